"""Adaptive Metropolis with a covariance pooled over the chains.

References
----------
.. [1] Haario, H., Saksman, E., Tamminen, J. (2001). An adaptive Metropolis algorithm.
   Bernoulli 7(2), 223-242.
.. [2] Andrieu, C., Thoms, J. (2008). A tutorial on adaptive MCMC. Statistics and Computing
   18, 343-373 (Algorithm 4: global scale adaptation with a Robbins-Monro step).
.. [3] Gelman, A., Rubin, D. B. (1992). Inference from iterative simulation using multiple
   sequences. Statistical Science 7(4), 457-472.
.. [4] Chan, T. F., Golub, G. H., LeVeque, R. J. (1983). Algorithms for computing the sample
   variance: analysis and recommendations. The American Statistician 37(3), 242-247.
"""

from __future__ import annotations

import math

import numpy as np

from ._move import Move, StepContext

__all__ = ["AdaptiveMetropolis"]


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
            "log_lambda": np.zeros(n_chains),  # one value for all chains (held per chain in
            # the checkpoint format winnow.sample-state/3)
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
        if len(x) != self.n_chains:
            raise ValueError(
                f"{self.name} updates all {self.n_chains} chains at once, got {len(x)} rows"
            )
        st = self.state
        t = ctx.iteration
        if ctx.burn_in > 0 and ctx.adapting:
            if ctx.accept_prob is not None:
                # Robbins-Monro: log lambda += gamma_t (alpha - alpha*), gamma_t = t^-0.6.
                # One lambda for all chains, from their mean acceptance: a chain that sits in
                # a tail while lambda is tuned would otherwise keep a step size fit only there.
                steps = float(st["steps"][0]) + 1.0
                mean_accept = float(np.add.reduce(ctx.accept_prob)) / len(ctx.accept_prob)
                st["log_lambda"] += steps**-0.6 * (mean_accept - self.target_acceptance)
                st["steps"][0] = steps
            if t in self.window_ends(ctx.burn_in):
                self._end_window()
            if t < self._last_end:
                self._update(x)
            elif t == ctx.burn_in - 1:
                # The kept draws start plain AM afresh, with the burn-in's C as C_0.
                self._reset_statistics()
        else:
            # Plain AM (Haario et al. 2001): C_0 until t0, then the pooled C_t of the history.
            c = self._update(x)
            if c > self.t0 and (c == self.t0 + 1 or c % self.refresh == 0):
                st["chol"] = _scaled_cholesky(self._empirical())
        m, d = x.shape
        (z,) = self._ahead(ctx, rng, lambda g, n: (g.standard_normal((n, m, d)),))
        # The step is z (sqrt(s_d) lambda L)' for every chain (lambda scales the std dev).
        chol, lam = st["chol"], float(st["log_lambda"][0])
        if chol is not self._factor[0] or lam != self._factor[1]:
            self._factor = (chol, lam, chol.T * (self._sqrt_s_d * math.exp(lam)))
        step = np.dot(z, self._factor[2])  # np.dot: less call overhead than @
        step += x
        return step, self._no_ratio(m)

    def _end_window(self) -> None:
        """At the end of an adaptation window: ``C`` from the window's pooled estimate,
        ``lambda`` tuned afresh around it, the statistics restarted."""
        st = self.state
        self._flush()
        n = st["count"][0]
        if n >= 3.0:
            cov = self._empirical()
            # Shrink towards the diagonal by n / (n + 5) (Stan's warm-up, common practice):
            # a short window's estimate stays positive definite.
            w = n / (n + 5.0)
            cov = w * cov + (1.0 - w) * np.diag(np.diag(cov))
            st["chol"] = _scaled_cholesky(cov)
            st["log_lambda"][:] = 0.0  # tuned afresh around s_d C
            st["steps"][0] = 0.0
        self._reset_statistics()

    def _update(self, x: np.ndarray) -> int:
        """Add the chains' states to the running means and pooled scatter matrix (Haario et
        al. 2001, Eq. (3), summed over chains); returns the draws per chain so far.

        The states are held for up to ``refresh`` iterations and folded in at once by
        :meth:`_flush` (before anything reads the statistics): one copy per iteration
        instead of a recursive update's several small array operations.
        """
        st = self.state
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
