"""Preparation of a chain for thinning: non-finite rows, repeated rows, standardisation.

Rows with NaN/inf are dropped (counted) or refused; repeated rows (Metropolis rejections) are
merged, their multiplicity kept as weight; each parameter is standardised (mixed units).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from winnow.tasks.errors import InputError

__all__ = ["Prepared", "prepare", "weighted_sample"]


@dataclass
class Prepared:
    x: np.ndarray  # all rows as given
    finite_rows: np.ndarray | None  # positions of finite rows (None: all finite)
    first: np.ndarray  # (n_distinct,) row (as given) of each distinct value's first occurrence
    counts: np.ndarray  # (n_distinct,) multiplicities
    inverse: np.ndarray  # (n_finite,) distinct id of each finite row, in order
    mean: np.ndarray
    scale: np.ndarray
    n_dropped: int

    @property
    def n_finite(self) -> int:
        return int(self.inverse.size)

    @property
    def n_distinct(self) -> int:
        return int(self.first.size)

    @property
    def rows(self) -> np.ndarray | None:
        """Rows of ``x`` to embed (None when every row is finite and distinct, no copy)."""
        if self.first.size == self.x.shape[0]:
            return None
        return self.first

    def ids_of_rows(self, rows: np.ndarray, name: str) -> np.ndarray:
        """Distinct ids of rows given as indices into the input."""
        rows = np.asarray(rows, dtype=np.int64)
        if np.any(rows < 0) or np.any(rows >= self.x.shape[0]):
            raise ValueError(f"{name} has row indices outside 0..{self.x.shape[0] - 1}")
        if self.finite_rows is None:
            return self.inverse[rows]
        pos = np.searchsorted(self.finite_rows, rows)
        pos = np.minimum(pos, self.finite_rows.size - 1)
        if np.any(self.finite_rows[pos] != rows):
            raise ValueError(f"{name} refers to rows with NaN or inf values")
        return self.inverse[pos]

    def standardised(self, ids: np.ndarray) -> np.ndarray:
        return (self.x[self.first[ids]] - self.mean) / self.scale


def _hash_rows(x: np.ndarray, rows: np.ndarray | None, chunk: int) -> np.ndarray:
    """64-bit hash of each row's bit pattern (fixed odd multipliers, wrapping sums)."""
    d = x.shape[1]
    mult = (np.arange(1, d + 1, dtype=np.uint64) * np.uint64(0x9E3779B97F4A7C15)) | np.uint64(1)
    n = x.shape[0] if rows is None else rows.size
    out = np.empty(n, dtype=np.uint64)
    for a in range(0, n, chunk):
        b = min(n, a + chunk)
        part = (x[a:b] if rows is None else x[rows[a:b]]) + 0.0  # -0.0 -> 0.0
        bits = part.view(np.uint64)
        bits = (bits ^ (bits >> np.uint64(29))) * mult
        out[a:b] = bits.sum(axis=1, dtype=np.uint64)
    return out


def _dedup(x: np.ndarray, rows: np.ndarray | None, chunk: int):
    """Distinct rows in order of first occurrence: (first positions, counts, inverse)."""
    h = _hash_rows(x, rows, chunk)
    _, first, inverse, counts = np.unique(
        h, return_index=True, return_inverse=True, return_counts=True
    )
    n = h.size
    same = True
    for a in range(0, n, chunk):  # hashes can collide: check every row against its group's
        b = min(n, a + chunk)
        src = np.arange(a, b) if rows is None else rows[a:b]
        ref = first[inverse[a:b]]
        ref = ref if rows is None else rows[ref]
        if not np.array_equal(x[src], x[ref]):
            same = False
            break
    if not same:  # exact, slower fallback
        sub = x if rows is None else x[rows]
        _, first, inverse, counts = np.unique(
            sub, axis=0, return_index=True, return_inverse=True, return_counts=True
        )
    order = np.argsort(first, kind="stable")
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    return first[order], counts[order].astype(np.int64), rank[inverse.ravel()].astype(np.int64)


def prepare(x: np.ndarray, nonfinite: str, standardise: bool, chunk: int) -> Prepared:
    finite = np.isfinite(x).all(axis=1)
    n_bad = int(x.shape[0] - np.count_nonzero(finite))
    if n_bad and nonfinite == "raise":
        raise InputError(
            f"samples has {n_bad} row(s) with NaN or inf values (nonfinite='raise'); "
            f"first at row {int(np.flatnonzero(~finite)[0])}"
        )
    finite_rows = None if n_bad == 0 else np.flatnonzero(finite)
    if finite_rows is not None and finite_rows.size == 0:
        raise InputError("samples has no row with all values finite")
    first, counts, inverse = _dedup(x, finite_rows, chunk)
    if finite_rows is not None:
        first = finite_rows[first]
    d = x.shape[1]
    if standardise:
        # chunked passes over the finite rows, float64 sums; every column is first divided
        # by its largest magnitude so that sums of squares cannot overflow (values up to
        # ~1.8e308 are valid chains: a column of 1e300s standardises like any other)
        n = inverse.size

        def rows(a: int, b: int) -> np.ndarray:
            return x[a:b] if finite_rows is None else x[finite_rows[a:b]]

        big = np.zeros(d)
        for a in range(0, n, chunk):
            np.maximum(big, np.abs(rows(a, min(n, a + chunk))).max(axis=0), out=big)
        big[big == 0] = 1.0
        total = np.zeros(d)
        for a in range(0, n, chunk):
            total += (rows(a, min(n, a + chunk)) / big).sum(axis=0)
        mean_u = total / n
        sq = np.zeros(d)
        for a in range(0, n, chunk):
            part = rows(a, min(n, a + chunk)) / big - mean_u
            sq += np.einsum("ij,ij->j", part, part)
        mean = mean_u * big
        scale = np.sqrt(sq / n) * big
        scale[~(np.isfinite(scale) & (scale > 0))] = 1.0  # constant column: leave as is
    else:
        mean, scale = np.zeros(d), np.ones(d)
    return Prepared(x, finite_rows, first, counts, inverse, mean, scale, n_bad)


def weighted_sample(
    ids: np.ndarray, counts: np.ndarray, k: int, rng: np.random.Generator
) -> np.ndarray:
    """``k`` of ``ids`` without replacement, chosen in proportion to ``counts``
    (Efraimidis & Spirakis 2006 keys ``log(u) / w``)."""
    if k >= ids.size:
        return ids.copy()
    keys = np.log(rng.random(ids.size)) / counts[ids]
    return np.sort(ids[np.argpartition(-keys, k - 1)[:k]])
