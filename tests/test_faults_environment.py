"""Fault injection, environment: unwritable run folders, a full disk, a second writer, a
Dask worker killed mid-run. Each test checks the RUN STORE afterwards.

Simulations (honest about what they are):

* *run folder not writable*: the tests run as root, and root ignores permission bits
  (common practice: CAP_DAC_OVERRIDE), so ``chmod`` cannot make a folder unwritable here.
  Instead ``run_root`` is put under a regular FILE, so creating it fails with
  ``NotADirectoryError`` for any user.
* *disk full*: the store's copy step (``shutil.copyfile`` in the commit that records the
  runs) writes half the file and raises ``OSError(ENOSPC)``, in-process.
* *second writer*: this process holds the store's writer lock while ``winnow run`` and
  ``winnow rerun`` start (flock locks belong to the open file description, so a second open
  in the same process is refused as another process would be; common practice, flock(2)).
* *Dask worker killed*: ``winnow run`` on a local Dask cluster of 2 workers; the worker
  process that started a solver run is SIGKILLed while that run is in flight.

Reference: the project's contract (issue 8; README "Each stage's output is committed in one
atomic step; only one process writes at a time"; docs/store-layout.md "Safe writes",
"Single writer").
"""

from __future__ import annotations

import errno
import hashlib
import os
import shutil
import signal
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import pytest
import yaml
from fault_solvers.kit import calls, calls_with_parent, make_study, read_runs, run_study, snapshot
from typer.testing import CliRunner

from winnow.flows.cli import app
from winnow.tasks.store import RunStore, check

pytestmark = pytest.mark.slow


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_run_root_that_cannot_be_created_keeps_the_store_and_resumes(tmp_path, prefect_harness):
    cfg = make_study(tmp_path, run_root="blocker/runs")
    (tmp_path / "blocker").write_text("a regular file where a folder should be\n")
    with pytest.raises(OSError):  # NotADirectoryError or FileExistsError, by the OS
        run_study(cfg)
    store = tmp_path / "study.h5"
    with RunStore.open_read(store) as r:
        assert r.revisions() == ["r0001"]
        assert r.stages_done() == {"chain", "selection"}  # committed before the fault
    assert check(store).ok
    assert calls(tmp_path) == []  # no solver was started
    (tmp_path / "blocker").unlink()  # the environment is fixed: the same config resumes
    result = run_study(cfg)
    assert result.revision == "r0001" and result.counts == {"succeeded": 6}
    assert Counter(n for n, _, _ in calls(tmp_path)) == Counter(
        {s.run_id: 1 for s in read_runs(store)[0]}
    )
    assert check(store).ok


def test_run_root_under_a_file_is_refused_before_anything_is_written(tmp_path):
    # regression: preflight used to miss it (store created, then a traceback); fixed in 65d646a
    cfg = make_study(tmp_path, run_root="blocker/runs")
    (tmp_path / "blocker").write_text("a regular file\n")
    before = snapshot(tmp_path)
    res = CliRunner().invoke(app, ["validate", str(cfg)])
    assert res.exit_code == 2 and "run_root" in res.stderr, res.output
    assert snapshot(tmp_path) == before


def test_disk_full_during_the_runs_commit_leaves_store_intact(
    tmp_path, prefect_harness, monkeypatch
):
    from winnow.tasks.store import RunStoreWriter
    from winnow.tasks.store import _core as _store

    cfg = make_study(tmp_path)
    store = tmp_path / "study.h5"
    real_copy, real_write_runs = shutil.copyfile, RunStoreWriter.write_runs
    partial = []

    def copy_until_full(src, dst, *args, **kwargs):
        data = Path(src).read_bytes()
        Path(dst).write_bytes(data[: len(data) // 2])
        partial.append(Path(dst))
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(dst))

    def write_runs_on_a_full_disk(self, *args, **kwargs):
        monkeypatch.setattr(_store.shutil, "copyfile", copy_until_full)
        try:
            return real_write_runs(self, *args, **kwargs)
        finally:
            monkeypatch.setattr(_store.shutil, "copyfile", real_copy)

    monkeypatch.setattr(RunStoreWriter, "write_runs", write_runs_on_a_full_disk)
    with pytest.raises(OSError) as err:
        run_study(cfg)
    assert err.value.errno == errno.ENOSPC
    monkeypatch.setattr(RunStoreWriter, "write_runs", real_write_runs)
    # the half-written temporary copy was removed; the store is the state before the commit
    assert partial and not partial[0].exists()
    assert not list(tmp_path.glob(".study.h5.tmp-*"))
    with RunStore.open_read(store) as r:
        assert r.stages_done() == {"chain", "selection"}
    assert check(store).ok
    solved = Counter(n for n, _, _ in calls(tmp_path))
    assert sum(solved.values()) == 6  # the runs themselves finished and are journalled
    # space freed: the same config resumes and records the runs without solving them again
    result = run_study(cfg)
    assert result.revision == "r0001" and result.counts == {"succeeded": 6}
    assert Counter(n for n, _, _ in calls(tmp_path)) == solved
    assert check(store).ok


def test_second_writer_is_refused_with_exit_2_and_no_change(tmp_path, prefect_harness):
    cfg = make_study(tmp_path)
    store = tmp_path / "study.h5"
    RunStore.create(store, "faults")
    digest = _sha(store)
    runner = CliRunner()
    with RunStore.open_for_write(store):
        res = runner.invoke(app, ["run", str(cfg)])
        assert res.exit_code == 2, res.output
        assert "is being written by another process" in res.stderr
        assert str(store) in res.stderr
        res = runner.invoke(app, ["rerun", str(store)])
        assert res.exit_code == 2, res.output
        assert "is being written by another process" in res.stderr
    assert _sha(store) == digest  # not a byte changed
    assert check(store).ok
    assert calls(tmp_path) == []


@pytest.fixture
def server_env(prefect_harness):
    from prefect.settings import PREFECT_API_URL

    env = dict(os.environ)
    env["PREFECT_API_URL"] = str(PREFECT_API_URL.value())
    return env


def test_dask_worker_killed_during_a_run_is_retried_or_recorded(tmp_path, server_env):
    pytest.importorskip("distributed")
    make_study(
        tmp_path,
        budget=4,
        dispatch__runner={"dask": {"local_cluster": {"n_workers": 2}}},
        dispatch__concurrency=2,
        dispatch__constants__mode="slow",
        dispatch__constants__fault_below=0.0,  # points with x < 0 wait for the release file
        dispatch__constants__slow_s=60.0,
    )
    proc = subprocess.Popen(
        [sys.executable, "-m", "winnow.flows.cli", "run", str(tmp_path / "study.yaml")],
        cwd=tmp_path,
        env=server_env,
        stdout=subprocess.DEVNULL,
        stderr=open(tmp_path / "stderr.txt", "wb"),  # noqa: SIM115 - child owns it
        start_new_session=True,
    )
    try:
        t0 = time.monotonic()
        victim = None
        while victim is None and time.monotonic() - t0 < 90:
            slow = [c for c in calls_with_parent(tmp_path) if c[2] == "slow"]
            victim = slow[0] if slow else None
            assert proc.poll() is None, (tmp_path / "stderr.txt").read_text()[-2000:]
            time.sleep(0.1)
        assert victim is not None, "no slow run started on the cluster"
        name, solver_pid, _, worker_pid = victim
        assert worker_pid != proc.pid  # the solver was started by a Dask worker process
        os.kill(worker_pid, signal.SIGKILL)  # common practice: cannot be caught
        time.sleep(1.0)
        (tmp_path / "state" / "release").write_text("go")
        rc = proc.wait(timeout=120)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    err = (tmp_path / "stderr.txt").read_text()
    assert rc == 0, err[-3000:]
    store = tmp_path / "study.h5"
    specs, outcomes, _ = read_runs(store)
    # every point is recorded; the killed worker's run was run again elsewhere, or recorded
    # as not succeeded with a message -- never missing
    assert set(outcomes) == {s.run_id for s in specs} and len(specs) == 4
    o = outcomes[name]
    solved = Counter(n for n, _, _ in calls(tmp_path))
    if o.state == "succeeded":
        assert solved[name] == 2  # the task was rescheduled on a live worker
    else:
        assert o.message
    assert all(outcomes[s.run_id].state == "succeeded" for s in specs if s.run_id != name)
    assert check(store).ok
    with RunStore.open_read(store) as r:
        assert r.stages_done() == {"chain", "selection", "runs", "results"}
    data = yaml.safe_load((tmp_path / "study.yaml").read_text())
    assert "dask" in data["dispatch"]["runner"]
