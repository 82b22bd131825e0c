"""Markov chain Monte Carlo moves and the driver that runs them.

Every sampler is a :class:`Move` with one hook, :meth:`Move.propose`: given the current
positions of the chains being updated it returns proposals and the log of the proposal
density ratio ``log q(x | y) - log q(y | x)``. The driver evaluates the target, accepts with
the Metropolis-Hastings rule, records draws, reports progress and writes checkpoints.

Ensemble moves (``ensemble = True``) update the chains in two halves: the proposal for a
chain in one half uses the current positions of the other half only, which keeps the
joint chain of all walkers invariant (Goodman & Weare 2010, Sec. 3; Foreman-Mackey et al.
2013, Sec. 3 "parallel stretch move").

All moves work in the unconstrained space of :mod:`winnow.tasks._priors`.

References
----------
.. [1] Haario, H., Saksman, E., Tamminen, J. (2001). An adaptive Metropolis algorithm.
   Bernoulli 7(2), 223-242.
.. [2] Andrieu, C., Thoms, J. (2008). A tutorial on adaptive MCMC. Statistics and Computing
   18, 343-373 (Algorithm 4: global scale adaptation with a Robbins-Monro step).
.. [3] Goodman, J., Weare, J. (2010). Ensemble samplers with affine invariance.
   Communications in Applied Mathematics and Computational Science 5(1), 65-80.
.. [4] ter Braak, C. J. F. (2006). A Markov chain Monte Carlo version of the genetic
   algorithm Differential Evolution: easy Bayesian computing for real parameter spaces.
   Statistics and Computing 16, 239-249.
.. [5] Foreman-Mackey, D., Hogg, D. W., Lang, D., Goodman, J. (2013). emcee: the MCMC
   hammer. PASP 125, 306-312.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

__all__ = [
    "AdaptiveMetropolis",
    "DifferentialEvolution",
    "MOVES",
    "Move",
    "StepContext",
    "StretchMove",
]


@dataclass(slots=True)
class StepContext:
    """What a move may know about the step it proposes for.

    Attributes
    ----------
    iteration : int
        Iteration number (0-based) of the whole run.
    index : ndarray of int, shape (m,)
        Which chains are being updated.
    adapting : bool
        True during burn-in; adaptation that would break the Markov property of the kept
        draws must only happen then.
    accept_prob : ndarray, shape (m,), or None
        Acceptance probability of these chains' previous step (None on the first step).
    burn_in : int
        Iterations of the run that are burn-in.
    """

    iteration: int
    index: np.ndarray
    adapting: bool
    accept_prob: np.ndarray | None
    burn_in: int = 0


class Move(ABC):
    """Base class of the samplers: one hook, :meth:`propose`.

    A move keeps any adaptation state in ``self.state`` (a dict of arrays), which the driver
    saves in checkpoints and restores on resume.

    Parameters
    ----------
    d : int
        Dimension.
    n_chains : int
        Number of chains (walkers).
    initial_scale : ndarray, shape (d,)
        A rough scale of each coordinate (from the priors), for moves that need one.
    """

    name: ClassVar[str] = ""
    #: True for moves that update the chains in two halves using the other half.
    ensemble: ClassVar[bool] = False

    def __init__(self, d: int, n_chains: int, initial_scale: np.ndarray) -> None:
        self.d = d
        self.n_chains = n_chains
        self.initial_scale = np.asarray(initial_scale, dtype=np.float64)
        self.state: dict[str, np.ndarray] = {}

    @abstractmethod
    def propose(
        self,
        x: np.ndarray,
        others: np.ndarray,
        rng: np.random.Generator,
        ctx: StepContext,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Propose new positions for the chains being updated.

        Parameters
        ----------
        x : ndarray, shape (m, d)
            Current positions of the chains in ``ctx.index``.
        others : ndarray, shape (r, d)
            Current positions of the complementary chains (ensemble moves), else empty.
        rng : numpy.random.Generator
        ctx : StepContext

        Returns
        -------
        proposal : ndarray, shape (m, d)
        log_q_ratio : ndarray, shape (m,)
            ``log q(x | y) - log q(y | x)`` (zero for a symmetric proposal).
        """


class AdaptiveMetropolis(Move):
    """Adaptive Metropolis (Haario, Saksman & Tamminen 2001), one adaptation per chain.

    The Gaussian random-walk proposal of chain ``i`` at iteration ``t`` has covariance
    ``lambda_i * s_d * (C_t + eps I)`` where ``C_t`` is the empirical covariance of that
    chain's history ``x_0 .. x_t`` (Haario et al. 2001, Eq. 2.1 with ``s_d = 2.4^2 / d``),
    updated recursively (their Eq. 3). Before ``t0`` draws the covariance is the fixed
    ``C_0 = diag(0.1 * prior scale)^2``.

    The global factor ``lambda_i`` (Andrieu & Thoms 2008, Algorithm 4) is adapted by a
    Robbins-Monro step towards acceptance 0.234 with a decreasing gain ``t^-0.6`` (a
    diminishing adaptation, as is that of ``C_t``).

    Burn-in schedule (a practical addition; the draws it touches are discarded): for the
    first quarter of the burn-in the chain walks in from its over-dispersed start with the
    fixed ``C_0`` and only ``lambda`` adapts, because the covariance of a trajectory points
    along the path taken rather than along the posterior. ``C_t`` is then learnt, and
    restarted at 50 % and 75 % of the burn-in (the last estimate becomes the fixed
    covariance of the next ``t0`` steps and ``lambda`` is tuned afresh), so that what is
    left of the walk-in does not distort the proposal for thousands of draws. With no
    burn-in none of this happens, which is the plain method of Haario et al.
    """

    name = "adaptive_metropolis"
    target_acceptance = 0.234  # Roberts, Gelman & Gilks (1997), common practice
    epsilon = 1e-10  # relative regularisation of C_t (Haario et al. 2001: eps > 0 small)
    learn_from = 0.25  # fraction of the burn-in before which C_t is not learnt
    restarts = (0.5, 0.75)  # fractions of the burn-in where C_t starts afresh
    refresh = 10  # iterations between Cholesky factorisations of C_t

    def __init__(self, d: int, n_chains: int, initial_scale: np.ndarray) -> None:
        super().__init__(d, n_chains, initial_scale)
        self.t0 = max(100, 10 * d)
        self.s_d = 2.4**2 / d
        c0 = np.diag((0.1 * self.initial_scale) ** 2)
        self._floor = (1e-6 * self.initial_scale) ** 2
        self.state = {
            "count": np.zeros(n_chains),
            "mean": np.zeros((n_chains, d)),
            "m2": np.zeros((n_chains, d, d)),
            "c0": np.repeat(c0[None], n_chains, axis=0),
            "chol": np.zeros((n_chains, d, d)),
            "log_lambda": np.zeros(n_chains),
            "steps": np.zeros(n_chains),
        }

    def propose(
        self,
        x: np.ndarray,
        others: np.ndarray,
        rng: np.random.Generator,
        ctx: StepContext,
    ) -> tuple[np.ndarray, np.ndarray]:
        st = self.state
        # All chains at once (the usual case): plain slices avoid fancy-index copies.
        i = slice(None) if len(ctx.index) == self.n_chains else ctx.index
        if ctx.accept_prob is not None and (ctx.adapting or ctx.burn_in > 0):
            # Robbins-Monro: log lambda += gamma_t (alpha - alpha*), gamma_t = t^-0.6
            gamma = (st["steps"][i] + 1.0) ** -0.6
            st["log_lambda"][i] += gamma * (ctx.accept_prob - self.target_acceptance)
            st["steps"][i] += 1.0
        if ctx.adapting and ctx.iteration in {int(f * ctx.burn_in) for f in self.restarts}:
            ready = st["count"][i] > self.t0
            if np.any(ready):
                st["c0"][i] = np.where(ready[:, None, None], self._empirical(i), st["c0"][i])
                # lambda was tuned to the old covariance: tune afresh around s_d C_t.
                st["log_lambda"][i] = np.where(ready, 0.0, st["log_lambda"][i])
                st["steps"][i] = np.where(ready, 0.0, st["steps"][i])
            st["count"][i] = 0.0
            st["mean"][i] = 0.0
            st["m2"][i] = 0.0
        if ctx.adapting and ctx.iteration < int(self.learn_from * ctx.burn_in):
            # Walking in from an over-dispersed start: a trajectory's covariance points
            # along the path taken, not along the posterior, so only lambda adapts here.
            sqrt_scale = np.sqrt(self.s_d) * np.exp(st["log_lambda"][i])
            if ctx.iteration == 0:
                st["chol"][i] = _cholesky(st["c0"][i])
            z = rng.standard_normal(x.shape)
            step = np.einsum("kij,kj->ki", st["chol"][i], z) * sqrt_scale[:, None]
            return x + step, np.zeros(len(x))
        # Haario et al. (2001), Eq. (3): recursive mean and covariance of x_0 .. x_t.
        n = st["count"][i] + 1.0
        st["count"][i] = n
        mean = st["mean"][i]
        delta = x - mean
        mean = mean + delta / n[:, None]
        st["mean"][i] = mean
        st["m2"][i] = st["m2"][i] + delta[:, :, None] * (x - mean)[:, None, :]
        # All chains advance together, so they share the count. The Cholesky factor of the
        # covariance is refreshed every `refresh` steps (and when C_0 gives way to C_t):
        # the running statistics still take every draw; this only saves the O(d^3) work.
        c = int(n[0])
        if c == 1:
            st["chol"][i] = _cholesky(st["c0"][i])
        elif c > self.t0 and (c == self.t0 + 1 or c % self.refresh == 0):
            st["chol"][i] = _cholesky(self._empirical(i))
        sqrt_scale = np.sqrt(self.s_d) * np.exp(st["log_lambda"][i])  # lambda on the std dev
        z = rng.standard_normal(x.shape)
        step = np.einsum("kij,kj->ki", st["chol"][i], z) * sqrt_scale[:, None]
        return x + step, np.zeros(len(x))

    def _empirical(self, i: slice | np.ndarray) -> np.ndarray:
        """``C_t + eps I`` of the chains ``i`` (eps relative to the mean variance)."""
        n = self.state["count"][i]
        cov = self.state["m2"][i] / np.maximum(n - 1.0, 1.0)[:, None, None]
        diag = np.einsum("kii->ki", cov)  # a writeable view of the diagonals
        # eps I relative to the mean variance, floored at 1e-12 of the prior variances so that
        # a chain that rejected everything for a while still gets a usable proposal.
        diag += self.epsilon * (diag.sum(axis=1) / self.d)[:, None] + self._floor
        return cov


class StretchMove(Move):
    """Affine-invariant stretch move (Goodman & Weare 2010, Eqs. 7, 9 and 10).

    For walker ``x_k`` a partner ``x_j`` is drawn from the other half of the ensemble and
    ``y = x_j + z (x_k - x_j)`` with ``z`` drawn from ``g(z) ~ 1/sqrt(z)`` on ``[1/a, a]``;
    the acceptance ratio carries ``z^(d-1)``.
    """

    name = "ensemble"
    ensemble = True
    a = 2.0  # stretch scale, the value used by Goodman & Weare (2010)

    def propose(
        self,
        x: np.ndarray,
        others: np.ndarray,
        rng: np.random.Generator,
        ctx: StepContext,
    ) -> tuple[np.ndarray, np.ndarray]:
        m = len(x)
        partner = others[rng.integers(len(others), size=m)]
        # Inverse CDF of g(z) ~ z^-1/2 on [1/a, a]: z = ((a - 1) U + 1)^2 / a.
        z = ((self.a - 1.0) * rng.random(m) + 1.0) ** 2 / self.a
        y = partner + z[:, None] * (x - partner)  # Eq. (7)
        return y, (self.d - 1.0) * np.log(z)  # Eq. (9)


class DifferentialEvolution(Move):
    """Differential-evolution MCMC (ter Braak 2006), in two halves of the population.

    ``y = x_i + gamma (x_r1 - x_r2) + e`` with ``r1 != r2`` drawn from the other half,
    ``gamma = 2.38 / sqrt(2 d)`` (ter Braak 2006, Sec. 3), ``gamma = 1`` with probability 0.1
    to jump between modes, and ``e`` a small Gaussian jitter (scale 1e-4 of the other half's
    spread) that makes the chain irreducible. The proposal is symmetric.
    """

    name = "de_mcmc"
    ensemble = True
    p_mode_jump = 0.1
    jitter = 1e-4

    def propose(
        self,
        x: np.ndarray,
        others: np.ndarray,
        rng: np.random.Generator,
        ctx: StepContext,
    ) -> tuple[np.ndarray, np.ndarray]:
        m, r = len(x), len(others)
        r1 = rng.integers(r, size=m)
        r2 = (r1 + rng.integers(1, r, size=m)) % r  # uniform over the others, != r1
        gamma = np.where(rng.random(m) < self.p_mode_jump, 1.0, 2.38 / math.sqrt(2 * self.d))
        spread = others.std(axis=0)
        spread = np.where(spread > 0, spread, self.initial_scale)
        e = self.jitter * spread * rng.standard_normal(x.shape)
        return x + gamma[:, None] * (others[r1] - others[r2]) + e, np.zeros(m)


MOVES: dict[str, type[Move]] = {
    AdaptiveMetropolis.name: AdaptiveMetropolis,
    StretchMove.name: StretchMove,
    DifferentialEvolution.name: DifferentialEvolution,
}


def _cholesky(cov: np.ndarray) -> np.ndarray:
    """Batched Cholesky factor; falls back to the diagonal where a matrix is not PD."""
    try:
        return np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        out = np.empty_like(cov)
        for k in range(len(cov)):
            try:
                out[k] = np.linalg.cholesky(cov[k])
            except np.linalg.LinAlgError:
                out[k] = np.diag(np.sqrt(np.maximum(np.diag(cov[k]), 1e-300)))
        return out
