"""The prior pass of the samplers' inner loop (``PriorSet.transform_rows``, ``transform``,
``LogPosterior.rows_at_unconstrained``) against closed forms and scipy.

Outside references:
* scipy.stats (general-purpose reference library): ``uniform``, ``norm``, ``lognorm``,
  ``truncnorm`` log densities of the mapped values;
* the maps and their log-Jacobians in closed form (Stan Reference Manual, "Constraint
  transforms": ``x = low + exp(u)``, ``x = high - exp(u)``, ``x = low + (high - low)
  logit^-1(u)``), written here with other formulas than the code's;
* the Gaussian likelihood: scipy.stats.norm.logpdf summed over the observations.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from winnow.tasks.sample import build_log_posterior
from winnow.tasks.sample._priors import as_prior_set

SPECS = [
    ({"name": "u", "dist": "uniform", "low": -5, "high": -1}, stats.uniform(-5, 4)),
    ({"name": "n", "dist": "normal", "mu": 1.0, "sigma": 2.0}, stats.norm(1.0, 2.0)),
    (
        {"name": "ln", "dist": "lognormal", "mu": 0.5, "sigma": 0.3},
        stats.lognorm(s=0.3, scale=np.exp(0.5)),
    ),
    (
        {"name": "tn", "dist": "truncnormal", "mu": 0.0, "sigma": 1.0, "low": -0.5, "high": 2.0},
        stats.truncnorm(-0.5, 2.0),
    ),
    (
        {"name": "lo", "dist": "truncnormal", "mu": 1.0, "sigma": 0.5, "low": 0.5},
        stats.truncnorm(-1.0, np.inf, loc=1.0, scale=0.5),
    ),
    (
        {"name": "up", "dist": "truncnormal", "mu": 0.0, "sigma": 2.0, "high": 1.0},
        stats.truncnorm(-np.inf, 0.5, loc=0.0, scale=2.0),
    ),
    (
        {"name": "nb", "dist": "normal", "mu": 0.0, "sigma": 3.0, "low": -1.0, "high": 4.0},
        stats.truncnorm(-1.0 / 3.0, 4.0 / 3.0, loc=0.0, scale=3.0),
    ),
    (  # log-normal with an upper bound: both ends, the logistic map and log x
        {"name": "lnb", "dist": "lognormal", "mu": 0.0, "sigma": 1.0, "high": 3.0},
        None,
    ),
]
# Interleaved kinds, so that every kind's columns are an index array, not a slice.
ORDER = [0, 1, 2, 3, 4, 5, 6, 7, 1, 0, 2]


def _logpdf_ref(k: int, x: np.ndarray) -> np.ndarray:
    ref = SPECS[k][1]
    if ref is None:  # log-normal on (0, 3]: scipy lognorm renormalised by its cdf at 3
        base = stats.lognorm(s=1.0, scale=1.0)
        return base.logpdf(x) - np.log(base.cdf(3.0))
    return ref.logpdf(x)


def _support(spec: dict) -> tuple[float, float]:
    low = spec.get("low", 0.0 if spec["dist"] == "lognormal" else -np.inf)
    return low, spec.get("high", np.inf)


def _closed_form(spec: dict, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """x(u) and log|dx/du| of the Stan constraint transforms, in closed form."""
    low, high = _support(spec)
    if np.isfinite(low) and np.isfinite(high):
        w = high - low
        # log s(u) + log s(-u) = -|u| - 2 log(1 + exp(-|u|))
        return low + w / (1.0 + np.exp(-u)), np.log(w) - np.abs(u) - 2 * np.log1p(
            np.exp(-np.abs(u))
        )
    if np.isfinite(low):
        return low + np.exp(u), u
    if np.isfinite(high):
        return high - np.exp(u), u
    return u, np.zeros_like(u)


_EPS = np.finfo(np.float64).eps
# x from two formulas for one map (x = a + f exp(u), or a + w / (1 + exp(-u)) against the
# code's a + w expit(u)): each side has an exp (< 1 ulp; numpy's SIMD exp and glibc's may
# differ by 1-2 ulp) and at most 4 roundings after it; error budget in ulps of |x| + |a|
# (a the finite bound; x = high - exp(u) near 0 keeps only the absolute accuracy
# ulp(high)): 2 + 4 * 0.5 * 2 = 6, we allow 8.
_X_ULPS = 8


def _assert_x_close(specs, x, x0):
    bound = np.array(
        [max([abs(b) for b in _support(s) if np.isfinite(b)], default=0.0) for s in specs]
    )
    bad = ~(np.abs(x - x0) <= _X_ULPS * _EPS * (np.abs(x0) + bound))
    assert not bad.any(), (np.argwhere(bad)[:5], x[bad][:5], x0[bad][:5])


@pytest.mark.parametrize("order", [ORDER, sorted(ORDER), [1], [0], [2, 2], [7, 3]])
@pytest.mark.parametrize("k", [1, 3, 40])
def test_transform_against_closed_forms_and_scipy(order, k):
    specs = [{**SPECS[j][0], "name": f"p{i}"} for i, j in enumerate(order)]
    ps = as_prior_set(specs)
    u = np.random.default_rng(11 + k).normal(scale=3.0, size=(k, len(specs)))
    x, lp, lj = ps.transform(u)
    x0 = np.empty_like(u)
    lj0 = np.zeros(k)
    lp0 = np.zeros(k)
    for i, j in enumerate(order):
        x0[:, i], lj_i = _closed_form(specs[i], u[:, i])
        lj0 += lj_i
        lp0 += _logpdf_ref(j, x0[:, i])  # independent priors: the marginals' sum
    _assert_x_close(specs, x, x0)
    # log-density and log-Jacobian: sums of d terms of order 1-10, each a few ulp apart
    # between scipy's formulas and ours (scipy's truncnorm normalises with its own log
    # ndtr differences); 1e-10 absolute is far above that and far below any real error.
    np.testing.assert_allclose(lp, lp0, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(lj, lj0, rtol=1e-12, atol=1e-12)
    # the separate methods share the pass: the same numbers
    np.testing.assert_array_equal(ps.to_user(u), x)
    np.testing.assert_array_equal(ps.log_jacobian(u), lj)
    np.testing.assert_allclose(ps.logpdf(x), lp, rtol=1e-15, atol=0)


@pytest.mark.parametrize("k", range(len(SPECS)), ids=[s["name"] for s, _ in SPECS])
def test_transform_log_prior_against_scipy_over_the_range(k):
    spec = SPECS[k][0]
    ps = as_prior_set([spec])
    u = np.linspace(-6.0, 6.0, 31)[:, None]
    x, lp, _ = ps.transform(u)
    low, high = _support(spec)
    assert np.all((x >= low) & (x <= high))
    # scipy.stats logpdf; tolerance as above (a handful of ulps of terms of order 1-20)
    np.testing.assert_allclose(lp, _logpdf_ref(k, x[:, 0]), rtol=1e-10, atol=1e-10)


def test_extreme_and_nonfinite_rows():
    specs = [{**SPECS[j][0], "name": f"p{i}"} for i, j in enumerate(ORDER)]
    ps = as_prior_set(specs)
    d = len(specs)
    u = np.random.default_rng(3).normal(size=(6, d))
    u[0] = 800.0  # exp overflow held at exp(700), logistic saturated at the upper bound
    u[1] = -800.0  # one-sided maps reach their bound
    u[2, 1] = np.inf  # unbounded normal: x = inf, density 0
    u[3, 3] = np.nan  # NaN: no density (so that no model is run there)
    with np.errstate(all="ignore"):  # as in the sampler (overflow of z^2, log 0)
        x, lp, lj = ps.transform(u)
    lows = np.array([_support(s)[0] for s in specs])
    highs = np.array([_support(s)[1] for s in specs])
    on = (x[[0, 1, 4, 5]] >= lows) & (x[[0, 1, 4, 5]] <= highs)
    assert on.all()  # every finite row maps onto the support (Stan's transforms)
    two = np.isfinite(lows) & np.isfinite(highs)
    np.testing.assert_array_equal(x[0, two], highs[two])  # s(800) = 1 in float64
    np.testing.assert_array_equal(x[1, two], lows[two])
    assert np.isfinite(lj[[0, 1]]).all()  # held at exp(700) and finite logistic terms
    assert lp[2] == -np.inf and lp[3] == -np.inf
    assert np.isnan(lj[3])  # the target stays NaN: the sampler rejects it
    np.testing.assert_allclose(lp[[4, 5]], ps.logpdf(x[[4, 5]]), rtol=1e-15)


def test_lognormal_density_at_zero_is_minus_inf():
    # scipy.stats.lognorm.logpdf(0) = -inf: the density tends to 0 as x -> 0+. The map
    # x = exp(u) reaches 0 below u = -745 (float64 underflow).
    ps = as_prior_set([SPECS[2][0]])
    assert stats.lognorm(s=0.3, scale=np.exp(0.5)).logpdf(0.0) == -np.inf
    assert ps.logpdf(np.array([[0.0]]))[0] == -np.inf
    with np.errstate(all="ignore"):
        x, lp, _ = ps.transform(np.array([[-800.0]]))
    assert x[0, 0] == 0.0 and lp[0] == -np.inf


def test_rows_at_unconstrained_against_scipy_and_counts_nonfinite():
    # Gaussian likelihood reference: scipy.stats.norm.logpdf summed over observations;
    # priors: scipy.stats.norm and uniform.
    t_obs = np.linspace(0.1, 2.0, 5)
    y = 0.3 + 0.8 * t_obs
    priors = [
        {"name": "a", "dist": "normal", "mu": 0.0, "sigma": 2.0},
        {"name": "b", "dist": "uniform", "low": -3.0, "high": 3.0},
    ]

    def model(theta, inputs):
        if theta[0] > 1.0:
            return np.full(t_obs.size, np.nan)  # outside the model's domain
        return theta[0] + theta[1] * t_obs

    lp = build_log_posterior(priors, forward=model, observations=y, sigma=0.3, vectorised="no")
    ps = lp.priors
    u = np.array([[0.1, 0.2], [1.2, -1.0], [-1.0, 0.9], [0.0, 0.0]])  # a = 1.2: NaN
    with np.errstate(all="ignore"):
        rows = lp.rows_at_unconstrained(u)
        lu, lx, x = lp.at_unconstrained(u)
    assert lp.n_evals == 8 and lp.n_nonfinite == 2
    x0 = np.column_stack([u[:, 0], -3.0 + 6.0 / (1.0 + np.exp(-u[:, 1]))])  # closed forms
    pred = x0[:, :1] + x0[:, 1:2] * t_obs
    ref = (
        stats.norm(pred, 0.3).logpdf(y).sum(axis=1)
        + stats.norm(0, 2).logpdf(x0[:, 0])
        + stats.uniform(-3, 6).logpdf(x0[:, 1])
    )
    ref[1] = -np.inf
    np.testing.assert_array_equal(rows[:, :2], u)
    np.testing.assert_allclose(rows[:, 2:4], x0, rtol=1e-14)
    # sums of a few terms of order 1-100: 1e-12 relative is many ulps above rounding
    np.testing.assert_allclose(rows[:, 5], ref, rtol=1e-12)
    np.testing.assert_allclose(rows[:, 4], ref + ps.log_jacobian(u), rtol=1e-12)
    np.testing.assert_array_equal(rows[:, 4], lu)
    np.testing.assert_array_equal(rows[:, 5], lx)
    np.testing.assert_array_equal(rows[:, 2:4], x)
