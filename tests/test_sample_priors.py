"""Priors and their transforms to an unconstrained space (tasks/sample/_priors.py).

Outside references:
* scipy.stats (general-purpose reference library): ``uniform``, ``norm``, ``lognorm``,
  ``truncnorm`` log densities and quantile functions;
* the log-Jacobian against numerical (central-difference) differentiation of the map;
* sampling a prior-only posterior through the transform must give back the prior's mean
  (scipy.stats ``truncnorm.mean`` / ``lognorm.mean``) within Monte Carlo error.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from winnow.tasks.sample import sample
from winnow.tasks.sample._priors import Prior, PriorSet, as_prior_set

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
    (  # one-sided, far in the upper tail (tests the accurate normalising constant)
        {"name": "tail", "dist": "truncnormal", "mu": 1.0, "sigma": 0.5, "low": 4.0},
        stats.truncnorm(6.0, np.inf, loc=1.0, scale=0.5),
    ),
    (
        {"name": "up", "dist": "truncnormal", "mu": 0.0, "sigma": 2.0, "high": 1.0},
        stats.truncnorm(-np.inf, 0.5, loc=0.0, scale=2.0),
    ),
    (  # a truncated log-normal via bounds on "lognormal"
        {"name": "tln", "dist": "lognormal", "mu": 0.0, "sigma": 1.0, "low": 0.5, "high": 3.0},
        None,
    ),
]


@pytest.mark.parametrize(("spec", "ref"), SPECS, ids=[s["name"] for s, _ in SPECS])
def test_logpdf_and_ppf_against_scipy(spec, ref):
    ps = as_prior_set([spec])
    q = np.linspace(0.01, 0.99, 25)[:, None]
    x = ps.ppf(q)
    if ref is None:  # truncated lognormal: scipy lognorm renormalised on [0.5, 3]
        base = stats.lognorm(s=1.0, scale=1.0)
        z = base.cdf(3.0) - base.cdf(0.5)
        expect = base.logpdf(x[:, 0]) - np.log(z)
        np.testing.assert_allclose(base.cdf(x[:, 0]), base.cdf(0.5) + q[:, 0] * z, rtol=1e-9)
    else:
        expect = ref.logpdf(x[:, 0])
        np.testing.assert_allclose(x[:, 0], ref.ppf(q[:, 0]), rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(ps.logpdf(x), expect, rtol=1e-10, atol=1e-10)
    outside = np.array([[ps.low[0] - 1.0]]) if np.isfinite(ps.low[0]) else None
    if outside is not None:
        assert ps.logpdf(outside)[0] == -np.inf


@pytest.mark.parametrize(("spec", "ref"), SPECS, ids=[s["name"] for s, _ in SPECS])
def test_transform_round_trip_and_log_jacobian_vs_finite_differences(spec, ref):
    ps = as_prior_set([spec])
    u = np.linspace(-4.0, 4.0, 17)[:, None]
    x = ps.to_user(u)
    np.testing.assert_allclose(ps.to_unconstrained(x), u, rtol=1e-9, atol=1e-9)
    h = 1e-5  # central differences: error O(h^2) relative
    dx = (ps.to_user(u + h) - ps.to_user(u - h)) / (2 * h)
    np.testing.assert_allclose(ps.log_jacobian(u), np.log(np.abs(dx[:, 0])), atol=1e-6)


def test_log_jacobian_sums_over_parameters():
    ps = as_prior_set([s for s, _ in SPECS])
    u = np.random.default_rng(0).normal(size=(6, ps.d))
    each = sum(as_prior_set([s]).log_jacobian(u[:, [j]]) for j, (s, _) in enumerate(SPECS))
    np.testing.assert_allclose(ps.log_jacobian(u), each, rtol=1e-12)


def test_dataclass_and_dict_forms_agree():
    a = as_prior_set([Prior("k", "truncnormal", low=0.0, mu=1.0, sigma=2.0, units="m/d")])
    b = as_prior_set(
        [
            {
                "name": "k",
                "dist": "truncnormal",
                "low": 0.0,
                "high": None,
                "mu": 1.0,
                "sigma": 2.0,
                "units": "m/d",
            }
        ]
    )
    x = np.array([[0.5], [3.0]])
    np.testing.assert_array_equal(a.logpdf(x), b.logpdf(x))
    assert a.units == b.units == ("m/d",)


@pytest.mark.parametrize(
    ("spec", "pattern"),
    [
        ({"name": "a", "dist": "uniform", "low": 2, "high": 1}, "low must be < high, got low=2"),
        ({"name": "a", "dist": "uniform", "low": 1, "high": 1}, "low must be < high"),
        ({"name": "a", "dist": "normal", "mu": 0, "sigma": -1}, "sigma must be > 0"),
        ({"name": "a", "dist": "normal", "mu": 0}, "needs sigma"),
        ({"name": "a", "dist": "uniform", "low": 0}, "needs high"),
        ({"name": "a", "dist": "gamma", "mu": 0}, "unknown dist 'gamma'.*uniform, normal"),
        ({"name": "a", "dist": "truncnormal", "mu": 0, "sigma": 1}, "needs low and/or high"),
        ({"name": "a", "dist": "lognormal", "mu": 0, "sigma": 1, "low": -1}, "low must be >= 0"),
        ({"name": "a", "dist": "normal", "mu": 0, "sigma": 1, "scale": 2}, "unknown key 'scale'"),
        ({"dist": "normal", "mu": 0, "sigma": 1}, "missing 'name'"),
    ],
)
def test_bad_priors_name_the_parameter(spec, pattern):
    with pytest.raises(ValueError, match=pattern):
        as_prior_set([spec])


def test_repeated_names_and_wrong_container():
    with pytest.raises(ValueError, match="repeat"):
        PriorSet([Prior("a", "normal", mu=0, sigma=1)] * 2)
    with pytest.raises(TypeError, match="sequence"):
        as_prior_set({"name": "a"})


def test_prior_only_sampling_recovers_prior_means():
    # With the likelihood switched off the posterior is the prior: the transform and its
    # Jacobian must give back the prior's moments (scipy.stats means as the reference).
    specs = [SPECS[2][0], SPECS[3][0], SPECS[0][0]]
    ps = as_prior_set(specs)
    chain = sample(ps.logpdf, specs, n_chains=4, n_draws=3000, rng=5)
    diag = chain.diagnostics
    exact = [SPECS[2][1].mean(), SPECS[3][1].mean(), SPECS[0][1].mean()]
    for j, name in enumerate(ps.names):
        p = diag.parameters[name]
        # 5 MCSE: a deterministic check at this seed with a margin for the MCSE's own error
        assert abs(p.mean - exact[j]) < 5 * p.mcse_mean, (name, p.mean, exact[j])
    assert chain.samples[:, 2].min() >= -5 and chain.samples[:, 2].max() <= -1
    assert chain.samples[:, 1].min() >= -0.5


@settings(max_examples=60, deadline=None)
@given(
    low=st.floats(-1e3, 1e3),
    width=st.floats(1e-3, 1e3),
    u=st.floats(-30, 30),
)
def test_bounded_transform_stays_on_support_and_inverts(low, width, u):
    # property (common practice for constraint transforms): x(u) lies in [low, high] and
    # u(x(u)) = u where x is not rounded onto a bound
    ps = as_prior_set([{"name": "p", "dist": "uniform", "low": low, "high": low + width}])
    x = ps.to_user(np.array([[u]]))
    assert ps.low[0] <= x[0, 0] <= ps.high[0]
    if ps.low[0] < x[0, 0] < ps.high[0] and abs(u) < 15:
        # x carries a rounding error of about eps * (|low| + |high|); through the inverse
        # u = logit((x - low) / width) it grows by 1 / (width p (1 - p)), p = expit(u)
        # (first-order error propagation, common practice); 8x margin
        p = 1.0 / (1.0 + np.exp(-u))
        eps = np.finfo(float).eps
        tol = 8 * eps * (abs(low) + abs(low + width) + width) / (width * p * (1 - p))
        assert ps.to_unconstrained(x)[0, 0] == pytest.approx(u, abs=tol + 1e-12)
    assert np.isfinite(ps.log_jacobian(np.array([[u]]))[0])
