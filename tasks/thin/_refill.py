"""Chosen points left without weight: replaced by the selector's next choices, or left out.

With simplex weights the optimal weights can put some chosen points at zero; a costly run
spent on such a point is wasted. See :func:`refill`.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from ._progress import Progress
from ._selector import Problem, Selector, SelectorResult

__all__ = ["WEIGHT_FLOOR", "refill"]

# a chosen point "carries weight" when w_i > WEIGHT_FLOOR / m (see refill)
WEIGHT_FLOOR = 1e-6
_REFILL_ROUNDS = 8  # rounds of replacing points without weight, at most


def refill(
    problem: Problem,
    selector: Selector,
    result: SelectorResult,
    w: np.ndarray,
    mmd: float,
    weigh: Callable[..., tuple[np.ndarray, float]],
    exact_of: Callable[[np.ndarray, np.ndarray], float] | None,
    m: int,
    rng: np.random.Generator,
    *,
    off: str | None,
    progress: Progress | None = None,
) -> tuple[SelectorResult, np.ndarray, float, float, dict[str, Any]]:
    """Replace chosen points that carry no weight, so that no costly run is spent on them.

    A point carries weight when ``w_i > 1e-6 / m``. The simplex solver (active set) puts a
    point on its bound at exactly 0, but a free weight can land within round-off of it; the
    floor is far above round-off (the solver works to ~1e-11) and far below any weight that
    matters: leaving out points of weight ``<= 1e-6 / m`` moves the weighted embedding by at
    most ``2e-6`` in norm (``|phi| = 1``), so the MMD by at most that much.

    Each round drops the free points without weight, keeps the others fixed (in their order,
    after the selection's own fixed rows), bans the dropped rows and lets the selector choose
    replacements from the same pool (greedy completions by the corrective rule), then
    re-solves the weights. A round is accepted only if the feature-space MMD did not rise (it
    cannot for greedy and swap: the kept points with their weights are still feasible) and,
    when the exact validation is on (``exact_of``), neither did the exact-kernel MMD: where
    random-feature noise dominates, a lower feature-space MMD can be a higher exact one.
    Rounds go on while each accepted round leaves more points carrying weight; they stop
    when every point carries weight, when a round is not accepted or adds no weighted point
    (the optimal weights on this pool want no more points: in low dimensions the kernel
    matrix of a few dozen well-placed points already has numerical rank near full, and
    further points are redundant), when the pool has no rows left, or after
    ``_REFILL_ROUNDS``. Free points still without weight are then left out of the selection
    (their weights are zero to within the floor, so the weighted points are unchanged) and
    the report says why: their runs are budget saved. Fixed rows (from ``extend``,
    ``replace``, ``reweight``) are never dropped.
    ``off`` (a reason) skips the replacement and only counts. ``progress`` hears of each
    round as ``(round, _REFILL_ROUNDS, "replacement rounds ...")`` and of the end.
    """
    on = off is None
    floor = WEIGHT_FLOOR / m
    k_fixed = problem.fixed.size
    n_idle0 = int(np.count_nonzero(w <= floor))

    def judge(ids: np.ndarray, w: np.ndarray) -> float:
        return float("nan") if exact_of is None else exact_of(ids, w)

    mmd_ex = judge(result.ids, w)
    info: dict[str, Any] = {
        "threshold": floor,
        "rule": f"w_i > {WEIGHT_FLOOR:g} / m",
        "first": {"n_weighted": int(w.size - n_idle0), "n_unweighted": n_idle0,
                  "mmd_features": mmd, "mmd_exact": mmd_ex, "ids": result.ids.copy(),
                  "weights": w.tolist(), "greedy_rule": result.info.get("greedy_rule")},
        "rounds": [],
        "replaced": 0,
    }  # fmt: skip
    if on:
        (result, w, mmd, mmd_ex), reason = _rounds(
            problem, selector, (result, w, mmd, mmd_ex), weigh, judge, m, rng, info, progress
        )
    else:
        reason = off if n_idle0 else "every chosen point carries weight"
    idle = w <= floor
    idle[:k_fixed] = False
    n_left = int(np.count_nonzero(idle))
    if on and n_left:
        # left out: weight within the floor of zero, so the weighted points are unchanged
        # the kept weights renormalised (mass <= 1e-6 in all removed); not re-solved: on a
        # near-singular Gram matrix a new solve may pick another optimum with other zeros
        keep = ~idle
        result = SelectorResult(result.ids[keep], result.population, result.info)
        w, mmd = weigh(result.ids, w[keep] / np.sum(w[keep]))
        mmd_ex = judge(result.ids, w)
    info.update(
        n_weighted=int(np.count_nonzero(w > floor)),
        n_returned=int(result.ids.size),
        n_fixed_unweighted=int(np.count_nonzero(w[:k_fixed] <= floor)),
        saved_budget=int(m - result.ids.size),
        reason=reason if not (on and n_left) else f"{n_left} point(s) left out: {reason}",
    )
    return result, w, mmd, mmd_ex, info


_Current = tuple[SelectorResult, np.ndarray, float, float]


def _rounds(
    problem: Problem,
    selector: Selector,
    current: _Current,
    weigh: Callable[..., tuple[np.ndarray, float]],
    judge: Callable[[np.ndarray, np.ndarray], float],
    m: int,
    rng: np.random.Generator,
    info: dict[str, Any],
    progress: Progress | None,
) -> tuple[_Current, str]:
    """The replacement rounds of :func:`refill`: the selection, weights and both MMDs after
    the last accepted round, and why the rounds stopped (each round is noted in ``info``)."""
    result, w, mmd, mmd_ex = current
    floor = WEIGHT_FLOOR / m
    k_fixed = problem.fixed.size
    banned = np.zeros_like(problem.allowed)
    reason = "every chosen point carries weight"
    what = "replacement rounds (points without weight)"
    for round_no in range(_REFILL_ROUNDS):
        if progress is not None:
            progress(round_no, _REFILL_ROUNDS, what)
        idle = w <= floor
        idle[:k_fixed] = False  # fixed rows stay whatever their weight
        n_idle = int(np.count_nonzero(idle))
        if n_idle == 0:
            reason = "every chosen point carries weight"
            break
        ids = result.ids
        banned[ids[idle]] = True
        allowed = problem.allowed & ~banned
        allowed[ids[~idle]] = True
        trial_problem = problem.with_rows(ids[~idle], allowed, greedy_rules=("corrective",))
        if int(np.count_nonzero(trial_problem.pool_free)) < n_idle:
            reason = "the candidate pool has no rows left to replace them"
            break
        trial = selector.select(trial_problem, m, rng, None)
        w_new, mmd_new = weigh(trial.ids)
        ex_new = judge(trial.ids, w_new)
        n_new = int(np.count_nonzero(w_new[k_fixed:] <= floor))
        accepted = mmd_new <= mmd * (1.0 + 1e-9) and not ex_new > mmd_ex
        info["rounds"].append(
            {"dropped": n_idle, "unweighted_after": n_new, "mmd_features": mmd_new,
             "mmd_exact": ex_new, "accepted": bool(accepted)}
        )  # fmt: skip
        if not accepted:
            which = "feature-space" if mmd_new > mmd * (1.0 + 1e-9) else "exact"
            reason = f"replacing them would have raised the {which} MMD"
            break
        info["replaced"] += n_idle
        result, w, mmd, mmd_ex = trial, w_new, mmd_new, ex_new
        if n_new >= n_idle:
            reason = (
                "their replacements got no weight either: the optimal weights on this pool "
                f"use {int(np.count_nonzero(w > floor))} points"
            )
            break
    else:
        if np.any(w[k_fixed:] <= floor):
            reason = f"still without weight after {_REFILL_ROUNDS} replacement rounds"
    if progress is not None:
        progress(_REFILL_ROUNDS, _REFILL_ROUNDS, what)
    return (result, w, mmd, mmd_ex), reason
