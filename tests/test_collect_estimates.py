"""Weighted estimates and their uncertainty, checked against closed forms, numpy and arviz."""

from __future__ import annotations

import numpy as np
import pytest

from winnow.tasks.collect import (
    bootstrap_mean_se,
    chain_ess,
    estimate_qoi,
    kish_ess,
    weighted_mean_sd,
    weighted_quantile,
)
from winnow.tasks.collect._uncertainty import ChainGeometry
from winnow.tasks.records import QoIValue


# --------------------------------------------------------------------------------------------
# weighted quantile
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("m", [1, 2, 7, 50])
def test_weighted_quantile_equal_weights_is_numpy_hazen(m):
    # Oracle: numpy.quantile(method="hazen") = Hyndman & Fan (1996) definition 5.
    rng = np.random.default_rng(m)
    y = rng.normal(size=(m, 3))
    q = np.linspace(0.0, 1.0, 41)
    got = weighted_quantile(y, np.full(m, 2.5), q)
    np.testing.assert_allclose(got, np.quantile(y, q, axis=0, method="hazen"), rtol=0, atol=1e-12)


def test_weighted_quantile_hand_computed():
    # y = (1, 2, 4), w = (.2, .3, .5): cumulative (.2, .5, 1), midpoints p = (.1, .35, .75).
    y, w = [4.0, 1.0, 2.0], [0.5, 0.2, 0.3]  # unsorted on purpose
    got = weighted_quantile(y, w, [0.05, 0.1, 0.2, 0.35, 0.5, 0.75, 0.95])
    # q=.2: 1 + (.2-.1)/(.35-.1)*(2-1) = 1.4; q=.5: 2 + (.5-.35)/(.75-.35)*(4-2) = 2.75
    np.testing.assert_allclose(got, [1.0, 1.0, 1.4, 2.0, 2.75, 4.0, 4.0], rtol=0, atol=1e-15)
    assert weighted_quantile(y, w, 0.5).shape == ()


def test_weighted_quantile_ignores_zero_weights():
    y = np.array([1.0, 2.0, 100.0, 4.0])
    w = np.array([0.2, 0.3, 0.0, 0.5])
    np.testing.assert_array_equal(
        weighted_quantile(y, w, [0.3, 0.9]),
        weighted_quantile(y[[0, 1, 3]], w[[0, 1, 3]], [0.3, 0.9]),
    )


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (([1.0, 2.0], [0.5, -0.5], 0.5), "non-negative"),
        (([1.0, 2.0], [0.0, 0.0], 0.5), "positive sum"),
        (([1.0, 2.0], [1.0], 0.5), "shape"),
        (([1.0, 2.0], [1.0, 1.0], 1.5), r"\[0, 1\]"),
        (([1.0, np.nan], [1.0, 1.0], 0.5), "finite"),
    ],
)
def test_weighted_quantile_rejects_bad_input(args, message):
    with pytest.raises(ValueError, match=message):
        weighted_quantile(*args)


# --------------------------------------------------------------------------------------------
# Kish ESS, mean and sd
# --------------------------------------------------------------------------------------------
def test_kish_ess_closed_form():
    # Kish (1965): n_eff = (sum w)^2 / sum w^2.
    assert kish_ess(np.full(17, 0.3)) == pytest.approx(17.0, rel=1e-14)
    assert kish_ess([0.5, 0.25, 0.25]) == pytest.approx(1.0 / (0.25 + 0.0625 + 0.0625), rel=1e-14)
    assert kish_ess([0.0, 3.0, 0.0]) == pytest.approx(1.0, rel=1e-14)


def test_weighted_mean_sd_hand_computed():
    mean, sd = weighted_mean_sd([1.0, 2.0, 4.0], [0.2, 0.3, 0.5])
    # mean = .2 + .6 + 2 = 2.8; var = .2*3.24 + .3*.64 + .5*1.44 = 1.56
    assert float(mean) == pytest.approx(2.8, rel=1e-15)
    assert float(sd) == pytest.approx(np.sqrt(1.56), rel=1e-14)


def test_linear_qoi_of_gaussian_posterior_matches_closed_form():
    # Q = a.theta + b with theta ~ N(mu, Sigma): E[Q] = a.mu + b, Var[Q] = a' Sigma a (closed
    # form). Large equal-weight sample of n draws: SE of the mean is sd/sqrt(n) and SE of the
    # sample variance is var*sqrt(2/n) (normal theory); both checked at 5 SE (fixed seed).
    rng = np.random.default_rng(11)
    mu, cov = np.array([1.0, -2.0]), np.array([[2.0, 0.6], [0.6, 0.5]])
    a, b = np.array([0.7, -1.3]), 4.0
    n = 200_000
    theta = rng.multivariate_normal(mu, cov, size=n)
    q = theta @ a + b
    est = estimate_qoi(q, np.ones(n), name="q", units="m", bootstrap=0, quantiles=(0.5,))
    exact_mean, exact_var = a @ mu + b, a @ cov @ a
    se_mean = np.sqrt(exact_var / n)
    assert abs(float(est.mean) - exact_mean) < 5 * se_mean
    assert abs(float(est.sd) ** 2 - exact_var) < 5 * exact_var * np.sqrt(2.0 / n)
    # median of a normal equals its mean; SE of the sample median ~ 1.2533 sd/sqrt(n)
    assert abs(float(est.quantiles[0.5]) - exact_mean) < 5 * 1.2533 * se_mean
    # exceedance of the mean is 1/2 (symmetric); binomial SE 0.5/sqrt(n)
    est2 = estimate_qoi(q, np.ones(n), name="q", thresholds=(exact_mean,), bootstrap=0)
    assert abs(float(est2.exceedance[exact_mean]) - 0.5) < 5 * 0.5 / np.sqrt(n)


def test_exceedance_hand_computed():
    est = estimate_qoi(
        [1.0, 2.0, 4.0], [0.2, 0.3, 0.5], name="q", thresholds=(1.5, 4.0, 0.0), bootstrap=0
    )
    assert est.exceedance == {1.5: pytest.approx(0.8), 4.0: 0.0, 0.0: pytest.approx(1.0)}


# --------------------------------------------------------------------------------------------
# control variate, thinning gap
# --------------------------------------------------------------------------------------------
def _chain_and_points(seed=5, n=5000, m=30):
    rng = np.random.default_rng(seed)
    chain = rng.normal(size=(n, 2)) * [1.0, 2.0] + [3.0, -1.0]
    idx = rng.choice(n, m, replace=False)
    w = rng.dirichlet(np.ones(m))
    return chain, idx, w


def test_control_variate_recovers_costly_mean_with_constant_offset():
    # Cheap = costly - delta everywhere: the discrepancy form mean_chain(cheap) + sum w (costly -
    # cheap) equals mean_chain(costly) exactly (algebra), whatever points and weights.
    chain, idx, w = _chain_and_points()
    cheap = lambda x: np.sin(x[:, 0]) + 0.3 * x[:, 1] ** 2  # noqa: E731
    delta = 0.125
    costly_chain = cheap(chain) + delta
    est = estimate_qoi(
        costly_chain[idx],
        w,
        name="h",
        units="m",
        cheap_on_points=cheap(chain[idx]),
        cheap_on_chain=cheap(chain),
        bootstrap=0,
    )
    cv = est.control_variate
    assert float(cv["mean"]) == pytest.approx(costly_chain.mean(), rel=1e-13)
    assert float(cv["discrepancy_sd"]) == pytest.approx(0.0, abs=1e-13)
    assert float(cv["correlation"]) == pytest.approx(1.0, rel=1e-12)
    # the cheap model's check of the selection: weighted cheap mean at the points minus its
    # chain mean (definition); reported as a check, not as an error term (issue 19 item 4)
    gap = w @ cheap(chain[idx]) - cheap(chain).mean()
    assert float(est.details["cheap_gap"]) == pytest.approx(gap, rel=1e-12)
    assert "thinning_gap" not in est.uncertainty
    # and the plain weighted mean is off by exactly that gap
    assert float(est.mean) - costly_chain.mean() == pytest.approx(gap, rel=1e-10)


def test_regression_rule_recovers_affine_costly_mean():
    # Costly = 2 cheap + 1 exactly: the GLS coefficient of the regression form is 2 and its
    # estimate mean_w(y) - 2 (mean_w(c) - mean_chain(c)) = 2 mean_chain(c) + 1 exactly
    # (algebra); the coefficient-one form is off by (2 - 1) * gap.
    chain, idx, w = _chain_and_points(seed=8)
    c_chain = chain[:, 0] * chain[:, 1]
    est = estimate_qoi(
        2 * c_chain[idx] + 1,
        w,
        name="h",
        cheap_on_points=c_chain[idx],
        cheap_on_chain=c_chain,
        points=chain[idx],
        geometry=ChainGeometry(chain, rng=0),
        forecast=False,
    )
    comp = est.headline["components"][0]
    reg = comp["candidates"]["regression"]
    assert reg["coefficient"] == pytest.approx(2.0, rel=1e-9)
    assert reg["estimate"] == pytest.approx(2 * c_chain.mean() + 1, rel=1e-12)
    gap = float(est.details["cheap_gap"])
    assert float(est.control_variate["mean"]) == pytest.approx(
        2 * c_chain.mean() + 1 + gap, rel=1e-12
    )
    # an exact affine relation leaves no residual error: the regression form is chosen
    assert comp["rule"] == "regression"
    assert float(est.headline["estimate"]) == pytest.approx(2 * c_chain.mean() + 1, rel=1e-12)


def test_chain_mcse_and_correlation_formulas():
    # chain_mcse = sd_w(QoI) / sqrt(ESS_chain) (documented formula: the QoI's own spread at
    # the chain's effective size).
    chain, idx, w = _chain_and_points(seed=9)
    c = chain[:, 0]
    y = c[idx] + 0.2 * chain[idx, 1] ** 2
    est = estimate_qoi(
        y, w, name="h", cheap_on_points=c[idx], cheap_on_chain=c, chain_ess=400.0, bootstrap=0
    )
    _, y_sd = weighted_mean_sd(y, w)
    mcse = y_sd / np.sqrt(400.0)
    assert float(est.uncertainty["chain_mcse"]) == pytest.approx(mcse, rel=1e-12)
    assert est.headline is None  # no chain coordinates given: no error model
    assert float(est.control_variate["correlation"]) == pytest.approx(
        np.cov(y, c[idx], aweights=w, bias=True)[0, 1]
        / np.sqrt(np.cov(y, aweights=w, bias=True) * np.cov(c[idx], aweights=w, bias=True)),
        rel=1e-10,
    )  # oracle: numpy weighted covariance


def test_chain_mcse_without_cheap_model_uses_weighted_sd():
    est = estimate_qoi([1.0, 2.0, 4.0], [0.2, 0.3, 0.5], name="q", chain_ess=100.0, bootstrap=0)
    assert float(est.uncertainty["chain_mcse"]) == pytest.approx(np.sqrt(1.56) / 10.0, rel=1e-14)
    assert "cheap_gap" not in est.details and est.control_variate is None


def test_weighted_chain_uses_kish_ess():
    rng = np.random.default_rng(2)
    c = rng.normal(size=200)
    cw = rng.uniform(0.5, 1.5, size=200)
    est = estimate_qoi(
        c[:5],
        np.ones(5),
        name="q",
        cheap_on_points=c[:5],
        cheap_on_chain=c,
        chain_weights=cw,
        bootstrap=0,
    )
    _, sd = weighted_mean_sd(c[:5], np.ones(5))
    assert float(est.uncertainty["chain_mcse"]) == pytest.approx(
        sd / np.sqrt(kish_ess(cw)), rel=1e-12
    )


# --------------------------------------------------------------------------------------------
# chain ESS against arviz
# --------------------------------------------------------------------------------------------
def _ar1(rng, n_chains, n, phi):
    x = np.empty((n_chains, n))
    x[:, 0] = rng.normal(size=n_chains)
    for t in range(1, n):
        x[:, t] = phi * x[:, t - 1] + rng.normal(size=n_chains)
    return x


@pytest.mark.parametrize(
    ("n_chains", "n", "phi"), [(1, 1000, 0.6), (4, 501, 0.9), (3, 300, -0.3), (2, 9, -0.9)]
)
def test_chain_ess_matches_arviz(n_chains, n, phi):
    # Oracle: arviz.ess(method="mean"), split-chain ESS of Vehtari et al. (2021).
    az = pytest.importorskip("arviz")
    x = _ar1(np.random.default_rng(n), n_chains, n, phi)
    expected = float(az.ess(x, method="mean"))
    got = chain_ess(x.reshape(-1), np.repeat(np.arange(n_chains), n))
    assert float(got) == pytest.approx(expected, rel=1e-9)
    # vector quantity: each component on its own
    both = chain_ess(
        np.stack([x.reshape(-1), 2 * x.reshape(-1) + 1], axis=1), np.repeat(np.arange(n_chains), n)
    )
    np.testing.assert_allclose(both, [expected, expected], rtol=1e-9)


def test_estimate_computes_chain_ess_when_not_given():
    x = _ar1(np.random.default_rng(4), 1, 2000, 0.8).reshape(-1)
    est = estimate_qoi(
        x[:10], np.ones(10), name="q", cheap_on_points=x[:10], cheap_on_chain=x, bootstrap=0
    )
    ess = float(chain_ess(x))
    assert float(est.uncertainty["chain_mcse"]) == pytest.approx(
        x[:10].std() / np.sqrt(ess), rel=1e-12
    )
    assert ess < 0.3 * x.size  # AR(1) with phi=.8: ESS ~ n (1-phi)/(1+phi) = n/9


# --------------------------------------------------------------------------------------------
# bootstrap
# --------------------------------------------------------------------------------------------
def test_bootstrap_se_equal_weights_is_sd_over_sqrt_m():
    # Equal weights: the ideal bootstrap SE of a mean is the plug-in sd / sqrt(m) (Efron &
    # Tibshirani 1993, ch. 6; value quoted from memory of that chapter). With
    # B = 4000 resamples the relative error of the SE estimate is about 1/sqrt(2B) = 1.1%;
    # we allow 6%.
    y = np.random.default_rng(1).normal(3.0, 2.0, size=40)
    se, low, high = bootstrap_mean_se(y, np.ones(40), n_boot=4000, rng=7)
    assert float(se) == pytest.approx(y.std() / np.sqrt(40), rel=0.06)
    assert low < y.mean() < high


def test_bootstrap_se_unequal_weights_matches_linearisation():
    # Pairs bootstrap of the ratio estimator sum w y / sum w: its variance is, to first order,
    # sum_i w_i^2 (y_i - mean)^2 (delta method for a ratio estimator; common practice). m = 300 makes the second-order terms small; B = 3000 gives ~1.3% noise.
    rng = np.random.default_rng(3)
    y = rng.normal(size=300)
    w = rng.gamma(0.7, size=300)
    w /= w.sum()
    se, _, _ = bootstrap_mean_se(y, w, n_boot=3000, rng=4)
    mean = w @ y
    assert float(se) == pytest.approx(np.sqrt(np.sum(w**2 * (y - mean) ** 2)), rel=0.08)
    # the same seed gives the same answer (randomness only through rng)
    assert float(bootstrap_mean_se(y, w, n_boot=3000, rng=4)[0]) == float(se)


# --------------------------------------------------------------------------------------------
# failed runs
# --------------------------------------------------------------------------------------------
def _values(ys, statuses):
    return [
        QoIValue(
            run_id=f"p{k}",
            name="h",
            value=np.asarray(y if s == "ok" else np.nan),
            status=s,
            reason="" if s == "ok" else "test",
        )
        for k, (y, s) in enumerate(zip(ys, statuses, strict=True))
    ]


def test_failed_runs_are_left_out_and_weights_renormalised():
    ys = [1.0, 1e6, 2.0, 4.0]
    vals = _values(ys, ["ok", "run_failed", "ok", "ok"])
    w = np.array([0.1, 0.4, 0.2, 0.3])
    est = estimate_qoi(vals, w, name="h", bootstrap=0)
    assert est.n_used == 3 and est.n_missing == 1 and not est.weights_resolved
    assert float(est.mean) == pytest.approx((0.1 * 1 + 0.2 * 2 + 0.3 * 4) / 0.6, rel=1e-14)
    assert "renormalised" in est.details["weights_rule"]
    assert est.details["left_out"] == {"p1": "run_failed: test"}


def test_failed_runs_trigger_weight_resolve():
    vals = _values([1.0, 0.0, 2.0, 4.0], ["ok", "missing", "ok", "nonfinite"])
    calls = []

    def resolve(pos):
        calls.append(pos.tolist())
        return np.array([1.0, 3.0]), 0.02, 0.05

    est = estimate_qoi(vals, np.full(4, 0.25), name="h", resolve_weights=resolve, bootstrap=0)
    assert calls == [[0, 2]]
    assert est.weights_resolved and est.mmd_growth == pytest.approx(0.03, rel=1e-12)
    assert float(est.mean) == pytest.approx(0.25 * 1 + 0.75 * 2, rel=1e-14)
    assert est.details["mmd_before"] == 0.02 and est.details["mmd_after"] == 0.05


def test_cheap_points_are_subset_with_the_survivors():
    # Survivors 0 and 2 only: the control variate must use cheap values of those points.
    vals = _values([1.0, 0.0, 3.0], ["ok", "run_failed", "ok"])
    c_chain = np.array([0.0, 1.0, 2.0, 3.0])
    est = estimate_qoi(
        vals,
        [0.5, 0.25, 0.25],
        name="h",
        cheap_on_points=[0.5, 99.0, 2.5],
        cheap_on_chain=c_chain,
        bootstrap=0,
        chain_ess=4.0,
    )
    # weights renormalised to (2/3, 1/3); discrepancy (0.5, 0.5) -> cv mean = 1.5 + 0.5
    assert float(est.control_variate["mean"]) == pytest.approx(2.0, rel=1e-14)
    assert float(est.details["cheap_gap"]) == pytest.approx(
        (2 / 3) * 0.5 + (1 / 3) * 2.5 - 1.5, rel=1e-12
    )


def test_no_usable_run_gives_nan_estimate():
    est = estimate_qoi(_values([0.0, 0.0], ["missing", "run_failed"]), [0.5, 0.5], name="h")
    assert est.n_used == 0 and est.n_missing == 2 and np.isnan(est.mean)
    assert "no run" in est.details["note"]


def test_array_rows_with_nan_are_left_out():
    est = estimate_qoi(
        np.array([[1.0, 2.0], [np.nan, 0.0], [3.0, 4.0]]), np.ones(3), name="v", bootstrap=0
    )
    np.testing.assert_allclose(est.mean, [2.0, 3.0])
    assert est.n_missing == 1 and "row 1" in est.details["left_out"]


# --------------------------------------------------------------------------------------------
# vector QoIs and argument checks
# --------------------------------------------------------------------------------------------
def test_vector_qoi_is_columnwise_scalar():
    chain, idx, w = _chain_and_points(seed=12, m=12)
    c_chain = np.stack([chain[:, 0], chain[:, 0] * chain[:, 1], chain[:, 1] ** 2], axis=1)
    y = c_chain[idx] * 1.1 + 0.3
    vec = estimate_qoi(
        y,
        w,
        name="v",
        cheap_on_points=c_chain[idx],
        cheap_on_chain=c_chain,
        thresholds=(1.0,),
        rng=3,
        chain_ess=500.0,
        points=chain[idx],
        geometry=ChainGeometry(chain, rng=0),
        forecast=False,
    )
    for j in range(3):
        one = estimate_qoi(
            y[:, j],
            w,
            name="v",
            cheap_on_points=c_chain[idx, j],
            cheap_on_chain=c_chain[:, j],
            thresholds=(1.0,),
            bootstrap=0,
            chain_ess=500.0,
            points=chain[idx],
            geometry=ChainGeometry(chain, rng=0),
            forecast=False,
        )
        assert vec.mean[j] == pytest.approx(float(one.mean), rel=1e-13)
        assert vec.quantiles[0.95][j] == pytest.approx(float(one.quantiles[0.95]), rel=1e-13)
        assert vec.exceedance[1.0][j] == pytest.approx(float(one.exceedance[1.0]), rel=1e-13)
        assert vec.details["cheap_gap"][j] == pytest.approx(float(one.details["cheap_gap"]))
        for key in ("thinning_se", "chain_mcse", "total_se"):
            assert vec.uncertainty[key][j] == pytest.approx(float(one.uncertainty[key]), rel=1e-9)
        assert vec.headline["interval_low"][j] == pytest.approx(
            float(one.headline["interval_low"]), rel=1e-9
        )


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"cheap_on_points": [1.0, 2.0]}, "give both or neither"),
        ({"cheap_on_points": [1.0], "cheap_on_chain": [1.0, 2.0]}, "cheap_on_points"),
        ({"bootstrap": 1}, "bootstrap"),
        ({"quantiles": (0.5, 2.0)}, "quantiles"),
        ({"thresholds": (np.nan,)}, "thresholds"),
        ({"chain_ess": -1.0}, "chain_ess"),
    ],
)
def test_estimate_rejects_bad_arguments(kwargs, message):
    with pytest.raises(ValueError, match=message):
        estimate_qoi([1.0, 2.0], [0.5, 0.5], name="q", **kwargs)


def test_record_for_another_qoi_is_rejected():
    with pytest.raises(ValueError, match="expected 'h'"):
        estimate_qoi([QoIValue("p0", "other", np.asarray(1.0), "ok")], [1.0], name="h")


# --------------------------------------------------------------------------------------------
# properties of the weighted quantile (hypothesis)
# --------------------------------------------------------------------------------------------
from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402
from hypothesis.extra.numpy import arrays  # noqa: E402


@settings(max_examples=60, deadline=None)
@given(
    data=st.integers(1, 30).flatmap(
        lambda m: st.tuples(
            arrays(np.float64, m, elements=st.floats(-1e6, 1e6)),
            arrays(np.float64, m, elements=st.floats(1e-3, 1e3)),
        )
    ),
    scale=st.floats(1e-3, 1e3),
)
def test_weighted_quantile_properties(data, scale):
    # Definition-level properties (common practice for any quantile rule): non-decreasing in q,
    # inside [min, max], unchanged by rescaling the weights or permuting the points.
    y, w = data
    q = np.linspace(0.0, 1.0, 11)
    got = weighted_quantile(y, w, q)
    assert np.all(np.diff(got) >= -1e-9 * (1 + np.abs(got[:-1])))
    assert got[0] >= y.min() and got[-1] <= y.max()
    # rescaled or permuted weights move the plotting positions by a few ulps (normalisation,
    # tie sharing summed in another order); interpolation multiplies that by the slope, up to
    # span / smallest position gap, so the tolerance scales with the data's span
    atol = 1e-9 * (1.0 + float(np.ptp(y)))
    np.testing.assert_allclose(weighted_quantile(y, w * scale, q), got, rtol=1e-12, atol=atol)
    perm = np.random.default_rng(0).permutation(y.size)
    np.testing.assert_allclose(weighted_quantile(y[perm], w[perm], q), got, rtol=1e-12, atol=atol)


def test_weighted_quantile_ties_share_weight():
    # y = (0, 1, 1), w = (2, 1, 2)/5: the tie at 1 carries 3/5, shared as 1.5/5 each, so the
    # positions are (.2, .55, .85) (hand computed) whatever the order of the tied points.
    for y, w in (([0.0, 1.0, 1.0], [2.0, 1.0, 2.0]), ([1.0, 0.0, 1.0], [2.0, 2.0, 1.0])):
        got = weighted_quantile(y, w, [0.2, 0.3, 0.55, 0.9])
        np.testing.assert_allclose(got, [0.0, (0.3 - 0.2) / 0.35, 1.0, 1.0], rtol=0, atol=1e-15)
    # equal weights with ties still match numpy's Hazen rule
    y = np.array([3.0, 1.0, 1.0, 2.0, 3.0, 3.0])
    q = np.linspace(0, 1, 21)
    np.testing.assert_allclose(
        weighted_quantile(y, np.ones(6), q), np.quantile(y, q, method="hazen"), atol=1e-15
    )


def test_estimate_fields_are_arrays():
    # The record promises ndarrays (shape () for a scalar QoI), not numpy scalars: the run
    # store hashes and round-trips them by type.
    chain, idx, w = _chain_and_points(seed=1, m=6)
    c = chain[:, 0]
    est = estimate_qoi(
        c[idx] + 1,
        w,
        name="h",
        thresholds=(3.0,),
        cheap_on_points=c[idx],
        cheap_on_chain=c,
        rng=0,
        bootstrap=50,
    )
    arrays_ = [
        est.mean,
        est.sd,
        *est.quantiles.values(),
        *est.exceedance.values(),
        *est.uncertainty.values(),
    ]
    cv = est.control_variate
    arrays_ += [v for v in cv.values() if not isinstance(v, str | dict | float)]
    for a in arrays_:
        assert type(a) is np.ndarray and a.shape == () and a.dtype == np.float64
