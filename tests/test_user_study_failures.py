"""A user's own study that goes wrong: failures that speak (issue 17 items 3, 6 and 12).

* item 3: a QoI reader that finds nothing. When no value of a QoI can be read from any
  succeeded run, ``winnow run`` fails (exit 1) with the first reader error on the terminal;
  everything is recorded, and fixing the reader and running again reuses every run. When
  only some values cannot be read, the terminal summary says how many and why.
* item 6: expected stops (the convergence gate, no run succeeded) show winnow's one-line
  message without Prefect tracebacks and without ``NoneType: None`` per failed task; the
  traceback is in a log file whose path the command prints.
* item 12: after a convergence stop the failed chain is stored with its diagnostics and
  ``winnow status`` says that the gate failed.

The study is the straight-line test study (tests/study_models/make_study.py) whose tiny
solver appends one line per call to ``runs/calls.log``, so a test can count solver calls.
The contract checked is the issue's (the project's own), with the reader messages of
tasks/collect/_readers.py.
"""

from __future__ import annotations

import json
import logging
import os
import subprocess
import sys
from pathlib import Path

import pytest
import yaml
from typer.testing import CliRunner

sys.path.insert(0, str(Path(__file__).parent / "study_models"))
from make_study import make_study  # noqa: E402

from winnow.flows.cli import app  # noqa: E402

pytestmark = pytest.mark.slow
RUNNER = CliRunner()


def _invoke(*args):
    return RUNNER.invoke(app, [str(a) for a in args])


def _calls(folder: Path) -> int:
    log = folder / "runs" / "calls.log"
    return len(log.read_text().splitlines()) if log.exists() else 0


def _qoi(key: str) -> list[dict]:
    return [
        {
            "name": "y2",
            "units": "-",
            "reader": {"json": {"file": "result.json", "key": key}},
            "cheap_qoi": "linear_model:cheap_y2",
        }
    ]


@pytest.fixture
def wide_terminal(monkeypatch):
    """Rich wraps at 80 columns when not on a terminal; one line per message is easier to check."""
    monkeypatch.setenv("COLUMNS", "400")


# --------------------------------------------------------------------------------------------
# item 3: values that cannot be read
# --------------------------------------------------------------------------------------------
def test_a_qoi_read_from_no_run_fails_the_study_and_the_fix_reuses_every_run(
    prefect_harness, tmp_path, wide_terminal
):
    folder = tmp_path / "s"
    cfg = make_study(folder, **{"collect.qoi": _qoi("y2_typo")})
    res = _invoke("run", cfg)
    assert res.exit_code == 1, res.output  # not a green run with nan +- nan
    err = " ".join(res.stderr.split())
    assert "collect.qoi[y2].reader: no value could be read from any of the 4 succeeded" in err
    assert "key 'y2_typo' not found in 'result.json'" in err, err  # the first reader error
    assert "Traceback" not in res.output
    # everything is recorded: the 4 runs succeeded
    st = json.loads(_invoke("status", folder / "study.h5", "--json").stdout)
    assert st["counts"]["succeeded"] == 4
    assert _calls(folder) == 4
    # the fix: the reader key; the same command again runs no solver, reuses the 4 runs
    cfg = make_study(folder, **{"collect.qoi": _qoi("y2")})
    res = _invoke("run", cfg)
    assert res.exit_code == 0, res.output
    assert "reused from earlier runs: 4" in res.stdout, res.stdout
    assert _calls(folder) == 4


# a solver that leaves the QoI out of every second result (calls counted in a file); with
# one run at a time exactly half of the runs give no value
_HALF_SOLVER = """\
import json, sys
from pathlib import Path
deck = Path(sys.argv[1])
count = deck.parent.parent / "count.txt"
n = int(count.read_text()) + 1 if count.exists() else 1
count.write_text(str(n))
v = dict(line.split(" = ") for line in deck.read_text().splitlines() if " = " in line)
out = {"y2": float(v["a"]) + 2 * float(v["b"]) + 0.25} if n % 2 else {"other": 1.0}
(deck.parent / "result.json").write_text(json.dumps(out))
"""


def test_some_unreadable_values_are_counted_and_explained_on_the_terminal(
    prefect_harness, tmp_path, wide_terminal
):
    folder = tmp_path / "s"
    folder.mkdir()
    (folder / "half_solver.py").write_text(_HALF_SOLVER)
    cfg = make_study(
        folder,
        **{
            "dispatch.command": ["{python}", "{config_dir}/half_solver.py", "{deck}"],
            "dispatch.concurrency": 1,
        },
    )
    res = _invoke("run", cfg)
    assert res.exit_code == 0, res.output
    out = " ".join(res.stdout.split())
    assert "y2: 2 of 4 succeeded run(s) gave no value; first (run p" in out, out
    assert "key 'y2' not found in 'result.json'" in out, out
    assert "2 run(s) without a value (0 failed or not run, 2 unreadable)" in out, out


# --------------------------------------------------------------------------------------------
# item 12: the failed chain is stored and status says so
# --------------------------------------------------------------------------------------------
def test_convergence_stop_stores_the_failed_chain_and_status_says_so(
    prefect_harness, tmp_path, wide_terminal
):
    from winnow.tasks.store import RunStore

    folder = tmp_path / "s"
    # 60 draws of 2 chains cannot reach a bulk ESS of 400 (the default threshold)
    over = {"sample.checks": {"on_failure": "stop"}, "sample.draws": 60, "sample.chains": 2}
    cfg = make_study(folder, **over)
    res = _invoke("run", cfg)
    assert res.exit_code == 1, res.output
    assert "the chain did not converge" in res.stderr
    store = folder / "study.h5"
    with RunStore.open_read(store) as r:
        assert r.revisions() == ["r0001"] and r.stages_done("r0001") == {"chain"}
        chain = r.read_chain("r0001")
    assert chain.diagnostics is not None and not chain.diagnostics.passed
    assert chain.samples.shape == (2 * 30, 2)  # burn-in 'half' of 60 draws, 2 chains
    st = json.loads(_invoke("status", store, "--json").stdout)
    assert st["chain"]["passed"] is False
    assert any("ESS" in m for m in st["chain"]["messages"]), st
    text = " ".join(_invoke("status", store).stdout.split())
    assert "The chain FAILED the convergence gate" in text, text
    # the same command stops again at once, from the stored chain, writing nothing new
    res = _invoke("run", cfg)
    assert res.exit_code == 1 and "the chain did not converge" in res.stderr
    with RunStore.open_read(store) as r:
        assert r.revisions() == ["r0001"] and r.stages_done("r0001") == {"chain"}
    assert _calls(folder) == 0


# --------------------------------------------------------------------------------------------
# item 6: expected stops on a real terminal (a child process, the session's Prefect server)
# --------------------------------------------------------------------------------------------
@pytest.fixture
def server_env(prefect_harness) -> dict[str, str]:
    from prefect.settings import PREFECT_API_URL

    env = dict(os.environ, PREFECT_API_URL=str(PREFECT_API_URL.value()), COLUMNS="400")
    env["PREFECT_LOGGING_LEVEL"] = "INFO"  # what a user sees by default
    return env


def _winnow(env: dict[str, str], *args) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "winnow.flows.cli", *map(str, args)],
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )


def _log_file(stderr: str) -> Path:
    tail = [ln for ln in stderr.splitlines() if "the full log, with tracebacks, is in" in ln]
    assert len(tail) == 1, stderr
    return Path(tail[0].split(" is in ", 1)[1].strip())


@pytest.mark.parametrize(
    ("over", "message"),
    [
        (
            {"sample.checks": {"on_failure": "stop"}, "sample.draws": 60, "sample.chains": 2},
            "winnow: the chain did not converge; no costly run was started:",
        ),
        (
            {"dispatch.command": ["{python}", "-c", "import sys; sys.exit(3)", "{deck}"]},
            "winnow: study line-test r0001: no run succeeded ({'failed': 4})",
        ),
    ],
    ids=["convergence gate", "no run succeeded"],
)
def test_expected_stop_shows_one_message_and_keeps_the_traceback_in_a_log(
    server_env, tmp_path, over, message
):
    folder = tmp_path / "s"
    cfg = make_study(folder, **over)
    done = _winnow(server_env, "run", cfg)
    assert done.returncode == 1, done.stderr
    assert message in done.stderr, done.stderr
    assert "Traceback" not in done.stderr, done.stderr
    assert "NoneType: None" not in done.stderr, done.stderr
    assert 'File "' not in done.stderr, done.stderr  # no traceback frames either
    log = _log_file(done.stderr)
    assert log.parent == folder / "study-logs" and log.name.startswith("run-")
    text = log.read_text()
    assert "Traceback (most recent call last)" in text  # kept, in the file
    assert "NoneType: None" not in text


def test_empty_exception_info_is_dropped_from_run_log_records():
    """Prefect's task engine logs a failed state with exc_info=True outside an exception;
    formatted, that is the line 'NoneType: None' (logging's documented behaviour for
    sys.exc_info() == (None, None, None))."""
    import winnow.flows  # noqa: F401 - installs the filter

    record = logging.LogRecord("prefect.task_runs", logging.ERROR, __file__, 1, "x", None, None)
    record.exc_info = (None, None, None)
    assert "NoneType: None" in logging.Formatter().format(record)  # the symptom
    record = logging.LogRecord("prefect.task_runs", logging.ERROR, __file__, 1, "x", None, None)
    record.exc_info = (None, None, None)
    for f in logging.getLogger("prefect.task_runs").filters:
        f.filter(record)
    assert logging.Formatter().format(record) == "x"


def test_the_refused_config_writes_no_log(tmp_path):
    # bad input is refused before anything is written, the log folder included
    folder = tmp_path / "s"
    cfg = make_study(folder)
    data = yaml.safe_load(cfg.read_text())
    data["budget"] = 0
    cfg.write_text(yaml.safe_dump(data))
    res = _invoke("run", cfg)
    assert res.exit_code == 2
    assert not (folder / "study-logs").exists() and not (folder / "study.h5").exists()


# --------------------------------------------------------------------------------------------
# item 1: continuing after a template fix
# --------------------------------------------------------------------------------------------
def _template_study(folder: Path) -> Path:
    from make_study import HERE

    (folder / "tpl").mkdir(parents=True)
    (folder / "tpl" / "line.deck.j2").write_text((HERE / "line.deck.j2").read_text())
    return make_study(folder, **{"dispatch.template_dir": "tpl"})


def test_rerun_after_a_template_change_is_refused_before_anything_is_written(
    prefect_harness, tmp_path, wide_terminal
):
    folder = tmp_path / "s"
    cfg = _template_study(folder)
    assert _invoke("run", cfg).exit_code == 0
    (folder / "tpl" / "line.deck.j2").write_text("a = {{ a }}\nb = {{ b }}\nc = 1\n")
    store = folder / "study.h5"
    before = (store.read_bytes(), sorted(p.stat().st_mtime_ns for p in folder.rglob("*")))
    res = _invoke("rerun", store)
    assert res.exit_code == 2, res.output
    err = " ".join(res.stderr.split())
    assert err.startswith("winnow: error: rerun: the deck templates or staged inputs changed")
    assert "template0: " in err and "line.deck.j2" in err and "Nothing was written" in err
    assert "run `winnow run CONFIG`" in err, err
    assert (store.read_bytes(), sorted(p.stat().st_mtime_ns for p in folder.rglob("*"))) == before


def test_run_after_a_template_change_keeps_unchanged_runs_and_says_why_it_runs_the_others(
    prefect_harness, tmp_path, wide_terminal
):
    folder = tmp_path / "s"
    cfg = _template_study(folder)
    assert _invoke("run", cfg).exit_code == 0
    (folder / "tpl" / "line.deck.j2").write_text("a = {{ a }}\nb = {{ b }}\nc = 1\n")
    res = _invoke("run", cfg)
    assert res.exit_code == 0, res.output
    out = " ".join(res.stdout.split())
    assert "ran 4 run(s): line.deck changed since r0001 (4: p" in out, out
