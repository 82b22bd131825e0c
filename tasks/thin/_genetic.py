"""Genetic algorithm over fixed-size index sets, started from the greedy set.

``genetic``
    Elitism, tournament selection, cardinality-preserving crossover (keep the parents' common
    rows, fill up from their symmetric difference) and mutation that brings in new chain rows
    (a nearby row, a row from a shortlist of the next greedy choices, or any pool row).
    Returns a population of distinct near-optimal sets with their MMDs: the best distinct
    sets evaluated in the run.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ._greedy import greedy_positions
from ._selector import Problem, Selector, SelectorResult

__all__ = ["GeneticSelector"]


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
        run = _Search(problem, m, o, rng)
        population = run.first_population()
        history = [run.fitness(run.start)]
        generations = int(o["generations"]) if run.can_vary else 0
        patience = int(o["patience"])
        for gen in range(generations):
            population = run.next_generation(population)
            history.append(min(run.fitness(p) for p in population))
            if progress is not None:
                progress(gen + 1, generations, "genetic")
            # stagnation stop (common practice for genetic algorithms): the elite has not
            # improved for ``patience`` generations
            if len(history) > patience and history[-1] >= history[-1 - patience]:
                break
        return run.result(history)

    def for_refill(self) -> Selector:
        """A replacement round searches only the few replaced genes: one stagnation window
        of generations (``patience``) is its cap, not the whole run's."""
        o = self.options
        return GeneticSelector(**{**o, "generations": min(o["generations"], o["patience"])})


class _Search:
    """One run of the genetic algorithm: the pool, the greedy start and shortlist, and the
    fitness cache shared by mutation, crossover and the generations."""

    def __init__(
        self, problem: Problem, m: int, options: dict[str, Any], rng: np.random.Generator
    ) -> None:
        o = self.o = options
        self.problem, self.m, self.rng = problem, m, rng
        k_fixed = problem.fixed.size
        self.n_free = n_free = m - k_fixed
        greedy_pos, self.shortlist, self.start_info = greedy_positions(
            problem, m, None, extra=int(o["shortlist"]) * m
        )
        self.fixed_pos = greedy_pos[:k_fixed]
        self.start = np.sort(greedy_pos[k_fixed:])
        self.free_pool = np.flatnonzero(problem.pool_free)
        self.rate = o["mutation_rate"] if o["mutation_rate"] is not None else 1.0 / max(n_free, 1)
        near = _Neighbours(problem.coords, int(o["creep_neighbours"]))
        self.near = near if near.ok else None
        self.cache: dict[bytes, float] = {}
        self.archive: dict[bytes, np.ndarray] = {}  # every distinct set evaluated
        self.grams: dict[bytes, np.ndarray] = {}  # Gram matrices of the living population
        self.simplex = problem.weights_rule == "simplex"
        self.pop_size = int(o["population"])
        self.n_elite = max(1, min(int(o["elite"]), self.pop_size))
        self.can_vary = self.free_pool.size > n_free and n_free > 0

    def fitness(self, genes: np.ndarray, parent: np.ndarray | None = None) -> float:
        """Feature-space MMD of the set (fixed rows and ``genes``) with the problem's weights;
        a child's simplex Gram matrix is mostly copied from ``parent``'s."""
        key = genes.tobytes()
        if key not in self.cache:
            full = np.concatenate([self.fixed_pos, genes])
            phi_s = self.problem.phi[full].astype(np.float64)
            gram = None
            if self.simplex:
                gram = _inherited_gram(full, phi_s, self.fixed_pos, parent, self.grams)
                self.grams[key] = gram
            self.cache[key] = self.problem.weigh(phi_s, gram)[1]
            self.archive[key] = genes
        return self.cache[key]

    def mutate(self, genes: np.ndarray, force: bool) -> np.ndarray:
        """Each gene moves with probability ``rate`` (at least one when ``force``): to a
        nearby row (creep), a shortlist row or any free pool row, never to a row in the set."""
        o, rng, problem = self.o, self.rng, self.problem
        genes = genes.copy()
        hit = rng.random(self.n_free) < self.rate
        if force and not np.any(hit):
            hit[rng.integers(self.n_free)] = True
        for i in np.flatnonzero(hit):
            taken = set(genes.tolist())
            for _ in range(20):
                u = rng.random()
                if self.near is not None and u < o["creep_share"]:
                    # creep: a row next to the gene's own row (small step)
                    cand = self.near[int(genes[i])]
                    new = int(cand[rng.integers(cand.size)])
                else:
                    from_short = self.shortlist.size and rng.random() < o["shortlist_share"]
                    src = self.shortlist if from_short else self.free_pool
                    new = int(src[rng.integers(src.size)])
                if new not in taken and problem.pool_free[new]:
                    genes[i] = new
                    break
        return np.sort(genes)

    def crossover(self, p1: np.ndarray, p2: np.ndarray) -> np.ndarray:
        """Keep the genes both parents share, fill up from their symmetric difference."""
        common = np.intersect1d(p1, p2)
        rest = np.setxor1d(p1, p2)
        fill = self.rng.choice(rest, size=self.n_free - common.size, replace=False)
        return np.sort(np.concatenate([common, fill]))

    def first_population(self) -> list[np.ndarray]:
        """The greedy start and distinct forced mutations of it."""
        population = [self.start]
        seen = {self.start.tobytes()}
        tries = 0
        while self.can_vary and len(population) < self.pop_size and tries < 50 * self.pop_size:
            tries += 1
            child = self.mutate(self.start, force=True)
            if child.tobytes() not in seen:
                seen.add(child.tobytes())
                population.append(child)
        return population

    def next_generation(self, population: list[np.ndarray]) -> list[np.ndarray]:
        """Elites kept, the rest children of tournament winners (crossover, then mutation)."""
        o, rng = self.o, self.rng
        population = sorted(population, key=self.fitness)
        scores = np.array([self.fitness(p) for p in population])
        nxt = population[: self.n_elite]
        keys = {p.tobytes() for p in nxt}
        tries = 0
        while len(nxt) < self.pop_size and tries < 50 * self.pop_size:
            tries += 1
            t1 = rng.integers(len(population), size=int(o["tournament"]))
            t2 = rng.integers(len(population), size=int(o["tournament"]))
            p1 = population[int(t1[np.argmin(scores[t1])])]
            p2 = population[int(t2[np.argmin(scores[t2])])]
            child = self.mutate(self.crossover(p1, p2), force=False)
            if child.tobytes() in keys:
                child = self.mutate(child, force=True)
            if child.tobytes() not in keys:
                keys.add(child.tobytes())
                self.fitness(child, p1)  # scored now: its Gram matrix is mostly p1's
                nxt.append(child)
        for key in set(self.grams) - keys:
            del self.grams[key]  # only the living population's matrices are kept
        return nxt

    def result(self, history: list[float]) -> SelectorResult:
        """The best set, and as population the best distinct sets met during the whole run
        (the elites and their near-optimal relatives), best first."""
        problem, m = self.problem, self.m
        ranked = sorted(self.archive, key=self.cache.__getitem__)
        keep = [self.archive[k] for k in ranked[: max(1, int(self.o["keep"]))]]
        members = [
            (problem.pool[np.concatenate([self.fixed_pos, g])], self.fitness(g)) for g in keep
        ]
        sets = [set(ids.tolist()) for ids, _ in members]
        overlap = np.array([[len(x & y) / m for y in sets] for x in sets])
        info = {
            **self.start_info,
            "start_mmd": history[0],
            "best_mmd_history": history,
            "population_mmd": [float(v) for _, v in members],
            "population_overlap": overlap.tolist(),
            "fitness_evaluations": len(self.cache),
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
