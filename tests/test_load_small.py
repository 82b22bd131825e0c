"""Load, small: 60 points, concurrency 8, a solver that sleeps 0-50 ms and fails some firsts.

The CI-sized version of ``benchmarks/bench_load.py``: the fault solver in ``load`` mode with
``fail_once = 1`` sleeps a pseudo-random 0-50 ms and fails a point's FIRST attempt with
probability 0.2 (both drawn from SHA-256 of the point; see tests/fault_solvers). The first
pass must record every point in the state the solver chose for it; ``rerun_flow`` must run
exactly the failed points once more; the store then holds exactly one success per point.

Reference: the project's contract (issue 8; README "Every run ends in a recorded state";
"reruns only what failed"). The expected first-pass states are recomputed here from the
solver's documented draw (an oracle of the solver, not of winnow).
"""

from __future__ import annotations

import hashlib
from collections import Counter

import pytest
from fault_solvers.kit import calls, make_study, read_runs, run_study

from winnow.tasks.store import RunStore, check

pytestmark = pytest.mark.slow

POINTS = 60
FAIL_RATE = 0.2


def _fails_first(x: float, y: float) -> bool:
    """The fault solver's draw for a point's first attempt (see fault_solver.py, load mode)."""
    digest = hashlib.sha256(f"{x!r},{y!r}".encode()).hexdigest()
    h = hashlib.sha256(f"{digest}:0".encode()).digest()
    return int.from_bytes(h[8:16], "little") / 2.0**64 < FAIL_RATE


def test_sixty_points_all_recorded_rerun_fixes_failures(tmp_path, prefect_harness, monkeypatch):
    from winnow.flows import _orchestrate
    from winnow.flows.rerun import rerun_flow

    # dispatch in batches of 25 (3 subflows), as a study of thousands of runs is dispatched
    # in batches of 400 (benchmarks/bench_load.py runs 2,000 points through that path)
    monkeypatch.setattr(_orchestrate, "_DISPATCH_BATCH", 25)

    make_study(
        tmp_path,
        n_rows=5 * POINTS,
        budget=POINTS,
        thin={"method": "stride", "weights": "uniform", "features": 64},
        dispatch__concurrency=8,
        dispatch__retries=0,
        dispatch__constants__mode="load",
        dispatch__constants__max_sleep_ms=50.0,
        dispatch__constants__fail_rate=FAIL_RATE,
        dispatch__constants__fail_once=1,
        collect__bootstrap=50,
    )
    store = tmp_path / "study.h5"
    first = run_study(tmp_path / "study.yaml")
    specs, outcomes, _ = read_runs(store)
    assert len(specs) == POINTS and set(outcomes) == {s.run_id for s in specs}
    expected = {
        s.run_id: "failed" if _fails_first(s.params["x"], s.params["y"]) else "succeeded"
        for s in specs
    }
    assert {rid: o.state for rid, o in outcomes.items()} == expected
    failed = {rid for rid, st in expected.items() if st == "failed"}
    assert 0 < len(failed) < POINTS  # 0.2 x 60 = 12 expected
    assert first.counts == dict(Counter(expected.values()))
    assert all(len(o.attempts) == 1 for o in outcomes.values())
    solved = Counter(name for name, _, _ in calls(tmp_path))
    assert solved == Counter({s.run_id: 1 for s in specs})

    again = rerun_flow(str(store))
    assert again.counts == {"succeeded": POINTS}
    specs, outcomes, values = read_runs(store)
    solved_after = Counter(name for name, _, _ in calls(tmp_path))
    # exactly the failed points ran once more; no success was solved twice
    assert solved_after - solved == Counter({rid: 1 for rid in failed})
    successes = Counter(o.run_id for o in outcomes.values() if o.state == "succeeded")
    assert successes == Counter({s.run_id: 1 for s in specs})
    assert len({s.point_index for s in specs}) == POINTS
    assert {v.status for v in values.values()} == {"ok"}
    with RunStore.open_read(store) as r:
        assert r.revisions() == ["r0001"]
        (est,) = r.read_results()[1]
    assert est.n_used == POINTS and est.n_missing == 0
    assert check(store).ok
