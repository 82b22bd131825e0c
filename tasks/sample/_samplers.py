"""Markov chain Monte Carlo moves and the driver that runs them.

Every sampler is a :class:`Move` with one hook, :meth:`Move.propose`: given the current
positions of the chains being updated it returns proposals and the log of the proposal
density ratio ``log q(x | y) - log q(y | x)``. The driver evaluates the target, accepts with
the Metropolis-Hastings rule, records draws, reports progress and writes checkpoints.

Ensemble moves (``ensemble = True``) update the chains in two halves: the proposal for a
chain in one half uses the current positions of the other half only, which keeps the
joint chain of all walkers invariant (Goodman & Weare 2010, Sec. 3; Foreman-Mackey et al.
2013, Sec. 3 "parallel stretch move").

All moves work in the unconstrained space of :mod:`winnow.tasks.sample._priors`.

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
.. [6] Chan, T. F., Golub, G. H., LeVeque, R. J. (1983). Algorithms for computing the sample
   variance: analysis and recommendations. The American Statistician 37(3), 242-247.
"""

from __future__ import annotations

import math
import time
from abc import ABC, abstractmethod
from collections.abc import Callable
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

__all__ = [
    "AdaptiveMetropolis",
    "DifferentialEvolution",
    "MOVES",
    "Move",
    "ProgressHook",
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
        Acceptance probability of these chains' previous step (None on the first step,
        and for a move whose ``uses_accept_prob`` is False).
    burn_in : int
        Iterations of the run that are burn-in.
    group : int
        Which group of chains (0, or 0 and 1 for the two halves of an ensemble).
    block : int
        At the first iteration the driver runs in a block of iterations, the block's
        length: the move draws the random numbers of this group for the whole block at
        once from the ``rng`` it is given (see :meth:`Move._ahead`); 0 elsewhere.
    block_start : int
        First iteration of the current block.
    """

    iteration: int
    index: np.ndarray
    adapting: bool
    accept_prob: np.ndarray | None
    burn_in: int = 0
    group: int = 0
    block: int = 0
    block_start: int = 0


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
    #: False for moves that never read ``ctx.accept_prob`` (the driver then skips it).
    uses_accept_prob: ClassVar[bool] = True
    #: True for moves whose proposal is symmetric: their log proposal ratio is always 0.
    symmetric: ClassVar[bool] = False
    #: Proposals of up to this many values (chains x dimension) may be computed in Python
    #: floats: a numpy call costs more than the arithmetic, and after a slow model it runs
    #: with cold CPU caches.
    small_batch: ClassVar[int] = 48

    def __init__(self, d: int, n_chains: int, initial_scale: np.ndarray) -> None:
        self.d = d
        self.n_chains = n_chains
        self.initial_scale = np.asarray(initial_scale, dtype=np.float64)
        self.state: dict[str, np.ndarray] = {}
        # Random numbers drawn ahead, per group: (first iteration, length, arrays).
        self._drawn: dict[int, tuple[int, int, tuple[np.ndarray, ...]]] = {}
        self._zeros: dict[int, np.ndarray] = {}

    def _no_ratio(self, m: int) -> np.ndarray:
        """A read-only zero log proposal ratio for ``m`` chains (a symmetric proposal)."""
        z = self._zeros.get(m)
        if z is None:
            z = self._zeros[m] = np.zeros(m)
            z.flags.writeable = False
        return z

    def _ahead(
        self,
        ctx: StepContext,
        rng: np.random.Generator,
        draw: Callable[[np.random.Generator, int], tuple[np.ndarray, ...]],
    ) -> tuple[np.ndarray, ...]:
        """This iteration's random numbers, drawn a block of iterations at a time.

        ``draw(rng, n)`` returns arrays whose first axis is the iteration (length ``n``).
        Drawing a block at once replaces many small calls to the generator by one (a
        per-call cost that dominates for a handful of chains); the numbers do not depend
        on the chains' positions, so drawing them early changes nothing else. The driver
        gives each block its own generator (a resumed run redraws the block it starts in);
        a move must draw its random numbers here only. Outside a block (a move called on
        its own) one iteration is drawn at a time.
        """
        t = ctx.iteration
        got = self._drawn.get(ctx.group)
        if ctx.block > 0:
            got = (ctx.block_start, ctx.block, draw(rng, ctx.block))
            self._drawn[ctx.group] = got
        elif got is None or not got[0] <= t < got[0] + got[1]:
            got = (t, 1, draw(rng, 1))
            self._drawn[ctx.group] = got
        j = t - got[0]
        return tuple([a[j] for a in got[2]])

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
    """Adaptive Metropolis (Haario, Saksman & Tamminen 2001) with a covariance pooled over
    the chains.

    The Gaussian random-walk proposal of chain ``i`` is ``N(x_i, lambda^2 s_d C)`` with
    ``s_d = 2.4^2 / d`` (Haario et al. 2001, Eq. (2.1); the 2.38^2 / d of Gelman, Roberts &
    Gilks 1996 rounded) and ``C`` the empirical covariance of the draws plus ``eps I`` in
    coordinates standardised by ``C``'s own diagonal (see "Scale" below).
    ``C`` is *pooled over the chains*: the within-chain covariance
    ``W = sum_k sum_t (x_kt - mean_k)(x_kt - mean_k)' / (K (n - 1))`` of all ``K`` chains,
    updated recursively every iteration (Haario et al. 2001, Eq. (3), one Welford update per
    chain summed into one matrix). Pooling uses ``K`` times the draws of one chain, which is
    what a strongly correlated, badly scaled target needs; it is a sound choice because
    every chain targets the same posterior, and it is the within-chain variance ``W`` of
    Gelman & Rubin (1992).

    The global factor ``lambda`` (Andrieu & Thoms 2008, Algorithm 4), one for all chains, is
    adapted by a Robbins-Monro step on ``log lambda`` towards a mean acceptance of 0.234
    with gain ``t^-0.6`` (a lambda per chain let a chain that sat in a tail while it was tuned
    keep a step size fit only there).

    With a burn-in (the usual case), ``C`` is learnt during the burn-in in windows that
    double in length (25 or ``5 d`` iterations first) up to 1/8 of the burn-in, the last
    one stretched to the start of a terminal stretch (10 % of the burn-in, at least 50
    iterations); the windowed scheme of the Stan Reference Manual's warm-up, common
    practice. The cap matters for a badly scaled target: the walk-in from prior draws can
    take a third of the burn-in, and each window's estimate speeds up the next part of it
    (the 10-D benchmark Gaussian needs it: without the cap R-hat stayed near 3). At the end of a window ``C`` becomes the window's pooled estimate (shrunk
    towards its diagonal by ``n / (n + 5)``, as Stan does), the statistics restart and
    ``lambda`` is tuned afresh; the first window walks in with ``C_0 = diag(0.1 prior
    scale)^2``. Windows forget the walk-in from an over-dispersed start, where a
    trajectory's covariance points along the path taken rather than along the posterior.
    In the terminal stretch only ``lambda`` adapts. After the burn-in ``lambda`` is fixed and
    the kept draws are plain AM (below) started afresh with the burn-in's ``C`` as ``C_0``.

    With no burn-in the method is the plain AM of Haario et al. (2001): ``C_0`` for the
    first ``t0 = max(100, 10 d)`` iterations, then the pooled ``C_t`` of the whole history,
    refactorised every ``refresh`` iterations (the running statistics take every draw;
    this only saves the ``O(d^3)`` factorisation), and ``lambda`` fixed (at 1 when there
    was no burn-in).

    Scale. The proposal does not depend on the parameters' units: ``C_0`` is set from each
    prior's own scale, and the regularisation of Haario et al.'s ``C + eps I`` (which only
    keeps ``C`` positive definite) is applied in coordinates standardised by ``C``'s
    diagonal, i.e. ``C + eps diag(C)``, floored at ``(1e-6 prior scale)^2``, and ``C`` is
    factorised as ``D R D`` (``R`` a correlation matrix, ``D`` the standard deviations).
    Rescaling a parameter (metres to nanometres, GPa to Pa) rescales its row of the
    Cholesky factor and leaves the chain, in the user's units over the scale, unchanged
    up to rounding. An ``eps`` relative to the *mean* variance, as before, added
    ``1e-10 (1.5e9)^2 / 2``, about 100, to the variance of a bounded parameter of scale 1
    next to a modulus of posterior sd 1.5e9 Pa: its proposals jumped over the whole logit
    range, the global ``lambda`` shrank to compensate and the modulus's chains stood still
    (R-hat near 4, ESS 4; issue 17 item 2).
    """

    name = "adaptive_metropolis"
    symmetric = True
    target_acceptance = 0.234  # Roberts, Gelman & Gilks (1997), common practice
    epsilon = 1e-10  # regularisation eps of standardised C (Haario et al. 2001: eps > 0 small)
    refresh = 10  # iterations between Cholesky factorisations of C_t (no burn-in)
    max_window = 0.125  # longest window, as a fraction of the burn-in
    terminal = 0.1  # fraction of the burn-in (at least 50 iterations) that tunes lambda only

    def __init__(self, d: int, n_chains: int, initial_scale: np.ndarray) -> None:
        super().__init__(d, n_chains, initial_scale)
        self.t0 = max(100, 10 * d)
        self.s_d = 2.4**2 / d  # Haario et al. (2001), Eq. (2.1)
        self._sqrt_s_d = math.sqrt(self.s_d)
        self.first_window = max(25, 5 * d)
        c0 = np.diag((0.1 * self.initial_scale) ** 2)
        self._floor = (1e-6 * self.initial_scale) ** 2
        self._windows: tuple[int, set[int]] = (-1, set())
        self._last_end = 0
        # (Cholesky factor, log lambda, the scaled factor) of the last step
        self._factor: tuple[np.ndarray | None, float, np.ndarray | None] = (None, 0.0, None)
        self.state = {
            "count": np.zeros(1),
            "mean": np.zeros((n_chains, d)),
            "m2": np.zeros((d, d)),
            "chol": np.linalg.cholesky(c0),
            "log_lambda": np.zeros(n_chains),
            "steps": np.zeros(1),
            "buffer": np.zeros((self.refresh, n_chains, d)),  # states not yet folded in
            "held": np.zeros(1),
        }

    def window_ends(self, burn_in: int) -> set[int]:
        """Iterations that end an adaptation window for a burn-in of ``burn_in``."""
        if self._windows[0] == burn_in:
            return self._windows[1]
        self._last_end = 0
        last = burn_in - max(50, int(self.terminal * burn_in))
        ends: list[int] = []
        start, width = 0, self.first_window
        cap = max(self.first_window, int(self.max_window * burn_in))
        while start + width <= last:
            # Stretch this window to `last` when the next (twice as long) would not fit.
            end = last if start + 3 * width > last else start + width
            ends.append(end)
            start, width = end, min(2 * width, cap)
        self._windows = (burn_in, set(ends))
        self._last_end = max(ends, default=0)
        return self._windows[1]

    def propose(
        self,
        x: np.ndarray,
        others: np.ndarray,
        rng: np.random.Generator,
        ctx: StepContext,
    ) -> tuple[np.ndarray, np.ndarray]:
        st = self.state
        t = ctx.iteration
        i = slice(None) if len(ctx.index) == self.n_chains else ctx.index
        if ctx.burn_in > 0 and ctx.adapting:
            if ctx.accept_prob is not None:
                # Robbins-Monro: log lambda += gamma_t (alpha - alpha*), gamma_t = t^-0.6
                steps = float(st["steps"][0]) + 1.0
                gamma = steps**-0.6
                # One lambda for all chains, from their mean acceptance: a chain that sits in
                # a tail while lambda is tuned would otherwise keep a step size fit only there.
                ap = ctx.accept_prob.tolist()  # a few numbers: Python is quicker
                mean_accept = sum(ap) / len(ap)
                step_size = gamma * (mean_accept - self.target_acceptance)
                if isinstance(i, slice):
                    st["log_lambda"] += step_size
                else:
                    st["log_lambda"][i] += step_size
                st["steps"][0] = steps
            ends = self.window_ends(ctx.burn_in)
            if t in ends:
                self._flush()
                n = st["count"][0]
                if n >= 3.0:
                    cov = self._empirical()
                    # Shrink towards the diagonal by n / (n + 5) (Stan's warm-up, common
                    # practice): a short window's estimate stays positive definite.
                    w = n / (n + 5.0)
                    cov = w * cov + (1.0 - w) * np.diag(np.diag(cov))
                    st["chol"] = _scaled_cholesky(cov)
                    st["log_lambda"][:] = 0.0  # tuned afresh around s_d C
                    st["steps"][0] = 0.0
                self._reset_statistics()
            if t < self._last_end:
                self._update(x, i)
            elif t == ctx.burn_in - 1:
                # The kept draws start plain AM afresh, with the burn-in's C as C_0.
                self._reset_statistics()
        else:
            # Plain AM (Haario et al. 2001): C_0 until t0, then the pooled C_t of the history.
            c = self._update(x, i)
            if c > self.t0 and (c == self.t0 + 1 or c % self.refresh == 0):
                st["chol"] = _scaled_cholesky(self._empirical())
        m, d = x.shape
        (z,) = self._ahead(ctx, rng, lambda g, n: (g.standard_normal((n, m, d)),))
        # The step is z (sqrt(s_d) lambda L)' for each chain (lambda scales the std dev).
        chol, lam = st["chol"], st["log_lambda"]
        lam = (lam if isinstance(i, slice) else lam[i]).tolist()
        if lam.count(lam[0]) == len(lam):  # one lambda for all chains: the usual case
            if chol is not self._factor[0] or lam[0] != self._factor[1]:
                scaled = chol.T * (self._sqrt_s_d * math.exp(lam[0]))
                self._factor = (chol, lam[0], scaled)
            step = np.dot(z, self._factor[2])  # np.dot: less call overhead than @
        else:
            step = np.dot(z, chol.T)
            step *= self._sqrt_s_d * np.exp(np.array(lam))[:, None]
        step += x
        return step, self._no_ratio(m)

    def _update(self, x: np.ndarray, i: slice | np.ndarray) -> int:
        """Add the chains' states to the running means and pooled scatter matrix (Haario et
        al. 2001, Eq. (3), summed over chains); returns the draws per chain so far.

        The states of all chains are held for up to ``refresh`` iterations and folded in
        at once by :meth:`_flush` (before anything reads the statistics): one copy per
        iteration instead of a recursive update's several small array operations.
        """
        st = self.state
        if not (isinstance(i, slice) and i == slice(None)):  # some chains: at once
            self._flush()
            count = st["count"]
            n = count.item() + 1.0
            count[0] = n
            mean = st["mean"][i]
            delta = x - mean
            mean += delta * (1.0 / n)
            st["mean"][i] = mean
            st["m2"] += np.dot(delta.T, x - mean)
            return int(n)
        held = st["held"]
        nb = int(held.item())
        st["buffer"][nb] = x
        held[0] = nb + 1
        total = int(st["count"].item()) + nb + 1
        if nb + 1 == len(st["buffer"]):
            self._flush()
        return total

    def _flush(self) -> None:
        """Fold the held states into the means and the pooled scatter matrix: the pairwise
        update of Chan, Golub & LeVeque (1983), per chain and summed over the chains,
        ``M2 = M2_a + M2_b + delta delta' n_a n_b / n`` (``delta`` the difference of the
        means of the two parts; the same sums as the recursive update, up to rounding)."""
        st = self.state
        nb = int(st["held"].item())
        if nb == 0:
            return
        b = st["buffer"][:nb]  # (nb, chains, d)
        n0 = st["count"].item()
        n = n0 + nb
        batch_mean = np.add.reduce(b, axis=0) * (1.0 / nb)
        dev = (b - batch_mean).reshape(-1, self.d)
        delta = batch_mean - st["mean"]
        st["m2"] += np.dot(dev.T, dev) + np.dot(delta.T, delta) * (n0 * nb / n)
        st["mean"] += delta * (nb / n)
        st["count"][0] = n
        st["held"][0] = 0.0

    def _reset_statistics(self) -> None:
        st = self.state
        st["count"][0] = 0.0
        st["held"][0] = 0.0
        st["mean"][:] = 0.0
        st["m2"][:] = 0.0

    def _empirical(self) -> np.ndarray:
        """Pooled within-chain covariance plus ``eps I`` in standardised coordinates, i.e.
        ``eps diag(C)``: each variance grows by the same relative amount whatever the
        parameters' units (an eps relative to the mean variance swamped a parameter of
        scale 1 next to one of scale 1e10). Floored at 1e-12 of the prior variances so
        that chains that rejected everything for a while still get a usable proposal."""
        self._flush()
        n = self.state["count"][0]
        k = self.n_chains
        cov = self.state["m2"] / max(k * (n - 1.0), 1.0)
        cov = 0.5 * (cov + cov.T)
        diag = np.einsum("ii->i", cov)  # a writeable view of the diagonal
        diag *= 1.0 + self.epsilon
        diag += self._floor
        return cov


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
        if isinstance(z, list):  # a few values: Python floats, the same formula
            rows = others.tolist()
            y = [
                [pk + zi * (xk - pk) for xk, pk in zip(xi, rows[j], strict=True)]
                for xi, j, zi in zip(x.tolist(), pick, z, strict=True)
            ]
            return np.array(y), log_q
        partner = others[pick]
        y = x - partner
        y *= z[:, None]
        y += partner  # Eq. (7)
        return y, log_q

    def _draw(
        self, rng: np.random.Generator, n: int, m: int, r: int
    ) -> tuple[np.ndarray | list, np.ndarray | list, np.ndarray]:
        """Partners, stretch factors and log proposal ratios of ``n`` iterations (the first
        two as lists for a few values, see ``small_batch``)."""
        pick = rng.integers(r, size=(n, m))
        # Inverse CDF of g(z) ~ z^-1/2 on [1/a, a]: z = ((a - 1) U + 1)^2 / a.
        z = ((self.a - 1.0) * rng.random((n, m)) + 1.0) ** 2 / self.a
        log_q = (self.d - 1.0) * np.log(z)  # Eq. (9)
        if m * self.d <= self.small_batch:
            return pick.tolist(), z.tolist(), log_q
        return pick, z, log_q


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
    max_pair_matrix = 1024  # up to m * r walker pairs, the pairs as one matrix product

    def propose(
        self,
        x: np.ndarray,
        others: np.ndarray,
        rng: np.random.Generator,
        ctx: StepContext,
    ) -> tuple[np.ndarray, np.ndarray]:
        m, r = len(x), len(others)
        *pairs, e = self._ahead(ctx, rng, lambda g, n: self._draw(g, n, m, r))
        if isinstance(e, list):  # a few values: Python floats, the same formula
            return self._propose_small(x, others, *pairs, e), self._no_ratio(m)
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
        if len(pairs) == 1:  # gamma (x_r1 - x_r2) as one product with the others
            y = np.dot(pairs[0], others)
        else:
            r1, r2, gamma = pairs
            y = others[r1]
            y -= others[r2]
            y *= gamma[:, None]
        y += x
        spread *= self.jitter
        y += spread * e
        return y, self._no_ratio(m)

    def __init__(self, d: int, n_chains: int, initial_scale: np.ndarray) -> None:
        super().__init__(d, n_chains, initial_scale)
        self._mean_weights: dict[int, np.ndarray] = {}
        self._initial_scale = self.initial_scale.tolist()

    def _propose_small(
        self,
        x: np.ndarray,
        others: np.ndarray,
        r1: list[int],
        r2: list[int],
        gamma: list[float],
        e: list[list[float]],
    ) -> np.ndarray:
        """:meth:`propose` for a few values, in Python floats."""
        rows = others.tolist()
        r = len(rows)
        scale = []  # jitter times the others' standard deviation, per coordinate
        for col, s0 in zip(zip(*rows, strict=True), self._initial_scale, strict=True):
            mu = sum(col) / r
            sd = math.sqrt(sum((v - mu) * (v - mu) for v in col) / r)
            scale.append(self.jitter * (sd if sd > 0 else s0))
        y = [
            [
                xk + g * (ak - bk) + sk * ek
                for xk, ak, bk, sk, ek in zip(xi, rows[a], rows[b], scale, ei, strict=True)
            ]
            for xi, a, b, g, ei in zip(x.tolist(), r1, r2, gamma, e, strict=True)
        ]
        return np.array(y)

    def _draw(self, rng: np.random.Generator, n: int, m: int, r: int) -> tuple[np.ndarray, ...]:
        """Pairs of others with their step factors, and unit jitters, of ``n`` iterations.

        The pairs come as ``(r1, r2, gamma)`` (lists, with the jitters, for up to
        ``small_batch`` values), or for up to ``max_pair_matrix`` walker pairs as one
        matrix per iteration, shape (m, r), holding ``gamma`` at ``r1`` and ``-gamma`` at
        ``r2`` in each row.
        """
        r1 = rng.integers(r, size=(n, m))
        r2 = (r1 + rng.integers(1, r, size=(n, m))) % r  # uniform over the others, != r1
        gamma = np.where(rng.random((n, m)) < self.p_mode_jump, 1.0, 2.38 / math.sqrt(2 * self.d))
        e = rng.standard_normal((n, m, self.d))
        if m * self.d <= self.small_batch:
            return r1.tolist(), r2.tolist(), gamma.tolist(), e.tolist()
        if m * r > self.max_pair_matrix:
            return r1, r2, gamma, e
        pick = np.zeros((n, m, r))
        step, row = np.ogrid[:n, :m]
        pick[step, row, r1] = gamma
        pick[step, row, r2] = -gamma
        return pick, e


class ProgressHook:
    """The driver's ``progress(done, total, what)`` at a bounded rate.

    A call goes through at the first iteration that completes 1 % of the run, then only
    once both another 1 % of the iterations and 0.5 s have passed (whichever is rarer: a
    fast run reports a few times, a slow one about 100 times), and always at the last
    iteration. ``done`` only increases. Checking costs one comparison per iteration.
    """

    share, seconds = 0.01, 0.5

    def __init__(
        self, progress: Callable[[int, int, str], None], total: int, what: str, *, clock=None
    ) -> None:
        self.progress, self.total, self.what = progress, int(total), what
        self.clock = clock if clock is not None else time.perf_counter
        self.step = max(1, int(math.ceil(self.share * self.total)))
        self.next = self.step  # the next iteration count that may report
        self.last_t: float | None = None

    def __call__(self, done: int) -> None:
        if done < self.next and done != self.total:
            return
        now = self.clock()
        if done != self.total and self.last_t is not None and now - self.last_t < self.seconds:
            self.next = done + 1  # 1 % has passed, the time has not: look again next time
            return
        self.last_t = now
        self.next = done + self.step
        self.progress(int(done), self.total, self.what)


MOVES: dict[str, type[Move]] = {
    AdaptiveMetropolis.name: AdaptiveMetropolis,
    StretchMove.name: StretchMove,
    DifferentialEvolution.name: DifferentialEvolution,
}


def _scaled_cholesky(cov: np.ndarray) -> np.ndarray:
    """Cholesky factor of one covariance, shape (d, d), computed as ``D chol(R)`` with ``R``
    the correlation matrix and ``D`` the standard deviations: the factorisation (and its
    positive-definiteness test) then sees numbers of order 1 whatever the parameters'
    scales (1e-9 next to 1e10 in one matrix)."""
    sd = np.sqrt(np.diag(cov))
    inv = 1.0 / sd
    corr = cov * inv[:, None] * inv[None, :]
    return _cholesky(corr[None])[0] * sd[:, None]


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
