"""The README's "Your own study" walkthrough, run step by step (issue 17, "done when").

The files and commands are read from the README section itself, so the walkthrough and this
test cannot drift apart: every ``<!-- file: NAME -->`` block is written to a fresh folder,
every ``$ winnow ...`` line of a ``console`` block is run in that folder (in-process, on the
session's Prefect server), and the ``<!-- fix: ... -->`` step deletes the lines marked
``# bug`` from the solver, as the text tells the reader to do.

Checks against something outside the project: the stored QoI of every run equals the
Timoshenko cantilever tip deflection P L^3 / (3 E I) + P L / (kappa G A) with kappa = 5/6
(Gere & Timoshenko, Mechanics of Materials, 4th ed., sec. 9.11 "shear deformations", with the
clamp term P L^2 / k of a rotational spring) at the run's parameters, to 1e-12 relative
(one float64 formula evaluated twice in the same order; the tolerance only allows for the
JSON round trip, which is exact for shortest-repr floats).
"""

from __future__ import annotations

import json
import re
import shlex
from pathlib import Path

import pytest
from typer.testing import CliRunner

from winnow.flows.cli import app

pytestmark = pytest.mark.slow
README = Path(__file__).resolve().parents[1] / "README.md"


def _section() -> str:
    text = README.read_text(encoding="utf-8")
    start = text.index("\n## Your own study\n")
    end = text.index("\n## ", start + 5)
    return text[start:end]


def _steps(section: str) -> list[tuple[str, str, str]]:
    """``(kind, name, body)`` in order: ("file", NAME, text), ("run", "", command line),
    ("fix", NAME, instruction)."""
    steps: list[tuple[str, str, str]] = []
    pattern = re.compile(
        r"<!-- file: (?P<file>\S+) -->\n```[a-z]*\n(?P<body>.*?)```"
        r"|```console\n(?P<console>.*?)```"
        r"|<!-- fix: (?P<fix>\S+): (?P<how>.*?) -->",
        re.S,
    )
    for m in pattern.finditer(section):
        if m["file"]:
            steps.append(("file", m["file"], m["body"]))
        elif m["console"] is not None:
            for line in m["console"].splitlines():
                if line.startswith("$ "):
                    steps.append(("run", "", line[2:]))
        else:
            steps.append(("fix", m["fix"], m["how"]))
    return steps


def _timoshenko_tip(deck: dict) -> float:
    g = deck["E"] / (2 * (1 + deck["poisson"]))
    p, length = deck["load"], deck["length"]
    return (
        p * length**3 / (3 * deck["E"] * deck["second_moment"])
        + p * length / (5 / 6 * g * deck["area"])
        + p * length**2 / deck["k"]
    )


def test_the_readme_walkthrough_runs_as_written(prefect_harness, tmp_path, monkeypatch):
    monkeypatch.setenv("COLUMNS", "400")  # rich wraps at 80 columns off a terminal
    monkeypatch.chdir(tmp_path)
    runner = CliRunner()
    steps = _steps(_section())
    kinds = [k for k, _, _ in steps]
    assert kinds.count("file") == 5 and kinds.count("fix") == 1, steps
    commands = [body for k, _, body in steps if k == "run"]
    assert [c.split()[:2] for c in commands] == [
        ["winnow", "validate"],
        ["winnow", "run"],
        ["winnow", "status"],
        ["winnow", "rerun"],
    ], commands
    results = {}
    for kind, name, body in steps:
        if kind == "file":
            (tmp_path / name).write_text(body, encoding="utf-8")
        elif kind == "fix":
            assert 'delete the lines marked "# bug"' in body, body
            src = (tmp_path / name).read_text().splitlines(keepends=True)
            fixed = [ln for ln in src if "# bug" not in ln]
            assert len(src) - len(fixed) == 2  # the two lines the text names
            (tmp_path / name).write_text("".join(fixed))
        else:
            argv = shlex.split(body)
            assert argv[0] == "winnow"
            res = runner.invoke(app, argv[1:])
            results[argv[1]] = res
            assert res.exit_code == 0, (body, res.output)
            if argv[1] == "run":  # the outputs of the runs that finished the first time
                kept = {p: p.stat().st_mtime_ns for p in tmp_path.glob("runs/*/result.json")}

    store = tmp_path / "beam.h5"
    assert "beam.yaml: valid" in results["validate"].stdout
    first = " ".join(results["run"].stdout.split())
    m = re.search(r"solver runs: failed (\d+), succeeded (\d+)", first)
    assert m, first
    failed, succeeded = int(m[1]), int(m[2])
    # the seeded study has stiff-clamp points on both sides of the bug's limit; if a change
    # of the sampler moved every point to one side, this walkthrough would show nothing
    assert failed >= 1 and succeeded >= 1 and failed + succeeded == 8, first
    status = " ".join(results["status"].stdout.split())
    assert status.count("NotImplementedError: stiff clamp") == failed, status
    again = " ".join(results["rerun"].stdout.split())
    assert "solver runs: succeeded 8" in again, again
    assert f"ran {failed} run(s): failed before ({failed}: p" in again, again

    # the runs that finished the first time were kept (their outputs untouched), the failed
    # ones ran again, and every value is the closed form at its parameters
    assert len(kept) == succeeded
    assert {p: p.stat().st_mtime_ns for p in kept} == kept
    st = json.loads(runner.invoke(app, ["status", str(store), "--json"]).stdout)
    assert st["counts"]["succeeded"] == 8
    assert len(list(tmp_path.glob("runs/*/result.json"))) == 8
    stiff = 0
    for run in sorted((tmp_path / "runs").iterdir()):
        if not run.is_dir() or run.name.startswith("."):
            continue
        deck = json.loads((run / "beam.json").read_text())
        value = json.loads((run / "result.json").read_text())["tip_deflection_m"]
        assert value == pytest.approx(_timoshenko_tip(deck), rel=1e-12)
        stiff += deck["k"] > 8.0e6
    assert stiff == failed  # the runs that failed were exactly the stiff clamps
    assert (tmp_path / "beam-report" / "report.html").is_file()
    assert any((tmp_path / "beam-logs").glob("rerun-*.log"))
