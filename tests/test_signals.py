"""Ctrl-C and SIGTERM stop a study (issue 13, item 2), checked with real signals.

``winnow run`` is started as a separate process in its own session on a fast variant of the
demo config (``configs/aquifer_demo.yaml``: 5 points, short chains, the coarse grid; the local
runner, and a local Dask cluster for SIGTERM), with the solver behind a gate
(``tests/dispatch_solvers/held_aquifer.py``): the first two runs finish, the next ones are
held, each with a grandchild in its process group that ignores SIGTERM. Once two solvers are
held, the signal goes to the command's process group, as a terminal's Ctrl-C does (the
temporary Prefect server and the Dask workers get it too). Each test then checks the exit
status, the message, that no solver process is left, that the journals of the stopped runs
say interrupted, and that the run store holds no half-done stage; the first test resumes the
study with the same command and checks that no finished run is repeated.

Reference: the project's contract (issue 13 item 2; README, "Running on a cluster":
"Stopping a study"; DEVELOPERS.md "Where things are recorded": the journal lets a killed study
resume). Exit status 128 + signal number for a command ended by a signal is common practice
(POSIX shells).
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import psutil
import pytest
import yaml
from fault_solvers.kit import make_study
from typer.testing import CliRunner

from winnow.flows.cli import app
from winnow.tasks.dispatch import read_outcome
from winnow.tasks.store import RunStore, check

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "aquifer_demo.yaml"
HELD = ROOT / "tests" / "dispatch_solvers" / "held_aquifer.py"
FAULT_KIT = ROOT / "tests" / "fault_solvers"

pytestmark = pytest.mark.slow

#: Seconds within which an interrupted command must have exited (it aims at a few).
EXIT_WITHIN = 15.0


def demo_variant(tmp: Path, runner: object = "local") -> Path:
    """The demo made fast; the solver is held (STATE/hold) after the first two runs."""
    state = tmp / "state"
    state.mkdir()
    (state / "hold").write_text("held\n")
    (state / "free").write_text("2")
    data = yaml.safe_load(DEMO.read_text())
    data["budget"] = 5
    data["store"] = str(tmp / "study.h5")
    data["run_root"] = str(tmp / "runs")
    data["sample"]["draws"] = 2000
    data["sample"]["checks"] = {"on_failure": "warn"}
    data["sample"]["observations"]["file"] = str(ROOT / "examples/aquifer/data/observations.csv")
    data["thin"]["features"] = 256
    data["dispatch"]["template_dir"] = str(ROOT / "examples/aquifer/templates")
    data["dispatch"]["constants"]["grid"] = "coarse"
    data["dispatch"]["command"] = ["{python}", str(HELD), str(state), "{deck}"]
    data["dispatch"]["concurrency"] = 2
    data["dispatch"]["runner"] = runner
    data["collect"]["bootstrap"] = 200
    path = tmp / "study.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


@pytest.fixture(autouse=True)
def no_strays(tmp_path):
    """After each test (whatever it asserted), kill what is left of its solvers' groups."""
    yield
    for _, pgid in calls(tmp_path):
        try:
            os.killpg(pgid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass


def start(tmp: Path, args: list[str], env: dict[str, str]) -> subprocess.Popen:
    return subprocess.Popen(
        args,
        cwd=tmp,
        env=env,
        stdin=subprocess.DEVNULL,
        stdout=open(tmp / "stdout.txt", "wb"),  # noqa: SIM115 - the child owns it
        stderr=open(tmp / "stderr.txt", "wb"),  # noqa: SIM115
        start_new_session=True,  # leads its own process group, as a shell job does
    )


def winnow_run(tmp: Path, cfg: Path, env: dict[str, str]) -> subprocess.Popen:
    return start(tmp, [sys.executable, "-m", "winnow.flows.cli", "run", str(cfg)], env)


def wait_for(proc: subprocess.Popen, tmp: Path, done, what: str, limit: float = 150.0) -> None:
    deadline = time.monotonic() + limit
    while not done():
        if proc.poll() is not None:
            pytest.fail(f"exited {proc.returncode} before {what}: {stderr(tmp)[-3000:]}")
        if time.monotonic() > deadline:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
            pytest.fail(f"no {what} within {limit} s: {stderr(tmp)[-3000:]}")
        time.sleep(0.05)


def held(tmp: Path) -> list[int]:
    log = tmp / "state" / "held.log"
    return [int(x) for x in log.read_text().split()] if log.exists() else []


def calls(tmp: Path) -> list[tuple[str, int]]:
    log = tmp / "state" / "calls.log"
    lines = log.read_text().splitlines() if log.exists() else []
    return [(name, int(pid)) for name, pid in (line.split() for line in lines)]


def stderr(tmp: Path) -> str:
    return (tmp / "stderr.txt").read_text(errors="replace")


def exit_status(proc: subprocess.Popen, tmp: Path) -> int:
    try:
        return proc.wait(timeout=EXIT_WITHIN)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
        pytest.fail(f"still running {EXIT_WITHIN} s after the signal: {stderr(tmp)[-3000:]}")


def leftovers(groups: set[int]) -> list[str]:
    """Live processes (zombies waiting for init count as gone) in the given process groups."""
    found = []
    for p in psutil.process_iter(["pid", "status", "cmdline"]):
        try:
            if os.getpgid(p.pid) in groups and p.info["status"] != psutil.STATUS_ZOMBIE:
                found.append(f"{p.pid}: {' '.join(p.info['cmdline'] or [])}")
        except (ProcessLookupError, psutil.Error):
            continue
    return found


def assert_no_solver_left(tmp: Path) -> None:
    groups = {pid for _, pid in calls(tmp)}  # each solver leads its own group
    assert groups
    grandchildren = [int(f.read_text()) for f in (tmp / "state").glob("grandchild-*")]
    assert grandchildren  # the held solvers did start their SIGTERM-ignoring grandchildren
    deadline = time.monotonic() + 3.0  # SIGKILLed processes are reaped by init shortly after
    while leftovers(groups) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert leftovers(groups) == []
    assert all(not psutil.pid_exists(g) or psutil.Process(g).status() == "zombie"
               for g in grandchildren)  # fmt: skip


def assert_stopped_and_nothing_committed(tmp: Path, signame: str, *, attempts: bool = True) -> None:
    stopped = {name for name, pid in calls(tmp) if pid in held(tmp)}
    assert len(stopped) == 2, (calls(tmp), held(tmp), stderr(tmp)[-3000:])
    for name in stopped:
        journal = read_outcome(tmp / "runs" / name)
        assert journal is not None and journal.state == "not_run", journal
        assert journal.message.startswith(f"interrupted by {signame}"), journal.message
        if attempts:  # the attempt that was stopped is recorded
            assert journal.attempts and journal.attempts[-1].exit_status != 0
        elif not journal.attempts:  # its worker died first; the dispatcher wrote the journal
            assert "worker stopped before journalling" in journal.message
    store = tmp / "study.h5"
    assert check(store).ok
    with RunStore.open_read(store) as r:
        assert r.revisions() == ["r0001"]
        assert r.stages_done("r0001") == {"chain", "selection"}  # no runs, no results


def dispatch_message(signame: str) -> str:
    return (
        f"winnow: interrupted by {signame} during dispatch: 2 runs stopped, 2 finished and "
        f"kept, 1 not started;"
    )


@pytest.fixture
def server_env(prefect_harness) -> dict[str, str]:
    """Environment of a command that uses the session's Prefect server (outside its group)."""
    from prefect.settings import PREFECT_API_URL

    return dict(os.environ, PREFECT_API_URL=str(PREFECT_API_URL.value()))


def own_server_env() -> dict[str, str]:
    """Environment of a command that starts its own temporary Prefect server, in its group."""
    env = {k: v for k, v in os.environ.items() if k != "PREFECT_API_URL"}
    env["PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS"] = "180"  # busy 2-core machine
    return env


def test_ctrl_c_during_dispatch_stops_the_solvers_and_the_same_command_resumes(
    tmp_path, prefect_harness
):
    cfg = demo_variant(tmp_path)
    proc = winnow_run(tmp_path, cfg, own_server_env())
    wait_for(proc, tmp_path, lambda: len(held(tmp_path)) == 2, "two held solvers")
    os.killpg(proc.pid, signal.SIGINT)
    assert exit_status(proc, tmp_path) == 130
    err = stderr(tmp_path)
    assert dispatch_message("SIGINT") in err, err[-3000:]
    assert f"run `winnow run {cfg}` again to resume" in err
    assert_no_solver_left(tmp_path)
    assert_stopped_and_nothing_committed(tmp_path, "SIGINT")
    finished = {name for name, pid in calls(tmp_path) if pid not in held(tmp_path)}
    assert len(finished) == 2

    # The same command resumes: the finished runs are reused, the stopped ones run again.
    (tmp_path / "state" / "hold").unlink()
    res = CliRunner().invoke(app, ["run", str(cfg)])
    assert res.exit_code == 0, res.output
    with RunStore.open_read(tmp_path / "study.h5") as r:
        assert r.revisions() == ["r0001"]
        assert r.stages_done("r0001") == {"chain", "selection", "runs", "results"}
        specs, outcomes = r.read_runs("r0001")
    assert {o.state for o in outcomes} == {"succeeded"} and len(outcomes) == 5
    solved = [name for name, _ in calls(tmp_path)]
    assert {s.run_id for s in specs} == set(solved)
    assert all(solved.count(name) == 1 for name in finished)  # not repeated
    assert check(tmp_path / "study.h5").ok


def test_sigterm_during_dispatch_on_dask_stops_the_solvers(tmp_path, server_env):
    # on a local Dask cluster the solvers run in the workers' processes, which get the SIGTERM
    # too (same process group) and die of it before they can stop their solvers
    pytest.importorskip("distributed")
    cfg = demo_variant(tmp_path, runner={"dask": {"local_cluster": {"n_workers": 2}}})
    proc = winnow_run(tmp_path, cfg, server_env)
    wait_for(proc, tmp_path, lambda: len(held(tmp_path)) == 2, "two held solvers")
    os.killpg(proc.pid, signal.SIGTERM)
    assert exit_status(proc, tmp_path) == 143
    err = stderr(tmp_path)
    assert dispatch_message("SIGTERM") in err, err[-3000:]
    assert_no_solver_left(tmp_path)
    # a worker killed by SIGTERM may die before it journals its run
    assert_stopped_and_nothing_committed(tmp_path, "SIGTERM", attempts=False)


def test_second_ctrl_c_exits_at_once(tmp_path, server_env):
    cfg = demo_variant(tmp_path)
    (tmp_path / "state" / "stubborn").write_text("the held solvers ignore SIGTERM\n")
    proc = winnow_run(tmp_path, cfg, server_env)
    wait_for(proc, tmp_path, lambda: len(held(tmp_path)) == 2, "two held solvers")
    os.killpg(proc.pid, signal.SIGINT)
    # the first Ctrl-C waits for the stubborn solvers' SIGKILL; the second does not wait
    time.sleep(0.3)
    assert proc.poll() is None  # still stopping: the next one is a second signal
    os.killpg(proc.pid, signal.SIGINT)
    assert exit_status(proc, tmp_path) == 130
    err = stderr(tmp_path)
    assert "winnow: second SIGINT: exiting at once" in err, err[-3000:]
    assert_no_solver_left(tmp_path)
    with RunStore.open_read(tmp_path / "study.h5") as r:
        assert r.stages_done("r0001") == {"chain", "selection"}
    assert check(tmp_path / "study.h5").ok


def test_ctrl_c_after_sampling_keeps_the_chain(tmp_path, server_env):
    # the fault kit's study (imported chain, stride thinning), paused inside the thin stage
    cfg = make_study(tmp_path)
    marker = tmp_path / "paused"
    driver = [sys.executable, str(FAULT_KIT / "pause_driver.py"), "thin", str(marker)]
    proc = start(tmp_path, [*driver, "run", str(cfg)], server_env)
    wait_for(proc, tmp_path, marker.exists, "the thin stage")
    os.killpg(proc.pid, signal.SIGINT)
    assert exit_status(proc, tmp_path) == 130
    err = stderr(tmp_path)
    assert "winnow: interrupted by SIGINT during thinning" in err, err[-3000:]
    assert f"run `winnow run {cfg}` again to resume" in err
    with RunStore.open_read(tmp_path / "study.h5") as r:
        assert r.stages_done("r0001") == {"chain"}
    assert check(tmp_path / "study.h5").ok
    assert not (tmp_path / "runs").exists()
