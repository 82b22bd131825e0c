"""The study flow keeps ``dispatch.concurrency`` on every runner (issue 13, item 5).

Each solver run records its start and end time (``tests/dispatch_solvers/timed_solver.py``);
the most runs alive at one instant must not exceed the configured concurrency, also on a Dask
cluster with more worker slots than that (the cluster would otherwise run one task per slot).
The overlap is counted from the solvers' own timestamps, not from a wall-clock limit.

Reference: the project's contract (README, Config reference: ``concurrency``; the
``dispatch.concurrency`` field "Runs at the same time").
"""

from __future__ import annotations

from pathlib import Path

import pytest
from fault_solvers.kit import make_study, read_runs, run_study

TIMED = Path(__file__).resolve().parent / "dispatch_solvers" / "timed_solver.py"

pytestmark = pytest.mark.slow


def max_overlap(intervals: list[tuple[float, float]]) -> int:
    """Most intervals open at one instant (a sweep over the sorted ends; an end at the same
    instant as a start is counted first, so touching intervals do not overlap)."""
    events = sorted([(a, 1) for a, _ in intervals] + [(b, -1) for _, b in intervals])
    alive = most = 0
    for _, step in events:
        alive += step
        most = max(most, alive)
    return most


def test_max_overlap_counts_the_sweep():
    assert max_overlap([]) == 0
    assert max_overlap([(0, 1), (1, 2), (2, 3)]) == 1
    assert max_overlap([(0, 3), (1, 2), (1.5, 4)]) == 3
    assert max_overlap([(0, 2), (1, 3), (2.5, 4)]) == 2


def _times(folder: Path) -> dict[str, tuple[float, float]]:
    out = {}
    for line in (folder / "state" / "times.log").read_text().splitlines():
        name, start, end = line.split()
        out[name] = (float(start), float(end))
    return out


@pytest.mark.parametrize(
    ("runner", "concurrency"),
    [
        ("local", 1),
        ({"dask": {"local_cluster": {"n_workers": 3}}}, 1),
        ({"dask": {"local_cluster": {"n_workers": 3}}}, 2),
    ],
    ids=["local-1", "dask3-1", "dask3-2"],
)
def test_study_flow_keeps_the_concurrency_limit(tmp_path, prefect_harness, runner, concurrency):
    if runner != "local":
        pytest.importorskip("distributed")
    cfg = make_study(
        tmp_path,
        budget=4,
        dispatch__command=["{python}", str(TIMED), "{deck}"],
        dispatch__constants__slow_s=1.0,
        dispatch__runner=runner,
        dispatch__concurrency=concurrency,
    )
    result = run_study(cfg)
    assert result.counts == {"succeeded": 4}
    specs, outcomes, _ = read_runs(tmp_path / "study.h5")
    times = _times(tmp_path)
    assert set(times) == {s.run_id for s in specs}  # every run recorded its interval once
    assert max_overlap(list(times.values())) <= concurrency, times
