"""Collect report: the headline answer, its breakdown, the checks with stated rules, the
pictures, the markdown/tables/CSV with the same content, rendering without matplotlib, and the
``winnow report`` command.

The data are invented (demo-like: drawdown at a spring in m). Outside sources of the computed
checks: scipy's Student t quantiles for the intervals (a t interval on the error model's
degrees of freedom), numpy's Hazen quantile (``numpy.quantile(..., method="hazen")``, Hyndman &
Fan 1996 definition 5) for the drawn CDF with equal weights, numpy's ``hypot`` for errors added
in quadrature, a direct double sum of the Gaussian kernel (Gretton et al. 2012, eq. 5, the
biased V-statistic) for the MMD scale, and Kish's (1965) effective sample size
``(sum w)^2 / sum w^2`` in closed form for the weights check.
"""

from __future__ import annotations

import base64
import copy
import csv
import dataclasses
import functools
import html as html_lib
import re
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from winnow.tasks.collect import (
    ReportData,
    build_report,
    estimate_qoi,
    export_csv,
    report_markdown,
    report_tables,
)
from winnow.tasks.collect import _report_answer as RA
from winnow.tasks.collect import _report_checks as RC
from winnow.tasks.collect import _report_sections as RS
from winnow.tasks.collect import _report_tables as RTab
from winnow.tasks.collect import _report_text as RT
from winnow.tasks.collect._report_plots import format_number
from winnow.tasks.collect._report_plots_qoi import cdf_curve, costly_cheap_figure, qoi_figure
from winnow.tasks.collect._uncertainty import ChainGeometry
from winnow.tasks.records import (
    Attempt,
    Diagnostics,
    ParameterDiagnostics,
    QoIEstimate,
    QoIValue,
    RunOutcome,
    Selection,
)

M = 10
FAILED = 3  # the run that fails
AXIS = np.array([1.0, 10.0, 30.0])
OLD_KEYS = ("thinning_gap", "bootstrap_se", "control_variate_se", "optimal")


@functools.lru_cache(maxsize=1)
def _records():
    """Chain, selection, runs, values and estimates (built once: the error model takes s)."""
    rng = np.random.default_rng(0)
    chain = rng.normal([-2.3, -4.0], [0.2, 0.3], size=(600, 2))
    idx = np.arange(0, 600, 60)
    w = rng.dirichlet(np.full(M, 3.0))
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
    costly = cheap_chain[idx] + 0.2 + 0.1 * np.sin(3.0 * chain[idx, 0])
    run_ids = tuple(f"p{k:03d}" for k in range(M))
    outcomes, scalar, vector = [], [], []
    for k, rid in enumerate(run_ids):
        state = "failed" if k == FAILED else "succeeded"
        att = Attempt(1, ("solver",), 0.0, 10.0, 0, False, "", "")
        outcomes.append(
            RunOutcome(
                run_id=rid,
                key="0" * 64,
                state=state,
                attempts=(att,),
                run_dir=Path("/runs") / rid,
                message="exit 1" if k == FAILED else "",
            )
        )
        if state == "succeeded":
            scalar.append(QoIValue(rid, "drawdown_spring", np.asarray(costly[k]), "ok"))
            vector.append(QoIValue(rid, "drawdown_history", costly[k] * AXIS / 30.0, "ok"))
        else:
            why = "run ended as 'failed'"
            scalar.append(QoIValue(rid, "drawdown_spring", np.asarray(np.nan), "run_failed", why))
            vector.append(QoIValue(rid, "drawdown_history", np.full(3, np.nan), "run_failed", why))
    geo = ChainGeometry(chain, rng=0)
    est_s = estimate_qoi(
        scalar,
        w,
        name="drawdown_spring",
        units="m",
        thresholds=(4.0,),
        cheap_on_points=cheap_chain[idx],
        cheap_on_chain=cheap_chain,
        resolve_weights=lambda pos: (w[pos], 0.035, 0.08),
        points=chain[idx],
        geometry=geo,
        chain_ess=500.0,
        rng=1,
    )
    est_v = estimate_qoi(
        vector, w, name="drawdown_history", units="m", points=chain[idx], geometry=geo, rng=2
    )
    return chain, sel, cheap_chain, tuple(outcomes), tuple(scalar + vector), (est_s, est_v)


def make_data(study: str = "spring-demo") -> ReportData:
    chain, sel, _, outcomes, values, estimates = _records()
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
        point_run_ids=tuple(f"p{k:03d}" for k in range(M)),
        outcomes=list(outcomes),
        qoi_values=list(values),
        estimates=copy.deepcopy(list(estimates)),
        qoi_axes={"drawdown_history": {"name": "time", "units": "d", "values": AXIS}},
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


def _text(html_text: str) -> str:
    """Visible text of the page (tags dropped, entities decoded)."""
    body = re.sub(r"<style>.*?</style>", "", html_text, flags=re.S)
    return html_lib.unescape(re.sub(r"<[^>]+>", " ", body))


def _t_half(comp: dict, sd: float, level: float = 0.95) -> float:
    return float(stats.t.ppf(0.5 + level / 2, comp["dof"])) * sd  # scipy: Student t quantile


def _with_headline(est: QoIEstimate, **changes) -> QoIEstimate:
    h = copy.deepcopy(est.headline)
    h.update(changes)
    return dataclasses.replace(est, headline=h)


# --------------------------------------------------------------------------------------------
# the page
# --------------------------------------------------------------------------------------------
def _images(html_text: str) -> dict[str, bytes]:
    return {
        alt: base64.b64decode(b64)
        for alt, b64 in re.findall(
            r'<img alt="([^"]*)" src="data:image/png;base64,([A-Za-z0-9+/=]+)"', html_text
        )
    }


def test_html_is_self_contained(html_text):
    assert not re.search(r"(?:src|href)\s*=\s*[\"'](?:https?:)?//", html_text)
    assert "http://" not in html_text and "https://" not in html_text
    assert "<style>" in html_text and "<link" not in html_text and "<script" not in html_text
    images = _images(html_text)
    assert set(images) == {
        "trace of every parameter",
        "chosen points over the posterior chain",
        "stated thinning error of drawdown_spring against the budget",
        "weighted distribution of drawdown_spring",
        "stated thinning error of drawdown_history against the budget",
        "weighted distribution of drawdown_history",
    }
    for png in images.values():
        assert png[:8] == b"\x89PNG\r\n\x1a\n"


def test_caution_is_general_and_near_the_top(html_text):
    caution = html_text.index('class="caution"')
    assert caution < html_text.index("<h2")
    box = html_text[caution : html_text.index("</div>", caution)]
    assert "licensed professional" in box and "local codes and standards" in box
    assert "engineering decisions" in box
    assert "water supply" not in RT.CAUTION and "water supply" not in html_text
    assert "This study:" not in box  # the config gives no study.caution


def test_study_caution_follows_the_general_one(tmp_path):
    d = make_data()
    d.config_text = "study:\n  name: s\n  caution: Not for dam <safety> decisions.\n"
    text = build_report(d, tmp_path).read_text()
    box = text[text.index('class="caution"') : text.index("</div>", text.index('class="caution"'))]
    assert box.index("licensed professional") < box.index("This study:")
    assert "Not for dam &lt;safety&gt; decisions." in box
    md = report_markdown(d)
    assert md.index("licensed professional") < md.index("**This study:** Not for dam")
    assert md.index("This study") < md.index("## Answer")


def test_aquifer_demo_config_carries_its_own_caution():
    from winnow.tasks.config import load_config

    path = Path(__file__).resolve().parents[1] / "configs" / "aquifer_demo.yaml"
    config = load_config(path)[0]
    assert "water supply" in config.study.caution
    d = ReportData(study="aquifer-demo", config_text=path.read_text())
    general, own = RC.caution_text(d)
    assert general == RT.CAUTION and own == config.study.caution


def test_config_caution_defaults_to_empty():
    from winnow.tasks.config import StudySettings

    assert StudySettings(name="s").caution == ""
    assert "caution" in StudySettings.model_fields


# --------------------------------------------------------------------------------------------
# the answer
# --------------------------------------------------------------------------------------------
def test_answer_states_estimate_interval_level_and_what_for(data, html_text):
    est = data.estimates[0]
    h, c = est.headline, est.headline["components"][0]
    assert h["level"] == 0.95
    # interval for the posterior expectation: t interval on the error model's dof with the
    # thinning and chain errors added in quadrature (scipy t; numpy hypot)
    total = float(np.hypot(c["thinning_se"], c["chain_mcse"]))
    half = _t_half(c, total)
    lo, hi = float(h["estimate"]) - half, float(h["estimate"]) + half
    assert float(h["interval_low"]) == pytest.approx(lo, rel=1e-9)
    expected = (
        f"drawdown_spring: {format_number(h['estimate'])} m "
        f"[{format_number(lo)}, {format_number(hi)}] m (95 % interval for the posterior "
        "expectation of drawdown_spring: thinning error and the chain's Monte Carlo error)."
    )
    text = _text(html_text).replace("\u00a0", " ")
    assert expected in text
    assert text.count(expected) == 1  # the summary sentence appears once
    assert text.index(expected) < text.index("Study ")  # at the top, before the sections
    md = report_markdown(data).replace("\u00a0", " ")
    assert md.count(expected) == 1 and md.index(expected) < md.index("## Study")


def test_answer_names_the_estimator_why_and_the_candidates(data):
    est = data.estimates[0]
    c = est.headline["components"][0]
    a = RA._answer(data, est)
    assert a["estimator"].startswith(f"Estimator: {c['rule']} (")
    for rule, cand in c["candidates"].items():
        assert f"{rule} {format_number(cand['se'])} m" in a["estimator"]
    assert set(c["candidates"]) == {"weighted mean", "discrepancy", "regression"}


@pytest.mark.parametrize(
    ("rule", "ses", "expected"),
    [
        ("weighted mean", {"weighted mean": 1.0, "discrepancy": 0.8}, "no multi-fidelity form"),
        ("discrepancy", {"weighted mean": 1.0, "discrepancy": 0.4}, "less than 47% of"),
        ("weighted mean", {"weighted mean": 1.0}, "the only form available"),
    ],
)
def test_why_an_estimator_was_chosen(rule, ses, expected):
    comp = {
        "rule": rule,
        "candidates": {
            r: {"se": s, "estimate": 1.0, "coefficient": 0.0, "dof": 7} for r, s in ses.items()
        },
    }
    why = RA._why(comp, "m")
    assert expected in why
    if rule == "discrepancy":  # the numbers the choice rests on
        assert "it states 0.4 m, less than 47% of the weighted mean's 1 m" in why


def test_not_reliable_box_lists_every_flag(data, tmp_path):
    d = make_data()
    flags = ["only 3 points carry weight (fewer than 5)", "leave-one-out check failed: <x>"]
    d.estimates[0] = _with_headline(d.estimates[0], flags=flags, reliable=False)
    text = build_report(d, tmp_path).read_text()
    start = text.index('class="unreliable"')
    box = text[start : text.index("</div>", start)]
    assert "NOT RELIABLE:" in box
    assert "<li>only 3 points carry weight (fewer than 5)</li>" in box
    assert "<li>leave-one-out check failed: &lt;x&gt;</li>" in box
    assert start < text.index('id="study"')  # in the answer, at the top
    md = report_markdown(d)
    assert "> **NOT RELIABLE:** (1) only 3 points carry weight" in md
    assert report_tables(d)["answers"][0]["reliable"] is False


def test_reliable_answer_has_no_box_and_says_the_checks_passed(tmp_path):
    d = make_data()
    d.estimates = [_with_headline(d.estimates[0], flags=[], reliable=True)]
    text = build_report(d, tmp_path).read_text()
    assert 'class="unreliable"' not in text
    assert "The error model&#x27;s checks flagged nothing" in text


def test_one_weighted_point_is_not_estimable_never_zero(tmp_path):
    d = make_data()
    chain = d.chain_samples
    y = np.array([3.0, 3.2, 3.1])
    est = estimate_qoi(
        y,
        np.array([1.0, 0.0, 0.0]),
        name="one_point",
        units="m",
        points=chain[:3],
        geometry=ChainGeometry(chain, rng=0),
        rng=0,
    )
    assert np.isnan(est.uncertainty["thinning_se"])  # the error model's own verdict
    d.estimates = [est]
    a = RA._answer(d, est)
    assert "not estimable" in a["text"] and "[" not in a["text"]
    assert a["unreliable"] and any("not estimable" in f for f in a["flags"])
    row = report_tables(d)["estimates"][0]
    assert row["interval low"] is None and row["interval high"] is None
    assert row["thinning_se"] is None  # NaN goes out as None, never as 0
    text = _text(build_report(d, tmp_path).read_text())
    assert "one_point: 3 m; its error is not estimable" in text
    assert "NOT RELIABLE" in text


def test_estimate_without_error_model_says_so(tmp_path):
    d = make_data()
    est = estimate_qoi(np.array([1.0, 2.0, 3.0]), np.ones(3), name="plain", units="m")
    assert est.headline is None
    d.estimates = [est]
    a = RA._answer(d, est)
    assert "weighted mean of the runs 2 m; no interval is stated" in a["text"]
    assert "no interval is stated" in _text(build_report(d, tmp_path).read_text())


def test_vector_answer_points_at_its_widest_interval(data):
    est = data.estimates[1]
    h = est.headline
    width = np.asarray(h["interval_high"]) - np.asarray(h["interval_low"])
    j = int(np.argmax(width))
    a = RA._answer(data, est)
    assert f"Widest at time = {format_number(AXIS[j])} d: " in a["text"]
    assert (
        f"[{format_number(h['interval_low'][j])},\u00a0{format_number(h['interval_high'][j])}] m"
        in a["text"]
    )


# --------------------------------------------------------------------------------------------
# breakdown, estimators, cheap check, quantiles
# --------------------------------------------------------------------------------------------
def test_breakdown_values_match_the_error_model(data):
    rows = RTab.report_tables(data)["uncertainty"]
    est = data.estimates[0]
    c = est.headline["components"][0]
    got = {r["item"]: r for r in rows if r["quantity"] == "drawdown_spring"}
    thin = got["thinning error (sd), of the estimate against the chain mean"]["value"]
    mc = got["chain Monte Carlo error (sd)"]["value"]
    total = got["total error (sd), against the posterior expectation"]["value"]
    assert thin == c["thinning_se"] and mc == c["chain_mcse"]
    assert total == pytest.approx(float(np.hypot(thin, mc)), rel=1e-12)  # numpy hypot
    chain_mean = got["95 % interval for the chain mean"]
    post = got["95 % interval for the posterior expectation"]
    est_v = float(est.headline["estimate"])
    # chain-mean interval: thinning error only; expectation: both (scipy t quantile)
    assert chain_mean["interval high"] - est_v == pytest.approx(_t_half(c, thin), rel=1e-9)
    assert post["interval high"] - est_v == pytest.approx(_t_half(c, total), rel=1e-9)
    assert "sqrt(chain ESS)" in got["chain Monte Carlo error (sd)"]["how"]
    assert f"{c['dof']} degrees of freedom" in got[next(iter(got))]["how"]


def test_estimator_table_lists_every_candidate_once_chosen(data):
    rows = [r for r in report_tables(data)["estimators"] if r["quantity"] == "drawdown_spring"]
    c = data.estimates[0].headline["components"][0]
    assert {r["estimator"] for r in rows} == set(c["candidates"])
    assert [r["estimator"] for r in rows if r["chosen"]] == [c["rule"]]
    for r in rows:
        cand = c["candidates"][r["estimator"]]
        assert r["stated thinning error (sd)"] == cand["se"]
        assert r["estimate"] == cand["estimate"]


def test_cheap_check_is_a_check_not_an_error_term(data, html_text):
    (row,) = [r for r in report_tables(data)["cheap_check"] if r["quantity"] == "drawdown_spring"]
    chk = data.estimates[0].headline["components"][0]["cheap_check"]
    assert row["cheap model's gap, weighted points minus chain"] == chk["gap"]
    assert row["z = gap / stated sd"] == pytest.approx(chk["gap"] / chk["stated_sd"], rel=1e-12)
    assert row["check"] == ("passed" if abs(chk["z"]) <= chk["bound"] else "FAILED")
    # the same gap as the estimate's own record, which is not among the error terms
    assert chk["gap"] == pytest.approx(float(data.estimates[0].details["cheap_gap"]), rel=1e-12)
    assert "A check, not an error term" in html_text
    items = {r["item"] for r in report_tables(data)["uncertainty"]}
    assert not any("gap" in i for i in items)


def test_old_error_keys_are_gone(data, html_text):
    md = report_markdown(data)
    t = report_tables(data)
    columns = {c for rows in t.values() for r in rows for c in r}
    for key in OLD_KEYS:
        assert key not in columns, key
    for key in OLD_KEYS[:3] + ("optimal coefficient", "alpha = rho"):
        assert key not in html_text and key not in md, key
    assert "optimal" not in (data.estimates[0].control_variate or {})
    for text in ("Bootstrap standard error", "Thinning gap", "\u00b1"):
        assert text not in html_text and text not in md


def test_quantile_and_exceedance_tables_carry_their_intervals(data):
    t = report_tables(data)
    c = data.estimates[0].headline["components"][0]
    rows = [r for r in t["quantiles"] if r["quantity"] == "drawdown_spring"]
    assert [r["probability"] for r in rows] == [0.05, 0.5, 0.95]
    for r in rows:
        lo, hi = c["quantile_intervals"][r["probability"]]
        assert r["level"] == 0.95
        assert r["interval low"] == (lo if np.isfinite(lo) else ("-inf" if lo < 0 else "+inf"))
        assert r["interval high"] == (hi if np.isfinite(hi) else ("-inf" if hi < 0 else "+inf"))
        assert r["quantile"] == float(data.estimates[0].quantiles[r["probability"]])
    (exc,) = [r for r in t["exceedance"] if r["quantity"] == "drawdown_spring"]
    assert exc["threshold"] == 4.0 and exc["level"] == 0.95
    assert (exc["interval low"], exc["interval high"]) == tuple(c["exceedance_intervals"][4.0])
    assert exc["probability of exceeding"] == c["exceedance_estimates"][4.0]
    assert exc["weighted share of runs above"] == float(data.estimates[0].exceedance[4.0])


def test_unbounded_quantile_end_is_said_plainly(tmp_path):
    d = make_data()
    est = d.estimates[0]
    comps = copy.deepcopy(est.headline["components"])
    comps[0]["quantile_intervals"][0.05] = (float("-inf"), 2.5)
    d.estimates = [_with_headline(est, components=comps)]
    row = next(r for r in report_tables(d)["quantiles"] if r["probability"] == 0.05)
    assert row["interval low"] == "-inf" and row["interval high"] == 2.5
    text = _text(build_report(d, tmp_path).read_text())
    assert "[-inf (below every run),\u00a02.5] m" in text
    assert "interval for the posterior 5% quantile of drawdown_spring" in text


def test_every_interval_header_states_its_level(html_text):
    heads = [html_lib.unescape(h) for h in re.findall(r"<th>(.*?)</th>", html_text)]
    with_interval = [h for h in heads if "interval" in h]
    assert with_interval  # the tables do have interval columns
    for h in with_interval:
        assert "95 %" in h, h
    # every sentence of the running text that speaks of an interval states its level
    paragraphs = re.findall(r"<(?:p|li)[^>]*>(.*?)</(?:p|li)>", html_text, flags=re.S)
    sentences = [
        s
        for para in paragraphs
        for s in re.split(r"(?<=\.) ", html_lib.unescape(re.sub(r"<[^>]+>", "", para)))
        if "interval" in s
    ]
    assert len(sentences) > 5
    for sentence in sentences:
        assert "95 %" in sentence, sentence


def test_numbers_share_one_format():
    # 4 significant digits: the printf %g rule (Python format spec, 'g' presentation type)
    assert format_number(1234.5678) == "1235"
    assert format_number(0.000123456) == "0.0001235"
    assert format_number(2.0) == "2"
    assert format_number(float("nan")) == "n/a" and format_number(None) == "n/a"
    assert RT._fmt(np.float64(3.14159)) == "3.142" and RT._fmt(7) == "7"


def test_section_links_reach_every_section(html_text):
    links = re.findall(r'<a href="#([^"]+)">', html_text)
    for name in ("answer", "study", "chain", "points", "runs", "weights", "config", "provenance"):
        assert name in links, name
    for target in links:
        assert f'id="{target}"' in html_text, target


# --------------------------------------------------------------------------------------------
# forecast
# --------------------------------------------------------------------------------------------
def test_forecast_sentence_and_table(data):
    est = data.estimates[0]
    fc = est.headline["forecast"]
    sentence = RA._forecast_sentence(data, est)
    assert sentence.startswith(
        f"10 more runs would bring the stated thinning error (sd) of drawdown_spring from "
        f"{format_number(fc['now'])} m to {format_number(fc['extra_points'][10])} m "
        f"({est.n_used} to {est.n_used + 10} runs;"
    )
    rows = [r for r in report_tables(data)["forecast"] if r["quantity"] == "drawdown_spring"]
    assert [r["more runs"] for r in rows] == [0, 5, 10, 20, 50]
    assert [r["runs"] for r in rows] == [est.n_used + k for k in (0, 5, 10, 20, 50)]
    assert rows[0]["stated thinning error (sd)"] == fc["now"]
    assert rows[2]["stated thinning error (sd)"] == fc["extra_points"][10]


def test_forecast_drop_from_the_change_of_weights_is_pointed_out(data):
    est = _with_headline(
        data.estimates[0],
        forecast={"component": 0, "now": 0.1, "extra_points": {5: 0.01, 10: 0.009}},
    )
    assert "Read it with care" in RA._forecast_sentence(data, est)
    est = _with_headline(
        data.estimates[0],
        forecast={"component": 0, "now": 0.1, "extra_points": {5: 0.08, 10: 0.07}},
    )
    s = RA._forecast_sentence(data, est)
    assert "Read it with care" not in s and "from 0.1 m to 0.07 m" in s


# --------------------------------------------------------------------------------------------
# pictures
# --------------------------------------------------------------------------------------------
def test_cdf_curve_is_the_report_quantile_function():
    # equal weights: the drawn curve is numpy's Hazen quantile (Hyndman & Fan definition 5)
    y = np.array([3.0, 1.0, 4.0, 1.5, 9.0, 2.6])
    x, p = cdf_curve(y, np.ones(6), [0.05, 0.5, 0.95])
    np.testing.assert_allclose(x, np.quantile(y, p, method="hazen"), rtol=0, atol=1e-12)
    assert np.all(np.diff(x) >= 0) and p[0] == 0.0 and p[-1] == 1.0


def test_quantile_markers_sit_on_the_drawn_cdf_and_legend_is_outside(data):
    pytest.importorskip("matplotlib")
    est = data.estimates[0]
    values, weights, _ = RS._qoi_values_for_plot(data, est)
    fig = qoi_figure(
        values,
        weights,
        name=est.name,
        units=est.units,
        mean=est.mean,
        quantiles=sorted(est.quantiles),
        thresholds=[4.0],
        estimate=est.headline["estimate"],
        interval=(est.headline["interval_low"], est.headline["interval_high"]),
    )
    ax_h, ax_c = fig.axes[:2]
    (curve,) = [ln for ln in ax_c.lines if ln.get_label().startswith("weighted CDF")]
    (marks,) = [ln for ln in ax_c.lines if ln.get_label().startswith("quantiles")]
    cx, cp = curve.get_xdata(), curve.get_ydata()
    mx, mp = marks.get_xdata(), marks.get_ydata()
    np.testing.assert_allclose(mp, [0.05, 0.5, 0.95])
    # the markers are the stated quantiles...
    np.testing.assert_allclose(mx, [float(est.quantiles[q]) for q in mp], rtol=1e-12)
    # ...and lie on the drawn curve: the curve passes through (x_q, q) among its vertices
    for x, q in zip(mx, mp, strict=True):
        assert np.any(np.isclose(cx, x, rtol=0, atol=1e-12) & np.isclose(cp, q, atol=1e-12))
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    legend = fig.legends[0].get_window_extent(renderer)
    for ax in (ax_h, ax_c):
        assert not legend.overlaps(ax.get_window_extent(renderer))


def test_costly_cheap_scatter_shows_the_points_used(data, tmp_path):
    pytest.importorskip("matplotlib")
    _, sel, cheap_chain, *_ = _records()
    d = make_data()
    d.cheap_at_points = {"drawdown_spring": cheap_chain[sel.indices]}
    est = d.estimates[0]
    cheap = RS._cheap_at_points(d, est)
    pos = est.details["positions_used"]
    assert FAILED not in pos and cheap.shape == (M - 1,)
    np.testing.assert_array_equal(cheap, cheap_chain[sel.indices][pos])
    values, weights, _ = RS._qoi_values_for_plot(d, est)
    fig = costly_cheap_figure(cheap, values, weights, name=est.name, units="m")
    ax = fig.axes[0]
    np.testing.assert_allclose(ax.collections[0].get_offsets(), np.column_stack([cheap, values]))
    (shift,) = [ln for ln in ax.lines if "weighted mean difference" in ln.get_label()]
    xs, ys = shift.get_data()
    # the dashed line is the discrepancy form's correction: mean of (costly - cheap), weighted
    np.testing.assert_allclose(ys - xs, np.average(values - cheap, weights=weights), rtol=1e-12)
    assert "costly against cheap values of drawdown_spring" in _images(
        build_report(d, tmp_path).read_text()
    )


def test_scatter_absent_without_cheap_values_says_why(html_text):
    assert "which this report&#x27;s data do not hold" in html_text


def test_observations_plot_when_the_data_hold_them(tmp_path):
    pytest.importorskip("matplotlib")
    d = make_data()
    rng = np.random.default_rng(5)
    x = np.linspace(1.0, 10.0, 12)
    pred = 0.1 * x[None, :] * rng.normal(1.0, 0.1, size=(200, 1))
    obs = 0.1 * x + rng.normal(0, 0.01, 12)
    obs[3] = 5.0  # one far outside the band
    d.observations = {"x": x, "observed": obs, "predictions": pred, "sigma": np.full(12, 0.01)}
    text = build_report(d, tmp_path).read_text()
    assert "cheap model against the observations" in _images(text)
    lo, hi = np.quantile(pred, [0.05, 0.95], axis=0)  # numpy, equal weights
    inside = int(np.sum((obs >= lo) & (obs <= hi)))
    assert inside < 12
    assert f"{inside} of 12 observations lie inside it" in text


def test_observations_absent_says_so(html_text):
    assert "hold no observations with the cheap model" in html_text


def test_trace_rows_follow_the_stored_chains(tmp_path):
    # Rows as the run store passes them (evenly spaced over chain-major rows): the chain and
    # draw the report infers for each plotted row must be the stored ones.
    from winnow.tasks.records import Chain
    from winnow.tasks.store import RunStore, load_report_data

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
    store = tmp_path / "s.h5"
    RunStore.create(store, "s")
    with RunStore.open_for_write(store) as wr:
        rev = wr.new_revision("study:\n  name: s\n")
        wr.write_chain(rev, chain)
    loaded = load_report_data(store, max_plot_rows=97)
    ci, di, note = RS._trace_rows(loaded)
    # where each plotted row sits in the stored chain, found by its values
    where = [
        int(np.flatnonzero((chain.samples == row).all(axis=1))[0]) for row in loaded.chain_samples
    ]
    np.testing.assert_array_equal(ci, chain.chain_index[where])
    np.testing.assert_array_equal(di, chain.draw_index[where])
    assert "97 of the 600 chain rows" in note


# --------------------------------------------------------------------------------------------
# checks with stated rules
# --------------------------------------------------------------------------------------------
def _brute_mmd(target: np.ndarray, pts: np.ndarray, w: np.ndarray, h: float) -> float:
    """Gaussian-kernel MMD by the direct double sums (Gretton et al. 2012, eq. 5)."""

    def k(a, b):
        return np.exp(-((a[:, None, :] - b[None, :, :]) ** 2).sum(-1) / (2 * h * h))

    n = len(target)
    v = w @ k(pts, pts) @ w - 2 * w @ k(pts, target).sum(1) / n + k(target, target).sum() / n**2
    return float(np.sqrt(max(v, 0.0)))


def test_selection_mmd_beside_random_subsets(data, html_text):
    scale = RC.random_subset_mmd(data)
    sel, x = data.selection, data.chain_samples
    z = (x - x.mean(0)) / x.std(0)  # no standardisation recorded: the chain's own
    zp = (sel.points - x.mean(0)) / x.std(0)
    assert scale["rows"] == 600  # fewer rows than the cap: every row is the target
    assert scale["selection"] == pytest.approx(_brute_mmd(z, zp, sel.weights, 1.0), rel=1e-4)
    assert scale["subsets"] == 5
    assert scale["random_min"] <= scale["random_mean"] <= scale["random_max"]
    # a uniform random subset of 10 i.i.d.-like rows has MMD of order 1/sqrt(10) (Gretton et
    # al. 2012, Theorem 7); far above the 1e-3 floor of an optimised selection
    assert 0.05 < scale["random_mean"] < 1.0
    rows = {r["check"]: r for r in report_tables(data)["selection_check"]}
    ratio = rows["selection's MMD / random subsets' mean MMD"]["value"]
    assert ratio == pytest.approx(scale["selection"] / scale["random_mean"], rel=1e-12)
    assert "mean of 5" in html_text
    assert format_number(scale["random_mean"]) in html_text


def test_selection_mmd_scale_read_from_the_thin_stage_when_recorded():
    d = make_data()
    rec = {
        "selection": 0.01,
        "random_mean": 0.2,
        "random_min": 0.1,
        "random_max": 0.3,
        "subsets": 5,
        "rows": 100,
    }
    d.selection = dataclasses.replace(d.selection, report={"random_subset_mmd": rec})
    scale = RC.random_subset_mmd(d)
    assert scale["random_mean"] == 0.2 and scale["basis"] == "recorded by the thin stage"


@pytest.mark.parametrize(
    ("weights", "flagged", "why"),
    [
        (np.ones(8), False, ""),
        (np.full(4, 0.25), False, ""),  # exactly 25 %: not more than 25 %
        ([0.7, 0.1, 0.1, 0.1], True, "one point carries 70 % of the weight"),
        # Kish ESS (sum w)^2 / sum w^2 = 1 / (0.2^2 + 8 x 0.1^2) = 8.33, not below 4.5
        ([0.2] + [0.1] * 8, False, ""),
        # 1 / (4 x 0.2^2 + 16 x 0.0125^2) = 1 / 0.1625 = 6.154 < 10, largest 20 %
        ([0.2] * 4 + [0.0125] * 16, True, "Kish effective number 6.154 of 20 points"),
    ],
)
def test_weights_warning_rule(weights, flagged, why):
    w = np.asarray(weights, dtype=float)
    got = RC.weights_warning(w)
    assert (got is not None) == flagged
    if flagged:
        assert why in got and RT.WEIGHTS_RULE in got


def _fake_estimate(**details) -> QoIEstimate:
    return QoIEstimate(
        name="q",
        units="m",
        mean=np.asarray(1.0),
        sd=np.asarray(0.1),
        quantiles={},
        exceedance={},
        uncertainty={},
        control_variate=None,
        n_used=8,
        n_missing=2,
        weights_resolved="mmd_before" in details,
        details=details,
    )


@pytest.mark.parametrize(
    ("details", "warns", "why"),
    [
        ({"mmd_before": 0.01, "mmd_after": 0.03, "ess_points": 7.0}, True, "more than twice"),
        ({"mmd_before": 0.01, "mmd_after": 0.019, "ess_points": 7.0}, False, ""),
        ({"mmd_before": 0.01, "mmd_after": 0.02, "ess_points": 4.0}, False, ""),  # boundaries
        ({"mmd_before": 0.01, "mmd_after": 0.011, "ess_points": 3.9}, True, "below half"),
        ({"ess_points": 1.0}, False, ""),  # weights not re-solved: the rule does not apply
    ],
)
def test_representation_warning_rule(details, warns, why):
    got = RC.representation_warning(_fake_estimate(**details))
    assert (got is not None) == warns
    if warns:
        assert why in got
        assert "winnow rerun --replace" in got and RT.REPRESENTATION_RULE in got


def test_representation_warning_in_the_answer(data, html_text):
    est = data.estimates[0]
    d = est.details
    assert d["mmd_after"] > 2 * d["mmd_before"]  # 0.08 > 2 x 0.035: the rule warns
    warning = RC.representation_warning(est)
    assert html_lib.escape(warning, quote=True) in html_text
    assert html_text.index('class="warn"') < html_text.index('id="study"')
    rows = report_tables(data)["weights"]
    assert rows[0]["representation"] == warning


def test_representation_rule_is_exported():
    assert "representation_warning" in RC.__all__


# --------------------------------------------------------------------------------------------
# tables, markdown, CSV
# --------------------------------------------------------------------------------------------
def test_tables_match_the_estimates(data):
    t = report_tables(data)
    assert set(t) == {
        "study",
        "diagnostics",
        "points",
        "selection_check",
        "outcomes",
        "reuse",
        "answers",
        "estimates",
        "uncertainty",
        "estimators",
        "cheap_check",
        "error_model",
        "quantiles",
        "exceedance",
        "forecast",
        "weights",
        "left_out",
        "provenance",
    }
    est = data.estimates[0]
    h = est.headline
    row = next(r for r in t["estimates"] if r["quantity"] == "drawdown_spring")
    assert row["units"] == "m" and row["axis"] == "" and row["axis value"] is None
    assert row["estimate"] == float(h["estimate"]) and row["level"] == 0.95
    assert (row["interval low"], row["interval high"]) == (
        float(h["interval_low"]),
        float(h["interval_high"]),
    )
    assert row["weighted mean of the runs"] == float(est.mean)
    assert row["quantile 95%"] == float(est.quantiles[0.95])
    assert row["runs used"] == M - 1 and row["runs left out"] == 1
    for key in ("thinning_se", "chain_mcse", "total_se"):
        assert row[key] == float(est.uncertainty[key])
    assert len({tuple(r) for r in t["estimates"]}) == 1  # same columns for every quantity
    vec_rows = [r for r in t["estimates"] if r["quantity"] == "drawdown_history"]
    assert [r["axis value"] for r in vec_rows] == AXIS.tolist()
    np.testing.assert_allclose(
        [r["estimate"] for r in vec_rows], data.estimates[1].headline["estimate"]
    )
    assert len(t["points"]) == M
    assert sum(r["weight"] for r in t["points"]) == pytest.approx(1.0)
    assert t["points"][FAILED]["run state"] == "failed"
    assert {r["run id"] for r in t["left_out"]} == {f"p{FAILED:03d}"}
    assert t["weights"][0]["MMD growth"] == pytest.approx(0.045)


def test_tables_are_strict_json(data):
    # Prefect table artifacts are JSON: no NaN, no numpy scalars.
    import json

    json.dumps(report_tables(data), allow_nan=False)


def test_markdown_has_the_same_content(data):
    md = report_markdown(data)
    assert md.startswith("# Collect report: spring-demo")
    assert md.index("Caution") < md.index("## Answer") < md.index("## Study")
    for section in (
        "## Chosen points",
        "## Runs",
        "## Quantity: drawdown_spring (m)",
        "## Quantity: drawdown_history (m)",
        "#### Breakdown of the answer",
        "#### The cheap model's check of the selection",
        "#### Quantiles and exceedance probabilities, with 95 % intervals",
        "#### More runs",
    ):
        assert section in md, section
    assert "| point | run id | chain row | weight |" in md
    assert "| time (d) | estimate (m) | 95 % interval for the posterior expectation (m) |" in md
    assert RA._forecast_sentence(data, data.estimates[0]) in md


def test_html_shows_the_records(data, html_text):
    for text in (
        "spring-demo",
        "r3",
        "ab" * 32,
        "log10_S: R-hat 1.03 above 1.01",
        "SOME CONVERGENCE CHECKS FAILED",
        "run_failed",
        f"p{FAILED:03d}",
        "log10_T (log10 m^2/s)",
        "time (d)",
        "Assumptions: The QoI",
    ):
        assert text in html_text, text
    assert "x &lt;y&gt;" in html_text  # config text escaped


def test_html_escapes_user_text(tmp_path):
    d = make_data(study="<script>alert(1)</script>")
    text = build_report(d, tmp_path).read_text()
    assert "<script>" not in text and "&lt;script&gt;" in text


def test_export_csv(data, tmp_path):
    paths = export_csv(data, tmp_path)
    assert [p.name for p in paths] == [
        "points.csv",
        "qoi_values.csv",
        "estimates.csv",
        "exceedance.csv",
        "quantiles.csv",
        "uncertainty.csv",
    ]
    with paths[0].open() as fh:
        points = list(csv.DictReader(fh))
    assert len(points) == M
    np.testing.assert_allclose([float(p["weight"]) for p in points], data.selection.weights)
    with paths[1].open() as fh:
        values = list(csv.DictReader(fh))
    assert len(values) == M + 3 * M  # scalar rows + one per axis value
    failed = [v for v in values if v["run id"] == f"p{FAILED:03d}"]
    assert {v["status"] for v in failed} == {"run_failed"} and all(v["value"] == "" for v in failed)
    with paths[2].open() as fh:
        est = next(csv.DictReader(fh))
    assert float(est["interval low"]) == float(data.estimates[0].headline["interval_low"])
    with paths[4].open() as fh:
        q = list(csv.DictReader(fh))
    assert len(q) == 3 + 3 * 3  # scalar: 3 quantiles; vector: 3 quantiles x 3 axis values


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
    assert "95 % interval for the posterior expectation" in text and 'class="caution"' in text


def test_quantity_without_usable_run_still_renders(tmp_path):
    d = make_data()
    bad = [
        QoIValue(f"p{k:03d}", "head", np.asarray(np.nan), "missing", "no file") for k in range(M)
    ]
    d.qoi_values = d.qoi_values + bad
    d.estimates = d.estimates + [estimate_qoi(bad, d.selection.weights, name="head", units="m")]
    text = build_report(d, tmp_path).read_text()
    assert f"head: no run gave a usable value ({M} left out)." in text
    assert report_tables(d)["estimates"][-1]["estimate"] is None


def test_long_vector_is_thinned_in_html_but_complete_in_tables(tmp_path):
    d = make_data()
    k = 40
    t_axis = np.arange(k, dtype=float)
    y = np.outer(np.linspace(1.0, 2.0, M), 1.0 + 0.01 * t_axis)
    est = estimate_qoi(y, d.selection.weights, name="h_long", units="m")
    d.estimates = d.estimates + [est]
    d.qoi_axes = {**d.qoi_axes, "h_long": {"name": "t", "units": "s", "values": t_axis}}
    assert len([r for r in report_tables(d)["estimates"] if r["quantity"] == "h_long"]) == k
    build_report(d, tmp_path)  # renders (no error model: no breakdown table to thin)


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


def test_report_command_on_a_real_store(cli_app, tmp_path):
    # End to end: records written through the run store, read back by its loader, reported;
    # the headline survives the store.
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
        rev = wr.new_revision("study:\n  name: spring-demo\n  caution: Stored caution.\n")
        wr.write_chain(rev, chain)
        wr.write_selection(rev, d.selection)
        wr.write_runs(rev, specs, d.outcomes)
        wr.write_results(rev, d.qoi_values, d.estimates)
    out = tmp_path / "rep"
    res = runner.invoke(app, ["report", str(store), "--out", str(out)])
    assert res.exit_code == 0, res.output
    text = (out / "report.html").read_text()
    answer = RA._answer(d, d.estimates[0])["text"]
    assert html_lib.escape(answer, quote=True) in text and f"p{FAILED:03d}" in text
    assert "Stored caution." in text
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
