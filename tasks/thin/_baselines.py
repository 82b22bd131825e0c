"""Baselines: uniform random rows and rows at equal stride through the chain.

``random``, ``stride``
    Rows drawn uniformly from the chain (without repeating a row), and rows at equal stride
    through the chain in its given order.
"""

from __future__ import annotations

import numpy as np

from ._selector import Problem, Selector, SelectorResult

__all__ = ["RandomSelector", "StrideSelector"]


def _free_ids(problem: Problem) -> np.ndarray:
    ok = problem.allowed.copy()
    ok[problem.fixed] = False
    return np.flatnonzero(ok)


class RandomSelector(Selector):
    """Uniform random chain rows without repeating a row (distinct rows drawn in proportion
    to their multiplicity, Efraimidis & Spirakis 2006 weighted sampling without replacement)."""

    name = "random"
    refills = False

    def _select(self, problem, m, rng, progress):
        free = _free_ids(problem)
        k = m - problem.fixed.size
        keys = np.log(rng.random(free.size)) / problem.counts[free]  # larger is better
        pick = free[np.argpartition(-keys, k - 1)[:k]] if k > 0 else free[:0]
        return SelectorResult(np.concatenate([problem.fixed, np.sort(pick)]))


class StrideSelector(Selector):
    """Rows at equal stride through the chain in its given order (the usual thinning)."""

    name = "stride"
    refills = False

    def _select(self, problem, m, rng, progress):
        k = m - problem.fixed.size
        ok = problem.allowed.copy()
        ok[problem.fixed] = False
        rows = np.flatnonzero(ok[problem.inverse])  # chain rows whose value may be chosen
        picked: list[int] = []
        taken = set()
        if k > 0:
            step = rows.size / k
            targets = np.floor((np.arange(k) + 0.5) * step).astype(np.int64)
            cursor = 0
            for t in targets:
                cursor = max(cursor, int(t))
                while cursor < rows.size and int(problem.inverse[rows[cursor]]) in taken:
                    cursor += 1  # a repeated row: move on to the next new value
                if cursor >= rows.size:
                    break
                taken.add(int(problem.inverse[rows[cursor]]))
                picked.append(int(problem.inverse[rows[cursor]]))
            if len(picked) < k:  # wrapped past the end: fill from the start, in order
                for r in rows:
                    v = int(problem.inverse[r])
                    if v not in taken:
                        taken.add(v)
                        picked.append(v)
                        if len(picked) == k:
                            break
        return SelectorResult(np.concatenate([problem.fixed, np.asarray(picked, np.int64)]))
