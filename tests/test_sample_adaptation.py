"""Adaptive Metropolis adaptation (tasks/sample/_metropolis.py): the pooled covariance against an
independent numpy oracle, the window schedule, and recovery of a badly scaled, strongly
correlated 10-D Gaussian.

Outside references:
* Pooled within-chain covariance: the within-chain variance W of Gelman & Rubin (1992),
  Statistical Science 7(4), Eq. (3) generalised to matrices; oracle: the mean of
  ``numpy.cov`` over the chains.
* 10-D target: Gaussian with covariance ``0.9^|i-j| s_i s_j``, ``s = 10^linspace(-1, 1)``
  (the benchmark's ``gauss-10d``); its exact marginal variances are ``s_i^2`` (closed form).
"""

from __future__ import annotations

import numpy as np
import pytest

from winnow.tasks.sample import sample
from winnow.tasks.sample._metropolis import AdaptiveMetropolis
from winnow.tasks.sample._move import StepContext

D = 10
SCALE = 10.0 ** np.linspace(-1, 1, D)
_IDX = np.arange(D)
COV10 = 0.9 ** np.abs(_IDX[:, None] - _IDX[None, :]) * np.outer(SCALE, SCALE)
PREC10 = np.linalg.inv(COV10)
PRIORS10 = [{"name": f"x{j}", "dist": "normal", "mu": 0.0, "sigma": 100.0} for j in range(D)]


def gauss10_logp(x):
    return -0.5 * np.einsum("ki,ij,kj->k", x, PREC10, x)


def test_pooled_covariance_matches_numpy_oracle():
    # Plain AM (no burn-in) keeps the Welford statistics of the whole history; the pooled
    # estimate must equal the mean over chains of numpy.cov of each chain's states.
    rng = np.random.default_rng(5)
    k, d, n = 3, 4, 60
    move = AdaptiveMetropolis(d, k, np.ones(d))
    states = rng.normal(size=(n, k, d)) * np.array([1.0, 10.0, 0.1, 3.0]) + 50.0
    for t in range(n):
        ctx = StepContext(iteration=t, index=np.arange(k), adapting=False, accept_prob=None)
        move.propose(states[t], np.empty((0, d)), rng, ctx)
    oracle = np.mean([np.cov(states[:, c, :].T) for c in range(k)], axis=0)
    # plus eps I in standardised coordinates: 1e-10 of each variance, and a floor of 1e-12
    # of the prior variance 1
    oracle += np.diag(1e-10 * np.diag(oracle) + 1e-12)
    np.testing.assert_allclose(move._empirical(), oracle, rtol=1e-10, atol=1e-13)


def test_window_schedule():
    move = AdaptiveMetropolis(2, 4, np.ones(2))
    # first window 25, doubling, capped at burn-in / 8, all ending before the terminal
    # stretch of max(50, 10 % of the burn-in)
    assert sorted(move.window_ends(2500)) == [25, 75, 175, 375, 687, 999, 1311, 1623, 2250]
    assert sorted(move.window_ends(150)) == [25, 50, 100]
    assert move.window_ends(40) == set()  # too short to learn: lambda only


@pytest.mark.slow
def test_am_recovers_badly_scaled_correlated_gaussian():
    # The benchmark's budget: 4 chains x 5000 iterations, half burn-in, prior draws as starts.
    chain = sample(
        gauss10_logp,
        PRIORS10,
        sampler="adaptive_metropolis",
        n_chains=4,
        n_draws=5000,
        rng=3,
        thresholds={"rhat_max": 1.05, "ess_bulk_min": 100.0, "ess_tail_min": 50.0},
    )
    diag = chain.diagnostics
    assert diag.passed, diag.messages  # R-hat < 1.05, bulk ESS > 100 for every coordinate
    var = chain.samples.var(axis=0, ddof=1)
    ess = np.array([diag.parameters[f"x{j}"].ess_bulk for j in range(D)])
    # The variance estimate of a Gaussian has relative sd sqrt(2 / ESS) (common practice);
    # 5 of those, i.e. about 0.5 at ESS 200. A proposal that never learnt the scales (the
    # bug this guards) gives variances off by factors of 10-500.
    rel = np.abs(var / SCALE**2 - 1.0)
    assert np.all(rel < 5 * np.sqrt(2.0 / ess)), (rel, ess)
    corr = np.corrcoef(chain.samples.T)
    # neighbour correlations 0.9: sd of a sample correlation (1 - rho^2) / sqrt(n), 5 of them
    near = np.diagonal(corr, offset=1)
    assert np.all(np.abs(near - 0.9) < 5 * (1 - 0.81) / np.sqrt(ess.min())), near
