"""Edits of a selection: add points (``extend``), replace failed ones (``replace``), a
selection sharing no row with it (``disjoint``), re-solved weights of a subset (``reweight``).

Each reads the selection's recorded settings back through the settings model
(:func:`~._options.options_of`) and runs the engine with the selection's rows kept or left
out.
"""

from __future__ import annotations

from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from winnow.tasks.config import MethodName
from winnow.tasks.records import Chain, Selection

from ._options import _validate_choice, _validate_int, _validate_samples, options_of
from ._progress import Progress
from ._run import run

__all__ = ["disjoint", "extend", "reweight", "replace"]


def _check_belongs(x: np.ndarray, selection: Selection) -> None:
    idx = np.asarray(selection.indices, dtype=np.int64)
    if idx.size and (idx.min() < 0 or idx.max() >= x.shape[0]):
        raise ValueError("selection does not belong to samples: indices out of range")
    if selection.points.shape != (idx.size, x.shape[1]) or not np.array_equal(
        x[idx], selection.points
    ):
        raise ValueError("selection does not belong to samples: points differ from the rows")


def extend(
    samples: npt.ArrayLike | Chain,
    selection: Selection,
    k: int,
    *,
    rng: np.random.Generator | int | None = None,
    method: MethodName | None = None,
    progress: Progress | None = None,
    **options: Any,
) -> Selection:
    """Add ``k`` points to ``selection``, keeping its points first and in order.

    The kernel, bandwidth, feature map, feature count and weights rule are the selection's;
    with the same ``rng`` as the original (default: ``selection.seed``) the same features are
    drawn, so the greedy selection continues where it stopped. Weights are re-solved over all
    ``m + k`` points. ``options`` override thin()'s keywords or pass selector options.
    """
    x = _validate_samples(samples)
    k = _validate_int("k", k, 1)
    _check_belongs(x, selection)
    s, method_options = options_of(selection, method, options)
    return run(
        x,
        selection.m + k,
        s,
        method_options,
        selection.seed if rng is None else rng,
        progress,
        fixed_rows=np.asarray(selection.indices),
        purpose="extend",
    )


def _selection_rows(selection: Selection, items: Any, by: str, name: str) -> np.ndarray:
    """Chain rows named by ``items``: selection positions (``by="position"``) or chain row
    indices that must be in the selection (``by="index"``)."""
    _validate_choice("by", by, ("index", "position"))
    a = np.asarray(items)
    if a.ndim != 1 or (a.size and not np.issubdtype(a.dtype, np.integer)):
        raise TypeError(f"{name} must be a 1-D sequence of integers, got {items!r}")
    a = a.astype(np.int64)
    idx = np.asarray(selection.indices, dtype=np.int64)
    if by == "position":
        if np.any(a < 0) or np.any(a >= idx.size):
            raise ValueError(f"{name} positions must be in 0..{idx.size - 1}, got {a.tolist()}")
        return idx[a]
    missing = np.setdiff1d(a, idx)
    if missing.size:
        raise ValueError(f"{name} has indices not in the selection: {missing.tolist()}")
    return a


def replace(
    samples: npt.ArrayLike | Chain,
    selection: Selection,
    failed: npt.ArrayLike,
    *,
    by: Literal["index", "position"] = "index",
    rng: np.random.Generator | int | None = None,
    method: MethodName | None = None,
    progress: Progress | None = None,
    **options: Any,
) -> Selection:
    """Replace failed points: survivors are kept first, the best substitutes are added.

    Parameters
    ----------
    failed : array_like of int
        Chain row indices (``by="index"``, entries of ``selection.indices``) or positions
        ``0..m-1`` in the selection (``by="position"``). Failed rows (and rows with the same
        value) are never chosen again.
    """
    x = _validate_samples(samples)
    _check_belongs(x, selection)
    failed_rows = _selection_rows(selection, failed, by, "failed")
    idx = np.asarray(selection.indices, dtype=np.int64)
    survivors = idx[~np.isin(idx, failed_rows)]
    s, method_options = options_of(selection, method, options)
    return run(
        x,
        selection.m,
        s,
        method_options,
        selection.seed if rng is None else rng,
        progress,
        fixed_rows=survivors,
        excluded_rows=failed_rows,
        purpose="replace",
    )


def disjoint(
    samples: npt.ArrayLike | Chain,
    selection: Selection,
    budget: int | None = None,
    *,
    rng: np.random.Generator | int | None = None,
    method: MethodName | None = None,
    progress: Progress | None = None,
    **options: Any,
) -> Selection:
    """A new selection sharing no row (and no repeated value) with ``selection``.

    ``budget`` defaults to ``selection.m``; settings are the selection's.
    """
    x = _validate_samples(samples)
    _check_belongs(x, selection)
    m = selection.m if budget is None else _validate_int("budget", budget, 1)
    s, method_options = options_of(selection, method, options)
    return run(
        x,
        m,
        s,
        method_options,
        selection.seed if rng is None else rng,
        progress,
        excluded_rows=np.asarray(selection.indices),
        purpose="disjoint",
    )


def reweight(
    samples: npt.ArrayLike | Chain,
    selection: Selection,
    keep: npt.ArrayLike,
    *,
    by: Literal["index", "position"] = "position",
    progress: Progress | None = None,
) -> Selection:
    """Re-solve the weights of a subset of a selection's points against the whole chain.

    Used when some chosen points have no result (their costly runs failed): the surviving
    points get the weights that are optimal *for them*, with the selection's own kernel,
    bandwidth, feature map and seed, rather than their old weights renormalised.

    Parameters
    ----------
    samples : array_like, shape (n, d), or Chain
        The chain the selection was made from.
    selection : Selection
    keep : array_like of int
        Positions ``0..m-1`` in the selection (``by="position"``) or chain row indices
        (``by="index"``) of the surviving points.

    Returns
    -------
    Selection
        The surviving points in the order given, their re-solved weights and MMDs; compare
        ``mmd_exact`` with the original selection's to see how much the discrepancy grew.
    """
    x = _validate_samples(samples)
    _check_belongs(x, selection)
    if np.size(keep) == 0:
        raise ValueError(f"keep must be a non-empty 1-D sequence of integers, got {keep!r}")
    rows = _selection_rows(selection, keep, by, "keep")
    if np.unique(rows).size != rows.size:
        raise ValueError(f"keep names a point twice: {np.asarray(keep).tolist()}")
    s, method_options = options_of(selection, None, {})
    # every point is fixed, so no selection happens: only the weights are solved
    return run(
        x, rows.size, s, method_options, selection.seed, progress, fixed_rows=rows,
        purpose="reweight",
    )  # fmt: skip
