"""The fused prior pass of the samplers' inner loop (``PriorSet.transform``,
``LogPosterior.at_unconstrained``) against the separate per-method path and scipy.

Outside references:
* scipy.stats (general-purpose reference library): ``norm``, ``uniform``, ``lognorm``,
  ``truncnorm`` log densities of the mapped values;
* the separate methods ``to_user``, ``logpdf`` and ``log_jacobian`` (themselves checked
  against scipy.stats and finite differences in test_sample_priors.py), applied one
  parameter at a time: the per-parameter path the fused pass replaces.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from winnow.tasks.sample import _priors as _priors
from winnow.tasks.sample import build_log_posterior, sample
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


def _per_parameter(specs, u):
    """x, log prior and log-Jacobian one parameter at a time, with the separate methods."""
    x = np.empty_like(u)
    lp = np.zeros(len(u))
    lj = np.zeros(len(u))
    for j, spec in enumerate(specs):
        ps = as_prior_set([spec])
        xj = ps.to_user(u[:, [j]])
        x[:, j] = xj[:, 0]
        lp += ps.logpdf(xj)
        lj += ps.log_jacobian(u[:, [j]])
    return x, lp, lj


def _specs(order):
    return [{**SPECS[k][0], "name": f"p{j}"} for j, k in enumerate(order)]


_EPS = np.finfo(np.float64).eps
# Tolerance of x between two paths that evaluate the same map, x = a + f exp(u) (one-sided
# support, f = +-1) or x = a + w / (1 + exp(-u)) (two-sided), with different exp
# implementations: the scalar path calls Python's math.exp (glibc), the numpy path np.exp,
# which on CPUs with AVX-512 runs numpy's own SIMD kernel (Tang's 1989 table method,
# < 0.77 ulp; numpy PR #15648) and may differ from glibc's (< 1 ulp) by 1-2 ulp of e.
# Error budget in ulps of (|x| + |a|), which bounds |e| and |w s| (s the logistic):
#   2 (the two exps) + 0.5 for each of at most 4 roundings after exp (1 + e, the division,
#   times w, plus a) on each of the two paths = 6; we allow 8.
# Scaled by |a| as well as |x| because x = high - exp(u) near 0 loses its relative accuracy
# to cancellation (its absolute error stays ~ ulp(high)).
_X_ULPS = 8


def _assert_x_close(ps, x, x0):
    """``|x - x0| <= _X_ULPS eps (|x0| + |a|)`` per column, a the column's finite bound."""
    bound = np.fmax(
        np.where(np.isfinite(ps.low), np.abs(ps.low), 0.0),
        np.where(np.isfinite(ps.high), np.abs(ps.high), 0.0),
    )
    scale = _EPS * (np.abs(x0) + bound)  # one ulp of |x0| + |a| (at most)
    bad = ~(np.abs(x - x0) <= _X_ULPS * scale)
    assert not bad.any(), (np.argwhere(bad)[:5], x[bad][:5], x0[bad][:5])


@pytest.fixture(params=["scalar", "numpy"])
def path(request, monkeypatch):
    """Run a test through the scalar path of small batches, or force the numpy path."""
    monkeypatch.setattr(_priors, "_SMALL", 10**9 if request.param == "scalar" else 0)
    return request.param


@pytest.mark.parametrize("order", [ORDER, sorted(ORDER), [1], [0], [2, 2], [7, 3]])
def test_transform_equals_the_per_parameter_path(order, path):
    specs = _specs(order)
    ps = as_prior_set(specs)
    rng = np.random.default_rng(11)
    u = rng.normal(scale=3.0, size=(40, len(specs)))
    x, lp, lj = ps.transform(u)
    x0, lp0, lj0 = _per_parameter(specs, u)
    _assert_x_close(ps, x, x0)  # the same formulas, exp from two libraries (see _X_ULPS)
    np.testing.assert_allclose(lp, lp0, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(lj, lj0, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("k", range(len(SPECS)), ids=[s["name"] for s, _ in SPECS])
def test_transform_log_prior_against_scipy(k, path):
    spec, ref = SPECS[k]
    ps = as_prior_set([spec])
    u = np.linspace(-6.0, 6.0, 31)[:, None]
    x, lp, _ = ps.transform(u)
    if ref is None:  # log-normal on (0, 3]: scipy lognorm renormalised by its cdf at 3
        base = stats.lognorm(s=1.0, scale=1.0)
        expect = base.logpdf(x[:, 0]) - np.log(base.cdf(3.0))
    else:
        expect = ref.logpdf(x[:, 0])
    np.testing.assert_allclose(lp, expect, rtol=1e-10, atol=1e-10)


def test_transform_extreme_and_nonfinite_rows_follow_the_separate_path(path):
    specs = _specs(ORDER)
    ps = as_prior_set(specs)
    d = len(specs)
    u = np.random.default_rng(3).normal(size=(6, d))
    u[0] = 800.0  # exp overflow guarded at 700, logistic saturated
    u[1] = -800.0  # one-sided maps reach their bound
    u[2, 1] = np.inf  # unbounded normal: x = inf, density -inf
    u[3, 3] = np.nan
    with np.errstate(all="ignore"):  # as in the sampler (overflow of z^2, log 0)
        x, lp, lj = ps.transform(u)
        x0 = ps.to_user(u)
        # Bit-equal on purpose: a batch with a non-finite term is recomputed by these very
        # methods on both paths (the scalar path hands rows beyond +-700 to numpy), so both
        # sides run the same code on the same array.
        np.testing.assert_array_equal(x, x0)
        np.testing.assert_array_equal(lp, ps.logpdf(x0))
        np.testing.assert_array_equal(lj, ps.log_jacobian(u))
    assert lp[2] == -np.inf and lp[3] == -np.inf


def test_small_batches_take_the_scalar_path_and_agree_with_numpy(monkeypatch):
    ps = as_prior_set(_specs(ORDER))
    u = np.random.default_rng(4).normal(scale=4.0, size=(4, len(ORDER)))
    assert u.size <= _priors._SMALL  # the default path of a handful of chains
    small = np.array(ps.rows_small(u))
    assert small.shape == (4, 2 * len(ORDER) + 2)
    monkeypatch.setattr(_priors, "_SMALL", 0)
    np.testing.assert_allclose(small, ps.transform_rows(u), rtol=1e-13, atol=1e-13)
    d = len(ORDER)
    x, lp, lj = ps.transform(u)
    np.testing.assert_array_equal(small[:, :d], u)
    np.testing.assert_allclose(small[:, d : 2 * d], x, rtol=1e-13)
    np.testing.assert_allclose(small[:, 2 * d], lj, rtol=1e-13)
    np.testing.assert_allclose(small[:, 2 * d + 1], lp, rtol=1e-13)
    u[1, 0] = -750.0  # logistic map: exp(-u) would overflow in Python floats
    assert ps.rows_small(u) is None


def test_at_unconstrained_equals_the_log_posterior_of_the_mapped_rows():
    # Gaussian likelihood reference: scipy.stats.norm.logpdf summed over observations.
    specs = _specs([1, 0, 2])
    t_obs = np.array([0.5, 1.0, 2.0, 4.0])
    y = np.array([1.2, 0.7, 2.9, 3.1])

    def model(theta, inputs):
        return theta[0] + theta[1] * t_obs + 0.1 * theta[2]

    lp = build_log_posterior(specs, forward=model, observations=y, sigma=0.4, vectorised="no")
    ps = lp.priors
    u = np.random.default_rng(8).normal(size=(7, 3))
    with np.errstate(all="ignore"):
        lu, lx, x = lp.at_unconstrained(u)
    # 21 values: the scalar path (math.exp) against to_user's np.exp (see _X_ULPS)
    _assert_x_close(ps, x, ps.to_user(u))
    pred = x[:, :1] + x[:, 1:2] * t_obs + 0.1 * x[:, 2:3]
    ref = stats.norm(pred, 0.4).logpdf(y).sum(axis=1) + ps.logpdf(x)
    np.testing.assert_allclose(lx, ref, rtol=1e-12)
    np.testing.assert_allclose(lx, lp(x), rtol=1e-12)
    np.testing.assert_allclose(lu, lx + ps.log_jacobian(u), rtol=1e-12)
    assert lp.n_evals == 7 + 7  # at_unconstrained and the direct call (probe rows not)


# ------------------------------------------------------------------ the model loop
T_LOOP = np.array([0.5, 1.0, 2.0])
Y_LOOP = np.array([1.0, 1.5, 2.5])
PRIORS_LOOP = [
    {"name": "a", "dist": "normal", "mu": 0.0, "sigma": 2.0},
    {"name": "b", "dist": "uniform", "low": -3.0, "high": 3.0},
]


def _reference(x):
    # Gaussian likelihood reference: scipy.stats.norm.logpdf summed over observations;
    # priors: scipy.stats.norm and uniform.
    pred = x[:, :1] + x[:, 1:2] * T_LOOP
    return (
        stats.norm(pred, 0.3).logpdf(Y_LOOP).sum(axis=1)
        + stats.norm(0, 2).logpdf(x[:, 0])
        + stats.uniform(-3, 6).logpdf(x[:, 1])
    )


ROWS = np.array([[0.1, 0.2], [0.5, -1.0], [-1.0, 2.5], [2.0, 0.0], [0.0, 0.0]])


def test_model_that_overwrites_one_output_array_is_copied_per_call():
    buf = np.empty(3)
    calls = []

    def reuse(theta, inputs):
        calls.append(1)
        buf[:] = theta[0] + theta[1] * T_LOOP  # the same array returned at every call
        return buf

    lp = build_log_posterior(
        PRIORS_LOOP, forward=reuse, observations=Y_LOOP, sigma=0.3, vectorised="no"
    )
    np.testing.assert_allclose(lp(ROWS), _reference(ROWS), rtol=1e-12)
    np.testing.assert_allclose(lp(ROWS[::-1]), _reference(ROWS[::-1]), rtol=1e-12)


@pytest.mark.parametrize("kind", ["array", "list", "view-of-theta"])
def test_model_results_of_any_kind_give_the_reference(kind):
    def model(theta, inputs):
        pred = theta[0] + theta[1] * T_LOOP
        if kind == "list":
            return pred.tolist()
        if kind == "view-of-theta":  # a view of the input row (counts as shared)
            return np.concatenate([theta, theta])[:3] * 0.0 + pred
        return pred

    lp = build_log_posterior(
        PRIORS_LOOP, forward=model, observations=Y_LOOP, sigma=0.3, vectorised="no"
    )
    np.testing.assert_allclose(lp(ROWS), _reference(ROWS), rtol=1e-12)


def test_model_failing_inside_a_batch_is_reported_with_its_theta():
    def model(theta, inputs):
        if theta[0] > 1.5:
            raise ZeroDivisionError("boom")
        return theta[0] + theta[1] * T_LOOP

    lp = build_log_posterior(
        PRIORS_LOOP, forward=model, observations=Y_LOOP, sigma=0.3, vectorised="no"
    )
    with pytest.raises(ValueError, match=r"failed at theta=\[2\.0, 0\.0\].*ZeroDivisionError"):
        lp(ROWS)


def test_scalar_log_density_of_floats_and_one_element_arrays():
    # Reference: scipy.stats.norm.logpdf (the density includes its prior: the result is
    # the user's density restricted to the priors' support).
    def make(wrap):
        def density(theta):
            return wrap(stats.norm(1.0, 0.5).logpdf(theta[0]) + stats.norm(0, 1).logpdf(theta[1]))

        return density

    for wrap in (float, lambda v: np.array([v])):
        lp = build_log_posterior(PRIORS_LOOP, log_density=make(wrap), vectorised="no")
        ref = stats.norm(1.0, 0.5).logpdf(ROWS[:, 0]) + stats.norm(0, 1).logpdf(ROWS[:, 1])
        np.testing.assert_allclose(lp(ROWS), ref, rtol=1e-12)


# ------------------------------------------------------------------ moves drawing ahead
@pytest.mark.parametrize(
    ("small", "max_pairs"), [(48, 1024), (0, 1024), (0, 0)], ids=["python", "pair-matrix", "gather"]
)
def test_de_proposal_against_its_formula(small, max_pairs, monkeypatch):
    # ter Braak (2006): y = x + gamma (x_r1 - x_r2) + e, e ~ N(0, (1e-4 sd of the others)^2)
    # per coordinate; the oracle redraws the same numbers and uses numpy's std.
    from winnow.tasks.sample._samplers import DifferentialEvolution, StepContext

    monkeypatch.setattr(DifferentialEvolution, "max_pair_matrix", max_pairs)
    monkeypatch.setattr(DifferentialEvolution, "small_batch", small)
    d, m, r, n = 3, 4, 5, 6
    move = DifferentialEvolution(d, m + r, np.ones(d))
    x = np.random.default_rng(1).normal(size=(m, d))
    others = np.random.default_rng(2).normal(size=(r, d)) * [1.0, 10.0, 0.1]
    got = []
    for t in range(n):
        ctx = StepContext(t, np.arange(m), True, None, block=n if t == 0 else 0, block_start=0)
        got.append(move.propose(x, others, np.random.default_rng(7), ctx)[0])
    g = np.random.default_rng(7)  # the same calls, in the same order, as DE's _draw
    r1 = g.integers(r, size=(n, m))
    r2 = (r1 + g.integers(1, r, size=(n, m))) % r
    gamma = np.where(g.random((n, m)) < 0.1, 1.0, 2.38 / np.sqrt(2 * d))
    e = g.standard_normal((n, m, d))
    for t in range(n):
        expect = x + gamma[t][:, None] * (others[r1[t]] - others[r2[t]])
        expect += 1e-4 * others.std(axis=0) * e[t]
        np.testing.assert_allclose(got[t], expect, rtol=1e-12, atol=1e-14)
    assert not np.allclose(got[0], got[1])  # each iteration its own draws


# ------------------------------------------------------------------ the small-batch path
@pytest.mark.parametrize("n_obs", [3, 40], ids=["python-sums", "numpy-sums"])
def test_small_batch_path_equals_the_general_path_and_counts_nonfinite(n_obs):
    # Gaussian likelihood reference: scipy.stats.norm.logpdf summed over observations.
    t_obs = np.linspace(0.1, 2.0, n_obs)
    y = 0.3 + 0.8 * t_obs

    def model(theta, inputs):
        if theta[0] > 1.0:
            return np.full(n_obs, np.nan)  # outside the model's domain
        return theta[0] + theta[1] * t_obs

    lp = build_log_posterior(PRIORS_LOOP, forward=model, observations=y, sigma=0.3, vectorised="no")
    assert lp._small is not None
    ps = lp.priors
    u = np.array([[0.1, 0.2], [1.2, -1.0], [-1.0, 0.9], [0.0, 0.0]])  # a = 1.2: NaN
    with np.errstate(all="ignore"):
        rows = lp.rows_at_unconstrained(u)
    x = ps.to_user(u)
    assert lp.n_evals == 4 and lp.n_nonfinite == 1
    pred = x[:, :1] + x[:, 1:2] * t_obs
    ref = stats.norm(pred, 0.3).logpdf(y).sum(axis=1) + ps.logpdf(x)
    ref[1] = -np.inf
    np.testing.assert_array_equal(rows[:, :2], u)
    np.testing.assert_allclose(rows[:, 2:4], x, rtol=1e-15)
    np.testing.assert_allclose(rows[:, 5], ref, rtol=1e-12)
    np.testing.assert_allclose(rows[:, 4], ref + ps.log_jacobian(u), rtol=1e-12)
    np.testing.assert_allclose(lp(x), ref, rtol=1e-12)  # the general path, same values


# ------------------------------------------------------------------ samplers on that path
T_REG = np.linspace(0.0, 2.0, 6)
Y_REG = np.array([0.35, 0.62, 1.3, 1.41, 2.05, 2.2])
SIGMA_REG = 0.25
PRIORS_REG = [
    {"name": "a", "dist": "normal", "mu": 0.0, "sigma": 2.0},
    {"name": "b", "dist": "normal", "mu": 0.0, "sigma": 2.0},
]
N_CHAINS = {"adaptive_metropolis": 4, "ensemble": 8, "de_mcmc": 8}


def _regression_lp():
    def line(theta, inputs):  # called row by row
        return theta[0] + theta[1] * T_REG

    lp = build_log_posterior(
        PRIORS_REG, forward=line, observations=Y_REG, sigma=SIGMA_REG, vectorised="no"
    )
    assert lp._small is not None  # the Python-float path of a handful of chains
    return lp


@pytest.mark.parametrize("sampler", list(N_CHAINS))
def test_row_by_row_model_posterior_and_resume(sampler):
    # Linear-Gaussian regression with a Gaussian prior: Gelman et al., Bayesian Data
    # Analysis, 3rd ed. (2013), Sec. 14.8 (prior as extra data): posterior
    # N(V (X'y / sigma^2 + m0 / s0^2), V), V = (X'X / sigma^2 + I / s0^2)^-1.
    X = np.column_stack([np.ones_like(T_REG), T_REG])
    V = np.linalg.inv(X.T @ X / SIGMA_REG**2 + np.eye(2) / 4.0)
    mean = V @ (X.T @ Y_REG / SIGMA_REG**2)
    chain = sample(
        _regression_lp(), sampler=sampler, n_chains=N_CHAINS[sampler], n_draws=2000, rng=11
    )
    for j, name in enumerate(chain.names):
        p = chain.diagnostics.parameters[name]
        # 5 MCSE (fixed seed; a margin for the MCSE's own error)
        assert abs(p.mean - mean[j]) < 5 * p.mcse_mean, (sampler, name, p.mean, mean[j])
        # sd: the MCSE of a variance is about var sqrt(2 / ESS) (common practice); 5 of those
        assert abs(p.sd - np.sqrt(V[j, j])) < 5 * np.sqrt(V[j, j]) * np.sqrt(0.5 / p.ess_bulk)
    # one evaluation per chain and iteration, plus the starting points (one prior draw each)
    assert chain.diagnostics.details["model_evaluations"] == N_CHAINS[sampler] * 2001
    # log_density is the log posterior of each row (the general path's value)
    np.testing.assert_allclose(chain.log_density[:50], _regression_lp()(chain.samples[:50]))

    states = {}
    kw = dict(sampler=sampler, n_chains=N_CHAINS[sampler], n_draws=300, rng=5)
    whole = sample(
        _regression_lp(),
        checkpoint=lambda s: states.update({s["iteration"]: s}),
        checkpoint_every=35,  # inside blocks of random numbers and AM's held states
        **kw,
    )
    if sampler == "adaptive_metropolis":
        assert states[245]["move:held"][0] == 5  # 95 states after the burn-in, 90 folded in
    for it in (105, 245):
        resumed = sample(_regression_lp(), resume=states[it], **kw)
        np.testing.assert_array_equal(resumed.samples, whole.samples)
        np.testing.assert_array_equal(resumed.diagnostics.acceptance, whole.diagnostics.acceptance)


@pytest.mark.parametrize("small", [48, 0], ids=["python", "numpy"])
def test_stretch_proposal_against_its_formula(small, monkeypatch):
    # Goodman & Weare (2010), Eqs. (7), (9): y = x_j + z (x_k - x_j), log q ratio
    # (d - 1) log z, z = ((a - 1) U + 1)^2 / a; the oracle redraws the same numbers.
    from winnow.tasks.sample._samplers import StepContext, StretchMove

    monkeypatch.setattr(StretchMove, "small_batch", small)
    d, m, r, n = 3, 4, 4, 5
    move = StretchMove(d, m + r, np.ones(d))
    x = np.random.default_rng(1).normal(size=(m, d))
    others = np.random.default_rng(2).normal(size=(r, d))
    got = []
    for t in range(n):
        ctx = StepContext(t, np.arange(m), True, None, block=n if t == 0 else 0, block_start=0)
        got.append(move.propose(x, others, np.random.default_rng(9), ctx))
    g = np.random.default_rng(9)
    pick = g.integers(r, size=(n, m))
    z = (g.random((n, m)) + 1.0) ** 2 / 2.0
    for t in range(n):
        p = others[pick[t]]
        np.testing.assert_allclose(got[t][0], p + z[t][:, None] * (x - p), rtol=1e-13)
        np.testing.assert_allclose(got[t][1], (d - 1) * np.log(z[t]), rtol=1e-13)


@pytest.mark.parametrize("name", list(N_CHAINS))
def test_moves_declared_symmetric_return_a_zero_log_ratio(name):
    # The driver takes a zero ratio from a move declared symmetric without reading it.
    from winnow.tasks.sample._samplers import MOVES, StepContext

    move = MOVES[name](2, 8, np.ones(2))
    x = np.random.default_rng(3).normal(size=(4, 2))
    others = np.random.default_rng(4).normal(size=(4, 2))
    ctx = StepContext(0, np.arange(4), False, None, block=1, block_start=0)
    if name == "adaptive_metropolis":  # one group of all chains
        move = MOVES[name](2, 4, np.ones(2))
        others = np.empty((0, 2))
    _, log_q = move.propose(x, others, np.random.default_rng(5), ctx)
    assert move.symmetric == (not np.any(log_q))  # stretch: (d - 1) log z, not all zero
