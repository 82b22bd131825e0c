"""thin(..., workers=N) reaches every threaded step (issue 13, item 3).

Oracle: the documented contract of ``thin`` (``workers``: threads for the streaming pass, the
result does not depend on it), checked by recording the thread counts actually requested.
"""

from __future__ import annotations

import numpy as np
import pytest

from winnow.tasks.thin import _auto, _run, extend, thin


def _banana(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    z = rng.standard_normal((n, 2))
    return np.c_[z[:, 0], z[:, 1] + 0.5 * z[:, 0] ** 2 - 0.5]


@pytest.fixture
def recorded(monkeypatch):
    """Thread counts asked of the mean-embedding pass, the auto-feature pool and the
    selector's matrix-vector products."""
    seen: dict[str, list[int]] = {"mean_embedding": [], "pool": [], "problem": []}
    real_mean, real_pool, real_problem = (
        _run.mean_embedding, _auto.ThreadPoolExecutor, _run.Problem,
    )  # fmt: skip

    def mean_embedding(*args, **kwargs):
        seen["mean_embedding"].append(kwargs["workers"])
        return real_mean(*args, **kwargs)

    def pool(*args, **kwargs):
        seen["pool"].append(kwargs["max_workers"])
        return real_pool(*args, **kwargs)

    def problem(*args, **kwargs):
        out = real_problem(*args, **kwargs)
        seen["problem"].append(out.workers)
        return out

    monkeypatch.setattr(_run, "mean_embedding", mean_embedding)
    monkeypatch.setattr(_auto, "ThreadPoolExecutor", pool)
    monkeypatch.setattr(_run, "Problem", problem)
    return seen


@pytest.mark.parametrize("workers", [1, 3])
def test_workers_reach_every_threaded_step(recorded, workers):
    x = _banana(3000, seed=1)
    sel = thin(x, 8, rng=2, workers=workers, exact_max_rows=0)  # n_features="auto"
    assert sel.report["settings"]["workers"] == workers
    assert recorded["mean_embedding"] == [workers]
    # the auto feature count runs its 3 independent draws on at most 3 threads
    assert recorded["pool"] == [min(workers, 3)]
    # the selection's problem (last built; the pilot problems of the auto count run one per
    # thread already and keep one thread each)
    assert recorded["problem"][-1] == workers
    # extend() reuses the selection's recorded setting
    for v in recorded.values():
        v.clear()
    extend(x, sel, 2, exact_max_rows=0)
    assert recorded["mean_embedding"] == [workers]


def test_result_does_not_depend_on_workers():
    # documented contract: the chosen rows and weights are the same for any thread count
    x = _banana(3000, seed=3)
    one = thin(x, 10, rng=4, workers=1, exact_max_rows=0)
    three = thin(x, 10, rng=4, workers=3, exact_max_rows=0)
    np.testing.assert_array_equal(one.indices, three.indices)
    np.testing.assert_allclose(one.weights, three.weights, rtol=0, atol=1e-12)
    assert one.report["settings"]["workers"] == 1 and three.report["settings"]["workers"] == 3


def test_bad_workers_refused():
    with pytest.raises(ValueError, match="workers must be >= 1, got 0"):
        thin(_banana(50, seed=1), 5, workers=0, n_features=32)
    with pytest.raises(TypeError, match="workers must be an integer"):
        thin(_banana(50, seed=1), 5, workers=1.5, n_features=32)
