"""Running solver processes: timeout kills the group, bounded tails, retries, reuse, resume."""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

import psutil
import pytest

from winnow.tasks.dispatch import (
    OUTCOME_NAME,
    DeckSpec,
    LocalRunner,
    dispatch,
    read_outcome,
    render_run,
    run_one,
    scan_run_folders,
    select_for_rerun,
    write_outcome,
)
from winnow.tasks.records import RunOutcome

SOLVER = Path(__file__).parent / "dispatch_solvers" / "fake_solver.py"
COMMAND = [sys.executable, str(SOLVER), "{deck}"]


@pytest.fixture
def tpl(tmp_path: Path) -> Path:
    root = tmp_path / "templates"
    root.mkdir()
    (root / "deck.in.j2").write_text("mode = {{ mode }}\nx = {{ x }}\n")
    return root


def make_spec(tpl: Path, run_root: Path, mode: str, index: int = 0, x: float = 0.5):
    return render_run(
        {"x": x},
        point_index=index,
        weight=0.5,
        run_root=run_root,
        decks=DeckSpec(["deck.in.j2"], constants={"mode": mode}),
        command=COMMAND,
        template_root=tpl,
    )


def _gone(pid: int) -> bool:
    """True when ``pid`` no longer runs (absent, or a zombie awaiting its reaper)."""
    try:
        return psutil.Process(pid).status() == psutil.STATUS_ZOMBIE
    except psutil.NoSuchProcess:
        return True


def test_success_hashes_outputs_and_journals(tpl, tmp_path):
    spec = make_spec(tpl, tmp_path / "runs", "succeed", x=0.1)
    out = run_one(spec, timeout=60, outputs=["result.txt"])
    assert out.state == "succeeded" and out.message == ""
    assert (spec.run_dir / "result.txt").read_text() == f"value = {2 * 0.1!r}\n"
    import hashlib  # reference library for the SHA-256 of the output

    assert out.output_hashes == {
        "result.txt": hashlib.sha256((spec.run_dir / "result.txt").read_bytes()).hexdigest()
    }
    (attempt,) = out.attempts
    assert attempt.exit_status == 0 and not attempt.timed_out
    assert "mode=succeed" in attempt.stdout_tail
    assert attempt.ended >= attempt.started
    assert read_outcome(spec.run_dir) == out
    assert json.loads((spec.run_dir / OUTCOME_NAME).read_text())["state"] == "succeeded"


def test_timeout_kills_the_whole_process_group(tpl, tmp_path):
    spec = make_spec(tpl, tmp_path / "runs", "sleep")
    t0 = time.monotonic()
    out = run_one(spec, timeout=1.5, kill_grace=0.5, outputs=["result.txt"])
    assert out.state == "timed_out"
    assert out.attempts[0].timed_out and out.attempts[0].exit_status is None
    assert time.monotonic() - t0 < 60  # guards the test itself, not a speed claim
    child = int((spec.run_dir / "child.pid").read_text())
    # The grandchild (spawned by the solver, same process group) must be gone: killpg(2).
    deadline = time.monotonic() + 10
    while not _gone(child) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert _gone(child)


def test_tails_are_bounded_with_megabytes_of_output(tpl, tmp_path):
    spec = make_spec(tpl, tmp_path / "runs", "spam")
    out = run_one(spec, timeout=60, tail_bytes=4096)
    assert out.state == "succeeded"
    a = out.attempts[0]
    assert len(a.stdout_tail.encode()) <= 4096 and len(a.stderr_tail.encode()) <= 4096
    assert a.stdout_tail.endswith("LAST STDOUT LINE\n")
    assert a.stderr_tail.endswith("LAST STDERR LINE\n")
    # The full streams (5 MiB each plus the last line) are on disk, not in memory.
    assert (spec.run_dir / "winnow-stdout.txt").stat().st_size > 5 * 2**20


def test_retry_succeeds_on_second_attempt(tpl, tmp_path):
    spec = make_spec(tpl, tmp_path / "runs", "flaky")
    out = run_one(spec, timeout=60, retries=2, retry_delay=0.05, outputs=["result.txt"])
    assert out.state == "succeeded"
    assert [a.exit_status for a in out.attempts] == [1, 0]
    assert "first attempt fails" in out.attempts[0].stderr_tail
    assert out.attempts[1].started - out.attempts[0].ended >= 0.05
    assert (spec.run_dir / "winnow-stderr.attempt1.txt").exists()


def test_failure_states(tpl, tmp_path):
    root = tmp_path / "runs"
    fail = run_one(make_spec(tpl, root, "fail", 0), retries=1, outputs=["result.txt"])
    assert fail.state == "failed" and len(fail.attempts) == 2
    assert fail.attempts[-1].exit_status == 1 and "diverged" in fail.attempts[-1].stderr_tail

    missing = run_one(make_spec(tpl, root, "no_output", 1), outputs=["result.txt"])
    assert missing.state == "output_missing" and "result.txt" in missing.message

    def finite(run_dir: Path) -> str | None:
        value = float((run_dir / "result.txt").read_text().split("=")[1])
        return None if value == value else f"result is {value}"

    nan = run_one(make_spec(tpl, root, "nan", 2), outputs=["result.txt"], check_output=finite)
    assert nan.state == "output_missing" and "nan" in nan.message

    gone = run_one(make_spec(tpl, root, "delete_folder", 3), outputs=["result.txt"])
    assert gone.state == "output_missing" and "deleted" in gone.message

    rewritten = run_one(make_spec(tpl, root, "rewrite_manifest", 5), outputs=["result.txt"])
    assert rewritten.state == "output_missing" and "rewritten" in rewritten.message

    spec = make_spec(tpl, root, "succeed", 4)
    cannot = run_one(
        type(spec)(**{**spec.__dict__, "argv": ("/nonexistent/solver", "x")}), retries=3
    )
    assert cannot.state == "failed" and len(cannot.attempts) == 1  # not retried
    assert "could not start" in cannot.message


def test_env_and_cwd(tpl, tmp_path):
    spec = make_spec(tpl, tmp_path / "runs", "env")
    (spec.run_dir / "work").mkdir()
    out = run_one(spec, env={"WINNOW_TEST_VALUE": "7.25"}, cwd="work", outputs=["work/result.txt"])
    assert out.state == "succeeded"
    assert (spec.run_dir / "work" / "result.txt").read_text() == "value = 7.25\n"


def test_dispatch_reuses_known_key_and_isolates_failures(tpl, tmp_path):
    root = tmp_path / "runs"
    specs = [make_spec(tpl, root, m, i) for i, m in enumerate(["succeed", "fail", "succeed"])]
    known = {specs[2].key: "store-rev-3"}
    seen: list[str] = []
    outs = dispatch(
        specs,
        runner=LocalRunner(2),
        known_successes=known,
        on_outcome=lambda o: seen.append(o.run_id),
        outputs=["result.txt"],
    )
    assert [o.state for o in outs] == ["succeeded", "failed", "succeeded"]
    assert outs[2].reused_from == "store-rev-3" and outs[2].attempts == ()
    assert not (specs[2].run_dir / "result.txt").exists()  # really not run
    assert sorted(seen) == sorted(s.run_id for s in specs)
    assert select_for_rerun(outs) == [specs[1].run_id]


def test_resume_after_killed_dispatch(tpl, tmp_path):
    root = tmp_path / "runs"
    specs = [make_spec(tpl, root, "succeed", i, x=float(i)) for i in range(4)]
    # Simulate a killed dispatch: runs 0 and 1 journalled a success, run 2 journalled a failure,
    # run 3 was killed mid-run (its folder has a partial output and no outcome file).
    first = dispatch(specs[:2], runner="local", concurrency=2, outputs=["result.txt"])
    stamp = {o.run_id: o.attempts[0].started for o in first}
    write_outcome(RunOutcome(specs[2].run_id, specs[2].key, "failed", (), specs[2].run_dir))
    (specs[3].run_dir / "result.txt").write_text("half")
    (specs[3].run_dir / "winnow-stdout.txt").write_text("partial")
    assert sorted(scan_run_folders(root)) == sorted(s.run_id for s in specs[:3])

    # Rerun: render again (cleans run 3's and run 2's folders) and dispatch everything.
    again = [make_spec(tpl, root, "succeed", i, x=float(i)) for i in range(4)]
    assert again == specs
    assert not (specs[3].run_dir / "result.txt").exists()
    outs = dispatch(again, runner="local", concurrency=2, outputs=["result.txt"])
    assert [o.state for o in outs] == ["succeeded"] * 4
    for o in outs[:2]:  # not repeated: the journalled attempts are returned
        assert o.attempts[0].started == stamp[o.run_id]
    for i, o in enumerate(outs[2:], start=2):
        assert o.attempts[0].started > max(stamp.values())
        assert (specs[i].run_dir / "result.txt").read_text() == f"value = {2.0 * i!r}\n"
    assert {k: v.state for k, v in scan_run_folders(root).items()} == {
        s.run_id: "succeeded" for s in specs
    }


def test_on_outcome_error_is_raised_after_all_runs_finish(tpl, tmp_path):
    root = tmp_path / "runs"
    specs = [make_spec(tpl, root, "succeed", i, x=float(i)) for i in range(3)]

    def boom(outcome):
        raise OSError("store is read-only")

    with pytest.raises(RuntimeError, match="store is read-only"):
        dispatch(specs, runner=LocalRunner(1), on_outcome=boom)
    assert all(read_outcome(s.run_dir).state == "succeeded" for s in specs)


def test_dispatch_validates_before_running(tpl, tmp_path):
    spec = make_spec(tpl, tmp_path / "runs", "succeed")
    with pytest.raises(ValueError, match="twice"):
        dispatch([spec, spec])
    with pytest.raises(ValueError, match="timeout"):
        dispatch([spec], timeout=-1)
    with pytest.raises(ValueError, match="valid"):
        dispatch([spec], runner="cloud")
    assert not (spec.run_dir / "winnow-stdout.txt").exists()


def test_interrupted_local_runner_kills_running_solvers(tpl, tmp_path):
    from winnow.tasks.dispatch import RunOptions

    root = tmp_path / "runs"
    sleeper = make_spec(tpl, root, "sleep", 0)
    quick = make_spec(tpl, root, "succeed", 1)
    gen = LocalRunner(2)._iter_outcomes([sleeper, quick], RunOptions(timeout=600))
    spec, outcome = next(gen)
    assert spec == quick and outcome.state == "succeeded"
    deadline = time.monotonic() + 30
    while not (sleeper.run_dir / "child.pid").exists() and time.monotonic() < deadline:
        time.sleep(0.05)
    child = int((sleeper.run_dir / "child.pid").read_text())
    gen.close()  # what Ctrl-C in the dispatcher does to the generator
    # The solver group is killed at once (not after the 600 s timeout) and journalled as
    # interrupted (not_run: it runs again on resume).
    journal = read_outcome(sleeper.run_dir)
    assert journal.state == "not_run" and journal.message.startswith("interrupted"), journal
    deadline = time.monotonic() + 10
    while not _gone(child) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert _gone(child)
