"""Thin a posterior chain to a few weighted points by minimising MMD (the thin stage).

From a chain of ``N`` rows (``N`` up to 10^7, dimension up to 50) choose ``m`` distinct rows and
weights whose weighted empirical distribution is close to the whole chain in maximum mean
discrepancy (MMD, Gretton et al. 2012), without gradients of the posterior and without an
``N x N`` kernel matrix:

1. rows with NaN/inf are dropped (counted) or refused; each parameter is standardised (mixed
   units); repeated rows (Metropolis rejections) are merged, their multiplicity kept as weight;
2. the kernel bandwidth defaults to the median pairwise distance of a random subsample
   (Gretton et al. 2012, Section 8);
3. the kernel is replaced by random Fourier features (Rahimi & Recht 2007; orthogonal, Yu et
   al. 2016; quasi-Monte Carlo, Avron et al. 2016); the mean embedding of the whole chain is
   streamed in chunks; ``n_features="auto"`` doubles the feature count until the MMD estimates
   of independent feature draws agree to ``features_tol``;
4. a selector (greedy / kernel herding, Chen, Welling & Smola 2010, Riabiz et al. 2022; swap
   local search; genetic algorithm; random and stride baselines) picks the rows from a pool of
   candidate distinct rows;
5. weights are uniform or the exact simplex-constrained minimiser of the feature-space MMD;
   with the latter, chosen points left without weight (``w_i <= 1e-6 / m``) are replaced by
   the selector's next choices until every point carries weight, or left out (and counted as
   budget saved) when replacements get no weight either, so no costly run is wasted;
6. the result is checked with the exact-kernel MMD against the chain (chunked; on a stated
   random subsample above ``exact_max_rows`` rows).

References
----------
.. [1] Rahimi, A. and Recht, B. (2007). Random features for large-scale kernel machines.
   NeurIPS 20.
.. [2] Yu, F. X. et al. (2016). Orthogonal random features. NeurIPS 29.
.. [3] Avron, H., Sindhwani, V., Yang, J. and Mahoney, M. W. (2016). Quasi-Monte Carlo feature
   maps for shift-invariant kernels. JMLR 17(120).
.. [4] Chen, Y., Welling, M. and Smola, A. (2010). Super-samples from kernel herding. UAI.
.. [5] Gretton, A. et al. (2012). A kernel two-sample test. JMLR 13, 723-773.
.. [6] Riabiz, M. et al. (2022). Optimal thinning of MCMC output. JRSS-B 84(4), 1059-1081.
.. [7] Rasmussen, C. E. and Williams, C. K. I. (2006). Gaussian Processes for Machine
   Learning. MIT Press.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from winnow.tasks.errors import InputError
from winnow.tasks.records import Chain, Selection

from ._features import (
    FEATURE_MAPS,
    FeatureMap,
    FeatureMapName,
    draw_feature_map,
    features_of_rows,
    mean_embedding,
    one_blas_thread,
)
from ._kernels import KERNELS, KernelName, get_kernel, median_heuristic
from ._mmd import ExactMMD, mmd_exact
from ._selectors import (
    SELECTORS,
    GreedyState,
    MethodName,
    Problem,
    Selector,
    SelectorResult,
    get_selector,
)
from ._weights import feature_mmd, optimal_weights

__all__ = [
    "FEATURE_MAPS",
    "KERNELS",
    "SELECTORS",
    "Selector",
    "disjoint",
    "extend",
    "median_heuristic",
    "mmd_exact",
    "optimal_weights",
    "replace",
    "reweight",
    "thin",
]

Progress = Callable[[int, int, str], None]
WeightsRule = Literal["simplex", "uniform"]
NonFinite = Literal["drop", "raise"]

_WEIGHTS_RULES = ("simplex", "uniform")
_NONFINITE = ("drop", "raise")
_MEDIAN_ROWS = 2000  # rows of the median-heuristic subsample
_AUTO_START, _AUTO_MAX, _AUTO_DRAWS = 64, 8192, 3
_AUTO_PILOT, _AUTO_MAX_M = 2000, 400  # pilot chain rows (at least), largest pilot budget
_FEATURE_BYTES = 512 * 2**20  # cap on the candidate pool's feature matrix
# independent random streams: bandwidth, feature map, pool, auto-features, exact MMD, selector
_STREAMS = 6
# a chosen point "carries weight" when w_i > _WEIGHT_FLOOR / m (see _refill)
_WEIGHT_FLOOR = 1e-6
_REFILL_ROUNDS = 8  # rounds of replacing points without weight, at most
_REFILL_METHODS = ("greedy", "swap", "genetic")
_EXACT_MAX_ROWS = 20_000  # default subsample of the exact check (see thin's exact_max_rows)
# progress: at most one call per 1 % of a step and per 0.5 s, whichever is rarer (plus the
# first and last call of each step)
_PROGRESS_SHARE, _PROGRESS_SECONDS = 0.01, 0.5
# the names the inner steps report under, as the thin stage's progress shows them
_STEP_NAMES = {
    "mean embedding": "feature pass (mean embedding of the chain)",
    "greedy": "selection (greedy)",
    "swap": "selection (swap sweeps)",
    "genetic": "selection (genetic generations)",
}


class _StepProgress:
    """The thin stage's ``progress(done, total, step)``, at a bounded rate.

    Each long step reports under its own name (see ``_STEP_NAMES`` for the inner ones);
    within a step ``done`` only increases: a call is passed on when it is the step's first
    or last (``done == total``), or when both 1 % of the step and 0.5 s have passed since
    the last one passed on.
    """

    def __init__(self, progress: Progress | None) -> None:
        self.progress = progress
        self.last: dict[str, tuple[int, float]] = {}

    def __call__(self, done: int, total: int, what: str) -> None:
        if self.progress is None:
            return
        what = _STEP_NAMES.get(what, what)
        now = time.perf_counter()
        seen = self.last.get(what)
        if seen is not None:
            last_done, last_t = seen
            if done <= last_done:
                return
            if done < total and (
                done - last_done < _PROGRESS_SHARE * total or now - last_t < _PROGRESS_SECONDS
            ):
                return
        self.last[what] = (done, now)
        self.progress(int(done), int(total), what)

    def step(self, what: str) -> Callable[[], None]:
        """Report the start of a one-piece step (0 of 1); the returned call reports its end."""
        self(0, 1, what)
        return lambda: self(1, 1, what)


# ============================================================================ validation
def _validate_samples(samples: Any) -> np.ndarray:
    if isinstance(samples, Chain):
        samples = samples.samples
    try:
        x = np.asarray(samples, dtype=np.float64)
    except (ValueError, TypeError) as exc:
        raise ValueError(
            f"samples must be a rectangular 2-D array of numbers (n, d); got a ragged or "
            f"non-numeric input ({exc})"
        ) from None
    if x.ndim != 2:
        raise ValueError(f"samples must be a 2-D array (n, d), got shape {x.shape}")
    if x.shape[0] == 0 or x.shape[1] == 0:
        raise ValueError(f"samples is empty: shape {x.shape}")
    return x


def _validate_int(name: str, value: Any, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer):
        raise TypeError(f"{name} must be an integer, got {value!r}")
    if value < low:
        raise ValueError(f"{name} must be >= {low}, got {value!r}")
    return int(value)


def _validate_choice(name: str, value: Any, choices: Sequence[str]) -> str:
    if not isinstance(value, str) or value not in choices:
        raise ValueError(f"{name} must be one of {sorted(choices)}, got {value!r}")
    return value


def _validate_bandwidth(value: Any) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int | float | np.number):
        raise TypeError(f"bandwidth must be a positive number or None, got {value!r}")
    if not (np.isfinite(value) and value > 0):
        raise ValueError(f"bandwidth must be finite and > 0, got {value!r}")
    return float(value)


def _validate_n_features(value: Any) -> int | None:
    if isinstance(value, str):
        if value != "auto":
            raise ValueError(f"n_features must be 'auto' or an integer >= 1, got {value!r}")
        return None
    return _validate_int("n_features", value, 1)


def _rng_and_seed(rng: Any) -> tuple[list[np.random.Generator], int | None]:
    seed = int(rng) if isinstance(rng, int | np.integer) and not isinstance(rng, bool) else None
    gen = np.random.default_rng(rng)
    return gen.spawn(_STREAMS), seed


# ============================================================================ preparation
@dataclass
class _Prepared:
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


def _prepare(x: np.ndarray, nonfinite: str, standardise: bool, chunk: int) -> _Prepared:
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
    return _Prepared(x, finite_rows, first, counts, inverse, mean, scale, n_bad)


def _weighted_sample(
    ids: np.ndarray, counts: np.ndarray, k: int, rng: np.random.Generator
) -> np.ndarray:
    """``k`` of ``ids`` without replacement, chosen in proportion to ``counts``
    (Efraimidis & Spirakis 2006 keys ``log(u) / w``)."""
    if k >= ids.size:
        return ids.copy()
    keys = np.log(rng.random(ids.size)) / counts[ids]
    return np.sort(ids[np.argpartition(-keys, k - 1)[:k]])


# ============================================================================ the engine
@dataclass
class _Settings:
    kernel: str
    bandwidth: float | None
    method: str
    weights: str
    feature_map: str
    n_features: int | None
    nonfinite: str
    standardise: bool
    exact_max_rows: int
    chunk_size: int | None
    n_candidates: int | None
    features_tol: float
    precision: str
    workers: int
    method_options: dict[str, Any]
    replace_unweighted: bool = True


def _chunk_rows(chunk_size: int | None, width: int) -> int:
    if chunk_size is not None:
        return chunk_size
    return int(max(256, 2**22 // max(width, 1)))  # about 16 MB of float32 features


def _auto_features(
    prep: _Prepared,
    kern,
    bandwidth: float,
    s: _Settings,
    m: int,
    dtype,
    rng: np.random.Generator,
    progress: Progress | None,
) -> tuple[int, list[dict[str, Any]]]:
    """Double the number of features until the honest MMD of a pilot selection is stable.

    A pilot of ``max(2000, 10 m)`` chain rows (at most 10000; uniform, without replacement) is
    thinned to ``min(m, pilot distinct rows / 10, 400)`` points with greedy selection and
    the chosen weights under ``_AUTO_DRAWS`` independent feature draws; each draw's selection is
    judged by the *other* draws too. Doubling stops at the first ``D`` where (a) the draws
    agree: the mean relative gap between a selection's own MMD estimate and the other draws'
    estimates is at most ``features_tol`` (the gap measures both the noise of the estimate
    and how much the optimiser fitted that noise), and (b) the cross-judged MMD changed by at
    most ``features_tol`` (relative) from ``D / 2``; or at the memory / ``_AUTO_MAX`` cap.
    """
    n_pilot = min(prep.n_finite, max(_AUTO_PILOT, 10 * m), 5 * _AUTO_PILOT)
    pick = np.sort(rng.choice(prep.n_finite, size=n_pilot, replace=False))
    ids, cnt = np.unique(prep.inverse[pick], return_counts=True)
    z_rows = prep.first[ids]
    m_pilot = max(1, min(m, ids.size // 10, _AUTO_MAX_M))
    d = prep.x.shape[1]
    cap = max(_AUTO_START, _FEATURE_BYTES // (ids.size * 2 * np.dtype(dtype).itemsize))
    levels = []
    n_feat = _AUTO_START
    while n_feat <= min(_AUTO_MAX, cap):
        levels.append(n_feat)
        n_feat *= 2
    history: list[dict[str, Any]] = []
    previous = None

    def one_draw(fmap: FeatureMap) -> tuple[np.ndarray, np.ndarray, tuple]:
        phi = features_of_rows(fmap, prep.x, z_rows, chunk_size=_chunk_rows(None, fmap.width))
        # float32 sums over 256 rows, added in float64 (a float64 product would first copy
        # the whole feature matrix to float64)
        c32 = cnt.astype(phi.dtype)
        mu = np.zeros(phi.shape[1])
        for a in range(0, phi.shape[0], 256):
            mu += c32[a : a + 256] @ phi[a : a + 256]
        mu /= cnt.sum()
        problem = Problem(
            phi=phi,
            mu=mu,
            pool=np.arange(ids.size),
            counts=cnt,
            inverse=np.arange(ids.size),
            allowed=np.ones(ids.size, bool),
            fixed=np.zeros(0, np.int64),
            weights_rule=s.weights,
            features_of=phi.__getitem__,
        )
        pos = np.asarray(GreedyState(problem, problem.fixed_pos, problem.pool_free).run(m_pilot))
        w, own = problem.weigh(phi[pos])
        return phi, mu, (pos, w, own)

    # the draws of a level are independent: drawn in order from ``rng`` (so the result does
    # not depend on the thread count), then worked on by ``s.workers`` threads (numpy and
    # the trig kernels release the GIL)
    with ThreadPoolExecutor(max_workers=max(1, min(s.workers, _AUTO_DRAWS))) as pool:
        for li, n_feat in enumerate(levels):
            fmaps = [
                draw_feature_map(
                    kern, d, n_feat, s.feature_map, bandwidth, prep.mean, prep.scale, rng, dtype
                )
                for _ in range(_AUTO_DRAWS)
            ]
            phis, mus, sels = map(list, zip(*pool.map(one_draw, fmaps), strict=True))
            entry = _auto_level_entry(n_feat, phis, mus, sels, previous)
            history.append(entry)
            if progress is not None:
                progress(li + 1, len(levels), "automatic feature count (pilot selections)")
            stable = entry["gap"] <= s.features_tol
            if stable and entry.get("change", np.inf) <= s.features_tol:
                return n_feat, history
            previous = entry["mmd_cross_mean"]
    return levels[-1], history


def _auto_level_entry(
    n_feat: int,
    phis: list[np.ndarray],
    mus: list[np.ndarray],
    sels: list[tuple[np.ndarray, np.ndarray, float]],
    previous: float | None,
) -> dict[str, Any]:
    """History entry of one level of the automatic feature count: each draw's selection
    judged by its own features and by the other draws'."""
    cross = []
    for r, (pos, w, _) in enumerate(sels):
        judged = [feature_mmd(phis[q][pos], mus[q], w) for q in range(_AUTO_DRAWS) if q != r]
        cross.append(float(np.mean(judged)))
    honest = float(np.mean(cross))
    own = np.array([v[2] for v in sels])
    # how far each draw's own estimate is from the other draws' verdict: feature noise
    # plus the optimiser fitting that noise; small means the estimate is stable
    gap = float(np.mean(np.abs(np.asarray(cross) - own)) / max(honest, 1e-300))
    entry = {
        "n_features": n_feat,
        "mmd_own": own.tolist(),
        "mmd_cross": cross,
        "mmd_cross_mean": honest,
        "gap": gap,
        "spread": float((max(cross) - min(cross)) / honest) if honest > 0 else 0.0,
    }
    if previous is not None:
        entry["change"] = float(abs(honest - previous) / max(honest, 1e-300))
    return entry


def _refill(
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
    floor = _WEIGHT_FLOOR / m
    k_fixed = problem.fixed.size
    n_idle0 = int(np.count_nonzero(w <= floor))

    def judge(ids: np.ndarray, w: np.ndarray) -> float:
        return float("nan") if exact_of is None else exact_of(ids, w)

    mmd_ex = judge(result.ids, w)
    info: dict[str, Any] = {
        "threshold": floor,
        "rule": f"w_i > {_WEIGHT_FLOOR:g} / m",
        "first": {"n_weighted": int(w.size - n_idle0), "n_unweighted": n_idle0,
                  "mmd_features": mmd, "mmd_exact": mmd_ex, "ids": result.ids.copy(),
                  "weights": w.tolist(), "greedy_rule": result.info.get("greedy_rule")},
        "rounds": [],
        "replaced": 0,
    }  # fmt: skip
    banned = np.zeros_like(problem.allowed)
    reason = "every chosen point carries weight"
    if not on and n_idle0:
        reason = off
    what = "replacement rounds (points without weight)"
    for round_no in range(_REFILL_ROUNDS if on else 0):
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
        if on and np.any(w[k_fixed:] <= floor):
            reason = f"still without weight after {_REFILL_ROUNDS} replacement rounds"
    if progress is not None and on:
        progress(_REFILL_ROUNDS, _REFILL_ROUNDS, what)
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


def _run(*args: Any, **kwargs: Any) -> Selection:
    # every product here is small in one dimension (d columns, m chosen rows, one vector):
    # OpenBLAS threads lose up to 10x on those (benchmarks/bench_thin.py, BLAS threads), so
    # BLAS runs on one thread and the streamed feature pass supplies the parallelism
    with one_blas_thread():
        return _run_one_thread(*args, **kwargs)


def _run_one_thread(
    x: np.ndarray,
    m: int,
    s: _Settings,
    rng: Any,
    progress: Progress | None,
    *,
    fixed_rows: np.ndarray | None = None,
    excluded_rows: np.ndarray | None = None,
    purpose: str = "thin",
) -> Selection:
    t_start = time.perf_counter()
    timings: dict[str, float] = {}
    report_to = progress
    progress = _StepProgress(report_to) if report_to is not None else None
    steps = progress if progress is not None else _StepProgress(None)

    def lap(name: str, t0: float) -> float:
        now = time.perf_counter()
        timings[name] = now - t0
        return now

    streams, seed = _rng_and_seed(rng)
    kern = get_kernel(s.kernel)
    selector = get_selector(s.method, **s.method_options)
    dtype = np.float32 if s.precision == "single" else np.float64
    chunk0 = _chunk_rows(s.chunk_size, 64)
    done = steps.step("preparing the chain (non-finite rows, repeats, standardisation)")
    prep = _prepare(x, s.nonfinite, s.standardise, chunk0)
    done()
    t = lap("prepare", t_start)

    fixed = np.zeros(0, np.int64)
    if fixed_rows is not None and fixed_rows.size:
        fixed = prep.ids_of_rows(fixed_rows, "selection")
        _, keep = np.unique(fixed, return_index=True)
        fixed = fixed[np.sort(keep)]
    allowed = np.ones(prep.n_distinct, dtype=bool)
    if excluded_rows is not None and excluded_rows.size:
        allowed[prep.ids_of_rows(excluded_rows, "excluded rows")] = False
    allowed[fixed] = True
    n_avail = int(np.count_nonzero(allowed))
    if m > n_avail:
        raise InputError(
            f"budget must be <= the number of distinct usable rows ({n_avail}), got {m}"
        )
    if fixed.size > m:
        raise InputError(f"budget ({m}) is smaller than the rows to keep ({fixed.size})")

    # bandwidth ---------------------------------------------------------------------------
    bw_info: dict[str, Any] = {}
    if s.bandwidth is None:
        # subsample of finite chain rows (multiplicity counted), standardised
        take = streams[0].choice(
            prep.n_finite, size=min(prep.n_finite, _MEDIAN_ROWS), replace=False
        )
        z = prep.standardised(prep.inverse[np.sort(take)])
        bandwidth, used = median_heuristic(z, norm=kern.norm, max_rows=_MEDIAN_ROWS)
        bw_info = {"bandwidth_rule": "median heuristic", "bandwidth_rows": used}
        if not bandwidth > 0:
            bandwidth = 1.0
            bw_info["bandwidth_rule"] = "median heuristic was 0 (all rows equal); used 1.0"
    else:
        bandwidth = s.bandwidth
        bw_info = {"bandwidth_rule": "given"}
    t = lap("bandwidth", t)

    # number of features -------------------------------------------------------------------
    auto_history: list[dict[str, Any]] | None = None
    if s.n_features is None:
        n_feat, auto_history = _auto_features(
            prep, kern, bandwidth, s, m, dtype, streams[3], progress
        )
    else:
        n_feat = s.n_features
    t = lap("auto_features", t)

    d = x.shape[1]
    fmap: FeatureMap = draw_feature_map(
        kern, d, n_feat, s.feature_map, bandwidth, prep.mean, prep.scale, streams[1], dtype
    )
    chunk = _chunk_rows(s.chunk_size, fmap.width)
    mu = mean_embedding(
        fmap, prep.x, prep.rows, prep.counts, chunk_size=chunk, workers=s.workers,
        progress=progress,
    )  # fmt: skip
    t = lap("mean_embedding", t)

    # candidate pool ---------------------------------------------------------------------------
    free_ids = np.flatnonzero(allowed & ~np.isin(np.arange(prep.n_distinct), fixed))
    if s.n_candidates is None:
        n_pool = max(10_000, 50 * m)
        n_pool = min(n_pool, max(m, _FEATURE_BYTES // (fmap.width * np.dtype(dtype).itemsize)))
    else:
        n_pool = s.n_candidates
    n_pool = max(n_pool, m - fixed.size)
    pool = np.union1d(fixed, _weighted_sample(free_ids, prep.counts, n_pool, streams[2]))
    done = steps.step("features of the candidate pool")
    phi_pool = features_of_rows(fmap, prep.x, prep.first[pool], chunk_size=chunk)
    done()
    t = lap("pool_features", t)

    def features_of(ids: np.ndarray) -> np.ndarray:
        return features_of_rows(fmap, prep.x, prep.first[np.asarray(ids)], chunk_size=chunk)

    problem = Problem(
        phi=phi_pool,
        mu=mu,
        pool=pool,
        counts=prep.counts,
        inverse=prep.inverse,
        allowed=allowed,
        fixed=fixed,
        weights_rule=s.weights,
        features_of=features_of,
        coords=prep.standardised(pool),
        workers=s.workers,
    )
    result = selector.select(problem, m, streams[5], progress)
    t = lap("select", t)

    def weigh(ids: np.ndarray, w: np.ndarray | None = None) -> tuple[np.ndarray, float]:
        """Weights by the rule (or ``w`` as given) and the feature-space MMD of ``ids``."""
        pos_in_pool = np.searchsorted(pool, ids)
        in_pool = (pos_in_pool < pool.size) & (pool[np.minimum(pos_in_pool, pool.size - 1)] == ids)
        phi_s = np.empty((ids.size, fmap.width), dtype=np.float64)
        if np.any(in_pool):
            phi_s[in_pool] = phi_pool[pos_in_pool[in_pool]]
        if not np.all(in_pool):
            phi_s[~in_pool] = features_of(ids[~in_pool])
        if w is not None:
            return w, feature_mmd(phi_s, mu, w)
        return problem.weigh(phi_s)

    done = steps.step("weight solve (simplex QP)" if s.weights == "simplex" else "weights")
    w, mmd_feat = weigh(result.ids)
    done()
    t = lap("weights", t)

    # exact validation target ------------------------------------------------------------------
    exact_of: Callable[[np.ndarray, np.ndarray], float] | None = None
    exact: ExactMMD | None = None
    if s.exact_max_rows > 0:
        sample_of: int | None = None
        if prep.n_finite <= s.exact_max_rows:
            target_ids, target_w = np.arange(prep.n_distinct), prep.counts.astype(np.float64)
            exact_rule = "all rows"
        else:
            take = streams[4].choice(prep.n_finite, size=s.exact_max_rows, replace=False)
            target_ids, cnt = np.unique(prep.inverse[take], return_counts=True)
            target_w = cnt.astype(np.float64)
            sample_of = prep.n_finite
            exact_rule = (
                f"uniform random subsample of {s.exact_max_rows} of {prep.n_finite} rows "
                "(unbiased MMD^2 estimate, standard error in mmd_exact_error)"
            )
        exact = ExactMMD(
            prep.standardised(target_ids), target_w, kern, bandwidth, sample_of=sample_of,
            progress=progress,
        )  # fmt: skip
        _ = exact.self_term  # once, before any set is judged

        def exact_of(ids: np.ndarray, w: np.ndarray) -> float:
            return exact(prep.standardised(ids), w)

        exact_rows = int(min(prep.n_finite, s.exact_max_rows))
    else:
        exact_rows, exact_rule = 0, "skipped (exact_max_rows=0)"
    t = lap("exact_mmd", t)

    # points without weight ------------------------------------------------------------------
    off = None
    if s.weights != "simplex":
        off = "uniform weights: every point carries weight 1/m"
    elif s.method not in _REFILL_METHODS:
        off = f"not replaced for the {s.method!r} baseline"
    elif not s.replace_unweighted:
        off = "not replaced (replace_unweighted=False)"
    refiller = selector
    if s.method == "genetic":
        # a replacement round searches only the few replaced genes: one stagnation window of
        # generations (``patience``) is its cap, not the whole run's
        opts = selector.options
        refiller = get_selector(
            "genetic", **{**opts, "generations": min(opts["generations"], opts["patience"])}
        )
    result, w, mmd_feat, mmd_ex, weighted_info = _refill(
        problem, refiller, result, w, mmd_feat, weigh, exact_of, m, streams[5], off=off,
        progress=progress,
    )  # fmt: skip
    ids = result.ids
    first = weighted_info["first"]
    first["indices"] = prep.first[first.pop("ids")].astype(np.int64).tolist()  # rows as given
    t = lap("replace_unweighted", t)

    # stated error of the exact check ----------------------------------------------------------
    exact_error: dict[str, Any] | None = None
    if exact is not None:
        done = steps.step("exact MMD check (selection)")
        est = exact.estimate(prep.standardised(ids), w)
        done()
        mmd_ex = est["mmd"]
        exact_error = {
            "rows": int(exact.n_rows),
            "of_rows": prep.n_finite,
            **est,
            "rule": "whole chain, exact (no error)"
            if exact.sample_of is None
            else "unbiased MMD^2 on a uniform subsample without replacement; standard error "
            "from the U-statistic variance (Gretton et al. 2012, Corollary 16; Hoeffding "
            "1948): first-order plus degenerate second-order term, finite-population "
            "corrected; mmd_low/mmd_high: sqrt(mmd_sq -/+ 1.96 mmd_sq_se), about 95 %",
        }
        t = lap("exact_mmd_error", t)
    timings["total"] = time.perf_counter() - t_start

    indices = prep.first[ids].astype(np.int64)
    population = None
    if result.population is not None:
        population = [(prep.first[p].astype(np.int64), float(v)) for p, v in result.population]
    report: dict[str, Any] = {
        "purpose": purpose,
        "budget": int(m),
        "weighted_points": weighted_info,
        "replace_unweighted": s.replace_unweighted,
        "n_rows": int(x.shape[0]),
        "n_nonfinite_dropped": prep.n_dropped,
        "n_finite": prep.n_finite,
        "n_distinct": prep.n_distinct,
        "standardise": s.standardise,
        "standardisation_mean": prep.mean.tolist(),
        "standardisation_scale": prep.scale.tolist(),
        **bw_info,
        "n_features_rule": "auto" if auto_history is not None else "given",
        "auto_features_tol": s.features_tol,
        "auto_features_history": auto_history,
        "feature_columns": fmap.width,
        "precision": s.precision,
        "workers": s.workers,
        "n_candidates": int(pool.size),
        "n_fixed": int(fixed.size),
        "multiplicity": prep.counts[ids].tolist(),
        "mmd_exact_rule": exact_rule,
        "mmd_exact_max_rows": s.exact_max_rows,
        "mmd_exact_error": exact_error,
        "selector": {k: v for k, v in result.info.items()},
        "method_options": dict(selector.options),
        "timings": timings,
    }
    return Selection(
        indices=indices,
        weights=w,
        points=x[indices].copy(),
        method=s.method,
        weights_rule=s.weights,
        kernel=kern.name,
        bandwidth=float(bandwidth),
        feature_map=s.feature_map,
        n_features=int(n_feat),
        seed=seed,
        mmd_features=float(mmd_feat),
        mmd_exact=float(mmd_ex),
        mmd_exact_rows=exact_rows,
        report=report,
        population=population,
    )


def _settings(
    *,
    kernel: Any,
    bandwidth: Any,
    method: Any,
    weights: Any,
    feature_map: Any,
    n_features: Any,
    nonfinite: Any,
    standardise: Any,
    exact_max_rows: Any,
    chunk_size: Any,
    n_candidates: Any,
    features_tol: Any,
    precision: Any,
    workers: Any,
    replace_unweighted: Any = True,
    method_options: dict[str, Any],
) -> _Settings:
    get_kernel(kernel)
    _validate_choice("method", method, tuple(SELECTORS))
    get_selector(method, **method_options)  # unknown options fail here, before any work
    if not isinstance(features_tol, int | float) or not (0 < features_tol < 1):
        raise ValueError(f"features_tol must be a number in (0, 1), got {features_tol!r}")
    if not isinstance(replace_unweighted, bool | np.bool_):
        raise TypeError(f"replace_unweighted must be True or False, got {replace_unweighted!r}")
    return _Settings(
        kernel=kernel,
        bandwidth=_validate_bandwidth(bandwidth),
        method=method,
        weights=_validate_choice("weights", weights, _WEIGHTS_RULES),
        feature_map=_validate_choice("feature_map", feature_map, FEATURE_MAPS),
        n_features=_validate_n_features(n_features),
        nonfinite=_validate_choice("nonfinite", nonfinite, _NONFINITE),
        standardise=bool(standardise),
        exact_max_rows=_validate_int("exact_max_rows", exact_max_rows, 0),
        chunk_size=None if chunk_size is None else _validate_int("chunk_size", chunk_size, 1),
        n_candidates=None
        if n_candidates in (None, "auto")
        else _validate_int("n_candidates", n_candidates, 1),
        features_tol=float(features_tol),
        precision=_validate_choice("precision", precision, ("single", "double")),
        workers=_validate_int("workers", workers, 1),
        method_options=method_options,
        replace_unweighted=bool(replace_unweighted),
    )


# ============================================================================ public API
def thin(
    samples: npt.ArrayLike | Chain,
    budget: int,
    *,
    kernel: KernelName = "gaussian",
    bandwidth: float | None = None,
    method: MethodName = "greedy",
    weights: WeightsRule = "simplex",
    feature_map: FeatureMapName = "orf",
    n_features: int | str = "auto",
    nonfinite: NonFinite = "drop",
    standardise: bool = True,
    exact_max_rows: int = _EXACT_MAX_ROWS,
    chunk_size: int | None = None,
    n_candidates: int | str = "auto",
    features_tol: float = 0.05,
    precision: Literal["single", "double"] = "single",
    workers: int = 2,
    replace_unweighted: bool = True,
    rng: np.random.Generator | int | None = None,
    progress: Progress | None = None,
    **method_options: Any,
) -> Selection:
    """Choose ``budget`` distinct weighted rows whose distribution is closest to the chain.

    Parameters
    ----------
    samples : array_like, shape (n, d), or Chain
        Chain rows in user units (a :class:`Chain` uses ``.samples``).
    budget : int
        Number of points ``m`` (1 <= m <= number of distinct finite rows).
    kernel : {"gaussian", "laplace", "matern32", "matern52"}
    bandwidth : float, optional
        In standardised coordinates; default: median heuristic on a random subsample of
        2000 finite rows (Gretton et al. 2012, Section 8).
    method : {"greedy", "swap", "genetic", "random", "stride"}
    weights : {"simplex", "uniform"}
        Optimal simplex-constrained weights (exact QP) or equal weights.
    feature_map : {"orf", "rff", "qmc"}
    n_features : int or "auto"
        Number of random frequencies ``D`` (the feature vector has ``2 D`` entries); "auto"
        doubles from 64 until independent feature draws agree on the pilot MMD to
        within ``features_tol`` (relative) and that MMD changed by at most ``features_tol``
        since the previous doubling (see the report's ``auto_features_history``).
    nonfinite : {"drop", "raise"}
        Rows with NaN/inf are dropped and counted, or refused.
    standardise : bool
        Scale each parameter to mean 0, standard deviation 1 before the kernel.
    exact_max_rows : int
        Exact-kernel MMD over all rows up to this many, else over a uniform random subsample
        of this many rows; 0 skips it (``mmd_exact`` is NaN). The check costs about
        ``exact_max_rows^2 / 2`` kernel values: the default 20,000 takes ~1 s, a few % of a
        default thin of a 400,000 x 4 chain (100,000 took 19-23 s, about half of it). On a
        subsample the MMD^2 estimate is unbiased for the whole chain's and the report's
        ``mmd_exact_error`` states its standard error and an approximate 95 % interval
        (U-statistic variance, Gretton et al. 2012, Corollary 16).
    chunk_size : int, optional
        Rows per chunk in the streaming passes (default: about 16 MB of features).
    n_candidates : int or "auto"
        Size of the candidate pool of distinct rows for greedy/swap/genetic (drawn in
        proportion to multiplicity); "auto" is ``max(10000, 50 m)`` capped at 512 MB of
        features. All distinct rows are candidates when there are fewer.
    features_tol : float
        Relative tolerance of the automatic feature count (default 0.05, the value at which
        the benchmark's greedy/swap selections come within ~15 % of an exact-kernel greedy
        at m = 100; the count is capped at 8192 frequencies and by 512 MB of features).
    precision : {"single", "double"}
        Precision of feature values (sums are float64 either way).
    workers : int
        Threads for the streaming pass over the chain (the result does not depend on it).
    replace_unweighted : bool
        With simplex weights and the greedy, swap or genetic selector: chosen points whose
        optimal weight is at most ``1e-6 / m`` are replaced by the selector's next choices
        (the other points kept), the weights re-solved, until every point carries weight;
        points that still carry none are left out (``Selection.m < budget``) and the report's
        ``weighted_points`` says how many carry weight and why. False keeps the first
        selection as it is, zero weights included.
    rng : int or Generator, optional
        Seed; the same input, settings and seed give the same selection.
    progress : callable, optional
        ``progress(done, total, step)`` during every long step, each under its own name
        (preparing the chain, automatic feature count, feature pass, candidate features,
        selection, weight solve, exact MMD check, replacement rounds); ``done`` increases
        within a step, at most once per 1 % and per 0.5 s (whichever is rarer) besides the
        step's first and last call.
    **method_options
        Options of the selector (swap: ``max_sweeps``; genetic: ``population``,
        ``generations``, ``patience``, ``elite``, ``tournament``, ``mutation_rate``,
        ``shortlist``, ``shortlist_share``, ``keep``).

    Returns
    -------
    Selection
        Indices into the rows of ``samples`` as given, weights, points in user units, both
        MMDs and a report (rows dropped, distinct rows, standardisation, bandwidth rule,
        feature-count history, ``weighted_points``: how many points carry weight, the
        replacement rounds, the budget saved and why; timings). ``m`` is ``budget`` unless
        points without weight could not be replaced (``report["weighted_points"]``).

    References
    ----------
    Rahimi & Recht (2007); Yu et al. (2016); Avron et al. (2016); Chen, Welling & Smola (2010);
    Gretton et al. (2012); Riabiz et al. (2022).
    """
    x = _validate_samples(samples)
    m = _validate_int("budget", budget, 1)
    s = _settings(
        kernel=kernel,
        bandwidth=bandwidth,
        method=method,
        weights=weights,
        feature_map=feature_map,
        n_features=n_features,
        nonfinite=nonfinite,
        standardise=standardise,
        exact_max_rows=exact_max_rows,
        chunk_size=chunk_size,
        n_candidates=n_candidates,
        features_tol=features_tol,
        precision=precision,
        workers=workers,
        replace_unweighted=replace_unweighted,
        method_options=method_options,
    )
    return _run(x, m, s, rng, progress)


def _settings_from(selection: Selection, method: str | None, overrides: dict[str, Any]):
    if not isinstance(selection, Selection):
        raise TypeError(f"selection must be a Selection, got {type(selection).__name__}")
    rep = selection.report
    opts = dict(
        kernel=selection.kernel,
        bandwidth=selection.bandwidth,
        method=method if method is not None else "greedy",
        weights=selection.weights_rule,
        feature_map=selection.feature_map,
        n_features=selection.n_features,
        nonfinite="drop",
        standardise=rep.get("standardise", True),
        exact_max_rows=rep.get("mmd_exact_max_rows", _EXACT_MAX_ROWS),
        chunk_size=None,
        n_candidates="auto",
        features_tol=rep.get("auto_features_tol", 0.05),
        precision=rep.get("precision", "single"),
        workers=rep.get("workers", 2),
        replace_unweighted=rep.get("replace_unweighted", True),
    )
    method_options = {k: v for k, v in overrides.items() if k not in opts}
    opts.update({k: v for k, v in overrides.items() if k in opts})
    return _settings(**opts, method_options=method_options)


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
    s = _settings_from(selection, method, options)
    return _run(
        x,
        selection.m + k,
        s,
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
    s = _settings_from(selection, method, options)
    return _run(
        x,
        selection.m,
        s,
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
    s = _settings_from(selection, method, options)
    return _run(
        x,
        m,
        s,
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
    s = _settings_from(selection, None, {})
    # every point is fixed, so no selection happens: only the weights are solved
    return _run(x, rows.size, s, selection.seed, progress, fixed_rows=rows, purpose="reweight")
