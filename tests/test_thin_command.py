"""The ``winnow thin`` command: output formats, refusal to overwrite, exit 2 on bad input.

The written values are checked against the library call with the same settings (the
library itself is checked against independent oracles in the other test_thin_* modules) and
against the input file (points are the input rows at the written indices).
"""

from __future__ import annotations

import csv
import json

import h5py
import numpy as np
import pytest
from typer.testing import CliRunner

from winnow.flows.cli import app
from winnow.tasks.thin import thin

runner = CliRunner()


@pytest.fixture(scope="module")
def rows() -> np.ndarray:
    rng = np.random.default_rng(21)
    x = rng.standard_normal((600, 3)) * np.array([1e-6, 1.0, 1e9])
    x[7, 0] = np.nan
    return x


def _run(*args: str):
    return runner.invoke(app, ["thin", *args, "--quiet"])


def test_json_output_matches_library(tmp_path, rows):
    src = tmp_path / "chain.npy"
    np.save(src, rows)
    out = tmp_path / "sel.json"
    res = _run(str(src), "--budget", "8", "--out", str(out), "--features", "64", "--seed", "3")
    assert res.exit_code == 0, res.output
    doc = json.loads(out.read_text())
    for key in ("indices", "weights", "points", "mmd_features", "mmd_exact", "features",
                "method", "kernel", "seed"):  # fmt: skip
        assert key in doc
    lib = thin(rows, 8, n_features=64, rng=3)
    assert doc["indices"] == lib.indices.tolist()
    np.testing.assert_allclose(doc["weights"], lib.weights, rtol=0, atol=0)
    np.testing.assert_array_equal(np.array(doc["points"]), rows[doc["indices"]])
    assert doc["features"] == 64 and doc["method"] == "greedy" and doc["seed"] == 3
    assert doc["mmd_exact"] == pytest.approx(lib.mmd_exact)
    assert doc["n_nonfinite_dropped"] == 1 and 7 not in doc["indices"]


def test_csv_output_from_csv_chain(tmp_path, rows):
    src = tmp_path / "chain.csv"
    with src.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["k", "head", "q"])
        w.writerows([[repr(float(v)) for v in r] for r in rows])
    out = tmp_path / "sel.csv"
    res = _run(str(src), "--budget", "5", "--out", str(out), "--features", "32",
               "--method", "stride", "--weights", "uniform")  # fmt: skip
    assert res.exit_code == 0, res.output
    with out.open() as fh:
        table = list(csv.reader(fh))
    assert table[0] == ["index", "weight", "k", "head", "q"]
    body = np.array(table[1:], dtype=float)
    assert body.shape == (5, 5)
    np.testing.assert_allclose(body[:, 1], 0.2)
    np.testing.assert_array_equal(body[:, 2:], rows[body[:, 0].astype(int)])


def test_hdf5_chain_with_dataset(tmp_path, rows):
    src = tmp_path / "chain.h5"
    with h5py.File(src, "w") as fh:
        fh.create_dataset("posterior/draws", data=rows)
    out = tmp_path / "sel.json"
    res = _run(str(src), "--budget", "4", "--out", str(out), "--features", "32",
               "--dataset", "posterior/draws")  # fmt: skip
    assert res.exit_code == 0, res.output
    assert len(json.loads(out.read_text())["indices"]) == 4


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--budget", "0"], "budget"),
        (["--budget", "100000"], "budget"),
        (["--budget", "3", "--kernel", "cosine"], "kernel"),
        (["--budget", "3", "--method", "annealing"], "method"),
        (["--budget", "3", "--features", "lots"], "--features"),
        (["--budget", "3", "--bandwidth", "-2"], "bandwidth"),
    ],
)
def test_bad_input_exits_2_without_writing(tmp_path, rows, extra, message):
    src = tmp_path / "chain.npy"
    np.save(src, rows)
    out = tmp_path / "sel.json"
    res = _run(str(src), *extra, "--out", str(out))
    assert res.exit_code == 2
    assert message in res.output
    assert not out.exists()


def test_refuses_to_overwrite_and_bad_paths(tmp_path, rows):
    src = tmp_path / "chain.npy"
    np.save(src, rows)
    out = tmp_path / "sel.json"
    out.write_text("keep me")
    res = _run(str(src), "--budget", "3", "--out", str(out), "--features", "16")
    assert res.exit_code == 2 and "--force" in res.output
    assert out.read_text() == "keep me"
    res = _run(str(src), "--budget", "3", "--out", str(out), "--features", "16", "--force")
    assert res.exit_code == 0 and json.loads(out.read_text())["indices"]
    assert _run(str(tmp_path / "nope.npy"), "--budget", "3", "--out",
                str(tmp_path / "a.json")).exit_code == 2  # fmt: skip
    assert _run(str(src), "--budget", "3", "--out", str(tmp_path / "a.txt")).exit_code == 2
    ragged = tmp_path / "ragged.csv"
    ragged.write_text("a,b\n1,2\n3\n")
    res = _run(str(ragged), "--budget", "1", "--out", str(tmp_path / "r.json"))
    assert res.exit_code == 2 and not (tmp_path / "r.json").exists()
    h5 = tmp_path / "c.h5"
    with h5py.File(h5, "w") as fh:
        fh.create_dataset("x", data=rows)
    res = _run(str(h5), "--budget", "3", "--out", str(tmp_path / "h.json"))
    assert res.exit_code == 2 and "--dataset" in res.output


def test_command_module_imports_no_heavy_modules():
    import subprocess
    import sys

    code = (
        "import sys, winnow.flows._cmd_thin; "
        "bad = [m for m in ('prefect', 'scipy.optimize', 'numpy', 'winnow.tasks.thin') "
        "if m in sys.modules]; print(bad)"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
