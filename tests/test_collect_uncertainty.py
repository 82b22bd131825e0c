"""The error model of the collect stage (tasks/collect/_uncertainty.py, tasks/collect/_headline.py).

Outside references: closed-form Gaussian integrals of the Gaussian kernel (the product of two
Gaussian densities integrates in closed form; Briol et al. 2019, Table 1), a direct Gram-matrix
computation, direct Monte Carlo over Gaussian-process sample paths drawn with numpy's
Cholesky factorisation, and scipy's Student t quantiles.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from winnow.tasks.collect._estimates import estimate_qoi
from winnow.tasks.collect._uncertainty import (
    ERROR_KERNELS,
    ChainGeometry,
    _reml_fit,
    fit_error_model,
    forecast_errors,
    kernel_mean_gaussian,
)


def _gauss_kernel_mean(x, mu, sig, length):
    """E exp(-|x - X|^2 / (2 l^2)) for X ~ N(mu, sig^2 I): Gaussian integral in closed form."""
    d = x.shape[1]
    s2 = length**2 + sig**2
    return (length**2 / s2) ** (d / 2) * np.exp(-((x - mu) ** 2).sum(1) / (2 * s2))


def test_kernel_mean_closed_form_matches_helper():
    x = np.array([[0.0, 0.0], [1.0, -0.5]])
    np.testing.assert_allclose(
        kernel_mean_gaussian(x, 0.7), _gauss_kernel_mean(x, 0.0, 1.0, 0.7), rtol=1e-15
    )


def test_exact_sums_match_gaussian_integrals():
    # A 1-D "chain" of normal quantile points Phi^-1((i - 1/2)/n) integrates smooth functions
    # of N(0, 1) to O(1/n^2); after standardising by its own mean and sd the rows are a
    # sample of N(-c/s, 1/s^2), whose kernel means and double integral are closed forms.
    n = 1000
    chain = stats.norm.ppf((np.arange(n) + 0.5) / n)[:, None]
    geo = ChainGeometry(chain, exact_max_rows=n, rng=0)
    c, s = float(geo.center[0]), float(geo.scale[0])
    pts = np.array([[-1.0], [0.2], [1.5]])
    z = geo.standardise(pts)
    length = 0.8
    G, mean, C = geo.sums("gaussian", length, z)
    mu, sig = -c / s, 1.0 / s
    np.testing.assert_allclose(mean, _gauss_kernel_mean(z, mu, sig, length), rtol=2e-4)
    # double integral: E k(X, X') with X - X' ~ N(0, 2 sig^2)
    closed_c = (length**2 / (length**2 + 2 * sig**2)) ** 0.5
    assert C == pytest.approx(closed_c, rel=2e-4)
    # Gram matrix: direct computation
    direct = np.exp(-((z - z.T) ** 2) / (2 * length**2))
    np.testing.assert_allclose(G, direct, rtol=1e-13)


@pytest.mark.parametrize("kernel", ["gaussian", "matern52"])
def test_feature_path_agrees_with_exact_path(kernel):
    # Random Fourier features (Rahimi & Recht 2007) of the error kernel: the squared MMD of a
    # rule is estimated with relative error about 1/sqrt(features); 4,096 pairs, bound 10 %.
    rng = np.random.default_rng(3)
    chain = rng.normal(size=(1500, 2)) * [1.0, 3.0]
    exact = ChainGeometry(chain, exact_max_rows=2000, rng=1)
    feat = ChainGeometry(chain, exact_max_rows=10, features=4096, rng=1)
    idx = rng.choice(1500, 12, replace=False)
    w = rng.dirichlet(np.ones(12))
    for length in (0.5, 2.0):
        a = exact.mmd2(kernel, length, 0.0, exact.standardise(chain[idx]), w)
        b = feat.mmd2(kernel, length, 0.0, feat.standardise(chain[idx]), w)
        assert b == pytest.approx(a, rel=0.10)


def _gp_paths(xs, length, sigma, nugget, draws, rng, kernel="matern52"):
    d2 = ((xs[:, None, :] - xs[None, :, :]) ** 2).sum(-1)
    K = sigma**2 * (ERROR_KERNELS[kernel](d2 / length**2) + nugget * np.eye(xs.shape[0]))
    L = np.linalg.cholesky(K + 1e-10 * np.eye(xs.shape[0]))
    return (L @ rng.standard_normal((xs.shape[0], draws))).T  # (draws, n)


def test_rule_variance_matches_monte_carlo_over_gp_paths():
    # Var e(h) = sigma^2 MMD^2 (Briol et al. 2019, Proposition 1): checked against the
    # empirical variance of the weighted rule's error over 6,000 sample paths of h drawn
    # on the chain rows. The relative sd of a variance estimate from 6,000 Gaussian draws is
    # sqrt(2/6000) = 1.8 %; the bound 8 % is over 4 sd.
    rng = np.random.default_rng(11)
    chain = rng.normal(size=(400, 2))
    geo = ChainGeometry(chain, exact_max_rows=1000, rng=0)
    z = geo.standardise(chain)
    idx = rng.choice(400, 15, replace=False)
    w = rng.dirichlet(np.ones(15))
    length, sigma = 0.9, 1.7
    paths = _gp_paths(z, length, sigma, 0.0, 6000, rng)
    err = paths[:, idx] @ w - paths.mean(axis=1)
    stated = sigma**2 * geo.mmd2("matern52", length, 0.0, z[idx], w)
    assert np.var(err) == pytest.approx(stated, rel=0.08)


def test_regression_rule_variance_matches_monte_carlo():
    # Eq. (3): with f = mu + beta c + h and the GLS coefficient, the error of
    # sum w (y - b c) + b cbar is the rule with effective weights v = w - gap a. Monte Carlo
    # over 6,000 paths of h (nugget 1e-2 included), same bound as above.
    rng = np.random.default_rng(12)
    chain = rng.normal(size=(400, 2))
    geo = ChainGeometry(chain, exact_max_rows=1000, rng=0)
    z = geo.standardise(chain)
    idx = rng.choice(400, 20, replace=False)
    w = rng.dirichlet(np.ones(20))
    c = np.sin(chain[:, 0]) + chain[:, 1]
    length, sigma, eta = 1.1, 0.8, 1e-2
    gap = float(w @ c[idx] - c.mean())
    # the GLS operator of the fit at fixed hyperparameters: fit a single grid point
    X = np.column_stack([np.ones(20), c[idx]])
    fit = _reml_fit(
        np.zeros(20) + rng.normal(size=20),
        X,
        ERROR_KERNELS["matern52"],
        z[idx],
        np.array([length]),
        np.array([eta]),
    )
    a = fit.A[1]
    smooth = _gp_paths(z, length, sigma, 0.0, 6000, rng)
    noise = rng.normal(size=(6000, 20)) * sigma * np.sqrt(eta + 1e-10)
    errs = []
    for h, e in zip(smooth, noise, strict=True):
        y = 0.5 + 2.0 * c[idx] + h[idx] + e
        b = float(fit.A[1] @ y)
        est = float(w @ (y - b * c[idx])) + b * c.mean()
        truth = 0.5 + 2.0 * c.mean() + h.mean()
        errs.append(est - truth)
    v = w - gap * a
    stated = sigma**2 * geo.mmd2("matern52", length, eta + 1e-10, z[idx], v)
    assert np.var(errs) == pytest.approx(stated, rel=0.08)


def test_coverage_when_the_model_holds():
    # Functions drawn from the model itself (Matern 5/2, length 1, sd 1): the stated 95 %
    # interval of the chain mean must cover in about 95 % of 120 independent cases. With
    # p = 0.95 the chance of 104 or fewer covers is below 0.5 % (scipy binomial cdf), so the
    # bound 104/120 = 0.867 fails a correct model rarely; a model off by a factor two in
    # width would cover about 68 %.
    rng = np.random.default_rng(2026)
    chain = rng.normal(size=(600, 2))
    geo = ChainGeometry(chain, exact_max_rows=1000, rng=0)
    z = geo.standardise(chain)
    paths = _gp_paths(z, 1.0, 1.0, 0.0, 120, rng)
    covered = 0
    for k, h in enumerate(paths):
        g = np.random.default_rng(k)
        idx = g.choice(600, 20, replace=False)
        w = np.full(20, 1 / 20)
        fit = fit_error_model(chain[idx], h[idx], w, geo)
        lo, hi = fit.interval(0.95)
        covered += lo <= h.mean() <= hi
    assert stats.binom.cdf(104, 120, 0.95) < 0.005
    assert covered >= 105


def test_one_weighted_point_is_not_estimable():
    rng = np.random.default_rng(1)
    chain = rng.normal(size=(300, 2))
    geo = ChainGeometry(chain, rng=0)
    fit = fit_error_model(chain[:3], [1.0, 2.0, 3.0], [1.0, 0.0, 0.0], geo)
    assert np.isnan(fit.se) and "not estimable" in fit.flags[0]
    assert all(np.isnan(fit.interval()))
    est = estimate_qoi([1.0, 2.0, 3.0], [1.0, 0.0, 0.0], name="q", points=chain[:3], geometry=geo)
    assert np.isnan(float(est.uncertainty["thinning_se"]))
    assert est.headline["reliable"] is False


def test_leave_one_out_flags_a_spike():
    # a smooth function plus a spike at one run: the closed-form leave-one-out residual
    # (Rasmussen & Williams 2006, eq. 5.12) of that run exceeds its Bonferroni bound
    rng = np.random.default_rng(4)
    chain = rng.normal(size=(2000, 2))
    geo = ChainGeometry(chain, rng=0)
    idx = rng.choice(2000, 30, replace=False)
    y = np.sin(chain[idx, 0]) + 0.5 * chain[idx, 1]
    smooth = fit_error_model(chain[idx], y, np.full(30, 1 / 30), geo)
    assert not smooth.flags
    y[7] += 3.0
    spiky = fit_error_model(chain[idx], y, np.full(30, 1 / 30), geo)
    assert any("leave-one-out" in f for f in spiky.flags)
    assert spiky.loo_max_z > spiky.loo_bound


def test_poor_cheap_model_keeps_the_plain_mean():
    # cheap unrelated to costly: no multi-fidelity form states clearly less error, so the
    # headline is the plain weighted mean (the rule cannot make it worse beyond noise)
    rng = np.random.default_rng(5)
    chain = rng.normal(size=(3000, 2))
    geo = ChainGeometry(chain, rng=0)
    idx = rng.choice(3000, 25, replace=False)
    w = np.full(25, 1 / 25)
    costly = np.cos(chain[idx, 1])
    cheap_chain = rng.normal(size=3000)  # noise: no relation at all
    fit = fit_error_model(
        chain[idx],
        costly,
        w,
        geo,
        cheap_points=cheap_chain[idx],
        cheap_chain_mean=float(cheap_chain.mean()),
    )
    assert fit.rule == "weighted mean"
    assert fit.estimate == pytest.approx(float(w @ costly), rel=1e-14)


def test_nonfinite_cheap_rows_are_dropped_and_counted():
    rng = np.random.default_rng(6)
    chain = rng.normal(size=(2000, 2))
    c = chain[:, 0] + 0.1 * chain[:, 1] ** 2
    c[17] = np.nan
    idx = rng.choice(np.delete(np.arange(2000), 17), 12, replace=False)
    est = estimate_qoi(
        c[idx] + 0.05,
        np.full(12, 1 / 12),
        name="q",
        cheap_on_points=c[idx],
        cheap_on_chain=c,
        points=chain[idx],
        geometry=ChainGeometry(chain, rng=0),
        forecast=False,
    )
    assert est.details["cheap_nonfinite_chain_rows"] == 1
    assert float(est.control_variate["cheap_chain_mean"]) == pytest.approx(np.nanmean(c))
    assert np.isfinite(float(est.headline["estimate"]))


def test_forecast_shrinks_with_more_points():
    rng = np.random.default_rng(7)
    chain = rng.normal(size=(3000, 2))
    geo = ChainGeometry(chain, rng=0)
    idx = rng.choice(3000, 10, replace=False)
    w = np.full(10, 0.1)
    y = np.sin(2 * chain[idx, 0]) + chain[idx, 1] ** 2
    fit = fit_error_model(chain[idx], y, w, geo)
    fc = forecast_errors(fit, chain[idx], w, geo, (5, 20), rng=0)
    assert fc[20] < fc[5] < fit.se


def test_interval_uses_student_t():
    rng = np.random.default_rng(8)
    chain = rng.normal(size=(500, 1))
    geo = ChainGeometry(chain, rng=0)
    idx = rng.choice(500, 8, replace=False)
    fit = fit_error_model(chain[idx], np.sin(3 * chain[idx, 0]), np.full(8, 1 / 8), geo)
    lo, hi = fit.interval(0.9, extra_sd=0.01)
    t = stats.t.ppf(0.95, fit.dof)  # scipy's Student t quantile
    assert (hi - lo) / 2 == pytest.approx(t * np.hypot(fit.se, 0.01), rel=1e-12)


def test_bad_kernel_names_the_choices():
    geo = ChainGeometry(np.random.default_rng(0).normal(size=(50, 1)), rng=0)
    with pytest.raises(ValueError, match=r"kernel: expected one of \['gaussian', 'matern52'\]"):
        fit_error_model(np.zeros((3, 1)), [1.0, 2.0, 3.0], np.ones(3) / 3, geo, kernel="rbf")


def test_probability_interval_is_wilson_at_the_effective_size():
    # Oracle: scipy.stats.binomtest(...).proportion_ci(method="wilson") (Wilson 1927); equal
    # weights on 10 points are 10 effective draws, no chain error.
    from winnow.tasks.collect._headline import probability_interval

    ind = np.array([1, 0, 0, 1, 0, 0, 0, 1, 0, 0], dtype=float)
    got = probability_interval(ind, np.full(10, 0.1), ess_points=10.0, chain_ess=None)
    ref = stats.binomtest(3, 10).proportion_ci(0.95, method="wilson")
    assert got["estimate"] == pytest.approx(0.3)
    np.testing.assert_allclose(got["interval"], (ref.low, ref.high), rtol=1e-12)
    # the chain's ESS combines as 1/n = 1/n_e + 1/ESS: 10 and 10 give 5 draws
    half = probability_interval(ind, np.full(10, 0.1), ess_points=10.0, chain_ess=10.0)
    assert half["n"] == pytest.approx(5.0)


def test_quantile_interval_inverts_the_cdf_interval():
    # Woodruff (1952): the q-quantile interval is [Q(q - h_lo), Q(q + h_hi)] with Q the
    # weighted quantile function; an end outside the plotting positions is unbounded.
    from winnow.tasks.collect._estimates import weighted_quantile
    from winnow.tasks.collect._headline import quantile_interval

    y = np.arange(20, dtype=float)
    w = np.full(20, 0.05)
    cdf = {"estimate": 0.5, "interval": (0.4, 0.62)}
    lo, hi = quantile_interval(y, w, 0.5, float(weighted_quantile(y, w, 0.5)), cdf)
    assert lo == pytest.approx(float(weighted_quantile(y, w, 0.4)))
    assert hi == pytest.approx(float(weighted_quantile(y, w, 0.62)))
    lo, hi = quantile_interval(y, w, 0.05, 0.5, {"estimate": 0.05, "interval": (0.0, 0.2)})
    assert lo == -np.inf and np.isfinite(hi)


def test_margin_values():
    from winnow.tasks.collect._uncertainty import margin

    assert margin(9) == pytest.approx(np.exp(-2 / 3))
    assert margin(9) < margin(29) < margin(99) < 1.0


def test_clustered_failures_flag_the_estimate():
    # Failures where x0 is largest cluster in one region: the permutation test flags them.
    # Failures at random positions are flagged with probability 1 % by construction of the
    # test (p < 0.01); over 40 random draws, more than 3 flags has probability 0.0008
    # (scipy binomial), so the bound below fails a correct test rarely.
    rng = np.random.default_rng(9)
    chain = rng.normal(size=(2000, 2))
    geo = ChainGeometry(chain, rng=0)
    idx = rng.choice(2000, 30, replace=False)
    vals = np.sin(chain[idx, 0])
    top = np.argsort(chain[idx, 0])[-6:]
    clustered = vals.copy()
    clustered[top] = np.nan
    est = estimate_qoi(
        clustered,
        np.full(30, 1 / 30),
        name="q",
        points=chain[idx],
        geometry=geo,
        forecast=False,
        rng=1,
    )
    assert not est.headline["reliable"]
    assert any("cluster in one region" in f for f in est.headline["flags"])
    flagged = 0
    for k in range(40):
        g = np.random.default_rng(100 + k)
        rand = vals.copy()
        rand[g.choice(30, 6, replace=False)] = np.nan
        e = estimate_qoi(
            rand,
            np.full(30, 1 / 30),
            name="q",
            points=chain[idx],
            geometry=geo,
            forecast=False,
            rng=k,
            quantiles=(),
        )
        flagged += any("cluster in one region" in f for f in e.headline["flags"])
    assert stats.binom.sf(3, 40, 0.01) < 0.001
    assert flagged <= 3


def test_forecast_starts_at_the_stated_error():
    from winnow.tasks.collect._headline import forecast

    rng = np.random.default_rng(10)
    chain = rng.normal(size=(3000, 2))
    geo = ChainGeometry(chain, rng=0)
    idx = rng.choice(3000, 10, replace=False)
    w = np.full(10, 0.1)
    fit = fit_error_model(chain[idx], np.sin(2 * chain[idx, 0]), w, geo)
    fc = forecast(fit, chain[idx], w, geo, 0)
    assert set(fc) == {5, 10, 20, 50}
    assert fit.se > fc[5] > fc[10] > fc[20] > fc[50] > 0
