"""Fault injection, solver side: a misbehaving solver never costs a finished run.

One study of 12 chosen points runs the fault solver (``tests/fault_solvers/fault_solver.py``)
with a different behaviour per point: non-zero exit, hang past the timeout (with a
grandchild), no output, truncated / non-numeric / NaN output, megabytes on stdout and stderr,
deleting or rewriting its own run folder, success only on the second attempt, and plain
successes. Each test then checks what the RUN STORE records for its point (state, attempts,
exit statuses, tails, messages, QoI status) and that ``check()`` finds the store intact; the
last test reruns the failures with ``rerun_flow`` and checks nothing that succeeded ran again.

Reference for every check: the project's contract (issue 8 and the README, "Every run ends
in a recorded state ... survives solver failures and reruns only what failed"); OS facts are
marked "common practice".
"""

from __future__ import annotations

import hashlib
import json
from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from fault_solvers.kit import calls, make_study, read_runs, run_study

from winnow.tasks.store import RunStore, check

pytestmark = pytest.mark.slow

MODES = [
    "exit",
    "hang",
    "no_output",
    "truncated",
    "nonnumeric",
    "nan",
    "spam",
    "delete_folder",
    "rewrite",
    "flaky",
    "ok",
    "ok",
]
TIMEOUT = 4.0


def _alive(pid: int) -> bool:
    """True while ``pid`` runs; a zombie (exited, not yet reaped) counts as gone."""
    try:
        status = Path(f"/proc/{pid}/status").read_text()
    except (FileNotFoundError, ProcessLookupError):
        return False
    return "\nState:\tZ" not in status


@pytest.fixture(scope="module")
def mixed(tmp_path_factory, prefect_harness):
    import yaml

    from winnow.tasks.config import parse_config
    from winnow.tasks.sample import sample_stage
    from winnow.tasks.thin import thin_stage

    folder = tmp_path_factory.mktemp("mixed")
    cfg = make_study(
        folder,
        budget=len(MODES),
        dispatch__timeout=TIMEOUT,
        dispatch__retries=1,
        dispatch__retry_delay=0.0,
        dispatch__concurrency=4,
    )
    # the stages are deterministic: give each chosen point its behaviour up front
    config = parse_config(yaml.safe_load(cfg.read_text()))
    sel = thin_stage(config, sample_stage(config, folder))
    by_x = {repr(float(p[0])): m for p, m in zip(sel.points, MODES, strict=True)}
    (folder / "state" / "modes.json").write_text(json.dumps(by_x))
    result = run_study(cfg)
    specs, outcomes, values = read_runs(folder / "study.h5")
    mode_of = {s.run_id: by_x[repr(float(s.params["x"]))] for s in specs}
    run_of = {}
    for rid, m in mode_of.items():
        run_of.setdefault(m, []).append(rid)
    with RunStore.open_read(folder / "study.h5") as r:
        estimates = r.read_results()[1]
    return {
        "folder": folder,
        "result": result,
        "specs": {s.run_id: s for s in specs},
        "outcomes": outcomes,
        "values": values,
        "run_of": run_of,
        "calls": Counter(name for name, _, _ in calls(folder)),
        "estimates": estimates,
        "check": check(folder / "study.h5"),
    }


def _one(mixed, mode):
    (rid,) = mixed["run_of"][mode]
    return mixed["outcomes"][rid], mixed["values"][rid], mixed["specs"][rid]


def test_every_point_recorded_and_store_intact(mixed):
    # contract: every run ends in a recorded state; the store verifies after faults
    assert mixed["check"].ok, mixed["check"].problems
    assert set(mixed["outcomes"]) == set(mixed["specs"])
    assert len(mixed["specs"]) == len(MODES)
    # solver invocations logged by the solver == attempts recorded in the store, per run
    # (the run that deleted its own folder is checked on its own below: see the bug there)
    (deleted,) = mixed["run_of"]["delete_folder"]
    for rid, o in mixed["outcomes"].items():
        if rid != deleted:
            assert mixed["calls"][rid] == len(o.attempts), (rid, o.state)
    counts = mixed["result"].counts
    assert counts == dict(Counter(o.state for o in mixed["outcomes"].values()))


def test_nonzero_exit_is_failed_with_tail_and_retried(mixed):
    o, v, _ = _one(mixed, "exit")
    assert o.state == "failed"
    assert [a.exit_status for a in o.attempts] == [3, 3]  # retries: 1 -> two attempts
    assert all("diverged at step 17" in a.stderr_tail for a in o.attempts)
    assert v.status == "run_failed" and np.isnan(v.value)


def test_hang_is_timed_out_and_whole_process_tree_gone(mixed):
    o, v, _ = _one(mixed, "hang")
    assert o.state == "timed_out"
    assert len(o.attempts) == 2
    assert all(a.timed_out and a.exit_status is None for a in o.attempts)
    assert all(f"{TIMEOUT:g} s timeout" in a.error for a in o.attempts)
    grandchildren = [
        int(p) for p in (mixed["folder"] / "state" / "grandchildren.log").read_text().split()
    ]
    assert len(grandchildren) == 2
    # the timeout kills the process group, so the grandchild (sleeping 300 s) is gone too
    # (common practice: killpg reaches every process of the group)
    assert not [p for p in grandchildren if _alive(p)]
    assert v.status == "run_failed"


def test_no_output_is_output_missing(mixed):
    o, v, _ = _one(mixed, "no_output")
    assert o.state == "output_missing"
    assert "out.json" in o.message
    assert all(a.exit_status == 0 for a in o.attempts)
    assert v.status == "run_failed"


@pytest.mark.parametrize(
    ("mode", "status", "words"),
    [("truncated", "unparsable", "not valid JSON"), ("nonnumeric", "unparsable", "abc")],
)
def test_bad_output_is_recorded_as_unparsable(mixed, mode, status, words):
    o, v, _ = _one(mixed, mode)
    assert o.state == "succeeded"  # the solver exited 0 and wrote its output file
    assert v.status == status and words in v.reason and np.isnan(v.value)


def test_nan_output_is_nonfinite_and_left_out_of_the_estimate(mixed):
    o, v, _ = _one(mixed, "nan")
    assert o.state == "succeeded"
    assert v.status == "nonfinite" and np.isnan(v.value)
    (est,) = mixed["estimates"]
    usable = [rid for rid, val in mixed["values"].items() if val.status == "ok"]
    # ok, ok, spam, flaky give a number; the other eight do not
    assert est.n_used == len(usable) == 4
    assert est.n_missing == len(MODES) - 4
    assert np.isfinite(est.mean)


def test_megabytes_of_output_kept_as_bounded_tails(mixed):
    o, v, _ = _one(mixed, "spam")
    assert o.state == "succeeded" and v.status == "ok"
    (a,) = o.attempts
    # 4 MiB were written to each stream; the store keeps only the last few KiB
    assert 0 < len(a.stdout_tail.encode()) <= 16 * 1024
    assert 0 < len(a.stderr_tail.encode()) <= 16 * 1024
    assert a.stdout_tail.rstrip().endswith("fault solver: last stdout line")
    assert a.stderr_tail.rstrip().endswith("fault solver: last stderr line")
    assert mixed["folder"].joinpath("study.h5").stat().st_size < 4 * 2**20


def test_solver_deleting_its_run_folder_is_recorded(mixed):
    o, v, s = _one(mixed, "delete_folder")
    # the outputs are gone with the folder: recorded as not succeeded, with a clear message
    assert o.state == "failed"
    assert f"run folder {s.run_dir} does not exist" in o.message
    assert v.status == "run_failed"
    assert mixed["calls"][s.run_id] == 1  # the retry could not start in a missing folder


def test_solver_deleting_its_run_folder_keeps_its_attempts(mixed):
    # regression: the outcome used to be rebuilt from the (deleted) folder's journal, losing
    # the attempts; fixed in a20d666 (the outcome travels with the Failed state)
    o, _, s = _one(mixed, "delete_folder")
    # attempt 1 ran (exit 0, outputs gone), attempt 2 could not start: both must be recorded
    assert len(o.attempts) == 2
    assert o.attempts[0].exit_status == 0
    assert "does not exist" in o.attempts[1].error


def test_solver_rewriting_its_run_folder_is_not_trusted(mixed):
    o, v, s = _one(mixed, "rewrite")
    # the solver exited 0 with its output, but it rewrote the folder winnow rendered: the
    # run is not trusted (contract: dispatch checks the run folder's manifest after a run)
    assert [a.exit_status for a in o.attempts] == [0, 0]
    assert o.state == "output_missing"
    assert "rewritten" in o.message
    assert v.status == "run_failed"
    # the store keeps the hash of the deck as rendered: the deck on disk minus the lines
    # the solver appended (one per attempt) hashes to the recorded value
    (rel,) = s.deck_hashes
    disk = (s.run_dir / rel).read_text()
    rendered = disk.replace("\n# edited by the solver\n", "")
    assert disk.count("# edited by the solver") == 2
    assert hashlib.sha256(rendered.encode()).hexdigest() == s.deck_hashes[rel]


def test_success_on_second_attempt_is_one_success(mixed):
    o, v, _ = _one(mixed, "flaky")
    assert o.state == "succeeded"
    assert [a.exit_status for a in o.attempts] == [1, 0]
    assert "first attempt fails" in o.attempts[0].stderr_tail
    assert v.status == "ok"


def test_rerun_repeats_only_failures_and_ends_with_one_success_per_point(mixed):
    from winnow.flows.rerun import rerun_flow

    folder = mixed["folder"]
    store = folder / "study.h5"
    before = Counter(name for name, _, _ in calls(folder))
    failed = {rid for rid, o in mixed["outcomes"].items() if o.state != "succeeded"}
    assert len(failed) == 5  # exit, hang, no_output, delete_folder, rewrite
    (folder / "state" / "modes.json").unlink()  # the solver behaves from now on
    result = rerun_flow(str(store))
    after = Counter(name for name, _, _ in calls(folder))
    ran = {rid for rid in after if after[rid] != before[rid]}
    assert ran == failed  # no succeeded run was solved again
    assert all(after[rid] == before[rid] + 1 for rid in failed)
    specs, outcomes, values = read_runs(store)
    assert result.counts == {"succeeded": len(MODES)}
    assert Counter(o.state for o in outcomes.values()) == {"succeeded": len(MODES)}
    assert len({s.point_index for s in specs}) == len(MODES)
    # the earlier bad outputs (truncated, NaN) were from succeeded runs: kept as they were
    assert values[mixed["run_of"]["nan"][0]].status == "nonfinite"
    assert check(store).ok
