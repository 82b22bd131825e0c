"""``winnow diagnose`` (flows/_cmd_diagnose.py) and the trace/pair plots (tasks/sample/_trace_plots.py).

The numbers printed are those of tasks/sample/_diagnostics.py, which test_sample_diagnostics.py
checks against arviz; here the command is checked against the library call on the same file,
and on arviz's example posterior ``centered_eight`` (shipped inside the arviz package) against
``arviz.rhat(method="rank")`` and ``arviz.ess(method="bulk"/"tail")`` directly.
"""

from __future__ import annotations

import json
import re
import sys

import h5py
import numpy as np
import pytest
from typer.testing import CliRunner

from winnow.flows.cli import app
from winnow.tasks import sample as D
from winnow.tasks.sample import plot_trace_pairs, read_chain_file

runner = CliRunner()


@pytest.fixture(scope="module")
def draws():
    return np.random.default_rng(3).normal(size=(4, 400, 2))


def test_json_matches_library(tmp_path, draws):
    # default: a chain file is taken as post-warm-up, every draw kept (issue 13)
    p = tmp_path / "c.npy"
    np.save(p, draws)
    res = runner.invoke(app, ["diagnose", str(p), "--json"])
    assert res.exit_code == 0, res.output
    out = json.loads(res.stdout)
    ref = D.diagnose(draws, ["x0", "x1"], burn_in="none")
    assert out["chains"] == 4 and out["draws"] == 400 and out["burn_in"] == 0
    assert out["burn_in_rule"] == "no burn-in removed: all 400 draws of each chain kept"
    for name in ("x0", "x1"):
        r = ref.parameters[name]
        got = out["parameters"][name]
        for key in ("rhat", "ess_bulk", "ess_tail", "mcse_mean", "mean", "sd"):
            assert got[key] == pytest.approx(getattr(r, key), rel=1e-12)


def test_burn_in_half_drops_the_first_half(tmp_path, draws):
    p = tmp_path / "c.npy"
    np.save(p, draws)
    res = runner.invoke(app, ["diagnose", str(p), "--json", "--burn-in", "half"])
    assert res.exit_code == 0, res.output
    out = json.loads(res.stdout)
    ref = D.diagnose(draws, ["x0", "x1"], burn_in="half")
    assert out["draws"] == 200 and out["burn_in"] == 200
    assert out["burn_in_rule"] == "first half of each chain discarded (200 draws)"
    for name in ("x0", "x1"):
        for key in ("rhat", "ess_bulk", "ess_tail"):
            got = out["parameters"][name][key]
            assert got == pytest.approx(getattr(ref.parameters[name], key), rel=1e-12)
    table = runner.invoke(app, ["diagnose", str(p), "--burn-in", "half"])
    assert "burn-in: first half of each chain discarded (200 draws)" in table.stdout
    assert "draws of each chain kept" not in table.stdout


def _arviz():
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # arviz prints a FutureWarning about its refactor
        import arviz as az
    return az


@pytest.mark.parametrize("burn_in", [None, "half"])
def test_centered_eight_file_against_arviz(tmp_path, burn_in):
    # arviz's example posterior (PyMC, 4 chains x 500 post-warm-up draws) written as a chain
    # file: the default keeps all 500 draws, --burn-in half the last 250; each time the
    # printed R-hat and ESS are arviz's on the same draws (az.rhat(method="rank"),
    # az.ess(method="bulk"/"tail"), Vehtari et al. 2021), to relative 1e-9 (the same
    # formulas summed in another order; see test_sample_diagnostics.py).
    az = _arviz()
    post = az.load_arviz_data("centered_eight").posterior
    x = np.stack([post["mu"].values, post["tau"].values], axis=-1)  # (4, 500, 2)
    p = tmp_path / "eight.npy"
    np.save(p, x)
    args = ["diagnose", str(p), "--json"] + ([] if burn_in is None else ["--burn-in", burn_in])
    res = runner.invoke(app, args)
    assert res.exit_code == 0, res.output
    out = json.loads(res.stdout)
    kept = x if burn_in is None else x[:, 250:]
    assert out["draws"] == kept.shape[1] and out["burn_in"] == 500 - kept.shape[1]
    for j, name in enumerate(("x0", "x1")):
        got = out["parameters"][name]
        xj = kept[..., j]
        rel = 1e-9
        assert got["rhat"] == pytest.approx(float(np.asarray(az.rhat(xj, method="rank"))), rel=rel)
        for kind in ("bulk", "tail"):
            ref = float(np.asarray(az.ess(xj, method=kind)))
            assert got[f"ess_{kind}"] == pytest.approx(ref, rel=rel)
    # the table says which draws were used
    table = runner.invoke(app, [a for a in args if a != "--json"])
    assert table.exit_code == 0, table.output
    if burn_in is None:
        assert "all 500 draws of each chain kept (taken as post-warm-up)" in table.stdout
        assert "--burn-in half" in table.stdout
    else:
        assert "first half of each chain discarded (250 draws)" in table.stdout


def test_chains_option_and_burn_in(tmp_path, draws):
    p = tmp_path / "flat.npy"
    np.save(p, draws.reshape(-1, 2))  # 1600 rows, chain after chain
    res = runner.invoke(app, ["diagnose", str(p), "--chains", "4", "--burn-in", "50", "--json"])
    assert res.exit_code == 0, res.output
    out = json.loads(res.stdout)
    ref = D.diagnose(draws, burn_in=50)
    assert out["draws"] == 350 and out["burn_in"] == 50
    assert out["parameters"]["x1"]["rhat"] == pytest.approx(ref.parameters["x1"].rhat, rel=1e-12)


def test_table_and_hdf5(tmp_path, draws):
    p = tmp_path / "c.h5"
    with h5py.File(p, "w") as fh:
        ds = fh.create_dataset("mcmc/theta", data=draws)
        ds.attrs["names"] = ["logT", "logS"]
        ds.attrs["units"] = ["log10(m2/s)", "-"]
    res = runner.invoke(app, ["diagnose", str(p), "--dataset", "mcmc/theta"])
    assert res.exit_code == 0, res.output
    assert "logT" in res.stdout and "log10(m2/s)" in res.stdout and "R-hat" in res.stdout
    assert "all thresholds met" in res.stdout


def test_failing_chain_is_reported(tmp_path, draws):
    bad = draws.copy()
    bad[0, :, 0] += 3.0
    p = tmp_path / "bad.npy"
    np.save(p, bad)
    res = runner.invoke(app, ["diagnose", str(p)])
    assert res.exit_code == 0
    assert "x0: R-hat" in res.stdout and "is not below the threshold 1.01" in res.stdout


@pytest.mark.parametrize(
    ("args", "pattern"),
    [
        (["missing.npy"], "does not exist"),
        (["c.npy", "--burn-in", "lots"], "--burn-in must be"),
        (["c.npy", "--chains", "3"], "cannot split it into 3"),
        (["c.npy", "--burn-in", "400"], "between 0 and"),
        (["c.h5"], r"give the HDF5 dataset path \(datasets in the file: d \(4, 400, 2\)\)"),
        (["c.csv"], "line 3, column 2"),
    ],
)
def test_bad_input_exits_2(tmp_path, draws, args, pattern):
    np.save(tmp_path / "c.npy", draws)
    with h5py.File(tmp_path / "c.h5", "w") as fh:
        fh.create_dataset("d", data=draws)
    (tmp_path / "c.csv").write_text("a,b\n1,2\n3,oops\n")
    args = [str(tmp_path / args[0]), *args[1:]]
    res = runner.invoke(app, ["diagnose", *args])
    assert res.exit_code == 2
    assert re.search(pattern, res.stderr), res.stderr


def test_plots_written(tmp_path, draws):
    np.save(tmp_path / "c.npy", draws)
    chain = read_chain_file(tmp_path / "c.npy", names=["a", "b"], units=["m", ""])
    files = plot_trace_pairs(
        chain, tmp_path / "out" / "demo", chosen=[3, 700, 1500], weights=[0.2, 0.5, 0.3]
    )
    assert [f.name for f in files] == ["demo_trace.png", "demo_pairs.png"]
    for f in files:
        assert f.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with pytest.raises(ValueError, match="one weight per chosen point"):
        plot_trace_pairs(chain, tmp_path / "x", chosen=[1, 2], weights=[1.0])


def test_plots_without_matplotlib(tmp_path, draws, monkeypatch):
    np.save(tmp_path / "c.npy", draws)
    chain = read_chain_file(tmp_path / "c.npy")
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import now raises ImportError
    assert plot_trace_pairs(chain, tmp_path / "p") == []
    assert not list(tmp_path.glob("p_*"))
