"""Bugs are not reported as bad input (issue 13, item 7).

Bad input keeps its one-line message and exit status 2 (tests/test_bad_input.py checks the
cases command by command). An unexpected exception -- here a ``ValueError`` or ``TypeError``
raised deep inside a stage by monkeypatching a stage function so that it fails the way a bug
would -- is reported as an internal error: exit status 1, the exception's one-line summary and
the path of a file holding its traceback.

Reference: the project's contract (DEVELOPERS.md "Bad input on the command line": exit 2;
issue 13 item 7: an internal error is shown as such, with a traceback saved to a file).
"""

from __future__ import annotations

import re
import tempfile
from pathlib import Path

import numpy as np
import pytest
from fault_solvers.kit import make_study
from typer.testing import CliRunner

from winnow.flows._cli_common import is_usage_error
from winnow.tasks.errors import InputError

RUNNER = CliRunner()


def _invoke(*args):
    from winnow.flows.cli import app

    return RUNNER.invoke(app, [str(a) for a in args])


def _winnow_bug(*args, **kwargs):
    """Fail inside winnow's own (non-validating) code, as a bug there would."""
    from winnow.tasks.dispatch._process import outcome_from_dict

    return outcome_from_dict({"format": "not-an-outcome"})  # ValueError in winnow code


def _library_bug(*args, **kwargs):
    return np.zeros("three")  # TypeError raised inside numpy


def _traceback_file(err: str) -> Path:
    m = re.search(r"the traceback is in (\S+\.txt)", err)
    assert m, err
    return Path(m.group(1))


@pytest.fixture
def temp_dir(tmp_path, monkeypatch) -> Path:
    """The system temp dir, moved into the test's folder (where the traceback file goes)."""
    where = tmp_path / "tmp"
    where.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(where))
    return where


@pytest.mark.parametrize(
    ("bug", "summary"),
    [
        (_winnow_bug, "ValueError: not a winnow outcome record"),
        (_library_bug, "TypeError: "),
    ],
    ids=["ValueError in winnow", "TypeError in numpy"],
)
def test_bug_in_the_thin_stage_is_an_internal_error(tmp_path, temp_dir, monkeypatch, bug, summary):
    import winnow.tasks.thin

    monkeypatch.setattr(winnow.tasks.thin, "thin", bug)
    np.save(tmp_path / "c.npy", np.random.default_rng(4).normal(size=(50, 2)))
    out = tmp_path / "sel.json"
    res = _invoke("thin", tmp_path / "c.npy", "--budget", "3", "--out", out, "--quiet")
    assert res.exit_code == 1, (res.exit_code, res.output)
    err = res.stderr
    assert err.startswith(f"winnow: internal error: {summary}"), err
    assert "winnow: error:" not in err  # not dressed up as bad input
    path = _traceback_file(err)
    assert path.parent == temp_dir and path.is_file()
    text = path.read_text()
    assert "Traceback (most recent call last)" in text and bug.__name__ in text
    assert not out.exists()


@pytest.mark.slow
def test_bug_deep_in_a_study_stage_is_an_internal_error(
    tmp_path, temp_dir, monkeypatch, prefect_harness
):
    import winnow.tasks.prefect_tasks

    monkeypatch.setattr(winnow.tasks.prefect_tasks, "thin_stage", _winnow_bug)
    cfg = make_study(tmp_path / "study")
    res = _invoke("run", cfg)
    assert res.exit_code == 1, (res.exit_code, res.output)
    err = res.stderr
    assert "winnow: internal error: ValueError: not a winnow outcome record" in err, err
    assert "winnow: error:" not in err
    text = _traceback_file(err).read_text()
    assert "outcome_from_dict" in text and "_winnow_bug" in text


def test_bad_input_still_exits_2(tmp_path):
    # one case per kind of refusal; tests/test_bad_input.py has them all
    np.save(tmp_path / "c.npy", np.random.default_rng(4).normal(size=(50, 2)))
    out = tmp_path / "sel.json"
    cases = [
        (["thin", tmp_path / "c.npy", "--budget", "0", "--out", out], "budget"),  # _validate_*
        (["thin", tmp_path / "c.npy", "--budget", "3", "--out", out, "--kernel", "x"], "kernel"),
        (["thin", tmp_path / "absent.npy", "--budget", "3", "--out", out], "absent.npy"),
        (["validate", tmp_path / "absent.yaml"], "absent.yaml"),  # ConfigError (InputError)
    ]
    for args, word in cases:
        res = _invoke(*args, "--quiet") if args[0] == "thin" else _invoke(*args)
        assert res.exit_code == 2, (args, res.output)
        assert res.stderr.startswith("winnow: error: ") and word in res.stderr, res.stderr
    (tmp_path / "c.csv").write_text("a,b\n1,2\n3,oops\n")
    res = _invoke("diagnose", tmp_path / "c.csv")  # chain file reading raises InputError
    assert res.exit_code == 2 and "c.csv" in res.stderr, res.output


def _raise_in(module: str, function: str, exc: BaseException) -> BaseException:
    """``exc`` as raised by a function called ``function`` of a module called ``module``."""
    namespace = {"__name__": module, "exc": exc}
    exec(f"def {function}():\n    raise exc\n", namespace)  # noqa: S102 - test fixture code
    try:
        namespace[function]()
    except BaseException as raised:  # noqa: BLE001
        return raised
    raise AssertionError("not raised")


def test_usage_errors_are_told_apart_by_type_and_raise_site():
    from pydantic import BaseModel, ValidationError

    class M(BaseModel):
        n: int

    try:
        M(n="x")
    except ValidationError as exc:
        assert is_usage_error(exc)
    assert is_usage_error(InputError("budget must be >= 1"))
    store_format_error = type("StoreFormatError", (ValueError,), {"__module__": "winnow.tasks.s"})
    assert is_usage_error(store_format_error("not a run store"))
    assert not is_usage_error(type("StoreFormatError", (ValueError,), {})("elsewhere"))
    assert is_usage_error(FileNotFoundError("chain.npy"))
    # a plain ValueError is bad input only when one of winnow's validators raised it
    assert is_usage_error(_raise_in("winnow.tasks.thin", "_validate_int", ValueError("v")))
    assert not is_usage_error(_raise_in("winnow.tasks.thin", "greedy", ValueError("v")))
    assert not is_usage_error(_raise_in("winnow.tasks.preflight", "preflight", ValueError("v")))
    assert not is_usage_error(_raise_in("winnow.tasks.thin", "_validate_int", KeyError("v")))
    assert not is_usage_error(_raise_in("numpy", "_validate_int", ValueError("v")))
    assert not is_usage_error(ValueError("never raised"))  # no traceback: no validator
    assert not is_usage_error(RuntimeError("x"))
