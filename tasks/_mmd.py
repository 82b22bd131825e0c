"""Exact-kernel MMD between a weighted point set and a (weighted) sample, chunked.

``MMD^2 = v^T K_YY v - 2 v^T K_YX w + w^T K_XX w`` (Gretton et al. 2012, Lemma 6, the biased
V-statistic form with weights), where ``Y`` are the target rows with weights ``v`` and ``X``
the chosen points with weights ``w``. The ``Y``-``Y`` term is accumulated in row blocks over
the upper triangle, so memory is ``block * n`` kernel values, never ``n * n``.

References
----------
.. [1] Gretton, A., Borgwardt, K. M., Rasch, M. J., Schölkopf, B. and Smola, A. (2012).
   A kernel two-sample test. Journal of Machine Learning Research 13, 723-773.
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
        Non-negative, normalised here to sum one (uniform when None).
    kernel : str or Kernel
    bandwidth : float
    block_elems : int
        Kernel values per block (default 2^19, 4 MB: small blocks stay in cache).
    precision : {"single", "double"}
        Precision of the ``exp``/``sqrt`` evaluations (distances and sums are float64).
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
        progress: Progress | None = None,
    ) -> None:
        self.y = np.ascontiguousarray(target, dtype=np.float64)
        n = self.y.shape[0]
        v = np.ones(n) if target_weights is None else np.asarray(target_weights, np.float64)
        self.v = v / np.sum(v)
        self.kernel = get_kernel(kernel)
        self.bandwidth = float(bandwidth)
        self.block = max(1, int(block_elems) // max(n, 1))
        self.progress = progress
        # exp/sqrt of the target-target block in single precision (distances and all sums
        # stay float64); see the precision check in tests/test_thin_mmd.py
        self.dtype = np.float32 if precision == "single" else np.float64
        self._self_term: float | None = None

    @property
    def self_term(self) -> float:
        """``v^T K_YY v`` over the upper triangle in row blocks (symmetry halves the work)."""
        if self._self_term is None:
            y, v, n = self.y, self.v, self.y.shape[0]
            total = 0.0
            for a in range(0, n, self.block):
                b = min(n, a + self.block)
                k = self.kernel.gram(y[a:b], y[a:], self.bandwidth, dtype=self.dtype)
                k = k.astype(np.float64, copy=False)  # float64 accumulation
                # upper triangle: off-diagonal blocks count twice, the diagonal block once
                total += 2.0 * float(v[a:b] @ (k @ v[a:])) - float(
                    v[a:b] @ (k[:, : b - a] @ v[a:b])
                )
                if self.progress is not None:
                    self.progress(b, n, "exact MMD")
            self._self_term = total
        return self._self_term

    def cross(self, points: np.ndarray, weights: np.ndarray) -> float:
        """``v^T K_YX w``."""
        y, v, n = self.y, self.v, self.y.shape[0]
        blk = max(1, self.block * max(n, 1) // max(points.shape[0], 1))
        total = 0.0
        for a in range(0, n, blk):
            b = min(n, a + blk)
            k = self.kernel.gram(y[a:b], points, self.bandwidth, dtype=self.dtype)
            total += float(v[a:b] @ (k.astype(np.float64, copy=False) @ weights))
        return total

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
    kernel : {"gaussian", "laplace", "matern32", "matern52"}
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
