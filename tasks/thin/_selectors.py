"""Selectors: choose ``m`` distinct chain rows whose weighted features match the chain's.

Every selector works on a :class:`Problem` (features of a candidate pool of distinct rows, the
chain's mean embedding ``mu``, multiplicities, rows that must be kept or left out) and fills in
ONE hook, :meth:`Selector._select`. The base class checks the result (distinct, allowed, fixed
rows first, right size) so every selector obeys the same contract.

``greedy``
    Greedy MMD minimisation in feature space, the kernel-herding family. With equal weights
    each step adds the candidate that minimises the MMD of the equally weighted set (Chen,
    Welling & Smola 2010, in the without-replacement form used for MCMC output by Riabiz et al.
    2022, Algorithm 1), an O(P F) update of one score vector (P candidates, F feature
    entries). With simplex weights each step adds the candidate with the best exact
    line-search step and re-solves the weights (fully corrective conditional gradient, Bach
    et al. 2012); the herding set with its optimal weights is computed too, and the set with
    the lower MMD is kept (the corrective rule is myopic at small budgets).
``swap``
    Swap local search from the greedy set: one point at a time is replaced by the candidate
    that lowers the MMD most at that point's weight; optimal weights are re-solved after each
    sweep, so the MMD never increases.
``genetic``
    A genetic algorithm over fixed-size index sets started from the greedy set: elitism,
    tournament selection, cardinality-preserving crossover (keep the parents' common rows, fill
    up from their symmetric difference) and mutation that brings in new chain rows (half from
    a shortlist of the next greedy choices, half from the whole pool). Returns a population of
    distinct near-optimal sets with their MMDs: the best distinct sets evaluated in the run.
``random``, ``stride``
    Baselines: rows drawn uniformly from the chain (without repeating a row), and rows at
    equal stride through the chain in its given order.

References
----------
.. [1] Chen, Y., Welling, M. and Smola, A. (2010). Super-samples from kernel herding. UAI.
.. [2] Riabiz, M., Chen, W. Y., Cockayne, J., Swietach, P., Niederer, S. A., Mackey, L. and
   Oates, C. J. (2022). Optimal thinning of MCMC output. Journal of the Royal Statistical
   Society Series B 84(4), 1059-1081.
.. [3] Gretton, A. et al. (2012). A kernel two-sample test. JMLR 13, 723-773.
.. [4] Bach, F., Lacoste-Julien, S. and Obozinski, G. (2012). On the equivalence between
   herding and conditional gradient algorithms. ICML.
"""

from __future__ import annotations

import abc
import copy
import functools
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np

from ._weights import solve_simplex_qp

__all__ = [
    "SELECTORS",
    "GeneticSelector",
    "GreedySelector",
    "GreedyState",
    "MethodName",
    "Problem",
    "RandomSelector",
    "SelectorResult",
    "Selector",
    "StrideSelector",
    "SwapSelector",
    "get_selector",
]

MethodName = Literal["greedy", "swap", "genetic", "random", "stride"]
_SPLIT_ROWS = 4096  # pools at least this large share their products among threads


@functools.cache
def _executor(workers: int) -> ThreadPoolExecutor:
    return ThreadPoolExecutor(max_workers=workers, thread_name_prefix="winnow-matvec")


Progress = Callable[[int, int, str], None]


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


# ------------------------------------------------------------------------------------ greedy
class GreedyState:
    """Incremental state of the greedy (herding-type) selection on a pool.

    With ``t`` points summing to ``s`` in feature space, adding ``x`` gives
    ``(t+1)^2 MMD^2 = |(t+1) mu - s|^2 + cost(x)`` with
    ``cost(x) = 2 phi(x).s - 2 (t+1) phi(x).mu + |phi(x)|^2``; the vector ``phi(x).s`` is
    updated in O(P F) per step (Chen, Welling & Smola 2010, Eq. 4; Riabiz et al. 2022, Alg. 1).
    """

    def __init__(self, problem: Problem, start: np.ndarray, available: np.ndarray) -> None:
        self.p = problem
        self.chosen = [int(i) for i in start]
        self.t = len(self.chosen)
        self.available = available.copy()
        self.available[np.asarray(start, dtype=np.int64)] = False
        if self.t:
            s = problem.phi[self.chosen].sum(axis=0, dtype=np.float64)
            self.c = (problem.phi @ s.astype(problem.phi.dtype)).astype(np.float64)
        else:
            self.c = np.zeros(problem.n_pool)

    def costs(self) -> np.ndarray:
        """``cost(x)`` for every pool row (``inf`` where not available)."""
        cost = 2.0 * self.c - 2.0 * (self.t + 1) * self.p.a + self.p.q
        cost[~self.available] = np.inf
        return cost

    def add(self, j: int) -> None:
        self.chosen.append(int(j))
        self.available[j] = False
        self.c += self.p.matvec(self.p.phi[j])  # O(P F): phi(x).s gains phi(x).phi(x_j)
        self.t += 1

    def run(self, n_steps: int, progress: Progress | None = None) -> list[int]:
        for step in range(n_steps):
            cost = self.costs()
            j = int(np.argmin(cost))
            if not np.isfinite(cost[j]):
                raise ValueError("not enough candidate rows left for the greedy selection")
            self.add(j)
            if progress is not None:
                progress(step + 1, n_steps, "greedy")
        return self.chosen


def corrective_scores(problem: Problem, chosen: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Decrease of ``MMD^2`` from moving mass ``gamma`` (best in [0, 1]) of the weighted set
    onto each pool row: with residual ``r = mu - s``, ``s = sum w_i phi_i``,
    ``min_gamma |r - gamma (phi(x) - s)|^2 = |r|^2 - (r.(phi(x) - s))_+^2 / |phi(x) - s|^2``
    (exact line search of the conditional-gradient step; Bach, Lacoste-Julien & Obozinski
    2012, Section 3). One matrix-vector product, O(P F)."""
    phi = problem.phi
    s = w @ phi[chosen].astype(np.float64)
    c = problem.matvec(s).astype(np.float64)  # phi(x).s
    ss = float(s @ s)
    rs = float(problem.mu @ s) - ss  # r.s
    num = problem.a - c - rs  # r.(phi(x) - s)
    den = np.maximum(problem.q - 2.0 * c + ss, 1e-300)
    with np.errstate(over="ignore", divide="ignore"):
        gamma = np.clip(num / den, 0.0, 1.0)  # the step may not leave the simplex
    return 2.0 * gamma * num - gamma**2 * den  # |r|^2 - min over gamma; 0 where num <= 0


def _corrective_positions(
    problem: Problem, m: int, progress: Progress | None, extra: int = 0
) -> np.ndarray:
    """Fully corrective greedy: add the row whose line-search step lowers the MMD most, then
    re-solve the simplex weights over all chosen rows (used with ``weights="simplex"``)."""
    phi = problem.phi
    avail = problem.pool_free.copy()
    chosen: list[int] = []
    gram = np.zeros((0, 0))

    def append(j: int) -> np.ndarray:
        # the Gram matrix of the chosen rows grows one row/column at a time, by the same
        # float64 operations whether a row is kept from before or newly chosen
        col = phi[chosen].astype(np.float64) @ phi[j].astype(np.float64)
        chosen.append(j)
        return np.block([[gram, col[:, None]], [col[None, :], np.array([[problem.q[j]]])]])

    for j in problem.fixed_pos:
        gram = append(int(j))
    total = min(m + extra - len(chosen), int(np.sum(avail)))
    n_main = m - len(chosen)
    w = solve_simplex_qp(gram, problem.a[chosen]) if chosen else np.zeros(0)
    for step in range(total):
        if chosen:
            score = corrective_scores(problem, np.asarray(chosen), w)
            if not np.any(score[avail] > 0):  # no single row helps: the least harmful one
                score = problem.a - problem.q / 2.0 - problem.matvec(w @ phi[chosen])
        else:
            score = problem.a - problem.q / 2.0  # argmin |mu - phi(x)|^2
        score = np.where(avail, score, -np.inf)
        j = int(np.argmax(score))
        if not np.isfinite(score[j]):
            raise ValueError("not enough candidate rows left for the greedy selection")
        gram = append(j)
        avail[j] = False
        if step < n_main - 1 or extra:
            w = solve_simplex_qp(gram, problem.a[chosen])
        if progress is not None and step < n_main:
            progress(step + 1, n_main, "greedy")
    return np.asarray(chosen, dtype=np.int64)


def _herding_positions(problem: Problem, n_steps: int) -> np.ndarray:
    """Pool positions of kernel herding without repeats (equal-weight objective), fixed rows
    first, ``n_steps`` new rows at most (fewer if the pool runs out)."""
    state = GreedyState(problem, problem.fixed_pos, problem.pool_free)
    state.run(min(n_steps, int(np.sum(state.available))))
    return np.asarray(state.chosen, dtype=np.int64)


def _greedy_positions(
    problem: Problem, m: int, progress: Progress | None, extra: int = 0
) -> tuple[np.ndarray, np.ndarray, dict[str, Any]]:
    """Greedy pool positions for a set of size ``m`` (fixed first), the next ``extra``
    greedy choices after it (a shortlist of good candidates) and what was compared.

    Equal weights: the herding objective. Simplex weights: both the fully corrective variant
    and herding, each set then given its optimal weights; the lower feature-space MMD wins.
    The corrective rule is myopic: each step takes the largest line-search decrease, which
    at small budgets can crowd the points where the density is high. Herding's equal-weight
    objective spreads them; with its optimal weights it is never worse than herding itself,
    and it was up to 35 % lower than the corrective set at m = 10 in 4-D (exact-kernel
    greedy on random pools, benchmarks/bench_thin.py), though much worse at m >= 30.
    """
    if problem.weights_rule != "simplex":
        state = GreedyState(problem, problem.fixed_pos, problem.pool_free)
        free_left = int(np.sum(state.available))
        state.run(m - problem.fixed.size, progress)
        more = min(extra, free_left - (m - problem.fixed.size))
        if more > 0:
            state.run(more)
        pos = np.asarray(state.chosen, dtype=np.int64)
        return pos[:m], pos[m:], {"greedy_rule": "herding"}
    found = {}
    if "corrective" in problem.greedy_rules or not problem.greedy_rules:
        found["corrective"] = _corrective_positions(problem, m, progress, extra)
    if "herding" in problem.greedy_rules:
        found["herding"] = _herding_positions(problem, m - problem.fixed.size + extra)
    mmd = {rule: problem.weigh(problem.phi[pos[:m]])[1] for rule, pos in found.items()}
    rule = min(mmd, key=mmd.__getitem__)  # ties: the corrective set (listed first)
    pos = found[rule]
    return pos[:m], pos[m:], {"greedy_rule": rule, "greedy_mmd": mmd}


class GreedySelector(Selector):
    """Greedy MMD minimisation in feature space.

    With equal weights: kernel herding without repeats (Chen, Welling & Smola 2010; Riabiz et
    al. 2022, Algorithm 1), one O(P F) incremental update per step. With simplex weights:
    the fully corrective conditional-gradient form of herding (Bach, Lacoste-Julien &
    Obozinski 2012): each step adds the row with the largest exact line-search decrease and
    re-solves the optimal weights; the herding set, given its optimal weights, replaces it
    when its MMD is lower (``report["selector"]["greedy_rule"]`` says which was kept).
    """

    name = "greedy"

    def _select(self, problem, m, rng, progress):
        pos, _, info = _greedy_positions(problem, m, progress)
        return SelectorResult(problem.pool[pos], info=info)


# -------------------------------------------------------------------------------------- swap
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
        pos, _, start = _greedy_positions(problem, m, progress)
        pos, info = _swap_refine(
            problem, pos, max_sweeps=int(self.options["max_sweeps"]), progress=progress
        )
        return SelectorResult(problem.pool[pos], info={**start, **info})


# ----------------------------------------------------------------------------------- genetic
class GeneticSelector(Selector):
    """Genetic algorithm over fixed-size index sets, started from the greedy set.

    Elitism, tournament selection, a crossover that keeps the genes both parents share and
    fills up from the others (so every child has exactly ``m`` distinct rows), and mutation
    that moves a gene to a nearby row (creep) or brings in a row from the greedy shortlist
    or the whole pool. A child's fitness is its feature-space MMD with the problem's weights
    (simplex weights solved exactly, their Gram matrix mostly copied from the first parent).
    Runs for ``generations`` at most, stopping early after ``patience`` generations without a
    better set. The population reported is the ``keep`` best distinct sets met during the run.
    """

    name = "genetic"

    @classmethod
    def defaults(cls):
        return {
            "population": 20,
            "generations": 200,  # at most; see "patience"
            "patience": 50,  # stop after this many generations without a better set
            "elite": 4,
            "tournament": 3,
            "mutation_rate": None,  # default: 1 / (number of free genes)
            "shortlist": 2,  # shortlist length as a multiple of m
            "shortlist_share": 0.5,  # chance that a mutation draws from the shortlist
            "creep_share": 0.5,  # chance that a mutation moves a gene to a nearby row
            "creep_neighbours": 8,  # nearby rows considered by a creep mutation
            "keep": 8,  # members of the final population reported
        }

    def _select(self, problem, m, rng, progress):
        o = self.options
        k_fixed = problem.fixed.size
        n_free = m - k_fixed
        greedy_pos, shortlist, start_info = _greedy_positions(
            problem, m, None, extra=int(o["shortlist"]) * m
        )
        fixed_pos = greedy_pos[:k_fixed]
        start = np.sort(greedy_pos[k_fixed:])
        free_pool = np.flatnonzero(problem.pool_free)
        rate = o["mutation_rate"] if o["mutation_rate"] is not None else 1.0 / max(n_free, 1)
        near = _Neighbours(problem.coords, int(o["creep_neighbours"]))
        near = near if near.ok else None
        cache: dict[bytes, float] = {}
        archive: dict[bytes, np.ndarray] = {}  # every distinct set evaluated
        grams: dict[bytes, np.ndarray] = {}  # Gram matrices of the living population
        simplex = problem.weights_rule == "simplex"

        def fitness(genes: np.ndarray, parent: np.ndarray | None = None) -> float:
            key = genes.tobytes()
            if key not in cache:
                full = np.concatenate([fixed_pos, genes])
                phi_s = problem.phi[full].astype(np.float64)
                gram = None
                if simplex:
                    gram = _inherited_gram(full, phi_s, fixed_pos, parent, grams)
                    grams[key] = gram
                cache[key] = problem.weigh(phi_s, gram)[1]
                archive[key] = genes
            return cache[key]

        def mutate(genes: np.ndarray, force: bool) -> np.ndarray:
            genes = genes.copy()
            hit = rng.random(n_free) < rate
            if force and not np.any(hit):
                hit[rng.integers(n_free)] = True
            for i in np.flatnonzero(hit):
                taken = set(genes.tolist())
                for _ in range(20):
                    u = rng.random()
                    if near is not None and u < o["creep_share"]:
                        # creep: a row next to the gene's own row (small step)
                        cand = near[int(genes[i])]
                        new = int(cand[rng.integers(cand.size)])
                    else:
                        from_short = shortlist.size and rng.random() < o["shortlist_share"]
                        src = shortlist if from_short else free_pool
                        new = int(src[rng.integers(src.size)])
                    if new not in taken and problem.pool_free[new]:
                        genes[i] = new
                        break
            return np.sort(genes)

        def crossover(p1: np.ndarray, p2: np.ndarray) -> np.ndarray:
            common = np.intersect1d(p1, p2)
            rest = np.setxor1d(p1, p2)
            fill = rng.choice(rest, size=n_free - common.size, replace=False)
            return np.sort(np.concatenate([common, fill]))

        pop_size = int(o["population"])
        n_elite = max(1, min(int(o["elite"]), pop_size))
        can_vary = free_pool.size > n_free and n_free > 0
        population = [start]
        seen = {start.tobytes()}
        tries = 0
        while can_vary and len(population) < pop_size and tries < 50 * pop_size:
            tries += 1
            child = mutate(start, force=True)
            if child.tobytes() not in seen:
                seen.add(child.tobytes())
                population.append(child)
        start_mmd = fitness(start)
        history = [start_mmd]
        generations = int(o["generations"]) if can_vary else 0
        patience = int(o["patience"])
        for gen in range(generations):
            population.sort(key=fitness)
            scores = np.array([fitness(p) for p in population])
            nxt = population[:n_elite]
            keys = {p.tobytes() for p in nxt}
            tries = 0
            while len(nxt) < pop_size and tries < 50 * pop_size:
                tries += 1
                t1 = rng.integers(len(population), size=int(o["tournament"]))
                t2 = rng.integers(len(population), size=int(o["tournament"]))
                p1 = population[int(t1[np.argmin(scores[t1])])]
                p2 = population[int(t2[np.argmin(scores[t2])])]
                child = mutate(crossover(p1, p2), force=False)
                if child.tobytes() in keys:
                    child = mutate(child, force=True)
                if child.tobytes() not in keys:
                    keys.add(child.tobytes())
                    fitness(child, p1)  # scored now: its Gram matrix is mostly p1's
                    nxt.append(child)
            population = nxt
            for key in set(grams) - keys:
                del grams[key]  # only the living population's matrices are kept
            history.append(min(fitness(p) for p in population))
            if progress is not None:
                progress(gen + 1, generations, "genetic")
            # stagnation stop (common practice for genetic algorithms): the elite has not
            # improved for ``patience`` generations
            if len(history) > patience and history[-1] >= history[-1 - patience]:
                break
        # the reported population: the best distinct sets met during the whole run (the
        # elites and their near-optimal relatives), best first
        ranked = sorted(archive, key=cache.__getitem__)
        keep = [archive[k] for k in ranked[: max(1, int(o["keep"]))]]
        members = [(problem.pool[np.concatenate([fixed_pos, g])], fitness(g)) for g in keep]
        sets = [set(ids.tolist()) for ids, _ in members]
        overlap = np.array([[len(x & y) / m for y in sets] for x in sets])
        info = {
            **start_info,
            "start_mmd": start_mmd,
            "best_mmd_history": history,
            "population_mmd": [float(v) for _, v in members],
            "population_overlap": overlap.tolist(),
            "fitness_evaluations": len(cache),
            "generations_run": len(history) - 1,
        }
        return SelectorResult(members[0][0], population=members, info=info)


class _Neighbours:
    """Nearest pool rows of a pool row in standardised coordinates, looked up on demand
    (k-d tree, scipy.spatial)."""

    def __init__(self, coords: np.ndarray | None, k: int) -> None:
        self.ok = coords is not None and k > 0 and coords.shape[0] > k
        self.coords = coords
        self.k = k
        self.found: dict[int, np.ndarray] = {}
        if self.ok:
            from scipy.spatial import cKDTree

            self.tree = cKDTree(coords)

    def __getitem__(self, pos: int) -> np.ndarray:
        if pos not in self.found:
            _, idx = self.tree.query(self.coords[pos], k=self.k + 1)
            self.found[pos] = np.asarray(idx[idx != pos][: self.k], dtype=np.int64)
        return self.found[pos]


def _inherited_gram(
    full: np.ndarray,
    phi_s: np.ndarray,
    fixed_pos: np.ndarray,
    parent: np.ndarray | None,
    grams: dict[bytes, np.ndarray],
) -> np.ndarray:
    """Gram matrix ``phi_s phi_s^T`` of a child set, copying the entries it shares with its
    parent: only the rows of genes the parent lacks are computed, O(new m F) not O(m^2 F)."""
    g_parent = None if parent is None else grams.get(parent.tobytes())
    if g_parent is None:
        return phi_s @ phi_s.T
    where = {int(p): i for i, p in enumerate(np.concatenate([fixed_pos, parent]))}
    src = np.array([where.get(int(p), -1) for p in full])
    old = np.flatnonzero(src >= 0)
    new = np.flatnonzero(src < 0)
    gram = np.empty((full.size, full.size))
    gram[np.ix_(old, old)] = g_parent[np.ix_(src[old], src[old])]
    if new.size:
        rows = phi_s[new] @ phi_s.T
        gram[new, :] = rows
        gram[:, new] = rows.T
    return gram


# --------------------------------------------------------------------------------- baselines
def _free_ids(problem: Problem) -> np.ndarray:
    ok = problem.allowed.copy()
    ok[problem.fixed] = False
    return np.flatnonzero(ok)


class RandomSelector(Selector):
    """Uniform random chain rows without repeating a row (distinct rows drawn in proportion
    to their multiplicity, Efraimidis & Spirakis 2006 weighted sampling without replacement)."""

    name = "random"

    def _select(self, problem, m, rng, progress):
        free = _free_ids(problem)
        k = m - problem.fixed.size
        keys = np.log(rng.random(free.size)) / problem.counts[free]  # larger is better
        pick = free[np.argpartition(-keys, k - 1)[:k]] if k > 0 else free[:0]
        return SelectorResult(np.concatenate([problem.fixed, np.sort(pick)]))


class StrideSelector(Selector):
    """Rows at equal stride through the chain in its given order (the usual thinning)."""

    name = "stride"

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


SELECTORS: dict[str, type[Selector]] = {
    cls.name: cls
    for cls in (GreedySelector, SwapSelector, GeneticSelector, RandomSelector, StrideSelector)
}


def get_selector(method: str, **options: Any) -> Selector:
    """Return the selector called ``method`` configured with ``options``."""
    if not isinstance(method, str) or method not in SELECTORS:
        raise ValueError(f"method must be one of {sorted(SELECTORS)}, got {method!r}")
    return SELECTORS[method](**options)
