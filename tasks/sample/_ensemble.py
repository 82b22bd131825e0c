"""Ensemble moves: the affine-invariant stretch move and differential-evolution MCMC.

Both update the walkers in two halves (``ensemble = True``); see :mod:`._move`.

References
----------
.. [1] Goodman, J., Weare, J. (2010). Ensemble samplers with affine invariance.
   Communications in Applied Mathematics and Computational Science 5(1), 65-80.
.. [2] ter Braak, C. J. F. (2006). A Markov chain Monte Carlo version of the genetic
   algorithm Differential Evolution: easy Bayesian computing for real parameter spaces.
   Statistics and Computing 16, 239-249.
"""

from __future__ import annotations

import math

import numpy as np

from ._move import Move, StepContext

__all__ = ["DifferentialEvolution", "StretchMove"]


class StretchMove(Move):
    """Affine-invariant stretch move (Goodman & Weare 2010, Eqs. 7, 9 and 10).

    For walker ``x_k`` a partner ``x_j`` is drawn from the other half of the ensemble and
    ``y = x_j + z (x_k - x_j)`` with ``z`` drawn from ``g(z) ~ 1/sqrt(z)`` on ``[1/a, a]``;
    the acceptance ratio carries ``z^(d-1)``.
    """

    name = "ensemble"
    ensemble = True
    uses_accept_prob = False
    a = 2.0  # stretch scale, the value used by Goodman & Weare (2010)

    def propose(
        self,
        x: np.ndarray,
        others: np.ndarray,
        rng: np.random.Generator,
        ctx: StepContext,
    ) -> tuple[np.ndarray, np.ndarray]:
        m, r = len(x), len(others)
        pick, z, log_q = self._ahead(ctx, rng, lambda g, n: self._draw(g, n, m, r))
        partner = others[pick]
        y = x - partner
        y *= z
        y += partner  # Eq. (7)
        return y, log_q

    def _draw(
        self, rng: np.random.Generator, n: int, m: int, r: int
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Partners (n, m), stretch factors (n, m, 1) and log proposal ratios (n, m) of
        ``n`` iterations."""
        pick = rng.integers(r, size=(n, m))
        # Inverse CDF of g(z) ~ z^-1/2 on [1/a, a]: z = ((a - 1) U + 1)^2 / a.
        z = ((self.a - 1.0) * rng.random((n, m)) + 1.0) ** 2 / self.a
        log_q = (self.d - 1.0) * np.log(z)  # Eq. (9)
        return pick, z[:, :, None], log_q


class DifferentialEvolution(Move):
    """Differential-evolution MCMC (ter Braak 2006), in two halves of the population.

    ``y = x_i + gamma (x_r1 - x_r2) + e`` with ``r1 != r2`` drawn from the other half,
    ``gamma = 2.38 / sqrt(2 d)`` (ter Braak 2006, Sec. 3), ``gamma = 1`` with probability 0.1
    to jump between modes, and ``e`` a small Gaussian jitter (scale 1e-4 of the other half's
    spread) that makes the chain irreducible. The proposal is symmetric.
    """

    name = "de_mcmc"
    ensemble = True
    uses_accept_prob = False
    symmetric = True
    p_mode_jump = 0.1
    jitter = 1e-4

    def __init__(self, d: int, n_chains: int, initial_scale: np.ndarray) -> None:
        super().__init__(d, n_chains, initial_scale)
        self._mean_weights: dict[int, np.ndarray] = {}

    def propose(
        self,
        x: np.ndarray,
        others: np.ndarray,
        rng: np.random.Generator,
        ctx: StepContext,
    ) -> tuple[np.ndarray, np.ndarray]:
        m, r = len(x), len(others)
        r1, r2, gamma, e = self._ahead(ctx, rng, lambda g, n: self._draw(g, n, m, r))
        # The others' standard deviation per coordinate; np.dot for the means costs a
        # fraction of numpy's std on a few walkers.
        w = self._mean_weights.get(r)
        if w is None:
            w = self._mean_weights[r] = np.full(r, 1.0 / r)
        dev = others - np.dot(w, others)
        dev *= dev
        spread = np.sqrt(np.dot(w, dev))
        if not spread.all():
            spread = np.where(spread > 0, spread, self.initial_scale)
        spread *= self.jitter
        y = others[r1]
        y -= others[r2]
        y *= gamma
        y += x
        y += spread * e
        return y, self._no_ratio(m)

    def _draw(self, rng: np.random.Generator, n: int, m: int, r: int) -> tuple[np.ndarray, ...]:
        """Pairs of others ``r1 != r2`` (n, m) each, their step factors (n, m, 1) and unit
        jitters (n, m, d) of ``n`` iterations."""
        r1 = rng.integers(r, size=(n, m))
        r2 = (r1 + rng.integers(1, r, size=(n, m))) % r  # uniform over the others, != r1
        gamma = np.where(rng.random((n, m)) < self.p_mode_jump, 1.0, 2.38 / math.sqrt(2 * self.d))
        e = rng.standard_normal((n, m, self.d))
        return r1, r2, gamma[:, :, None], e
