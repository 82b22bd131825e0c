"""The moves' proposals against their published formulas, and the samplers on a model
called row by row (tasks/sample/_ensemble.py, _metropolis.py, _sampling.py).

Outside references:
* ter Braak (2006), Statistics and Computing 16: the DE-MCMC proposal;
* Goodman & Weare (2010), CAMCoS 5(1), Eqs. (7), (9): the stretch move and its ratio;
* Gelman et al., Bayesian Data Analysis, 3rd ed. (2013), Sec. 14.8: the conjugate
  linear-Gaussian regression posterior.
"""

from __future__ import annotations

import numpy as np
import pytest

from winnow.tasks.sample import build_log_posterior, sample
from winnow.tasks.sample._ensemble import DifferentialEvolution, StretchMove
from winnow.tasks.sample._move import StepContext
from winnow.tasks.sample._samplers import MOVES


# ------------------------------------------------------------------ moves drawing ahead
@pytest.mark.parametrize(("m", "r"), [(4, 5), (40, 41)])
def test_de_proposal_against_its_formula(m, r):
    # ter Braak (2006): y = x + gamma (x_r1 - x_r2) + e, e ~ N(0, (1e-4 sd of the others)^2)
    # per coordinate; the oracle redraws the same numbers and uses numpy's std.
    d, n = 3, 6
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


# ------------------------------------------------------------------ a row-by-row model
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


@pytest.mark.parametrize(("m", "r"), [(4, 4), (40, 40)])
def test_stretch_proposal_against_its_formula(m, r):
    # Goodman & Weare (2010), Eqs. (7), (9): y = x_j + z (x_k - x_j), log q ratio
    # (d - 1) log z, z = ((a - 1) U + 1)^2 / a; the oracle redraws the same numbers.
    d, n = 3, 5
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
    move = MOVES[name](2, 8, np.ones(2))
    x = np.random.default_rng(3).normal(size=(4, 2))
    others = np.random.default_rng(4).normal(size=(4, 2))
    ctx = StepContext(0, np.arange(4), False, None, block=1, block_start=0)
    if name == "adaptive_metropolis":  # one group of all chains
        move = MOVES[name](2, 4, np.ones(2))
        others = np.empty((0, 2))
    _, log_q = move.propose(x, others, np.random.default_rng(5), ctx)
    assert move.symmetric == (not np.any(log_q))  # stretch: (d - 1) log z, not all zero


def test_adaptive_metropolis_takes_every_chain_at_once():
    # A move with ensemble = False gets all chains (the driver's contract, see _move):
    # its pooled statistics would otherwise mix chains of different iterations.
    move = MOVES["adaptive_metropolis"](2, 4, np.ones(2))
    ctx = StepContext(0, np.arange(2), True, None, block=1, block_start=0)
    with pytest.raises(ValueError, match="updates all 4 chains at once, got 2 rows"):
        move.propose(np.zeros((2, 2)), np.empty((0, 2)), np.random.default_rng(0), ctx)
