"""Bad input through the command line: one clear message, exit 2, nothing written.

Every case builds a valid small study (``tests/fault_solvers/kit.py``), spoils one thing (a
config field, a template, the chain file), lists the study folder with sizes and mtimes, runs
``winnow run`` / ``winnow validate`` / ``winnow thin`` / ``winnow diagnose`` in-process
(typer's CliRunner) and checks the exit status 2, that the message names the file, field or
argument, and that the listing is unchanged. The parse-level checks of the config loader
are in tests/test_config.py; these go through the commands.

Reference: the project's contract (README "Bad input ... always gets one message naming it
and the expected value, exit status 2, and nothing is written or overwritten"; issue 8).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import h5py
import numpy as np
import pytest
import yaml
from fault_solvers.kit import make_study, snapshot, study_data
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from typer.testing import CliRunner

from winnow.flows.cli import app

RUNNER = CliRunner()


def _invoke(*args: str):
    return RUNNER.invoke(app, [str(a) for a in args])


def _refused(folder: Path, args: list, *words: str) -> str:
    """Run a command expected to refuse; check exit 2, the message and the unchanged folder."""
    before = snapshot(folder)
    res = _invoke(*args)
    assert res.exit_code == 2, (res.exit_code, res.output, res.exception)
    err = res.stderr
    assert err.startswith("winnow: error: "), err
    assert "Traceback" not in res.output
    for w in words:
        assert w in err, (w, err)
    assert snapshot(folder) == before  # nothing written, created or touched
    return err


def _spoil(folder: Path, **over) -> Path:
    """A valid study with some config values replaced (``a__b=v``; ``None`` deletes)."""
    path = make_study(folder)
    data = study_data(folder)
    for dotted, value in over.items():
        node = data
        *head, last = dotted.split("__")
        for k in head:
            node = node[int(k)] if isinstance(node, list) else node[k]
        if value is None:
            del node[last]
        else:
            node[last] = value
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


# --------------------------------------------------------------------------------------------
# configs, through `winnow run` and `winnow validate`
# --------------------------------------------------------------------------------------------
CONFIG_CASES = {
    "unknown key": ({"thin__colour": "red"}, ["thin.colour", "Extra inputs"]),
    "wrong type": ({"budget": "six"}, ["budget", "integer"]),
    "missing field": ({"store": None}, ["store", "Field required"]),
    "zero budget": ({"budget": 0}, ["budget", "greater than 0"]),
    "negative budget": ({"budget": -4}, ["budget", "greater than 0"]),
    "budget above distinct rows": ({"budget": 401}, ["budget", "400 distinct", "chain.npy"]),
    "prior low >= high": (
        {"parameters__0__prior": {"dist": "uniform", "low": 2.0, "high": 2.0}},
        ["parameters[x].prior", "low must be < high"],
    ),
    "unknown kernel": ({"thin__kernel": "cosine"}, ["thin.kernel", "'gaussian'"]),
    "unknown method": ({"thin__method": "best"}, ["thin.method", "'greedy'"]),
    "shell string command": (
        {"dispatch__command": "python solver.py {deck}; rm -rf ~"},
        ["dispatch.command", "list of arguments"],
    ),
    "model that does not import": (
        {"sample": {"model": {"log_density": "no_such_module_xyz:f"}}},
        ["sample.model.log_density", "no_such_module_xyz"],
    ),
    "template path escapes": (
        {"dispatch__templates": ["../outside.txt.j2"]},
        ["dispatch.templates", "outside.txt.j2"],
    ),
    "absolute template path": (
        {"dispatch__templates": ["/etc/hostname"]},
        ["dispatch.templates", "/etc/hostname"],
    ),
    "copied file escapes": (
        {"dispatch__inputs": ["../outside.txt"]},
        ["dispatch.inputs[0].file", "../outside.txt", "inside the run folder"],
    ),
    "missing chain file": (
        {"sample__import_chain__file": "nope.npy"},
        ["nope.npy"],
    ),
    # keys of winnow 0.1, renamed since (issue 17 item 18): the message names the new key
    # and gives the line to write, for one release
    "old key work_dir": (
        {"run_root": None, "work_dir": "runs"},
        ["study.yaml: work_dir:", "renamed", "(now 'run_root')", "write run_root: runs"],
    ),
    "old key copy": (
        {"dispatch__copy": ["mesh.msh", "table.csv"]},
        ["dispatch.copy:", "(now 'inputs')", "write inputs: [{file: mesh.msh}, {file: table.csv}]"],
    ),
    "old key link": (
        {"dispatch__link": ["big.dat"]},
        ["dispatch.link:", "(now 'inputs')", "write inputs: [{file: big.dat, stage: link}]"],
    ),
    "unknown input stage": (
        {"dispatch__inputs": [{"file": "a.txt", "stage": "symlink"}]},
        ["dispatch.inputs.0.stage", "'copy' or 'link'"],
    ),
}


@pytest.mark.parametrize("case", list(CONFIG_CASES))
@pytest.mark.parametrize("command", ["run", "validate"])
def test_bad_config_is_refused_and_nothing_written(tmp_path, case, command):
    over, words = CONFIG_CASES[case]
    folder = tmp_path / "study"
    (tmp_path / "outside.txt.j2").write_text("x = {{ x }}\n")
    folder.mkdir()
    (folder / "outside.txt").write_text("a file next to the study, outside templates/\n")
    cfg = _spoil(folder, **over)
    _refused(folder, [command, cfg], *words)
    assert not (folder / "study.h5").exists() and not (folder / "runs").exists()


@pytest.mark.parametrize(
    ("body", "words"),
    [
        ("x = {{ x }}\nz = {{ undefined_name }}\n", ["dispatch.templates", "undefined_name"]),
        ("x = {{ x }}\n{% if %}\n", ["dispatch.templates", "deck.txt.j2", "line 2"]),
        ("{{ x.__class__.__mro__ }}\n", ["dispatch.templates"]),
    ],
    ids=["undefined name", "syntax error", "sandbox escape"],
)
def test_bad_template_is_refused_and_nothing_written(tmp_path, body, words):
    cfg = make_study(tmp_path)
    (tmp_path / "templates" / "deck.txt.j2").write_text(body)
    _refused(tmp_path, ["run", cfg], *words)
    _refused(tmp_path, ["validate", cfg], *words)


def test_not_yaml_and_missing_config(tmp_path):
    cfg = make_study(tmp_path)
    cfg.write_text("study: [unclosed\n")
    _refused(tmp_path, ["run", cfg], str(cfg), "not valid YAML")
    _refused(tmp_path, ["run", tmp_path / "absent.yaml"], "absent.yaml")


def test_existing_store_is_not_overwritten_by_bad_input(tmp_path):
    # a store already there (an earlier study) must survive a bad rerun of the config
    cfg = make_study(tmp_path)
    from winnow.tasks.store import RunStore

    RunStore.create(tmp_path / "study.h5", "earlier")
    data = study_data(tmp_path, budget=-1)
    cfg.write_text(yaml.safe_dump(data))
    _refused(tmp_path, ["run", cfg], "budget")
    _refused(tmp_path, ["rerun", tmp_path / "absent.h5"], "absent.h5")


def test_shell_metacharacters_in_argv_are_passed_literally(tmp_path):
    # contract (README, Security): the command is an argument list executed without a shell;
    # `;`, `$(...)` and backquotes reach the program as literal text and run nothing
    from winnow.tasks.dispatch import DeckSpec, render_run, run_one

    (tmp_path / "tpl").mkdir()
    (tmp_path / "tpl" / "deck.txt.j2").write_text("x = {{ x }}\n")
    canary = tmp_path / "canary"
    evil = [f"; touch {canary}", f"$(touch {canary})", f"`touch {canary}`", f"&& touch {canary}"]
    argv = [
        "python3",
        "-c",
        "import json, sys; json.dump(sys.argv[1:], open('args.json', 'w'))",
        *evil,
    ]
    spec = render_run(
        {"x": 1.0},
        run_id="p1",
        point_index=0,
        weight=1.0,
        run_root=tmp_path / "runs",
        decks=DeckSpec(templates=["deck.txt.j2"]),
        command=argv,
        template_root=tmp_path / "tpl",
    )
    outcome = run_one(spec, outputs=["args.json"])
    assert outcome.state == "succeeded"
    assert json.loads((spec.run_dir / "args.json").read_text()) == evil
    assert not canary.exists()


# --------------------------------------------------------------------------------------------
# chains and data: `winnow thin`, `winnow diagnose`, `winnow run` with import_chain
# --------------------------------------------------------------------------------------------
def _ragged(p: Path) -> None:
    p.write_text("x,y\n1,2\n3\n4,5\n")


def _non_numeric(p: Path) -> None:
    p.write_text("x,y\n1,2\n3,abc\n4,5\n")


def _h5_without_dataset(p: Path) -> None:
    with h5py.File(p, "w") as f:
        f["other"] = np.zeros((50, 2))


def _h5_truncated(p: Path) -> None:
    with h5py.File(p, "w") as f:
        f["samples"] = np.random.default_rng(3).normal(size=(500, 2))
    data = p.read_bytes()
    p.write_bytes(data[: len(data) // 2])


BAD_CHAINS = {
    "empty": ("chain.npy", lambda p: np.save(p, np.zeros((0, 2))), ["chain.npy"]),
    "one-dimensional": ("chain.npy", lambda p: np.save(p, np.arange(50.0)), ["chain.npy"]),
    "ragged csv": ("chain.csv", _ragged, ["chain.csv", "line 3"]),
    "non-numeric csv": ("chain.csv", _non_numeric, ["chain.csv", "abc"]),
    "hdf5 without dataset": ("chain.h5", _h5_without_dataset, ["chain.h5", "samples"]),
    "truncated hdf5": ("chain.h5", _h5_truncated, ["chain.h5"]),
}


@pytest.mark.parametrize("case", list(BAD_CHAINS))
def test_bad_chain_file_is_refused_by_every_command(tmp_path, case):
    name, write, words = BAD_CHAINS[case]
    folder = tmp_path / "study"
    folder.mkdir()
    chain = folder / name
    write(chain)
    extra = ["--dataset", "samples"] if name.endswith(".h5") else []
    out = folder / "thinned.json"
    _refused(folder, ["thin", chain, "--budget", "3", "--out", out, "--quiet", *extra], *words)
    assert not out.exists()
    _refused(folder, ["diagnose", chain, *extra], *words)
    over = {"sample__import_chain__file": name}
    if extra:
        over["sample__import_chain__dataset"] = "samples"
    (folder / "chain.npy").unlink(missing_ok=True)
    np.save(folder / "unused.npy", np.zeros((1, 2)))  # make_study writes chain.npy if absent
    cfg = _spoil(folder, **over)
    if name == "chain.npy":
        write(chain)  # make_study wrote a good chain.npy: spoil it again
    _refused(folder, ["run", cfg], *words)
    assert not (folder / "study.h5").exists()


def test_nonfinite_rows_are_dropped_and_counted(tmp_path):
    # contract (README, thin stage): non-finite rows are dropped and counted
    g = np.random.default_rng(5)
    draws = g.normal(size=(300, 2))
    draws[[3, 70, 71]] = np.nan
    draws[100, 1] = np.inf
    draws[200, 0] = -np.inf
    np.save(tmp_path / "c.npy", draws)
    out = tmp_path / "t.json"
    res = _invoke(
        "thin", tmp_path / "c.npy", "--budget", "5", "--out", out, "--quiet", "--features", "128"
    )
    assert res.exit_code == 0, res.output
    doc = json.loads(out.read_text())
    rows = [int(i) for i in doc["indices"]]
    assert len(rows) == 5 and np.isfinite(draws[rows]).all()
    assert doc["n_nonfinite_dropped"] == 5 and doc["n_distinct"] == 295
    assert "5 non-finite dropped" in res.stdout
    # with such rows in the chain the study's preflight counts only the finite distinct rows
    folder = tmp_path / "study"
    folder.mkdir()
    np.save(folder / "chain.npy", draws)
    cfg = make_study(folder, budget=296)
    _refused(folder, ["validate", cfg], "budget", "295 distinct finite rows")


def test_single_repeated_row_is_refused(tmp_path):
    one = np.tile([[1.0, 2.0]], (100, 1))
    np.save(tmp_path / "one.npy", one)
    out = tmp_path / "o.json"
    _refused(
        tmp_path,
        ["thin", tmp_path / "one.npy", "--budget", "2", "--out", out, "--quiet"],
        "budget",
        "distinct",
    )
    # one point from a constant chain is a valid (trivial) selection
    res = _invoke("thin", tmp_path / "one.npy", "--budget", "1", "--out", out, "--quiet")
    assert res.exit_code == 0, res.output
    assert json.loads(out.read_text())["weights"] == [1.0]


def test_huge_values_are_thinned_like_any_chain(tmp_path):
    # 1e300 x N(0, 1) is a valid float64 chain; in standardised coordinates it is N(0, 1)
    # (regression: the variance used to overflow, features turned NaN; fixed in b3ee1b1)
    huge = np.random.default_rng(9).normal(size=(200, 2)) * 1e300
    np.save(tmp_path / "huge.npy", huge)
    out = tmp_path / "h.json"
    res = _invoke(
        "thin",
        tmp_path / "huge.npy",
        "--budget",
        "4",
        "--out",
        out,
        "--quiet",
        "--features",
        "128",
    )
    assert res.exit_code == 0, res.output
    w = np.asarray(json.loads(out.read_text())["weights"], dtype=float)
    assert np.isfinite(w).all() and math.isclose(w.sum(), 1.0, rel_tol=1e-9)


# --------------------------------------------------------------------------------------------
# property: the thin command never ends in a traceback on random small chains
# --------------------------------------------------------------------------------------------
_cells = st.one_of(
    st.floats(-1e3, 1e3, allow_nan=False),
    st.sampled_from([0.0, 1.0, math.nan, math.inf, -math.inf, 1e300, -1e300, 5e-324]),
)


@settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    rows=hnp.arrays(np.float64, st.tuples(st.integers(0, 12), st.integers(1, 3)), elements=_cells),
    budget=st.integers(-1, 6),
    method=st.sampled_from(["greedy", "swap", "random", "stride"]),
)
def test_thin_command_exits_0_or_2_on_random_chains(tmp_path, rows, budget, method):
    # contract: bad input -> exit 2 with one message; never a traceback (exit 1)
    chain = tmp_path / "r.npy"
    np.save(chain, rows)
    out = tmp_path / "r.json"
    out.unlink(missing_ok=True)
    res = _invoke(
        "thin",
        chain,
        "--budget",
        str(budget),
        "--method",
        method,
        "--out",
        out,
        "--quiet",
        "--features",
        "64",
        "--seed",
        "1",
    )
    assert res.exit_code in (0, 2), (res.exit_code, res.output, repr(res.exception))
    if res.exit_code == 2:
        assert res.stderr.startswith("winnow: error: ") and not out.exists()
    else:
        doc = json.loads(out.read_text())
        assert len(doc["indices"]) == budget


# --------------------------------------------------------------------------------------------
# files named in the solver command (issue 17 item 5)
# --------------------------------------------------------------------------------------------
def _solver_beside(folder: Path, **dispatch) -> Path:
    """A valid study whose solver is ``solver.py`` next to the config, with ``dispatch``
    settings replaced."""
    from fault_solvers.kit import SOLVER

    cfg = make_study(folder)
    (folder / "solver.py").write_text(SOLVER.read_text())
    data = study_data(folder)
    data["dispatch"].update(dispatch)
    cfg.write_text(yaml.safe_dump(data, sort_keys=False))
    return cfg


@pytest.mark.parametrize("command", ["run", "validate"])
def test_relative_solver_next_to_config_is_refused_with_fix(tmp_path, command):
    # The solver runs in its run folder (subprocess cwd); solver.py next to the config is
    # not there, so every run would fail after validate had passed.
    cfg = _solver_beside(tmp_path, command=["{python}", "solver.py", "{deck}"])
    err = _refused(
        tmp_path, [command, cfg], str(cfg), "dispatch.command[1]", "'solver.py'", "run folder"
    )
    assert "{config_dir}/solver.py" in err, err
    assert f"inputs: [{{file: {tmp_path.resolve() / 'solver.py'}}}]" in err, err
    assert not (tmp_path / "runs").exists()


@pytest.mark.parametrize("stage", ["copy", "link"])
def test_dotdot_staging_path_names_its_field_and_index(tmp_path, stage):
    cfg = _solver_beside(tmp_path, inputs=[{"file": "../solver.py", "stage": stage}])
    for command in ("run", "validate"):
        err = _refused(tmp_path, [command, cfg], "dispatch.inputs[0].file", "'../solver.py'")
        # the fix: the absolute path (staged under its base name); not the templates field
        absolute = tmp_path.resolve() / "solver.py"
        fix = f"{{file: {absolute}}}" if stage == "copy" else f"{{file: {absolute}, stage: link}}"
        assert f"inputs: [{fix}]" in err, err
        assert "dispatch.templates" not in err, err


def test_config_dir_placeholder_and_staged_copy_both_run(tmp_path):
    # The two fixes the message offers both validate and then run in the run folder.
    from winnow.tasks.config import load_config
    from winnow.tasks.dispatch import deck_spec, render_run, run_one, solver_command

    cases = {
        "beside": {"command": ["{python}", "{config_dir}/solver.py", "{deck}"]},
        "staged": {
            "command": ["{python}", "solver.py", "{deck}"],
            "inputs": [{"file": str(tmp_path.resolve() / "staged" / "solver.py")}],
        },
    }
    for name, dispatch in cases.items():
        cfg = _solver_beside(tmp_path / name, **dispatch)
        res = _invoke("validate", cfg)
        assert res.exit_code == 0, res.output
        config, _ = load_config(cfg)
        decks, root = deck_spec(config, cfg.parent)
        spec = render_run(
            {"x": 0.5, "y": 0.25},
            point_index=0,
            weight=1.0,
            run_root=tmp_path / name / "runs",
            decks=decks,
            command=solver_command(config.dispatch.command),
            template_root=root,
        )
        outcome = run_one(spec, outputs=["out.json"], timeout=60)
        assert outcome.state == "succeeded", (name, outcome.message)
        # the fault solver's q = x + 2 y (tests/fault_solvers/fault_solver.py)
        assert json.loads((spec.run_dir / "out.json").read_text())["q"] == 1.0
