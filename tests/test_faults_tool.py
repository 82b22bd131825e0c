"""Fault injection, tool side: ``winnow run`` SIGKILLed mid-study loses nothing.

``winnow run`` runs as a subprocess (through ``tests/fault_solvers/pause_driver.py``, which is
the plain command line plus a pause at a chosen point) against the session's Prefect test
server, and is killed with SIGKILL

* during sampling, just after the sampler's first checkpoint was committed;
* during thinning (inside the thin task);
* during dispatch, with some runs journalled as finished and others still in flight;
* during the commit that records the runs (change applied to the temporary copy, store not
  yet replaced).

Each time the study is then started again with the same config (in-process, same flow) and
must resume the same revision, solve no point that had already succeeded (the fault solver
logs every invocation), end with every point succeeded, and leave a store that ``winnow
check`` finds intact.

References: the project's contract (issue 8; README "a killed study resumes without
repeating a finished run"; docs/store-layout.md "Safe writes"); common practice: SIGKILL
cannot be caught or handled, so nothing in the killed process gets to clean up.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import pytest
from fault_solvers.kit import calls, make_study, read_runs, run_study
from typer.testing import CliRunner

from winnow.flows.cli import app
from winnow.tasks.store import RunStore, check

pytestmark = pytest.mark.slow

DRIVER = Path(__file__).parent / "fault_solvers" / "pause_driver.py"

MODEL = '''
import numpy as np


def log_density(theta):
    """Standard normal log density in 2-D (vectorised over rows)."""
    theta = np.asarray(theta, dtype=float)
    return -0.5 * np.sum(theta * theta, axis=-1)
'''


@pytest.fixture(scope="module")
def server_env(prefect_harness):
    """Environment for child processes: the session's Prefect server, not a new one each."""
    from prefect.settings import PREFECT_API_URL

    env = dict(os.environ)
    env["PREFECT_API_URL"] = str(PREFECT_API_URL.value())
    return env


def _start(where: str, folder: Path, env: dict[str, str]) -> tuple[subprocess.Popen, Path]:
    marker = folder / f"paused-{where}"
    proc = subprocess.Popen(
        [sys.executable, str(DRIVER), where, str(marker), "run", str(folder / "study.yaml")],
        cwd=folder,
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=open(folder / f"stderr-{where}.txt", "wb"),  # noqa: SIM115 - child owns it
        start_new_session=True,  # its own process group, killed as a whole below
    )
    return proc, marker


def _wait(proc: subprocess.Popen, ready, what: str, timeout: float = 120.0) -> None:
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        if ready():
            return
        if proc.poll() is not None:
            raise AssertionError(f"winnow ended (status {proc.returncode}) before {what}")
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)
    raise AssertionError(f"winnow never reached {what}")


def _kill(proc: subprocess.Popen) -> None:
    os.killpg(proc.pid, signal.SIGKILL)
    assert proc.wait(timeout=30) == -signal.SIGKILL


def _resume_and_check(folder: Path, before: Counter) -> Counter:
    """Start the same config again; check the resumed store. Returns solver calls after."""
    store = folder / "study.h5"
    journalled = {p.parent.name for p in folder.glob("runs/*/winnow-outcome.json")}
    result = run_study(folder / "study.yaml")
    assert result.revision == "r0001"  # same config and inputs: resumed, no new revision
    after = Counter(name for name, _, _ in calls(folder))
    specs, outcomes, values = read_runs(store)
    assert result.counts == {"succeeded": len(specs)}
    assert {o.state for o in outcomes.values()} == {"succeeded"}
    assert len({s.point_index for s in specs}) == len(specs) == 6
    assert {v.status for v in values.values()} == {"ok"}
    # every point solved; a point that had succeeded before the kill was not solved again
    for s in specs:
        assert after[s.run_id] >= 1
        if s.run_id in journalled:
            assert after[s.run_id] == before[s.run_id], s.run_id
    with RunStore.open_read(store) as r:
        assert r.revisions() == ["r0001"]
        assert r.stages_done() == {"chain", "selection", "runs", "results"}
        assert r.load_checkpoint("r0001", "sample") is None  # cleared once the chain is in
    assert not list(folder.glob(".study.h5.tmp-*"))
    res = CliRunner().invoke(app, ["check", str(store)])
    assert res.exit_code == 0, res.output
    assert check(store).ok
    return after


def test_killed_during_sampling_resumes_from_checkpoint(tmp_path, server_env):
    (tmp_path / "slowmodel.py").write_text(MODEL)
    make_study(
        tmp_path,
        sample={
            "model": {"log_density": "slowmodel:log_density", "search_path": "."},
            "sampler": "adaptive_metropolis",
            "chains": 2,
            "draws": 1200,
            "checks": {"on_failure": "warn"},
        },
    )
    proc, marker = _start("checkpoint", tmp_path, server_env)
    _wait(proc, marker.exists, "the first sampler checkpoint")
    _kill(proc)
    with RunStore.open_read(tmp_path / "study.h5") as r:
        assert r.stages_done("r0001") == set()
        state = r.load_checkpoint("r0001", "sample")
    assert state is not None  # the committed checkpoint survived the kill
    assert calls(tmp_path) == []
    assert check(tmp_path / "study.h5").ok
    _resume_and_check(tmp_path, Counter())


def test_killed_during_thinning_resumes_after_the_chain(tmp_path, server_env):
    make_study(tmp_path)
    proc, marker = _start("thin", tmp_path, server_env)
    _wait(proc, marker.exists, "the thin stage")
    _kill(proc)
    with RunStore.open_read(tmp_path / "study.h5") as r:
        assert r.stages_done("r0001") == {"chain"}
        chain_before = r.read_chain("r0001").samples
    assert check(tmp_path / "study.h5").ok
    _resume_and_check(tmp_path, Counter())
    with RunStore.open_read(tmp_path / "study.h5") as r:
        assert (r.read_chain("r0001").samples == chain_before).all()


def test_killed_during_dispatch_repeats_no_finished_run(tmp_path, server_env):
    # points with x < 0 wait (for the release file, at most 120 s); the others finish at once
    make_study(
        tmp_path,
        dispatch__constants__mode="slow",
        dispatch__constants__fault_below=0.0,
        dispatch__constants__slow_s=120.0,
        dispatch__concurrency=6,
    )
    proc, _ = _start("none", tmp_path, server_env)
    runs = tmp_path / "runs"

    def some_done_some_in_flight() -> bool:
        done = list(runs.glob("*/winnow-outcome.json")) if runs.is_dir() else []
        slow = [c for c in calls(tmp_path) if c[2] == "slow"]
        return len(done) >= 1 and len(slow) >= 1

    _wait(proc, some_done_some_in_flight, "runs finished and runs in flight")
    time.sleep(0.5)  # let the other quick runs finish too
    _kill(proc)
    in_flight = [pid for _, pid, mode in calls(tmp_path) if mode == "slow"]
    # the solvers run in their own sessions (so a timeout can kill each run's group): the
    # kill of winnow's group does not reach them; they are orphans, still running
    # (common practice: SIGKILL gives the process no chance to stop its children)
    assert all(Path(f"/proc/{pid}").exists() for pid in in_flight)
    (tmp_path / "state" / "release").write_text("go")  # the orphans finish on their own
    t0 = time.monotonic()
    while any(_running(p) for p in in_flight) and time.monotonic() - t0 < 30:
        time.sleep(0.1)
    assert not [p for p in in_flight if _running(p)]
    with RunStore.open_read(tmp_path / "study.h5") as r:
        assert r.stages_done("r0001") == {"chain", "selection"}  # runs not yet recorded
    before = Counter(name for name, _, _ in calls(tmp_path))
    journalled = {p.parent.name for p in runs.glob("*/winnow-outcome.json")}
    assert journalled and len(journalled) < 6
    after = _resume_and_check(tmp_path, before)
    for name in journalled:
        assert after[name] == before[name] == 1
    # a run killed in flight (no journal) is solved again
    assert all(after[n] == before[n] + 1 for n in before if n not in journalled)


def _running(pid: int) -> bool:
    try:
        return "\nState:\tZ" not in Path(f"/proc/{pid}/status").read_text()
    except FileNotFoundError:
        return False


def test_killed_while_writing_the_store_keeps_old_state(tmp_path, server_env):
    make_study(tmp_path)
    proc, marker = _start("runs-commit", tmp_path, server_env)
    _wait(proc, marker.exists, "the commit of the runs")
    _kill(proc)
    store = tmp_path / "study.h5"
    # the killed commit left its temporary copy; the store itself is the state before it
    assert list(tmp_path.glob(".study.h5.tmp-*"))
    with RunStore.open_read(store) as r:
        assert r.stages_done("r0001") == {"chain", "selection"}
    before = Counter(name for name, _, _ in calls(tmp_path))
    assert sum(before.values()) == 6  # every run finished and journalled before the commit
    after = _resume_and_check(tmp_path, before)
    assert after == before  # nothing solved again: the journals stood in for the runs
