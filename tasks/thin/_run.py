"""One thinning run, step by step: prepare the chain, bandwidth, feature count, mean
embedding, candidate pool, selection, weights, exact validation target, replacement of
points without weight, the exact check's stated error, and the selection with its report.

Every public entry point (``thin``, ``extend``, ``replace``, ``disjoint``, ``reweight``) ends
here with one validated :class:`~winnow.tasks.config.ThinOptions`.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from winnow.tasks.config import ThinOptions
from winnow.tasks.errors import InputError
from winnow.tasks.records import Selection

from ._auto import FEATURE_BYTES, auto_features, chunk_rows
from ._features import (
    FeatureMap,
    draw_feature_map,
    features_of_rows,
    mean_embedding,
    one_blas_thread,
)
from ._kernels import Kernel, get_kernel, median_heuristic
from ._mmd import ExactMMD
from ._options import rng_and_seed
from ._prepare import Prepared, prepare, weighted_sample
from ._progress import Progress, StepProgress
from ._refill import refill
from ._selector import Problem, Selector, SelectorResult
from ._selectors import get_selector
from ._weights import feature_mmd

__all__ = ["run"]

_MEDIAN_ROWS = 2000  # rows of the median-heuristic subsample


def run(*args: Any, **kwargs: Any) -> Selection:
    """:func:`_run_one_thread` with BLAS on one thread."""
    # every product here is small in one dimension (d columns, m chosen rows, one vector):
    # OpenBLAS threads lose up to 10x on those (benchmarks/bench_thin.py, BLAS threads), so
    # BLAS runs on one thread and the streamed feature pass supplies the parallelism
    with one_blas_thread():
        return _run_one_thread(*args, **kwargs)


class _Laps:
    """Wall time of each step, in order."""

    def __init__(self) -> None:
        self.start = self.last = time.perf_counter()
        self.timings: dict[str, float] = {}

    def __call__(self, name: str) -> None:
        now = time.perf_counter()
        self.timings[name] = now - self.last
        self.last = now

    def total(self) -> dict[str, float]:
        self.timings["total"] = time.perf_counter() - self.start
        return self.timings


def _rows(
    prep: Prepared, m: int, fixed_rows: np.ndarray | None, excluded_rows: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray]:
    """Distinct ids to keep (first, in order) and the mask of distinct rows allowed."""
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
    return fixed, allowed


def _bandwidth(
    prep: Prepared, kern: Kernel, s: ThinOptions, rng: np.random.Generator
) -> tuple[float, dict[str, Any]]:
    """The kernel bandwidth (given, or the median heuristic on a subsample of finite chain
    rows, multiplicity counted, standardised) and how it was found."""
    if s.bandwidth is not None:
        return s.bandwidth, {"bandwidth_rule": "given"}
    take = rng.choice(prep.n_finite, size=min(prep.n_finite, _MEDIAN_ROWS), replace=False)
    z = prep.standardised(prep.inverse[np.sort(take)])
    bandwidth, used = median_heuristic(z, norm=kern.norm, max_rows=_MEDIAN_ROWS)
    info: dict[str, Any] = {"bandwidth_rule": "median heuristic", "bandwidth_rows": used}
    if not bandwidth > 0:
        bandwidth = 1.0
        info["bandwidth_rule"] = "median heuristic was 0 (all rows equal); used 1.0"
    return bandwidth, info


def _pool(
    prep: Prepared,
    allowed: np.ndarray,
    fixed: np.ndarray,
    m: int,
    s: ThinOptions,
    width: int,
    rng: np.random.Generator,
) -> np.ndarray:
    """Distinct ids of the candidate pool: the fixed rows and free rows drawn in proportion
    to multiplicity."""
    free_ids = np.flatnonzero(allowed & ~np.isin(np.arange(prep.n_distinct), fixed))
    if s.n_candidates == "auto":
        itemsize = np.dtype(_dtype(s)).itemsize
        n_pool = min(max(10_000, 50 * m), max(m, FEATURE_BYTES // (width * itemsize)))
    else:
        n_pool = s.n_candidates
    n_pool = max(n_pool, m - fixed.size)
    return np.union1d(fixed, weighted_sample(free_ids, prep.counts, n_pool, rng))


def _dtype(s: ThinOptions) -> type:
    return np.float32 if s.precision == "single" else np.float64


@dataclass
class _Weigher:
    """Weights by the problem's rule (or as given) and the feature-space MMD of any ids."""

    problem: Problem
    fmap: FeatureMap
    features_of: Callable[[np.ndarray], np.ndarray]

    def __call__(self, ids: np.ndarray, w: np.ndarray | None = None) -> tuple[np.ndarray, float]:
        pool, phi_pool = self.problem.pool, self.problem.phi
        pos_in_pool = np.searchsorted(pool, ids)
        in_pool = (pos_in_pool < pool.size) & (pool[np.minimum(pos_in_pool, pool.size - 1)] == ids)
        phi_s = np.empty((ids.size, self.fmap.width), dtype=np.float64)
        if np.any(in_pool):
            phi_s[in_pool] = phi_pool[pos_in_pool[in_pool]]
        if not np.all(in_pool):
            phi_s[~in_pool] = self.features_of(ids[~in_pool])
        if w is not None:
            return w, feature_mmd(phi_s, self.problem.mu, w)
        return self.problem.weigh(phi_s)


@dataclass
class _Exact:
    """The exact-kernel validation target: all distinct rows, or a uniform subsample."""

    mmd: ExactMMD | None
    rows: int
    rule: str

    def of(self, prep: Prepared) -> Callable[[np.ndarray, np.ndarray], float] | None:
        if self.mmd is None:
            return None
        exact = self.mmd
        return lambda ids, w: exact(prep.standardised(ids), w)


def _exact_target(
    prep: Prepared,
    kern: Kernel,
    bandwidth: float,
    s: ThinOptions,
    rng: np.random.Generator,
    progress: Progress | None,
) -> _Exact:
    if s.exact_max_rows == 0:
        return _Exact(None, 0, "skipped (exact_max_rows=0)")
    sample_of: int | None = None
    if prep.n_finite <= s.exact_max_rows:
        target_ids, target_w = np.arange(prep.n_distinct), prep.counts.astype(np.float64)
        rule = "all rows"
    else:
        take = rng.choice(prep.n_finite, size=s.exact_max_rows, replace=False)
        target_ids, cnt = np.unique(prep.inverse[take], return_counts=True)
        target_w = cnt.astype(np.float64)
        sample_of = prep.n_finite
        rule = (
            f"uniform random subsample of {s.exact_max_rows} of {prep.n_finite} rows "
            "(unbiased MMD^2 estimate, standard error in mmd_exact_error)"
        )
    exact = ExactMMD(
        prep.standardised(target_ids), target_w, kern, bandwidth, sample_of=sample_of,
        progress=progress,
    )  # fmt: skip
    _ = exact.self_term  # once, before any set is judged
    return _Exact(exact, int(min(prep.n_finite, s.exact_max_rows)), rule)


def _refill_off(s: ThinOptions, selector: Selector) -> str | None:
    """Why points without weight are not replaced in this run (None: they are)."""
    if s.weights != "simplex":
        return "uniform weights: every point carries weight 1/m"
    if not selector.refills:
        return f"not replaced for the {s.method!r} baseline"
    if not s.replace_unweighted:
        return "not replaced (replace_unweighted=False)"
    return None


def _exact_error(
    exact: ExactMMD, prep: Prepared, ids: np.ndarray, w: np.ndarray, steps: StepProgress
) -> tuple[float, dict[str, Any]]:
    """The exact MMD of the selection and its stated error (zero on the whole chain)."""
    done = steps.step("exact MMD check (selection)")
    est = exact.estimate(prep.standardised(ids), w)
    done()
    return est["mmd"], {
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


def _features_step(
    prep: Prepared,
    kern: Kernel,
    bandwidth: float,
    s: ThinOptions,
    m: int,
    streams: list[np.random.Generator],
    progress: Progress | None,
    laps: _Laps,
) -> tuple[FeatureMap, int, np.ndarray, list[dict[str, Any]] | None]:
    """The feature map (its count given or automatic) and the chain's mean embedding."""
    auto_history: list[dict[str, Any]] | None = None
    if s.features == "auto":
        n_feat, auto_history = auto_features(
            prep, kern, bandwidth, s, m, _dtype(s), streams[3], progress
        )
    else:
        n_feat = s.features
    laps("auto_features")
    d = prep.x.shape[1]
    fmap = draw_feature_map(
        kern, d, n_feat, s.feature_map, bandwidth, prep.mean, prep.scale, streams[1], _dtype(s)
    )
    mu = mean_embedding(
        fmap, prep.x, prep.rows, prep.counts, chunk_size=chunk_rows(s.chunk_size, fmap.width),
        workers=s.workers, progress=progress,
    )  # fmt: skip
    laps("mean_embedding")
    return fmap, int(n_feat), mu, auto_history


# long: the run's steps in order, each a call, with the report of what each step found
def _run_one_thread(
    x: np.ndarray,
    m: int,
    s: ThinOptions,
    method_options: dict[str, Any],
    rng: Any,
    progress: Progress | None,
    *,
    fixed_rows: np.ndarray | None = None,
    excluded_rows: np.ndarray | None = None,
    purpose: str = "thin",
) -> Selection:
    laps = _Laps()
    steps = StepProgress(progress)
    progress = steps if progress is not None else None
    streams, seed = rng_and_seed(rng)
    kern = get_kernel(s.kernel)
    selector = get_selector(s.method, **method_options)
    done = steps.step("preparing the chain (non-finite rows, repeats, standardisation)")
    prep = prepare(x, s.nonfinite, s.standardise, chunk_rows(s.chunk_size, 64))
    done()
    laps("prepare")
    fixed, allowed = _rows(prep, m, fixed_rows, excluded_rows)
    bandwidth, bw_info = _bandwidth(prep, kern, s, streams[0])
    laps("bandwidth")
    fmap, n_feat, mu, auto_history = _features_step(
        prep, kern, bandwidth, s, m, streams, progress, laps
    )

    chunk = chunk_rows(s.chunk_size, fmap.width)
    pool = _pool(prep, allowed, fixed, m, s, fmap.width, streams[2])
    done = steps.step("features of the candidate pool")
    phi_pool = features_of_rows(fmap, prep.x, prep.first[pool], chunk_size=chunk)
    done()
    laps("pool_features")

    def features_of(ids: np.ndarray) -> np.ndarray:
        return features_of_rows(fmap, prep.x, prep.first[np.asarray(ids)], chunk_size=chunk)

    problem = Problem(
        phi=phi_pool, mu=mu, pool=pool, counts=prep.counts, inverse=prep.inverse,
        allowed=allowed, fixed=fixed, weights_rule=s.weights, features_of=features_of,
        coords=prep.standardised(pool), workers=s.workers,
    )  # fmt: skip
    result = selector.select(problem, m, streams[5], progress)
    laps("select")
    weigh = _Weigher(problem, fmap, features_of)
    done = steps.step("weight solve (simplex QP)" if s.weights == "simplex" else "weights")
    w, mmd_feat = weigh(result.ids)
    done()
    laps("weights")
    exact = _exact_target(prep, kern, bandwidth, s, streams[4], progress)
    laps("exact_mmd")

    result, w, mmd_feat, mmd_ex, weighted_info = refill(
        problem, selector.for_refill(), result, w, mmd_feat, weigh, exact.of(prep), m,
        streams[5], off=_refill_off(s, selector), progress=progress,
    )  # fmt: skip
    ids = result.ids
    first = weighted_info["first"]
    first["indices"] = prep.first[first.pop("ids")].astype(np.int64).tolist()  # rows as given
    laps("replace_unweighted")
    exact_error: dict[str, Any] | None = None
    if exact.mmd is not None:
        mmd_ex, exact_error = _exact_error(exact.mmd, prep, ids, w, steps)
        laps("exact_mmd_error")

    indices = prep.first[ids].astype(np.int64)
    report: dict[str, Any] = {
        "purpose": purpose,
        "budget": int(m),
        "settings": s.model_dump(mode="json"),
        "weighted_points": weighted_info,
        "n_rows": int(x.shape[0]),
        "n_nonfinite_dropped": prep.n_dropped,
        "n_finite": prep.n_finite,
        "n_distinct": prep.n_distinct,
        "standardisation_mean": prep.mean.tolist(),
        "standardisation_scale": prep.scale.tolist(),
        **bw_info,
        "n_features_rule": "auto" if auto_history is not None else "given",
        "auto_features_history": auto_history,
        "feature_columns": fmap.width,
        "n_candidates": int(pool.size),
        "n_fixed": int(fixed.size),
        "multiplicity": prep.counts[ids].tolist(),
        "mmd_exact_rule": exact.rule,
        "mmd_exact_error": exact_error,
        "selector": dict(result.info),
        "method_options": dict(selector.options),
        "timings": laps.total(),
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
        n_features=n_feat,
        seed=seed,
        mmd_features=float(mmd_feat),
        mmd_exact=float(mmd_ex),
        mmd_exact_rows=exact.rows,
        report=report,
        population=_population(prep, result),
    )


def _population(prep: Prepared, result: SelectorResult) -> list[tuple[np.ndarray, float]] | None:
    if result.population is None:
        return None
    return [(prep.first[p].astype(np.int64), float(v)) for p, v in result.population]
