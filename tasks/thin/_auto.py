"""The automatic feature count (``features="auto"``): double the number of random features
until the MMD of pilot selections is stable across independent feature draws."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from typing import Any

import numpy as np

from winnow.tasks.config import ThinOptions

from ._features import FeatureMap, draw_feature_map, features_of_rows
from ._greedy import GreedyState
from ._prepare import Prepared
from ._progress import Progress
from ._selector import Problem
from ._weights import feature_mmd

__all__ = ["FEATURE_BYTES", "auto_features", "chunk_rows"]

_AUTO_START, _AUTO_MAX, _AUTO_DRAWS = 64, 8192, 3
_AUTO_PILOT, _AUTO_MAX_M = 2000, 400  # pilot chain rows (at least), largest pilot budget
FEATURE_BYTES = 512 * 2**20  # cap on the candidate pool's feature matrix


def chunk_rows(chunk_size: int | None, width: int) -> int:
    if chunk_size is not None:
        return chunk_size
    return int(max(256, 2**22 // max(width, 1)))  # about 16 MB of float32 features


def auto_features(
    prep: Prepared,
    kern,
    bandwidth: float,
    s: ThinOptions,
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
    cap = max(_AUTO_START, FEATURE_BYTES // (ids.size * 2 * np.dtype(dtype).itemsize))
    levels = []
    n_feat = _AUTO_START
    while n_feat <= min(_AUTO_MAX, cap):
        levels.append(n_feat)
        n_feat *= 2
    history: list[dict[str, Any]] = []
    previous = None

    def one_draw(fmap: FeatureMap) -> tuple[np.ndarray, np.ndarray, tuple]:
        phi = features_of_rows(fmap, prep.x, z_rows, chunk_size=chunk_rows(None, fmap.width))
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
