"""Collect report: self-contained HTML, markdown and tables with the same content, CSV export,
rendering without matplotlib, and the ``winnow report`` command.

The data are invented (demo-like: drawdown at a spring in m); what is checked is that the
report shows what the records hold, not the numbers themselves.
"""

from __future__ import annotations

import base64
import csv
import re
import sys
from pathlib import Path

import numpy as np
import pytest

from winnow.tasks.collect import (
    ReportData,
    build_report,
    estimate_qoi,
    export_csv,
    report_markdown,
    report_tables,
)
from winnow.tasks.records import (
    Attempt,
    Diagnostics,
    ParameterDiagnostics,
    QoIValue,
    RunOutcome,
    Selection,
)

M = 8


def make_data(study: str = "spring-demo") -> ReportData:
    rng = np.random.default_rng(0)
    chain = rng.normal([-2.3, -4.0], [0.2, 0.3], size=(600, 2))
    idx = np.arange(0, 600, 75)
    w = rng.dirichlet(np.ones(M))
    sel = Selection(
        indices=idx,
        weights=w,
        points=chain[idx],
        method="greedy",
        weights_rule="simplex",
        kernel="gaussian",
        bandwidth=1.0,
        feature_map="rff",
        n_features=256,
        seed=0,
        mmd_features=0.03,
        mmd_exact=0.035,
        mmd_exact_rows=600,
    )
    cheap_chain = 3.0 + chain[:, 0] - 0.5 * chain[:, 1]
    costly = cheap_chain[idx] + 0.2
    run_ids = tuple(f"p{k:03d}" for k in range(M))
    outcomes, scalar, vector = [], [], []
    axis_vals = np.array([1.0, 10.0, 30.0])
    for k, rid in enumerate(run_ids):
        state = "failed" if k == 3 else "succeeded"
        att = Attempt(
            number=1,
            argv=("solver",),
            started=0.0,
            ended=10.0,
            exit_status=0,
            timed_out=False,
            stdout_tail="",
            stderr_tail="",
        )
        outcomes.append(
            RunOutcome(
                run_id=rid,
                key="0" * 64,
                state=state,
                attempts=(att,),
                run_dir=Path("/runs") / rid,
                message="exit 1" if k == 3 else "",
            )
        )
        if state == "succeeded":
            scalar.append(QoIValue(rid, "drawdown_spring", np.asarray(costly[k]), "ok"))
            vector.append(QoIValue(rid, "drawdown_history", costly[k] * axis_vals / 30.0, "ok"))
        else:
            scalar.append(
                QoIValue(
                    rid,
                    "drawdown_spring",
                    np.asarray(np.nan),
                    "run_failed",
                    "run ended as 'failed'",
                )
            )
            vector.append(
                QoIValue(
                    rid,
                    "drawdown_history",
                    np.full(3, np.nan),
                    "run_failed",
                    "run ended as 'failed'",
                )
            )
    est_s = estimate_qoi(
        scalar,
        w,
        name="drawdown_spring",
        units="m",
        thresholds=(4.0,),
        cheap_on_points=cheap_chain[idx],
        cheap_on_chain=cheap_chain,
        resolve_weights=lambda pos: (w[pos], 0.035, 0.05),
        rng=1,
        bootstrap=200,
    )
    est_v = estimate_qoi(vector, w, name="drawdown_history", units="m", rng=2, bootstrap=200)
    diag = Diagnostics(
        parameters={
            "log10_T": ParameterDiagnostics(1.002, 900, 800, 0.01, 0.02, 0.02, -2.3, 0.2),
            "log10_S": ParameterDiagnostics(1.03, 90, 80, 0.03, 0.05, 0.05, -4.0, 0.3),
        },
        n_chains=2,
        n_draws=300,
        burn_in=100,
        burn_in_rule="fixed",
        acceptance=np.array([0.3, 0.35]),
        thresholds={"rhat": 1.01},
        passed=False,
        messages=("log10_S: R-hat 1.03 above 1.01",),
    )
    return ReportData(
        study=study,
        revision="r3",
        config_hash="ab" * 32,
        config_text="study:\n  name: x <y>\n",
        chain_names=("log10_T", "log10_S"),
        chain_units=("log10 m^2/s", "log10 -"),
        chain_diagnostics=diag,
        chain_samples=chain,
        chain_rows=600,
        chain_source="sampled:test",
        selection=sel,
        point_run_ids=run_ids,
        outcomes=outcomes,
        qoi_values=scalar + vector,
        estimates=[est_s, est_v],
        qoi_axes={"drawdown_history": {"name": "time", "units": "d", "values": axis_vals}},
        reuse_counts={"ran": 5, "reused": 3},
        provenance={"winnow": "0.1.0"},
    )


@pytest.fixture(scope="module")
def data() -> ReportData:
    return make_data()


@pytest.fixture(scope="module")
def html_text(data, tmp_path_factory) -> str:
    path = build_report(data, tmp_path_factory.mktemp("rep"))
    assert path.name == "report.html" and path.is_file()
    return path.read_text(encoding="utf-8")


def test_html_is_self_contained(html_text):
    assert not re.search(r"(?:src|href)\s*=\s*[\"'](?:https?:)?//", html_text)
    assert "http://" not in html_text and "https://" not in html_text
    assert "<style>" in html_text and "<link" not in html_text and "<script" not in html_text
    images = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', html_text)
    assert len(images) == 3  # pair plot, scalar QoI, vector QoI
    for b64 in images:
        assert base64.b64decode(b64)[:8] == b"\x89PNG\r\n\x1a\n"


def test_caution_is_near_the_top(html_text):
    caution = html_text.index('class="caution"')
    assert caution < html_text.index("<h2")
    assert "licensed professional" in html_text[caution : caution + 800]
    assert "water supply" in html_text[caution : caution + 800]


def test_html_shows_the_records(data, html_text):
    est = data.estimates[0]
    for text in (
        "spring-demo",
        "r3",
        "ab" * 32,
        "log10_S: R-hat 1.03 above 1.01",
        "SOME CONVERGENCE CHECKS FAILED",
        "mean (m)",
        "5% quantile (m)",
        "P(&gt; 4 m)",
        "Thinning gap",
        "Bootstrap standard error",
        "Monte Carlo error of the chain",
        "Standard error of the multi-fidelity estimate",
        "run_failed",
        "p003",
        "log10_T (log10 m^2/s)",
        "time (d)",
        "grew from 0.035 to 0.05",
    ):
        assert text in html_text, text
    assert f"{float(est.mean):.4g}" in html_text
    assert f"{float(est.control_variate['mean']):.4g}" in html_text
    assert "x &lt;y&gt;" in html_text  # config text escaped


def test_html_escapes_user_text(tmp_path):
    d = make_data(study="<script>alert(1)</script>")
    text = build_report(d, tmp_path).read_text()
    assert "<script>" not in text and "&lt;script&gt;" in text


def test_tables_match_the_estimates(data):
    t = report_tables(data)
    assert set(t) == {
        "study",
        "diagnostics",
        "points",
        "outcomes",
        "reuse",
        "estimates",
        "exceedance",
        "uncertainty",
        "multifidelity",
        "weights",
        "left_out",
        "provenance",
    }
    est = data.estimates[0]
    row = next(r for r in t["estimates"] if r["quantity"] == "drawdown_spring")
    assert row["units"] == "m" and row["axis"] == "" and row["axis value"] is None
    assert row["mean"] == float(est.mean)
    assert row["quantile 95%"] == float(est.quantiles[0.95])
    assert row["runs used"] == 7 and row["runs left out"] == 1
    for key in ("bootstrap_se", "thinning_gap", "control_variate_se", "chain_mcse"):
        assert row[key] == float(est.uncertainty[key])
    assert row["multi-fidelity estimate"] == float(est.control_variate["mean"])
    # every row has the same columns, whatever the quantity
    assert len({tuple(r) for r in t["estimates"]}) == 1
    vec_rows = [r for r in t["estimates"] if r["quantity"] == "drawdown_history"]
    assert [r["axis value"] for r in vec_rows] == [1.0, 10.0, 30.0]
    assert {r["axis units"] for r in vec_rows} == {"d"}
    np.testing.assert_allclose([r["mean"] for r in vec_rows], data.estimates[1].mean)
    assert all(r["thinning_gap"] is None for r in vec_rows)  # no cheap model for this one
    (exc,) = t["exceedance"]
    assert exc == {
        "quantity": "drawdown_spring",
        "threshold": 4.0,
        "units": "m",
        "axis value": None,
        "probability of exceeding": float(est.exceedance[4.0]),
    }
    sources = {r["key"] for r in t["uncertainty"] if r["quantity"] == "drawdown_spring"}
    assert sources == {"thinning_gap", "control_variate_se", "bootstrap_se", "chain_mcse"}
    mf = t["multifidelity"]
    assert [r["coefficient"] for r in mf] == [1.0, float(est.control_variate["optimal"]["alpha"])]
    assert len(t["points"]) == M
    assert sum(r["weight"] for r in t["points"]) == pytest.approx(1.0)
    assert t["points"][3]["run state"] == "failed"
    assert {r["run id"] for r in t["left_out"]} == {"p003"}
    assert t["weights"][0]["MMD growth"] == pytest.approx(0.015)


def test_markdown_has_the_same_content(data):
    md = report_markdown(data)
    assert md.startswith("# Collect report: spring-demo")
    assert md.index("Caution") < md.index("## Study")
    t = report_tables(data)
    for section in (
        "## Chosen points",
        "## Runs",
        "## Quantity: drawdown_spring (m)",
        "## Quantity: drawdown_history (m)",
        "Uncertainty of the estimate",
    ):
        assert section in md
    for r in t["uncertainty"]:
        assert r["source"] in md
    assert "| point | run id | chain row | weight |" in md
    assert "| mean (m) | sd (m) | 5% quantile (m) |" in md
    assert "| time (d) | mean (m) |" in md


def test_export_csv(data, tmp_path):
    paths = export_csv(data, tmp_path)
    assert [p.name for p in paths] == [
        "points.csv",
        "qoi_values.csv",
        "estimates.csv",
        "exceedance.csv",
        "uncertainty.csv",
    ]
    with paths[0].open() as fh:
        points = list(csv.DictReader(fh))
    assert len(points) == M
    np.testing.assert_allclose([float(p["weight"]) for p in points], data.selection.weights)
    with paths[1].open() as fh:
        values = list(csv.DictReader(fh))
    assert len(values) == M + 3 * M  # scalar rows + one per axis value
    failed = [v for v in values if v["run id"] == "p003"]
    assert {v["status"] for v in failed} == {"run_failed"} and all(v["value"] == "" for v in failed)


def test_report_renders_without_matplotlib(data, tmp_path, monkeypatch):
    for name in (
        "matplotlib",
        "matplotlib.figure",
        "matplotlib.backends",
        "matplotlib.backends.backend_agg",
    ):
        monkeypatch.setitem(sys.modules, name, None)  # import now raises ImportError
    text = build_report(data, tmp_path).read_text()
    assert "<img" not in text
    assert "matplotlib is not installed" in text
    assert "Thinning gap" in text and 'class="caution"' in text


# --------------------------------------------------------------------------------------------
# the command
# --------------------------------------------------------------------------------------------
@pytest.fixture
def cli_app():
    from typer.testing import CliRunner

    from winnow.flows.cli import app

    return CliRunner(), app


def test_report_command_bad_store_writes_nothing(cli_app, tmp_path):
    runner, app = cli_app
    out = tmp_path / "out"
    res = runner.invoke(app, ["report", str(tmp_path / "none.h5"), "--out", str(out)])
    assert res.exit_code == 2 and "not found" in res.output
    res = runner.invoke(app, ["report", str(tmp_path), "--out", str(out)])
    assert res.exit_code == 2 and "folder" in res.output
    assert not out.exists()


def test_report_command_writes_report(cli_app, tmp_path, monkeypatch):
    # The store loader belongs to the run-store module; a stand-in returning the sample data
    # exercises the command alone.
    import winnow.tasks.store as store_module

    runner, app = cli_app
    store = tmp_path / "study.h5"
    store.write_bytes(b"")
    seen = {}

    def fake_loader(path, revision=None):
        seen["args"] = (Path(path), revision)
        return make_data()

    monkeypatch.setattr(store_module, "load_report_data", fake_loader, raising=False)
    res = runner.invoke(app, ["report", str(store), "--revision", "r3", "--csv"])
    assert res.exit_code == 0, res.output
    assert seen["args"] == (store, "r3")
    assert (tmp_path / "study-report" / "report.html").is_file()
    assert (tmp_path / "study-report" / "points.csv").is_file()
    assert "Caution" in res.output


def test_tables_are_strict_json(data):
    # Prefect table artifacts are JSON: no NaN, no numpy scalars.
    import json

    json.dumps(report_tables(data), allow_nan=False)


def test_quantity_without_usable_run_still_renders(tmp_path):
    d = make_data()
    bad = [
        QoIValue(f"p{k:03d}", "head", np.asarray(np.nan), "missing", "no file") for k in range(M)
    ]
    d.qoi_values = d.qoi_values + bad
    d.estimates = d.estimates + [estimate_qoi(bad, d.selection.weights, name="head", units="m")]
    text = build_report(d, tmp_path).read_text()
    assert "head: no run gave a usable value (8 left out)." in text
    assert report_tables(d)["estimates"][-1]["mean"] is None


def test_long_vector_is_thinned_in_html_but_complete_in_tables(tmp_path):
    d = make_data()
    k = 40
    t_axis = np.arange(k, dtype=float)
    y = np.outer(np.linspace(1.0, 2.0, M), 1.0 + 0.01 * t_axis)
    est = estimate_qoi(y, d.selection.weights, name="h_long", units="m", bootstrap=0)
    d.estimates = d.estimates + [est]
    d.qoi_axes = {**d.qoi_axes, "h_long": {"name": "t", "units": "s", "values": t_axis}}
    text = build_report(d, tmp_path).read_text()
    assert "15 of 40 axis values shown" in text
    assert len([r for r in report_tables(d)["estimates"] if r["quantity"] == "h_long"]) == k


def test_report_command_on_a_real_store(cli_app, tmp_path):
    # End to end: records written through the run store, read back by its loader, reported.
    from winnow.tasks.records import Chain, RunSpec
    from winnow.tasks.store import RunStore

    runner, app = cli_app
    d = make_data()
    n = d.chain_samples.shape[0]
    chain = Chain(
        samples=d.chain_samples,
        names=d.chain_names,
        units=d.chain_units,
        chain_index=np.repeat([0, 1], n // 2),
        draw_index=np.tile(np.arange(n // 2), 2),
        source="sampled:test",
        diagnostics=d.chain_diagnostics,
    )
    specs = [
        RunSpec(
            run_id=o.run_id,
            point_index=int(i),
            params={},
            weight=float(w),
            run_dir=o.run_dir,
            argv=("solver",),
            deck_hashes={},
            key=o.key,
        )
        for o, i, w in zip(d.outcomes, d.selection.indices, d.selection.weights, strict=True)
    ]
    store = tmp_path / "study.h5"
    RunStore.create(store, "spring-demo")
    with RunStore.open_for_write(store) as wr:
        rev = wr.new_revision("study:\n  name: spring-demo\n")
        wr.write_chain(rev, chain)
        wr.write_selection(rev, d.selection)
        wr.write_runs(rev, specs, d.outcomes)
        wr.write_results(rev, d.qoi_values, d.estimates)
    out = tmp_path / "rep"
    res = runner.invoke(app, ["report", str(store), "--out", str(out)])
    assert res.exit_code == 0, res.output
    text = (out / "report.html").read_text()
    assert f"{float(d.estimates[0].mean):.4g}" in text and "p003" in text
    res = runner.invoke(
        app, ["report", str(store), "--revision", "r9999", "--out", str(tmp_path / "other")]
    )
    assert res.exit_code == 2 and not (tmp_path / "other").exists()


def test_minimal_report_data_renders(tmp_path):
    # A store with only a config (nothing sampled yet) still gives a readable report.
    d = ReportData(study="empty-study")
    text = build_report(d, tmp_path).read_text()
    assert "No diagnostics recorded" in text and "No selection recorded" in text
    assert 'class="caution"' in text
    assert report_markdown(d).startswith("# Collect report: empty-study")
    assert all(p.is_file() for p in export_csv(d, tmp_path))
