"""The selector contract: what a selector sees (:class:`Problem`), what it returns
(:class:`SelectorResult`) and the base class with its one hook (:class:`Selector`).

Every selector works on a :class:`Problem` (features of a candidate pool of distinct rows, the
chain's mean embedding ``mu``, multiplicities, rows that must be kept or left out) and fills in
ONE hook, :meth:`Selector._select`. The base class checks the result (distinct, allowed, fixed
rows first, right size) so every selector obeys the same contract. To add a selector,
subclass :class:`Selector` in a new module and register it in ``SELECTORS``
(``tasks/thin/_selectors.py``); its name joins ``MethodName`` in ``tasks/config/_thin.py``
(``tests/test_thin_registry.py`` holds the two equal).
"""

from __future__ import annotations

import abc
import copy
import functools
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ._progress import Progress
from ._weights import solve_simplex_qp

__all__ = ["Problem", "Selector", "SelectorResult"]

_SPLIT_ROWS = 4096  # pools at least this large share their products among threads


@functools.cache
def _executor(workers: int) -> ThreadPoolExecutor:
    return ThreadPoolExecutor(max_workers=workers, thread_name_prefix="winnow-matvec")


@dataclass
class Problem:
    """What a selector sees.

    Attributes
    ----------
    phi : ndarray, shape (P, F)
        Features of the candidate pool (distinct rows).
    mu : ndarray of float64, shape (F,)
        Mean embedding of the whole chain (multiplicities counted).
    pool : ndarray of int64, shape (P,)
        Distinct-row id of each pool row.
    counts : ndarray of int64, shape (n_distinct,)
        Multiplicity of each distinct row.
    inverse : ndarray of int64, shape (n_rows,)
        Distinct-row id of each (finite) chain row, in chain order.
    allowed : ndarray of bool, shape (n_distinct,)
        False for rows that must not be chosen.
    fixed : ndarray of int64
        Distinct ids that must be kept, first and in this order (all present in ``pool``).
    weights_rule : {"simplex", "uniform"}
    features_of : callable
        ``features_of(ids) -> ndarray (len(ids), F)`` for any distinct ids.
    coords : ndarray, shape (P, d), optional
        Standardised coordinates of the pool rows (used to find nearby rows).
    workers : int
        Threads sharing the pool's matrix-vector products (:meth:`matvec`).
    greedy_rules : tuple of str
        Greedy sets compared under simplex weights (``"corrective"``, ``"herding"``); the
        thin stage's replacement of unweighted points uses the corrective rule alone (with
        weighted rows kept, herding's equal-weight objective does not apply).
    """

    phi: np.ndarray
    mu: np.ndarray
    pool: np.ndarray
    counts: np.ndarray
    inverse: np.ndarray
    allowed: np.ndarray
    fixed: np.ndarray
    weights_rule: str
    features_of: Callable[[np.ndarray], np.ndarray]
    coords: np.ndarray | None = None
    workers: int = 1
    greedy_rules: tuple[str, ...] = ("corrective", "herding")
    a: np.ndarray = field(init=False)
    q: np.ndarray = field(init=False)
    fixed_pos: np.ndarray = field(init=False)
    pool_free: np.ndarray = field(init=False)

    def __post_init__(self) -> None:
        self.a = (self.phi @ self.mu.astype(self.phi.dtype)).astype(np.float64)  # phi(x).mu
        self.q = np.einsum("ij,ij->i", self.phi, self.phi, dtype=np.float64)  # |phi(x)|^2
        self._set_rows()

    def _set_rows(self) -> None:
        where = {int(i): p for p, i in enumerate(self.pool)}
        self.fixed_pos = np.array([where[int(i)] for i in self.fixed], dtype=np.int64)
        # pool rows a selector may add: allowed and not already fixed
        self.pool_free = self.allowed[self.pool].copy()
        self.pool_free[self.fixed_pos] = False

    def with_rows(self, fixed: np.ndarray, allowed: np.ndarray, **changes: Any) -> Problem:
        """The same pool, features and chain with other rows kept (``fixed``, all in the
        pool) and allowed (and other ``changes`` of plain attributes); the pool products
        ``a`` and ``q`` are shared, not recomputed."""
        new = copy.copy(self)
        for name, value in changes.items():
            setattr(new, name, value)
        new.fixed = np.asarray(fixed, dtype=np.int64)
        new.allowed = np.asarray(allowed, dtype=bool)
        new._set_rows()
        return new

    def matvec(self, v: np.ndarray) -> np.ndarray:
        """``phi @ v`` in the features' precision, shape (P,). On a large pool the rows are
        split across ``workers`` threads: the product is bound by memory traffic, numpy
        releases the GIL, and two threads measured about 1.5x faster than one BLAS thread."""
        phi = self.phi
        v = np.asarray(v).astype(phi.dtype, copy=False)
        n = phi.shape[0]
        if self.workers <= 1 or n < _SPLIT_ROWS:
            return phi @ v
        out = np.empty(n, dtype=phi.dtype)
        bounds = np.linspace(0, n, self.workers + 1).astype(np.int64)

        def part(k: int) -> None:
            a, b = bounds[k], bounds[k + 1]
            np.matmul(phi[a:b], v, out=out[a:b])

        list(_executor(self.workers).map(part, range(self.workers)))
        return out

    @property
    def n_pool(self) -> int:
        return int(self.phi.shape[0])

    def weigh(self, phi_s: np.ndarray, gram: np.ndarray | None = None) -> tuple[np.ndarray, float]:
        """Weights by the problem's rule and the feature-space MMD, for features ``phi_s``
        (``gram``: their Gram matrix ``phi_s phi_s^T`` if the caller already has it)."""
        phi_s = np.asarray(phi_s, dtype=np.float64)
        m = phi_s.shape[0]
        if self.weights_rule == "uniform":
            w = np.full(m, 1.0 / m)
        else:
            w = solve_simplex_qp(phi_s @ phi_s.T if gram is None else gram, phi_s @ self.mu)
        r = w @ phi_s - self.mu
        return w, float(np.sqrt(max(float(r @ r), 0.0)))


@dataclass
class SelectorResult:
    """Distinct ids chosen (fixed ones first), plus an optional population."""

    ids: np.ndarray
    population: list[tuple[np.ndarray, float]] | None = None
    info: dict[str, Any] = field(default_factory=dict)


class Selector(abc.ABC):
    """Base class of the selectors: subclasses implement ONE hook, :meth:`_select`."""

    name: str = ""
    #: whether the thin stage replaces chosen points left without weight (simplex weights)
    #: by this selector's next choices: True for the MMD optimisers, False for baselines
    refills: bool = True

    def __init__(self, **options: Any) -> None:
        unknown = set(options) - set(self.defaults())
        if unknown:
            raise TypeError(
                f"unknown option(s) {sorted(unknown)} for method {self.name!r}; "
                f"valid: {sorted(self.defaults())}"
            )
        self.options = {**self.defaults(), **options}

    @classmethod
    def defaults(cls) -> dict[str, Any]:
        return {}

    @abc.abstractmethod
    def _select(
        self, problem: Problem, m: int, rng: np.random.Generator, progress: Progress | None
    ) -> SelectorResult:
        """Choose ``m`` rows for ``problem`` (the one hook a selector implements)."""

    def for_refill(self) -> Selector:
        """The selector that chooses replacements for points without weight (itself unless
        a subclass caps its effort for those small searches)."""
        return self

    def select(
        self,
        problem: Problem,
        m: int,
        rng: np.random.Generator,
        progress: Progress | None = None,
    ) -> SelectorResult:
        """Run the selector and check the shared contract."""
        result = self._select(problem, m, rng, progress)
        ids = np.asarray(result.ids, dtype=np.int64)
        k = problem.fixed.size
        if ids.size != m or np.unique(ids).size != m:
            raise RuntimeError(f"selector {self.name!r} returned {ids.size} ids, not {m} distinct")
        if not np.array_equal(ids[:k], problem.fixed) or not np.all(problem.allowed[ids]):
            raise RuntimeError(f"selector {self.name!r} broke the fixed/allowed rows")
        result.ids = ids
        return result
