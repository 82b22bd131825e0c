"""Exact-kernel MMD between a weighted point set and a (weighted) sample, chunked.

``MMD^2 = v^T K_YY v - 2 v^T K_YX w + w^T K_XX w`` (Gretton et al. 2012, Lemma 6, the biased
V-statistic form with weights), where ``Y`` are the target rows with weights ``v`` and ``X``
the chosen points with weights ``w``. The ``Y``-``Y`` term is accumulated in row blocks over
the upper triangle, so memory is ``block * n`` kernel values, never ``n * n``. When ``Y`` is a
random subsample of a longer chain, :class:`ExactMMD` (``sample_of``) estimates the MMD to the
whole chain without bias and states its standard error (:meth:`ExactMMD.estimate`).

References
----------
.. [1] Gretton, A., Borgwardt, K. M., Rasch, M. J., Schölkopf, B. and Smola, A. (2012).
   A kernel two-sample test. Journal of Machine Learning Research 13, 723-773.
.. [2] Hoeffding, W. (1948). A class of statistics with asymptotically normal distribution.
   Annals of Mathematical Statistics 19(3), 293-325.
.. [3] Hoeffding, W. (1963). Probability inequalities for sums of bounded random variables.
   JASA 58(301), 13-30 (Section 6: sampling without replacement).
.. [4] Cochran, W. G. (1977). Sampling Techniques, 3rd ed. Wiley.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import numpy.typing as npt

from ._kernels import Kernel, get_kernel

__all__ = ["ExactMMD", "mmd_exact"]

Progress = Callable[[int, int, str], None]


class ExactMMD:
    """Exact MMD to a fixed weighted target, with the target's self term computed once.

    Parameters
    ----------
    target : ndarray, shape (n, d)
        Target rows (the coordinates the kernel is applied in).
    target_weights : ndarray, shape (n,) or None
        Non-negative, normalised here to sum one (uniform when None). With ``sample_of``
        they are the multiplicities of the distinct rows of the subsample (summing to the
        subsample's row count).
    kernel : str or Kernel
    bandwidth : float
    block_elems : int
        Kernel values per block (default 2^19, 4 MB: small blocks stay in cache).
    precision : {"single", "double"}
        Precision of the ``exp``/``sqrt`` evaluations (distances and sums are float64).
    sample_of : int, optional
        The target is a uniform random subsample, drawn without replacement, of a chain of
        ``sample_of`` rows, and the MMD wanted is the one to the whole chain. The self term
        is then the unbiased U-statistic of the subsample's distinct pairs (the plain
        V-statistic of ``n`` rows is biased up by about ``(k(0) - mean k) / n``, as large as
        a good selection's MMD^2 at ``n = 20000``), and :meth:`estimate` states its
        standard error (see there). None: the target is the whole chain, no error.
    progress : callable, optional
        ``progress(done, total, "exact MMD check (target self term)")`` per row block.
    """

    def __init__(
        self,
        target: np.ndarray,
        target_weights: np.ndarray | None,
        kernel: str | Kernel,
        bandwidth: float,
        *,
        block_elems: int = 2**19,
        precision: str = "single",
        sample_of: int | None = None,
        progress: Progress | None = None,
    ) -> None:
        self.y = np.ascontiguousarray(target, dtype=np.float64)
        n = self.y.shape[0]
        v = np.ones(n) if target_weights is None else np.asarray(target_weights, np.float64)
        self.n_rows = float(np.sum(v)) if sample_of is not None else float(n)
        self.v = v / np.sum(v)
        self.kernel = get_kernel(kernel)
        self.bandwidth = float(bandwidth)
        self.block = max(1, int(block_elems) // max(n, 1))
        self.progress = progress
        self.sample_of = None if sample_of is None else int(sample_of)
        # exp/sqrt of the target-target block in single precision (distances and all sums
        # stay float64); see the precision check in tests/test_thin_mmd.py
        self.dtype = np.float32 if precision == "single" else np.float64
        self._self_term: float | None = None
        self._row_means: np.ndarray | None = None  # sum_j v_j k(y_i, y_j), diagonal included
        self._square_term = 0.0  # v^T (K o K) v, for the second-order variance
        self._vstat = 0.0  # v^T K_YY v before the unbiased correction
        self._k0 = float(self.kernel.gram(self.y[:1], self.y[:1], self.bandwidth)[0, 0])

    @property
    def self_term(self) -> float:
        """``v^T K_YY v`` over the upper triangle in row blocks (symmetry halves the work);
        with ``sample_of`` the unbiased estimate of the whole chain's self term instead."""
        if self._self_term is None:
            y, v, n = self.y, self.v, self.y.shape[0]
            stats = self.sample_of is not None
            rows = np.zeros(n) if stats else None
            total = square = 0.0
            for a in range(0, n, self.block):
                b = min(n, a + self.block)
                k = self.kernel.gram(y[a:b], y[a:], self.bandwidth, dtype=self.dtype)
                k = k.astype(np.float64, copy=False)  # float64 accumulation
                kv = k @ v[a:]
                diag = k[:, : b - a] @ v[a:b]
                # upper triangle: off-diagonal blocks count twice, the diagonal block once
                total += 2.0 * float(v[a:b] @ kv) - float(v[a:b] @ diag)
                if rows is not None:
                    # full row sums from the upper triangle: rows a:b see columns a:, the
                    # columns b: see rows a:b (the lower triangle by symmetry)
                    rows[a:b] += kv
                    rows[b:] += v[a:b] @ k[:, b - a :]
                    k *= k
                    square += 2.0 * float(v[a:b] @ (k @ v[a:])) - float(
                        v[a:b] @ (k[:, : b - a] @ v[a:b])
                    )
                if self.progress is not None:
                    self.progress(b, n, "exact MMD check (target self term)")
            if stats:
                self._row_means, self._square_term, self._vstat = rows, square, total
                total = self._unbiased(total)
            self._self_term = total
        return self._self_term

    def _unbiased(self, vstat: float) -> float:
        """Whole-chain self term ``(1 - 1/N) U_n + k(0) / N`` from the subsample's
        V-statistic: ``U_n = (n V_n - k(0)) / (n - 1)`` over its distinct pairs (pairs of
        repeated rows included, as in the chain) is unbiased for the chain's mean over
        distinct pairs when rows are drawn without replacement (Hoeffding 1963)."""
        n, big_n, k0 = self.n_rows, float(self.sample_of), self._k0  # type: ignore[arg-type]
        if n < 2:
            return vstat
        u = (n * vstat - k0) / (n - 1.0)
        return (1.0 - 1.0 / big_n) * u + k0 / big_n

    def _cross_rows(self, points: np.ndarray, weights: np.ndarray) -> np.ndarray:
        """``f(y_i) = sum_j w_j k(y_i, x_j)`` for every target row, shape (n,)."""
        y, n = self.y, self.y.shape[0]
        blk = max(1, self.block * max(n, 1) // max(points.shape[0], 1))
        out = np.empty(n)
        for a in range(0, n, blk):
            b = min(n, a + blk)
            k = self.kernel.gram(y[a:b], points, self.bandwidth, dtype=self.dtype)
            out[a:b] = k.astype(np.float64, copy=False) @ weights
        return out

    def cross(self, points: np.ndarray, weights: np.ndarray) -> float:
        """``v^T K_YX w``."""
        return float(self.v @ self._cross_rows(points, weights))

    def estimate(self, points: npt.ArrayLike, weights: npt.ArrayLike) -> dict[str, float]:
        """Exact MMD of the weighted ``points`` to the target, with its stated error.

        Returns ``mmd``, ``mmd_sq`` (the estimate of MMD^2, unbiased with ``sample_of``, may
        be slightly negative), ``mmd_sq_se`` (its standard error), ``mmd_low``/``mmd_high``
        (the square roots of ``mmd_sq -/+ 1.96 mmd_sq_se``, an approximate 95 % interval)
        and ``mmd_se`` (half that interval's width / 1.96).

        The standard error is the U-statistic variance of Gretton et al. (2012), Corollary
        16 / Hoeffding (1948), for the one random side here (the chain subsample ``Y``; the
        weighted points are fixed): with ``g(y) = (1 - 1/N) kbar(y) - f(y)``, ``kbar(y)``
        the mean kernel value of ``y`` with the other rows and ``f(y) = sum_j w_j k(y, x_j)``,
        ``Var ~ (1 - n/N) [4 Var(g) / n + 2 (1 - 1/N)^2 Var(h2) / (n (n - 1))]``, ``h2`` the
        degenerate part of the kernel (Hoeffding's decomposition). The first term is the
        first-order (linear) part, the second the degenerate second-order part, which
        dominates when the selection matches the chain closely; ``1 - n/N`` is the finite-population
        correction of sampling without replacement (Cochran 1977, Eq. 2.8). Variances are
        estimated on the subsample itself. The whole chain (``sample_of=None``): error 0.
        """
        x = np.asarray(points, dtype=np.float64)
        w = np.asarray(weights, dtype=np.float64)
        s_term = self.self_term
        f = self._cross_rows(x, w)
        c_term = float(self.v @ f)
        sq = s_term - 2.0 * c_term + float(w @ self.kernel.gram(x, x, self.bandwidth) @ w)
        se = 0.0
        n, big_n = self.n_rows, self.sample_of
        if big_n is not None and n >= 2 and n < big_n and self._row_means is not None:
            k0 = self._k0
            kbar = (n * self._row_means - k0) / (n - 1.0)  # mean over the other rows
            g = (1.0 - 1.0 / big_n) * kbar - f
            var_g = float(self.v @ (g - float(self.v @ g)) ** 2) * n / (n - 1.0)
            # the degenerate part h2(y, y') = k(y, y') - kbar(y) - kbar(y') + S, its variance
            # E k^2 - 2 E kbar^2 + S^2 over distinct pairs (Hoeffding 1948, Eq. 5.13)
            mean_k = (n * self._vstat - k0) / (n - 1.0)
            mean_k2 = (n * self._square_term - k0 * k0) / (n - 1.0)
            var_h2 = max(mean_k2 - 2.0 * float(self.v @ kbar**2) + mean_k * mean_k, 0.0)
            c2 = (1.0 - 1.0 / big_n) ** 2
            fpc = 1.0 - n / big_n
            se = float(np.sqrt(fpc * (4.0 * var_g / n + 2.0 * c2 * var_h2 / (n * (n - 1.0)))))
        lo = float(np.sqrt(max(sq - 1.96 * se, 0.0)))
        hi = float(np.sqrt(max(sq + 1.96 * se, 0.0)))
        return {
            "mmd": float(np.sqrt(max(sq, 0.0))),  # round-off can make a tiny MMD^2 negative
            "mmd_sq": float(sq),
            "mmd_sq_se": se,
            "mmd_low": lo,
            "mmd_high": hi,
            "mmd_se": (hi - lo) / (2.0 * 1.96),
        }

    def __call__(self, points: npt.ArrayLike, weights: npt.ArrayLike) -> float:
        """Exact MMD of the weighted ``points`` to the target."""
        x = np.asarray(points, dtype=np.float64)
        w = np.asarray(weights, dtype=np.float64)
        sq = (
            self.self_term
            - 2.0 * self.cross(x, w)
            + float(w @ self.kernel.gram(x, x, self.bandwidth) @ w)
        )
        return float(np.sqrt(max(sq, 0.0)))  # round-off can make a tiny MMD^2 negative


def mmd_exact(
    samples: npt.ArrayLike,
    points: npt.ArrayLike,
    weights: npt.ArrayLike,
    *,
    kernel: str | Kernel = "gaussian",
    bandwidth: float,
    max_rows: int = 100_000,
    rng: np.random.Generator | int | None = None,
) -> tuple[float, int]:
    """Exact-kernel MMD between weighted points and the rows of a sample.

    Parameters
    ----------
    samples : array_like, shape (n, d)
        Target rows, each with weight ``1 / n``.
    points : array_like, shape (m, d)
    weights : array_like, shape (m,)
    kernel : str or Kernel
        A name in ``KERNELS``.
    bandwidth : float
        Kernel bandwidth in the coordinates of ``samples``.
    max_rows : int
        When ``n > max_rows`` the target is a uniform random subsample of ``max_rows`` rows
        drawn without replacement with ``rng``.
    rng : int or Generator or None

    Returns
    -------
    mmd : float
    rows : int
        Number of target rows used.
    """
    y = np.asarray(samples, dtype=np.float64)
    x = np.asarray(points, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64)
    if y.ndim != 2 or y.shape[0] < 1:
        raise ValueError(f"samples must be a non-empty 2-D array, got shape {y.shape}")
    if x.ndim != 2 or x.shape[1] != y.shape[1]:
        raise ValueError(f"points must have shape (m, {y.shape[1]}), got {x.shape}")
    if w.shape != (x.shape[0],):
        raise ValueError(f"weights must have shape ({x.shape[0]},), got {w.shape}")
    if not (np.isfinite(bandwidth) and bandwidth > 0):
        raise ValueError(f"bandwidth must be a finite positive number, got {bandwidth!r}")
    if int(max_rows) < 1:
        raise ValueError(f"max_rows must be >= 1, got {max_rows!r}")
    if y.shape[0] > max_rows:
        gen = np.random.default_rng(rng)
        y = y[np.sort(gen.choice(y.shape[0], size=int(max_rows), replace=False))]
    return ExactMMD(y, None, kernel, bandwidth)(x, w), int(y.shape[0])
