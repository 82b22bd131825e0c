"""Swap local search from the greedy set.

``swap``
    One point at a time is replaced by the candidate that lowers the MMD most at that point's
    weight; optimal weights are re-solved after each sweep, so the MMD never increases.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ._greedy import greedy_positions
from ._progress import Progress
from ._selector import Problem, Selector, SelectorResult

__all__ = ["SwapSelector"]


def _swap_refine(
    problem: Problem,
    pos: np.ndarray,
    *,
    max_sweeps: int,
    progress: Progress | None,
) -> tuple[np.ndarray, dict[str, Any]]:
    phi, a, q = problem.phi, problem.a, problem.q
    m = pos.size
    pos = pos.copy()
    movable = np.ones(m, dtype=bool)
    movable[: problem.fixed.size] = False
    used = np.zeros(problem.n_pool, dtype=bool)
    used[pos] = True
    candidates = problem.pool_free.copy()
    gram = (phi @ phi[pos].T).astype(np.float64)  # (P, m): phi(x).phi(s_i)
    w, mmd = problem.weigh(phi[pos])
    start_mmd = mmd
    history = [mmd]
    n_swaps = 0
    for sweep in range(max_sweeps):
        gw = gram @ w
        swaps_this_sweep = 0
        for i in np.flatnonzero(movable):
            # phi(x).r with r = mu - sum_{j != i} w_j phi(s_j)
            rdot = a - gw + w[i] * gram[:, i]
            cur = int(pos[i])
            if w[i] > 0.0:
                gain = 2.0 * w[i] * rdot - w[i] ** 2 * q  # |r|^2 - |r - w_i phi(x)|^2
            else:
                gain = rdot.copy()  # dead point: bring in the row best aligned with r
            ok = candidates & ~used
            if not np.any(ok):
                break
            best = int(np.flatnonzero(ok)[np.argmax(gain[ok])])
            if gain[best] <= gain[cur] + 1e-12 * max(1.0, abs(gain[cur])):
                continue
            used[cur] = False
            used[best] = True
            pos[i] = best
            col = problem.matvec(phi[best]).astype(np.float64)
            gw += w[i] * (col - gram[:, i])
            gram[:, i] = col
            swaps_this_sweep += 1
        n_swaps += swaps_this_sweep
        w, mmd = problem.weigh(phi[pos])
        history.append(mmd)
        if progress is not None:
            progress(sweep + 1, max_sweeps, "swap")
        if swaps_this_sweep == 0 or history[-2] - mmd <= 1e-9 * history[-2]:
            break
    return pos, {
        "swap_sweeps": len(history) - 1,
        "swaps": n_swaps,
        "start_mmd": start_mmd,
        "mmd_history": history,
    }


class SwapSelector(Selector):
    """Swap local search started from the greedy set."""

    name = "swap"

    @classmethod
    def defaults(cls):
        return {"max_sweeps": 5}

    def _select(self, problem, m, rng, progress):
        pos, _, start = greedy_positions(problem, m, progress)
        pos, info = _swap_refine(
            problem, pos, max_sweeps=int(self.options["max_sweeps"]), progress=progress
        )
        return SelectorResult(problem.pool[pos], info={**start, **info})
