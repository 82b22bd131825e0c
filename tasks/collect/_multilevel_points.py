"""The points of every level of a multilevel study, chosen with the thin stage (issue 16).

``nested``
    The coarsest level's points are the thin stage's selection of the chain (:func:`thin`).
    Each finer level's points are a subset of the next coarser level's, chosen to minimise the
    MMD of the subset *to the whole chain*: the coarser level's points form the candidate pool
    of the thin stage's selector (the selection's own method, kernel, bandwidth,
    standardisation, feature map and feature count, on a feature draw of the level's own
    seed), with the chain's mean embedding as the target. The subset's weights are then
    re-solved against the whole chain by :func:`reweight` (the optimal simplex weights of
    those points, with the coarser selection's own features), so every level's weighted
    points stand for the whole chain, not for the coarser level's points. A chosen point the
    re-solved weights leave without weight is barred and the selector chooses again (the thin
    stage's rule for such points: no costly run is wasted). Each correction
    ``Q_l - Q_{l-1}`` is then computed at points where both runs exist.
``disjoint``
    Level 0 as above; each finer level is the thin stage's best selection sharing no row
    (and no repeated value) with any coarser level (:func:`disjoint`), so the levels are
    independent draws of the thinning.

Every level draws from its own random stream: one integer seed per level, spawned from the
one ``rng`` given (:class:`numpy.random.SeedSequence`), recorded in the level's selection.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from winnow.tasks.config import ThinSettings
from winnow.tasks.errors import InputError
from winnow.tasks.records import Chain, Selection
from winnow.tasks.thin import (
    Problem,
    disjoint,
    draw_feature_map,
    extend,
    features_of_rows,
    get_kernel,
    get_selector,
    mean_embedding,
    reweight,
    thin,
)

__all__ = ["LevelPoints", "MultilevelPoints", "extend_levels", "select_levels"]

_CHUNK = 4096  # rows per feature chunk of the subset search (memory only, not the result)
_SEED_BITS = 63
_NO_WEIGHT = 1e-6  # a point's weight at most this / m is none (the thin stage's rule)
_ROUNDS = 3  # subset rounds that replace points left without weight


@dataclass(frozen=True, eq=False)
class LevelPoints:
    """The chosen points of one level.

    Attributes
    ----------
    name : str
        Level name.
    level : int
        Position, 0 = coarsest.
    indices : ndarray of int64, shape (m,)
        Chain rows of the points (``selection.indices``).
    weights : ndarray of float64, shape (m,)
        Their weights against the whole chain (``selection.weights``).
    selection : Selection
        The thin stage's record of the level (settings, MMDs, seed, report).
    rule : str
        How the points were chosen (provenance of the level's runs).
    parent : str or None
        The level the points were chosen from (nested) or kept apart from (disjoint).
    seed : int
        The level's own seed.
    """

    name: str
    level: int
    indices: np.ndarray
    weights: np.ndarray
    selection: Selection
    rule: str
    parent: str | None
    seed: int

    @property
    def m(self) -> int:
        return int(self.indices.size)


@dataclass(frozen=True, eq=False)
class MultilevelPoints:
    """The points of every level, coarse to fine, and how they relate."""

    pairing: Literal["nested", "disjoint"]
    levels: tuple[LevelPoints, ...]
    entropy: int

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.levels)


# --------------------------------------------------------------------------------------------
# validation helpers
# --------------------------------------------------------------------------------------------
def _validate_samples(samples: npt.ArrayLike | Chain) -> np.ndarray:
    x = np.asarray(samples.samples if isinstance(samples, Chain) else samples, dtype=np.float64)
    if x.ndim != 2 or x.shape[0] == 0 or x.shape[1] == 0:
        raise InputError(f"samples: expected a non-empty array of shape (n, d), got {x.shape}")
    return x


def _validate_budgets(budgets: Sequence[int], pairing: str) -> list[int]:
    if isinstance(budgets, str | bytes) or not isinstance(budgets, Sequence) or len(budgets) < 2:
        raise InputError(
            f"budgets: expected at least 2 run counts, coarse to fine, got {budgets!r}"
        )
    out = []
    for k, b in enumerate(budgets):
        if isinstance(b, bool) or not isinstance(b, int | np.integer) or b < 2:
            raise InputError(f"budgets[{k}]: expected an integer >= 2, got {b!r}")
        out.append(int(b))
    if pairing == "nested":
        for k in range(1, len(out)):
            if out[k] > out[k - 1]:
                raise InputError(
                    f"budgets[{k}]: with pairing 'nested' a level's points are a subset of the "
                    f"coarser level's, so at most {out[k - 1]}, got {out[k]}"
                )
    return out


def _validate_names(names: Sequence[str] | None, n: int) -> tuple[str, ...]:
    if names is None:
        return tuple(f"level{k}" for k in range(n))
    names = tuple(names)
    if len(names) != n or not all(isinstance(s, str) and s for s in names):
        raise InputError(f"names: expected {n} non-empty names, got {names!r}")
    if len(set(names)) != n:
        raise InputError(f"names: expected distinct names, got {list(names)}")
    return names


def _validate_pairing(pairing: Any) -> str:
    if pairing not in _PAIRINGS:
        raise InputError(f"pairing: expected one of {sorted(_PAIRINGS)}, got {pairing!r}")
    return pairing


def _level_seeds(rng: int | np.random.Generator | None, n: int) -> tuple[int, list[int]]:
    """One integer seed per level from one seed or generator (independent streams)."""
    if isinstance(rng, np.random.Generator):
        entropy = int(rng.integers(0, 2**_SEED_BITS))
    elif rng is None:
        entropy = int(np.random.SeedSequence().entropy)
    elif isinstance(rng, int | np.integer) and not isinstance(rng, bool) and rng >= 0:
        entropy = int(rng)
    else:
        raise InputError(f"rng: expected a seed (int >= 0) or a numpy Generator, got {rng!r}")
    children = np.random.SeedSequence(entropy).spawn(n)
    seeds = [int(c.generate_state(1, np.uint64)[0] >> np.uint64(64 - _SEED_BITS)) for c in children]
    return entropy, seeds


# --------------------------------------------------------------------------------------------
# the nested subset
# --------------------------------------------------------------------------------------------
def _subset_problem(x: np.ndarray, parent: Selection, gen: np.random.Generator) -> Problem:
    """The selector's problem on ``parent``'s points: their features as the candidate pool
    and the whole chain's mean embedding as the target, with ``parent``'s kernel, bandwidth,
    standardisation, feature map and feature count (a feature draw of ``gen``)."""
    rep = parent.report
    d = x.shape[1]
    mean = np.asarray(rep.get("standardisation_mean", np.zeros(d)), dtype=np.float64)
    scale = np.asarray(rep.get("standardisation_scale", np.ones(d)), dtype=np.float64)
    kern = get_kernel(parent.kernel)
    fmap = draw_feature_map(
        kern, d, parent.n_features, parent.feature_map, parent.bandwidth, mean, scale, gen
    )
    finite = np.flatnonzero(np.all(np.isfinite(x), axis=1))  # the chain the thin stage saw
    mu = mean_embedding(fmap, x, finite, np.ones(finite.size), chunk_size=_CHUNK)
    m0 = parent.m
    phi = features_of_rows(fmap, x, np.asarray(parent.indices), chunk_size=_CHUNK)
    return Problem(
        phi=phi, mu=mu, pool=np.arange(m0), counts=np.ones(m0, np.int64),
        inverse=np.arange(m0), allowed=np.ones(m0, bool), fixed=np.zeros(0, np.int64),
        weights_rule=parent.weights_rule, features_of=lambda ids: phi[np.asarray(ids)],
        coords=(parent.points - mean) / scale,
    )  # fmt: skip


def _method_of(root: Selection) -> tuple[str, dict[str, Any]]:
    """The selector (name, options) that chose the coarsest level: a re-weighted record
    names no selector of its own."""
    return root.method, dict(root.report.get("method_options") or {})


# long: the subset rounds (choose, re-solve weights, leave out points without weight) in one
def _nested_level(
    x: np.ndarray,
    parent: LevelPoints,
    name: str,
    level: int,
    k: int,
    seed: int,
    method: tuple[str, dict[str, Any]],
    keep: np.ndarray | None = None,
) -> LevelPoints:
    """Level ``level``: ``k`` of ``parent``'s points (``keep``: positions in ``parent`` that
    stay, first and in order), chosen by the selector ``method`` to minimise the MMD to the
    whole chain, weights re-solved against the whole chain by :func:`reweight`.

    As in the thin stage, a chosen point the re-solved weights leave without weight
    (``w <= 1e-6 / k``) would be a wasted run: it is barred and the selector chooses again
    with the weighted points kept, for up to ``_ROUNDS`` rounds; points still without weight
    are left out (the level then has fewer points, said in ``rule``).
    """
    gen = np.random.default_rng(seed)
    problem = _subset_problem(x, parent.selection, gen)
    selector = get_selector(method[0], **method[1])
    keep = np.zeros(0, np.int64) if keep is None else np.asarray(keep, dtype=np.int64)
    want = k
    k = min(k, parent.m)  # the thin stage may have left points of the parent out
    fixed, allowed = keep, np.ones(parent.m, dtype=bool)
    rounds = 0
    while True:
        rounds += 1
        result = selector.select(problem.with_rows(fixed, allowed), k, gen)
        pos = np.asarray(result.ids, dtype=np.int64)
        sel = reweight(x, parent.selection, pos, by="position")
        unweighted = (sel.weights <= _NO_WEIGHT / k) & ~np.isin(pos, keep)
        if not unweighted.any():
            break
        allowed[pos[unweighted]] = False
        fixed = pos[~unweighted]  # the kept points first, in order
        if rounds == _ROUNDS or int(allowed.sum()) < k:
            pos = fixed
            sel = reweight(x, parent.selection, pos, by="position")
            break
    report = {**sel.report, "purpose": "multilevel nested subset", "subset": dict(result.info)}
    report["subset_rounds"] = rounds
    sel = dataclasses.replace(sel, report=report)
    rule = (
        f"nested: {sel.m} of the {parent.m} points of level {parent.name!r}, chosen by the "
        f"{method[0]!r} selector to minimise the MMD to the whole chain; weights re-solved "
        "against the whole chain"
    )
    if sel.m < want:
        rule += f" ({want - sel.m} fewer than the {want} asked: no more points carry weight)"
    return LevelPoints(name, level, sel.indices, sel.weights, sel, rule, parent.name, seed)


# --------------------------------------------------------------------------------------------
# the disjoint levels
# --------------------------------------------------------------------------------------------
def _holding(x: np.ndarray, template: Selection, rows: np.ndarray) -> Selection:
    """A selection record holding ``rows`` (with ``template``'s settings): the rows a
    :func:`disjoint` selection must keep away from, or the rows to re-solve weights of."""
    rows = np.asarray(rows, dtype=np.int64)
    return dataclasses.replace(
        template,
        indices=rows,
        points=x[rows].copy(),
        weights=np.full(rows.size, 1.0 / rows.size),
        population=None,
    )


def _disjoint_level(
    x: np.ndarray, earlier: Sequence[LevelPoints], name: str, level: int, k: int, seed: int
) -> LevelPoints:
    taken = np.concatenate([p.indices for p in earlier])
    sel = disjoint(x, _holding(x, earlier[0].selection, taken), k, rng=seed)
    rule = (
        f"disjoint: the thin stage's best {k} points sharing no row with levels "
        f"{[p.name for p in earlier]}"
    )
    return LevelPoints(name, level, sel.indices, sel.weights, sel, rule, earlier[-1].name, seed)


_PAIRINGS = {"nested": _nested_level, "disjoint": _disjoint_level}


# --------------------------------------------------------------------------------------------
# public entry points
# --------------------------------------------------------------------------------------------
def select_levels(
    samples: npt.ArrayLike | Chain,
    budgets: Sequence[int],
    *,
    pairing: Literal["nested", "disjoint"] = "nested",
    names: Sequence[str] | None = None,
    rng: int | np.random.Generator | None = None,
    settings: ThinSettings | None = None,
    **options: Any,
) -> MultilevelPoints:
    """Choose the points of every level of a multilevel study.

    Parameters
    ----------
    samples : array_like, shape (n, d), or Chain
        The posterior chain in user units.
    budgets : sequence of int, length L + 1 >= 2
        Points per level, coarse to fine (each >= 2; non-increasing for ``nested``).
    pairing : {"nested", "disjoint"}
        See the module docstring.
    names : sequence of str, optional
        Level names (``level0``, ``level1``, ... by default).
    rng : int or Generator, optional
        One seed; every level gets its own stream spawned from it.
    settings : ThinSettings, optional
        The thin stage's settings (a study's ``config.thin``); ``options`` as for
        :func:`thin`.

    Returns
    -------
    MultilevelPoints
        Per level: chain row indices, weights against the whole chain, the thin record and
        the rule that chose them. A level may hold fewer points than its budget: the thin
        stage leaves out points its optimal weights give no weight (its report says so),
        and a nested level has at most its parent's points (``rule`` says when).
    """
    pairing = _validate_pairing(pairing)
    x = _validate_samples(samples)
    budgets = _validate_budgets(budgets, pairing)
    names = _validate_names(names, len(budgets))
    entropy, seeds = _level_seeds(rng, len(budgets))
    first = thin(x, budgets[0], rng=seeds[0], settings=settings, **options)
    levels = [
        LevelPoints(
            names[0], 0, first.indices, first.weights, first,
            "the thin stage's selection of the whole chain", None, seeds[0],
        )
    ]  # fmt: skip
    for k in range(1, len(budgets)):
        if pairing == "nested":
            levels.append(
                _nested_level(x, levels[-1], names[k], k, budgets[k], seeds[k], _method_of(first))
            )
        else:
            levels.append(_disjoint_level(x, levels, names[k], k, budgets[k], seeds[k]))
    return MultilevelPoints(pairing, tuple(levels), entropy)


def extend_levels(
    samples: npt.ArrayLike | Chain, points: MultilevelPoints, extra: Sequence[int]
) -> MultilevelPoints:
    """Add ``extra[l]`` points to each level, keeping every level's points first.

    Nested: level 0 grows by :func:`extend` (its points first), each finer level is re-chosen
    from its grown parent with its own points kept (``fixed``), weights re-solved; the levels
    stay nested. Disjoint: each level's new points are the best ``extra[l]`` sharing no row
    with any level (:func:`disjoint`), and the level's weights are re-solved over old and new
    points together (:func:`reweight`). The levels' seeds are reused.
    """
    x = _validate_samples(samples)
    if not isinstance(points, MultilevelPoints):
        raise InputError(f"points: expected MultilevelPoints, got {type(points).__name__}")
    n = len(points.levels)
    if len(extra) != n:
        raise InputError(f"extra: expected {n} counts (one per level), got {len(extra)}")
    add = []
    for k, e in enumerate(extra):
        if isinstance(e, bool) or not isinstance(e, int | np.integer) or e < 0:
            raise InputError(f"extra[{k}]: expected an integer >= 0, got {e!r}")
        add.append(int(e))
    sizes = [p.m + a for p, a in zip(points.levels, add, strict=True)]
    if points.pairing == "nested":
        _validate_budgets(sizes, "nested")
        return _extend_nested(x, points, add)
    return _extend_disjoint(x, points, add)


def _extend_nested(x: np.ndarray, points: MultilevelPoints, add: list[int]) -> MultilevelPoints:
    old = points.levels
    base = old[0]
    sel = base.selection if add[0] == 0 else extend(x, base.selection, add[0], rng=base.seed)
    levels = [dataclasses.replace(base, indices=sel.indices, weights=sel.weights, selection=sel)]
    method = _method_of(base.selection)
    for k in range(1, len(old)):
        if add[k] == 0:  # its points are still a subset of the grown parent's
            levels.append(old[k])
            continue
        parent = levels[-1]
        # the level's own points, at their places in the grown parent (kept first, in order)
        where = {int(r): p for p, r in enumerate(parent.indices)}
        keep = np.array([where[int(r)] for r in old[k].indices], dtype=np.int64)
        levels.append(
            _nested_level(x, parent, old[k].name, k, old[k].m + add[k], old[k].seed, method, keep)
        )
    return MultilevelPoints("nested", tuple(levels), points.entropy)


def _extend_disjoint(x: np.ndarray, points: MultilevelPoints, add: list[int]) -> MultilevelPoints:
    levels = list(points.levels)
    for k, lp in enumerate(points.levels):
        if add[k] == 0:
            continue
        taken = np.concatenate([p.indices for p in levels])
        # the level's seed + 1: another stream than the one that chose its first points
        new = disjoint(x, _holding(x, lp.selection, taken), add[k], rng=lp.seed + 1)
        rows = np.concatenate([lp.indices, new.indices])
        both = _holding(x, lp.selection, rows)
        sel = reweight(x, both, np.arange(rows.size), by="position")
        sel = dataclasses.replace(sel, report={**sel.report, "purpose": "multilevel extend"})
        levels[k] = dataclasses.replace(lp, indices=sel.indices, weights=sel.weights, selection=sel)
    return MultilevelPoints("disjoint", tuple(levels), points.entropy)
