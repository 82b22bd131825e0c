"""Random feature maps and the streaming mean embedding of a chain.

A feature map sends a row ``x`` (user units) to

``phi(x) = D^{-1/2} [cos(W z), sin(W z)]``,   ``z = (x - mean) / scale``,

with ``W`` (D frequencies, rows) drawn from the kernel's spectral density divided by the
bandwidth, so that ``phi(x) . phi(y) = D^{-1} sum_j cos(w_j . (z_x - z_y))`` is an unbiased
estimate of ``k(x, y)`` (Rahimi & Recht 2007, Eq. 2 and Section 3; the paired cos/sin form
has no random phase and ``|phi(x)| = 1`` exactly). The feature vector has ``2 D`` entries.

Three ways of drawing ``W``:

``rff``
    independent frequencies (Rahimi & Recht 2007).
``orf``
    orthogonal random features: within each block of ``d`` frequencies the standard-normal
    directions are exactly orthogonal (a Haar-random orthogonal matrix scaled by independent
    chi_d norms, Yu et al. 2016, Eq. 3), which keeps every frequency's marginal law and
    lowers the variance of the kernel estimate for radial kernels. The kernel's mixing
    variable (Student t radius for Matérn, Cauchy ratio for Laplace) is applied on top.
    Yu et al. prove the variance reduction for the Gaussian kernel; for the others the
    estimate is still unbiased.
``qmc``
    quasi-Monte Carlo frequencies: a scrambled Halton sequence pushed through the inverse
    CDFs (Avron et al. 2016, Section 3; scrambling makes the estimate unbiased).

References
----------
.. [1] Rahimi, A. and Recht, B. (2007). Random features for large-scale kernel machines.
   NeurIPS 20.
.. [2] Yu, F. X., Suresh, A. T., Choromanski, K., Holtmann-Rice, D. and Kumar, S. (2016).
   Orthogonal random features. NeurIPS 29.
.. [3] Avron, H., Sindhwani, V., Yang, J. and Mahoney, M. W. (2016). Quasi-Monte Carlo feature
   maps for shift-invariant kernels. Journal of Machine Learning Research 17(120), 1-38.
"""

from __future__ import annotations

import contextlib
import functools
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import numpy as np
from scipy import special

from winnow.tasks.config import FeatureMapName
from winnow.tasks.errors import InputError

from ._kernels import Kernel
from ._progress import Progress

__all__ = [
    "FEATURE_MAPS",
    "FeatureMap",
    "draw_feature_map",
    "draw_unit_frequencies",
    "features_of_rows",
    "mean_embedding",
    "one_blas_thread",
    "PHASE_ROWS",
]


def _gaussian_iid(n: int, d: int, rng: np.random.Generator) -> np.ndarray:
    return rng.standard_normal((n, d))


def _gaussian_orthogonal(n: int, d: int, rng: np.random.Generator) -> np.ndarray:
    """Blocks of ``d`` exactly orthogonal rows, each row marginally N(0, I_d) (Yu et al. 2016,
    Eq. 3: W = S Q with Q Haar-orthogonal and S diagonal with chi_d entries)."""
    blocks = []
    for _ in range(-(-n // d)):
        q, r = np.linalg.qr(rng.standard_normal((d, d)))
        q *= np.sign(np.diag(r))[None, :]  # sign fix makes Q Haar-distributed
        norms = np.sqrt(rng.chisquare(d, size=d))  # chi_d lengths restore the N(0, I) marginal
        blocks.append(q.T * norms[:, None])
    return np.concatenate(blocks, axis=0)[:n]


def _clipped_uniforms(n: int, n_mix: int, rng: np.random.Generator) -> np.ndarray:
    v = rng.random((n, n_mix))
    np.clip(v, 1e-12, 1.0 - 1e-12, out=v)
    return v


def _rff_draws(d: int, n_mix: int, n: int, rng: np.random.Generator):
    """Independent standard-normal directions (Rahimi & Recht 2007)."""
    return _gaussian_iid(n, d, rng), _clipped_uniforms(n, n_mix, rng)


def _orf_draws(d: int, n_mix: int, n: int, rng: np.random.Generator):
    """Blockwise orthogonal directions (Yu et al. 2016)."""
    return _gaussian_orthogonal(n, d, rng), _clipped_uniforms(n, n_mix, rng)


def _qmc_draws(d: int, n_mix: int, n: int, rng: np.random.Generator):
    """A scrambled Halton sequence through the inverse CDFs (Avron et al. 2016)."""
    from scipy.stats import qmc

    u = qmc.Halton(d + n_mix, scramble=True, seed=rng).random(n)
    u = np.clip(u, 1e-12, 1.0 - 1e-12)  # keep the inverse CDFs finite
    return special.ndtri(u[:, :d]), u[:, d:]


#: the feature maps by name: ``draws(d, n_mix, n, rng) -> (g, v)``, ``n`` standard-normal
#: directions ``g`` (n, d) and ``n_mix`` uniforms ``v`` (n, n_mix) per frequency, which the
#: kernel turns into its frequencies (``Kernel.frequencies``)
FEATURE_MAPS: dict[str, Callable[..., tuple[np.ndarray, np.ndarray]]] = {
    "rff": _rff_draws,
    "orf": _orf_draws,
    "qmc": _qmc_draws,
}


def draw_unit_frequencies(
    kernel: Kernel, d: int, n: int, kind: FeatureMapName, rng: np.random.Generator
) -> np.ndarray:
    """Draw ``n`` frequencies of ``kernel`` at bandwidth 1, shape (n, d)."""
    if not isinstance(kind, str) or kind not in FEATURE_MAPS:
        raise InputError(f"feature_map must be one of {sorted(FEATURE_MAPS)}, got {kind!r}")
    g, v = FEATURE_MAPS[kind](d, kernel.n_mix(d), n, rng)
    return kernel.frequencies(g, v)


@dataclass(frozen=True)
class FeatureMap:
    """A drawn feature map.

    Attributes
    ----------
    omega : ndarray, shape (D, d)
        Frequencies in standardised coordinates, already divided by the bandwidth.
    mean, scale : ndarray, shape (d,)
        Standardisation: ``z = (x - mean) / scale``.
    dtype : numpy dtype
        Precision of the feature values. float32 is the default and uses the compiled
        cos/sin kernels of ``_trig.py`` (3 to 5 times faster than numpy's float32 ``cos``
        and ``sin``, ``benchmarks/bench_trig.py``; absolute error below 2e-7); float64 uses
        numpy. Sums over rows are float32
        over at most 32 rows and float64 beyond (see :func:`mean_embedding`).
    """

    omega: np.ndarray
    mean: np.ndarray
    scale: np.ndarray
    dtype: np.dtype

    @property
    def n_features(self) -> int:
        return int(self.omega.shape[0])

    @property
    def width(self) -> int:
        """Length of a feature vector (2 D: cos and sin)."""
        return 2 * self.n_features

    def __call__(
        self, x: np.ndarray, out: np.ndarray | None = None, *, scaled: bool = True
    ) -> np.ndarray:
        """Features of rows ``x`` (user units), shape (n, 2 D).

        ``scaled=False`` leaves out the factor ``D^{-1/2}`` (the caller applies it once to a
        sum instead of to every entry)."""
        n_freq = self.n_features
        x = np.asarray(x, dtype=np.float64)
        if out is None:
            out = np.empty((x.shape[0], 2 * n_freq), dtype=self.dtype)
        head = out[:, :n_freq]
        self._phases(x, out=head)
        factor = self.dtype.type(1.0 / np.sqrt(n_freq)) if scaled else None
        if out.dtype == np.float32 and out.flags.c_contiguous:
            # compiled float32 cos and sin from one shared range reduction (_trig.py)
            _trig = _trig_module()
            _trig.cos_sin_features(out, n_freq, np.float32(1.0 if factor is None else factor))
            return out
        np.sin(head, out=out[:, n_freq:])
        np.cos(head, out=head)  # in place
        if factor is not None:
            out *= factor
        return out

    def _phases(self, x: np.ndarray, out: np.ndarray) -> np.ndarray:
        """``theta = z W^T`` of rows ``x`` (float64, user units) into ``out``, shape (n, D)."""
        z = (x - self.mean) / self.scale
        return np.matmul(z.astype(self.dtype, copy=False), self._omega_t, out=out)  # one product

    def __post_init__(self) -> None:
        # W^T in the feature precision, laid out once for the matrix product
        object.__setattr__(self, "_omega_t", np.ascontiguousarray(self.omega.T, dtype=self.dtype))


def draw_feature_map(
    kernel: Kernel,
    d: int,
    n_features: int,
    kind: FeatureMapName,
    bandwidth: float,
    mean: np.ndarray,
    scale: np.ndarray,
    rng: np.random.Generator,
    dtype: type = np.float32,
) -> FeatureMap:
    """Draw a :class:`FeatureMap` with ``n_features`` frequencies."""
    omega = draw_unit_frequencies(kernel, d, n_features, kind, rng) / bandwidth
    return FeatureMap(
        omega=omega,
        mean=np.asarray(mean, dtype=np.float64),
        scale=np.asarray(scale, dtype=np.float64),
        dtype=np.dtype(dtype),
    )


@functools.cache
def _blas_controller():
    from threadpoolctl import ThreadpoolController

    return ThreadpoolController()


@contextlib.contextmanager
def one_blas_thread() -> Iterator[None]:
    """Run the block with the BLAS library on one thread.

    The feature product ``z @ W^T`` has an inner dimension of only ``d``; OpenBLAS splits
    such a product across its threads at a large loss (measured 0.8 ns per entry on one
    thread against 4 to 16 ns on two, ``benchmarks/bench_thin.py``) and fights the chunk
    workers for the same cores. Parallelism comes from the chunk workers instead."""
    with _blas_controller().limit(limits=1, user_api="blas"):
        yield


# rows of phases computed per product in the float32 mean-embedding pass: 32 rows of 4096
# float32 phases are 512 kB, one core's L2 cache (benchmarks/bench_trig.py)
PHASE_ROWS = 32


def _trig_module():
    """The compiled cos/sin kernels, imported on first use (numba takes ~0.5 s to import)."""
    from . import _trig as _trig

    return _trig


def _chunks(n: int, chunk: int):
    for start in range(0, n, chunk):
        yield start, min(n, start + chunk)


def features_of_rows(
    fmap: FeatureMap, x: np.ndarray, rows: np.ndarray | None, *, chunk_size: int
) -> np.ndarray:
    """Features of ``x[rows]`` (all rows when ``rows`` is None), shape (len(rows), 2 D)."""
    n = x.shape[0] if rows is None else rows.shape[0]
    out = np.empty((n, fmap.width), dtype=fmap.dtype)
    with one_blas_thread():
        for a, b in _chunks(n, chunk_size):
            part = x[a:b] if rows is None else x[rows[a:b]]
            fmap(part, out=out[a:b])
    return out


def mean_embedding(
    fmap: FeatureMap,
    x: np.ndarray,
    rows: np.ndarray | None,
    counts: np.ndarray,
    *,
    chunk_size: int,
    workers: int = 1,
    progress: Progress | None = None,
    phase_rows: int = PHASE_ROWS,
) -> np.ndarray:
    """Weighted mean of the features of ``x[rows]``, streamed in chunks.

    Parameters
    ----------
    fmap : FeatureMap
    x : ndarray, shape (n, d)
        Chain rows in user units (not copied).
    rows : ndarray of int, shape (k,), or None
        Which rows of ``x`` to embed (the distinct rows); None for all rows.
    counts : ndarray, shape (k,)
        Multiplicity of each embedded row.
    chunk_size : int
        Rows per chunk: memory is at most ``workers * chunk_size * 2 D`` feature values at
        a time (float32 maps store only ``workers * 32 * D`` phases). float32 maps sum 32
        rows at a time in float32 and add those sums in float64; float64 maps sum each chunk
        in float64. Chunk sums are added to a float64 total in chunk order.
    workers : int
        Threads computing chunks (the result is bit-identical for any number).
    phase_rows : int
        Rows of phases per product in the float32 pass (``PHASE_ROWS``: one core's L2
        cache at D = 4096; ``benchmarks/bench_trig.py`` compares others).

    Returns
    -------
    ndarray of float64, shape (2 D,)
        ``sum_i counts_i phi(x_i) / sum_i counts_i``, accumulated in float64.
    """
    n = x.shape[0] if rows is None else rows.shape[0]
    spans = list(_chunks(n, chunk_size))
    workers = max(1, min(int(workers), len(spans)))
    rows_per_buf = min(chunk_size, max(n, 1))
    n_freq = fmap.n_features
    compiled = fmap.dtype == np.float32
    if compiled:
        # float32: the compiled kernel sums cos and sin of the phases straight into float32
        # accumulators, 32 rows at a time, added to a float64 chunk total; only the phases
        # theta (32, D) are ever stored, not the (n, 2 D) features
        _trig = _trig_module()
        weights = np.ascontiguousarray(counts, dtype=np.float32)
        block = min(phase_rows, rows_per_buf)
        bufs = [np.empty((block, n_freq), dtype=np.float32) for _ in range(workers)]
    else:
        bufs = [np.empty((rows_per_buf, fmap.width), dtype=fmap.dtype) for _ in range(workers)]

    def chunk_sum(k: int, buf: np.ndarray) -> np.ndarray:
        a, b = spans[k]
        part = x[a:b] if rows is None else x[rows[a:b]]
        if compiled:
            part = np.asarray(part, dtype=np.float64)
            total = np.zeros(2 * n_freq, dtype=np.float64)
            sums = np.empty(2 * n_freq, dtype=np.float32)
            # the phases of a few rows at a time stay in the core's L2 cache between the
            # product that writes them and the kernel that reads them; each block's float32
            # sum goes into a float64 total at once (a short float32 sum, a cheap float64 add)
            for s0 in range(0, b - a, buf.shape[0]):
                s1 = min(b - a, s0 + buf.shape[0])
                theta = fmap._phases(part[s0:s1], out=buf[: s1 - s0])
                sums[:] = 0.0
                _trig.cos_sin_sums(theta, weights[a + s0 : a + s1], sums[:n_freq], sums[n_freq:])
                total += sums
            return total
        phi = fmap(part, out=buf[: b - a], scaled=False)
        return counts[a:b].astype(fmap.dtype) @ phi  # one chunk summed by BLAS

    acc = np.zeros(fmap.width, dtype=np.float64)
    with one_blas_thread():
        if workers == 1:
            for k in range(len(spans)):
                acc += chunk_sum(k, bufs[0])
                if progress is not None:
                    progress(spans[k][1], n, "mean embedding")
        else:
            # numpy's matmul and the compiled kernels (nogil) release the GIL, so threads
            # share the work; each round computes ``workers`` chunks and adds them in chunk
            # order, so the float64 sum is bit-identical to the one-thread result
            from concurrent.futures import ThreadPoolExecutor

            with ThreadPoolExecutor(max_workers=workers) as pool:
                for r in range(0, len(spans), workers):
                    ks = range(r, min(r + workers, len(spans)))
                    for part in pool.map(chunk_sum, ks, bufs):
                        acc += part
                    if progress is not None:
                        progress(spans[ks[-1]][1], n, "mean embedding")
    return acc / (float(np.sum(counts)) * np.sqrt(fmap.n_features))
