"""QoI readers: every reader kind, vector QoIs on an axis, and every way a run output can be bad.

The values are written by the tests themselves, so each expected number is known exactly.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from winnow.tasks.collect import read_qoi, read_qois, validate_qoi_spec
from winnow.tasks.records import RunOutcome


def spec(reader: dict, **extra) -> dict:
    return {"name": "drawdown_spring", "units": "m", "reader": reader, **extra}


def read(run_dir: Path, reader: dict, **extra):
    return read_qoi(run_dir, spec(reader, **extra), run_id="p001")


# --------------------------------------------------------------------------------------------
# JSON
# --------------------------------------------------------------------------------------------
def test_json_nested_key_and_list_index(tmp_path):
    (tmp_path / "result.json").write_text(
        json.dumps({"qoi": {"drawdown_spring": 1.25, "probes": [{"h": 3.5}, {"h": 4.5}]}})
    )
    v = read(tmp_path, {"json": {"file": "result.json", "key": "qoi.drawdown_spring"}})
    assert v.status == "ok" and v.value.shape == () and float(v.value) == 1.25
    assert v.run_id == "p001" and v.name == "drawdown_spring"
    v = read(tmp_path, {"json": {"file": "result.json", "key": "qoi.probes.1.h"}})
    assert float(v.value) == 4.5
    v = read(tmp_path, {"json": {"file": "result.json", "key": ["qoi", "drawdown_spring"]}})
    assert float(v.value) == 1.25


@pytest.mark.parametrize(
    ("content", "key", "status", "reason_part"),
    [
        (None, "qoi.x", "missing", "not found"),
        ('{"qoi": {"y": 1}}', "qoi.x", "missing", "'qoi.x'"),
        ('{"qoi": {"x": 1', "qoi.x", "unparsable", "not valid JSON"),
        ('{"qoi": {"x": "high"}}', "qoi.x", "unparsable", "not a number"),
        ('{"qoi": {"x": null}}', "qoi.x", "unparsable", "expected a number"),
        ('{"qoi": {"x": true}}', "qoi.x", "unparsable", "expected a number"),
        ('{"qoi": {"x": NaN}}', "qoi.x", "nonfinite", "non-finite"),
        ('{"qoi": {"x": Infinity}}', "qoi.x", "nonfinite", "non-finite"),
    ],
)
def test_json_bad_output_is_marked_not_raised(tmp_path, content, key, status, reason_part):
    if content is not None:
        (tmp_path / "result.json").write_text(content)
    v = read(tmp_path, {"json": {"file": "result.json", "key": key}})
    assert v.status == status
    assert reason_part in v.reason
    assert np.all(np.isnan(v.value))  # never read as zero


def test_failed_run_is_not_read(tmp_path):
    (tmp_path / "result.json").write_text('{"x": 2.0}')
    s = spec({"json": {"file": "result.json", "key": "x"}})
    v = read_qoi(tmp_path, s, run_id="p7", run_state="timed_out")
    assert v.status == "run_failed" and "timed_out" in v.reason and np.isnan(v.value)


# --------------------------------------------------------------------------------------------
# CSV
# --------------------------------------------------------------------------------------------
CSV_TEXT = "t,h,q\n0,10.0,1\n3600,9.5,1\n86400,8.25,1\n172800,7.0,1\n"


@pytest.mark.parametrize(
    ("row", "expected"),
    [("last", 7.0), ("first", 10.0), (1, 9.5), (-2, 8.25), ({"where": {"t": 86400}}, 8.25)],
)
def test_csv_row_rules(tmp_path, row, expected):
    (tmp_path / "out.csv").write_text(CSV_TEXT)
    v = read(tmp_path, {"csv": {"file": "out.csv", "column": "h", "row": row}})
    assert v.status == "ok" and float(v.value) == expected


def test_csv_column_by_index_and_delimiter(tmp_path):
    (tmp_path / "out.txt").write_text(CSV_TEXT.replace(",", ";"))
    v = read(tmp_path, {"csv": {"file": "out.txt", "column": 1, "row": "first", "delimiter": ";"}})
    assert float(v.value) == 10.0


@pytest.mark.parametrize(
    ("text", "opts", "status", "reason_part"),
    [
        (CSV_TEXT, {"column": "head"}, "missing", "column 'head'"),
        (CSV_TEXT, {"column": "h", "row": 9}, "missing", "4 data rows"),
        (CSV_TEXT, {"column": "h", "row": {"where": {"t": 5}}}, "missing", "no row"),
        (
            CSV_TEXT + "86400,1,1\n",
            {"column": "h", "row": {"where": {"t": 86400}}},
            "unparsable",
            "2 rows",
        ),
        ("t,h\n0,abc\n", {"column": "h"}, "unparsable", "'abc' is not a number"),
        ("t,h\n0,nan\n", {"column": "h"}, "nonfinite", "non-finite"),
        ("t,h\n", {"column": "h"}, "missing", "no data rows"),
        ("", {"column": "h"}, "missing", "empty"),
        ("t,h\n0\n", {"column": "h"}, "unparsable", "short"),
    ],
)
def test_csv_bad_output(tmp_path, text, opts, status, reason_part):
    (tmp_path / "out.csv").write_text(text)
    v = read(tmp_path, {"csv": {"file": "out.csv", **opts}})
    assert v.status == status, v.reason
    assert reason_part in v.reason


def test_csv_vector_qoi_with_axis_read_from_output(tmp_path):
    (tmp_path / "out.csv").write_text(CSV_TEXT)
    axis = {
        "name": "t",
        "units": "s",
        "reader": {"csv": {"file": "out.csv", "column": "t", "row": "all"}},
    }
    v = read(tmp_path, {"csv": {"file": "out.csv", "column": "h", "row": "all"}}, axis=axis)
    assert v.status == "ok"
    np.testing.assert_array_equal(v.value, [10.0, 9.5, 8.25, 7.0])


def test_vector_length_must_match_the_axis(tmp_path):
    (tmp_path / "out.csv").write_text(CSV_TEXT)
    axis = {"name": "t", "units": "s", "values": [0, 3600, 86400]}
    v = read(tmp_path, {"csv": {"file": "out.csv", "column": "h", "row": "all"}}, axis=axis)
    assert v.status == "unparsable" and "4 values" in v.reason and "has 3" in v.reason
    assert v.value.shape == (3,) and np.all(np.isnan(v.value))


def test_scalar_qoi_given_many_values_is_unparsable(tmp_path):
    (tmp_path / "out.csv").write_text(CSV_TEXT)
    v = read(tmp_path, {"csv": {"file": "out.csv", "column": "h", "row": "all"}})
    assert v.status == "unparsable" and "axis" in v.reason


# --------------------------------------------------------------------------------------------
# HDF5
# --------------------------------------------------------------------------------------------
def test_hdf5_scalar_vector_and_index(tmp_path):
    import h5py

    with h5py.File(tmp_path / "out.h5", "w") as f:
        f["probe/h"] = np.array([1.5, 2.5, 3.5])
        f["scalar"] = 4.25
        f["bad"] = np.array([1.0, np.inf])
    v = read(tmp_path, {"hdf5": {"file": "out.h5", "dataset": "/scalar"}})
    assert v.status == "ok" and float(v.value) == 4.25
    v = read(tmp_path, {"hdf5": {"file": "out.h5", "dataset": "/probe/h", "index": -1}})
    assert float(v.value) == 3.5
    v = read(
        tmp_path,
        {"hdf5": {"file": "out.h5", "dataset": "/probe/h"}},
        axis={"name": "x", "units": "m", "values": [0, 10, 20]},
    )
    np.testing.assert_array_equal(v.value, [1.5, 2.5, 3.5])
    v = read(tmp_path, {"hdf5": {"file": "out.h5", "dataset": "/probe/z"}})
    assert v.status == "missing" and "/probe/z" in v.reason
    v = read(
        tmp_path,
        {"hdf5": {"file": "out.h5", "dataset": "/bad"}},
        axis={"name": "x", "values": [0, 1]},
    )
    assert v.status == "nonfinite" and "1 non-finite" in v.reason
    (tmp_path / "junk.h5").write_text("not hdf5")
    v = read(tmp_path, {"hdf5": {"file": "junk.h5", "dataset": "/x"}})
    assert v.status == "unparsable"


# --------------------------------------------------------------------------------------------
# regular expression on a log
# --------------------------------------------------------------------------------------------
LOG = "step 1 drawdown = 0.5\nstep 2 drawdown = 0.75\nstep 3 drawdown = 1.5e-1\ndone\n"


@pytest.mark.parametrize(("occurrence", "expected"), [("last", 0.15), ("first", 0.5), (1, 0.75)])
def test_regex_occurrence(tmp_path, occurrence, expected):
    (tmp_path / "solver.log").write_text(LOG)
    v = read(
        tmp_path,
        {
            "regex": {
                "file": "solver.log",
                "pattern": r"drawdown = ([-+0-9.eE]+)",
                "group": 1,
                "occurrence": occurrence,
            }
        },
    )
    assert v.status == "ok" and float(v.value) == pytest.approx(expected, rel=0, abs=0)


def test_regex_named_group_all_and_not_found(tmp_path):
    (tmp_path / "solver.log").write_text(LOG)
    v = read(
        tmp_path,
        {
            "regex": {
                "file": "solver.log",
                "pattern": r"= (?P<v>\S+)",
                "group": "v",
                "occurrence": "all",
            }
        },
        axis={"name": "step", "units": "", "values": [1, 2, 3]},
    )
    np.testing.assert_array_equal(v.value, [0.5, 0.75, 0.15])
    v = read(tmp_path, {"regex": {"file": "solver.log", "pattern": r"head = (\S+)"}})
    assert v.status == "missing" and "not found" in v.reason
    (tmp_path / "solver.log").write_text("drawdown = ***\n")
    v = read(tmp_path, {"regex": {"file": "solver.log", "pattern": r"drawdown = (\S+)"}})
    assert v.status == "unparsable"


# --------------------------------------------------------------------------------------------
# user function
# --------------------------------------------------------------------------------------------
@pytest.fixture
def user_module(tmp_path, monkeypatch):
    mod = tmp_path / "pkg_readers_demo.py"
    mod.write_text(
        "import json\n"
        "def good(run_dir):\n"
        "    return json.loads((run_dir / 'r.json').read_text())\n"
        "def broken(run_dir):\n"
        "    raise RuntimeError('solver wrote garbage')\n"
        "def not_a_dict(run_dir):\n"
        "    return 3.0\n"
    )
    monkeypatch.syspath_prepend(str(tmp_path))
    return "pkg_readers_demo"


def test_function_reader(tmp_path, user_module):
    run = tmp_path / "run"
    run.mkdir()
    (run / "r.json").write_text('{"drawdown_spring": 2.5, "other": 1}')
    v = read(run, {"function": f"{user_module}:good"})
    assert v.status == "ok" and float(v.value) == 2.5
    v = read(run, {"function": f"{user_module}:broken"})
    assert v.status == "unparsable" and "solver wrote garbage" in v.reason
    v = read(run, {"function": f"{user_module}:not_a_dict"})
    assert v.status == "unparsable" and "dict" in v.reason
    (run / "r.json").write_text('{"other": 1}')
    v = read(run, {"function": f"{user_module}:good"})
    assert v.status == "missing" and "drawdown_spring" in v.reason


# --------------------------------------------------------------------------------------------
# configuration errors raise before anything is read
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("reader", "exc", "message"),
    [
        ({"xml": {"file": "a"}}, ValueError, "valid readers"),
        ({"json": {"file": "a", "key": "k"}, "csv": {"file": "a"}}, ValueError, "exactly one"),
        ({"json": {"file": "a"}}, ValueError, "'key'"),
        ({"json": {"file": "a", "key": "k", "keys": 1}}, ValueError, "unknown option"),
        ({"csv": {"file": "a", "column": "h", "row": "middle"}}, ValueError, "row"),
        ({"csv": {"file": "a", "column": 1.5}}, TypeError, "column"),
        ({"regex": {"file": "a", "pattern": "("}}, ValueError, "regular expression"),
        ({"regex": {"file": "a", "pattern": "x(y)", "group": 2}}, ValueError, "1 group"),
        ({"function": "no_such_module_xyz:f"}, ValueError, "cannot import"),
        ({"function": "json:no_such_function"}, ValueError, "no function"),
        ({"function": "json.loads"}, ValueError, "module:function"),
    ],
)
def test_bad_spec_raises(tmp_path, reader, exc, message):
    with pytest.raises(exc, match=message):
        read_qoi(tmp_path, spec(reader), run_id="p0")


def test_bad_axis_spec_raises():
    with pytest.raises(ValueError, match="exactly one of 'values' or 'reader'"):
        validate_qoi_spec(spec({"json": {"file": "a", "key": "k"}}, axis={"name": "t"}))
    with pytest.raises(ValueError, match="finite"):
        validate_qoi_spec(
            spec(
                {"json": {"file": "a", "key": "k"}}, axis={"name": "t", "values": [0, float("nan")]}
            )
        )


def test_read_qois_over_outcomes(tmp_path):
    outcomes = []
    for k, state in enumerate(["succeeded", "failed", "succeeded"]):
        d = tmp_path / f"p{k}"
        d.mkdir()
        if k != 2:
            (d / "result.json").write_text(json.dumps({"s": 0.5 * (k + 1)}))
        outcomes.append(RunOutcome(run_id=f"p{k}", key="k", state=state, attempts=(), run_dir=d))
    got = read_qois(
        outcomes,
        [{"name": "s", "units": "m", "reader": {"json": {"file": "result.json", "key": "s"}}}],
    )
    assert [v.status for v in got["s"]] == ["ok", "run_failed", "missing"]
    assert float(got["s"][0].value) == 0.5
    with pytest.raises(ValueError, match="distinct"):
        read_qois(outcomes, [spec({"json": {"file": "a", "key": "k"}})] * 2)
