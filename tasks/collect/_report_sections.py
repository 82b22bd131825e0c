"""The sections of the collect report as renderer-neutral blocks: the display tables of one
QoI (units in headers, intervals as text, long vectors thinned), its pictures and text, and
the chain and points summaries.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from winnow.tasks.records import QoIEstimate

from ._report_answer import _answer, _forecast_sentence
from ._report_plots import format_number, observations_png
from ._report_plots_qoi import costly_cheap_png, forecast_png, qoi_plot_png
from ._report_text import (
    _MAX_VECTOR_ROWS,
    _axis_of,
    _axis_value,
    _comp,
    _components,
    _fmt,
    _interval,
    _is_vector,
    _level,
    _lvl,
    _num,
    _pct,
    _rows_shown,
    _sp,
    _u,
    _where,
)

if TYPE_CHECKING:
    from ._collect import ReportData


# --------------------------------------------------------------------------------------------
# display tables of one QoI (units in headers, intervals as text, long vectors thinned)
# --------------------------------------------------------------------------------------------
def _rows_of(rows: list[dict[str, Any]], name: str) -> list[dict[str, Any]]:
    return [r for r in rows if r["quantity"] == name]


def _axis_header(data: ReportData, est: QoIEstimate) -> str:
    axis = _axis_of(data, est)
    return f"{axis['name']}{_u(axis['units'])}"


def _shown(data: ReportData, est: QoIEstimate, rows: list[dict[str, Any]]) -> list[dict]:
    """Rows of a vector QoI at the axis values shown (all of them for a short axis)."""
    if not _is_vector(est):
        return rows
    keep = {_axis_value(data, est, j) for j in _rows_shown(int(np.size(est.mean)))}
    return [r for r in rows if r.get("axis value") in keep]


def _breakdown_display(data: ReportData, est: QoIEstimate, t: dict) -> list[dict[str, Any]]:
    u = _u(est.units)
    rows = _rows_of(t["uncertainty"], est.name)
    if not _is_vector(est):
        return [
            {
                "part of the answer": r["item"],
                f"value{u}": r["value"]
                if r["interval low"] is None and r["interval high"] is None
                else _interval(
                    np.nan if r["interval low"] is None else r["interval low"],
                    np.nan if r["interval high"] is None else r["interval high"],
                ),
                "how it was obtained": r["how"],
            }
            for r in rows
        ]
    lvl = _lvl(_level(est))
    out = []
    for r in _shown(data, est, _rows_of(t["estimates"], est.name)):
        out.append(
            {
                _axis_header(data, est): r["axis value"],
                f"estimate{u}": r["estimate"],
                f"{lvl} interval for the posterior expectation{u}": _interval(
                    np.nan if r["interval low"] is None else r["interval low"],
                    np.nan if r["interval high"] is None else r["interval high"],
                ),
                f"{lvl} interval for the chain mean{u}": _interval(
                    np.nan
                    if r["chain-mean interval low"] is None
                    else r["chain-mean interval low"],
                    np.nan
                    if r["chain-mean interval high"] is None
                    else r["chain-mean interval high"],
                ),
                f"thinning error (sd){u}": r["thinning_se"],
                f"chain MC error (sd){u}": r["chain_mcse"],
                f"total (sd){u}": r["total_se"],
                "estimator": r["estimator"],
                "flags": r["flags"] or "none",
            }
        )
    return out


def _estimator_display(data: ReportData, est: QoIEstimate, t: dict) -> list[dict[str, Any]]:
    u = _u(est.units)
    rows = _shown(data, est, _rows_of(t["estimators"], est.name))
    out = []
    for r in rows:
        row: dict[str, Any] = {}
        if _is_vector(est):
            row[_axis_header(data, est)] = r["axis value"]
        row.update(
            {
                "estimator": r["estimator"],
                f"estimate{u}": r["estimate"],
                f"stated thinning error (sd){u}": r["stated thinning error (sd)"],
                "coefficient of the cheap model": r["coefficient of the cheap model"],
                "degrees of freedom": r["degrees of freedom"],
                "chosen": "chosen" if r["chosen"] else "",
            }
        )
        out.append(row)
    return out


def _cheap_display(data: ReportData, est: QoIEstimate, t: dict) -> list[dict[str, Any]]:
    u = _u(est.units)
    out = []
    for r in _shown(data, est, _rows_of(t["cheap_check"], est.name)):
        row: dict[str, Any] = {}
        if _is_vector(est):
            row[_axis_header(data, est)] = r["axis value"]
        row.update(
            {
                f"cheap model's gap, weighted points minus chain{u}": r[
                    "cheap model's gap, weighted points minus chain"
                ],
                f"error the model states for it (sd){u}": r["error the model states for it (sd)"],
                "z = gap / stated sd": r["z = gap / stated sd"],
                "bound on |z|": r["bound on |z|"],
                "check": r["check"],
                "weighted correlation costly/cheap": r["weighted correlation costly/cheap"],
            }
        )
        out.append(row)
    return out


def _fit_display(data: ReportData, est: QoIEstimate, t: dict) -> list[dict[str, Any]]:
    u = _u(est.units)
    out = []
    for r in _shown(data, est, _rows_of(t["error_model"], est.name)):
        row: dict[str, Any] = {}
        if _is_vector(est):
            row[_axis_header(data, est)] = r["axis value"]
        row.update(
            {
                f"sigma (process sd){u}": r["sigma (process sd)"],
                "length scale (standardised)": r["length scale (standardised)"],
                "nugget (ratio)": r["nugget (ratio)"],
                "MMD under the fitted covariance": r["MMD under the fitted covariance"],
                "leave-one-out largest |z|": r["leave-one-out largest |z|"],
                "leave-one-out bound": r["leave-one-out bound"],
            }
        )
        out.append(row)
    return out


def _distribution_display(data: ReportData, est: QoIEstimate, t: dict) -> list[dict[str, Any]]:
    """Quantiles and exceedance probabilities with their intervals at the stated level."""
    lvl = _lvl(_level(est))
    vec = _is_vector(est)
    out: list[dict[str, Any]] = []
    if not vec:
        out.append(
            {
                "summary": "weighted mean of the runs",
                "estimate": _fmt(est.mean) + _sp(est.units),
                f"{lvl} interval": "",
                "meaning": "the plain weighted mean; the answer above states the chosen "
                "estimator and its interval",
            }
        )
        out.append(
            {
                "summary": "sd of the weighted runs",
                "estimate": _fmt(est.sd) + _sp(est.units),
                f"{lvl} interval": "",
                "meaning": "the spread of the quantity over the posterior, not an error of the "
                "estimate",
            }
        )
    for r in _shown(data, est, _rows_of(t["quantiles"], est.name)):
        row: dict[str, Any] = {}
        if vec:
            row[_axis_header(data, est)] = r["axis value"]
        has = r["interval low"] is not None and r["interval high"] is not None
        row.update(
            {
                "summary": f"{_pct(r['probability'])} quantile",
                "estimate": _fmt(r["quantile"]) + _sp(est.units),
                f"{lvl} interval": _interval(
                    _as_float(r["interval low"]), _as_float(r["interval high"]), est.units
                )
                if has
                else "not stated",
                "meaning": f"interval for the posterior {_pct(r['probability'])} quantile of "
                f"{est.name}",
            }
        )
        out.append(row)
    for r in _shown(data, est, _rows_of(t["exceedance"], est.name)):
        row = {}
        if vec:
            row[_axis_header(data, est)] = r["axis value"]
        has = r["interval low"] is not None and r["interval high"] is not None
        row.update(
            {
                "summary": f"P({est.name} > {format_number(r['threshold'])}{_sp(est.units)})",
                "estimate": _fmt(r["probability of exceeding"])
                + f" (weighted share of runs above: {_fmt(r['weighted share of runs above'])})",
                f"{lvl} interval": _interval(r["interval low"], r["interval high"])
                if has
                else "not stated",
                "meaning": "interval for the posterior probability of exceeding the threshold",
            }
        )
        out.append(row)
    return out


def _as_float(x: Any) -> float:
    if isinstance(x, str):
        return float("inf") if x == "+inf" else float("-inf") if x == "-inf" else float("nan")
    return float("nan") if x is None else float(x)


# --------------------------------------------------------------------------------------------
# the section of one QoI as renderer-neutral blocks
# --------------------------------------------------------------------------------------------
def _qoi_values_for_plot(data: ReportData, est: QoIEstimate) -> tuple[np.ndarray, np.ndarray, str]:
    by_id = {v.run_id: v for v in data.qoi_values if v.name == est.name and v.status == "ok"}
    ids = est.details.get("run_ids_used")
    w = est.details.get("weights_used")
    if ids is not None and w is not None and all(i in by_id for i in ids):
        return np.stack([by_id[i].value for i in ids]), np.asarray(w, dtype=float), ""
    vals = [v.value for v in by_id.values()]
    if not vals:
        return np.empty((0,)), np.empty((0,)), ""
    return (
        np.stack(vals),
        np.full(len(vals), 1.0 / len(vals)),
        "The estimate did not record its weights: the plot uses equal weights.",
    )


def _cheap_at_points(data: ReportData, est: QoIEstimate) -> np.ndarray | None:
    """Cheap prediction at the points the estimate used, when the report data hold it.

    Read from an optional ``cheap_at_points`` attribute of the report data: ``{qoi name:
    array (m, ...)}`` in selection order (the collect stage's ``cheap_on_points``).
    """
    table = getattr(data, "cheap_at_points", None) or {}
    cp = table.get(est.name) if isinstance(table, dict) else None
    pos = est.details.get("positions_used")
    if cp is None or pos is None:
        return None
    cp = np.asarray(cp, dtype=float)
    pos = np.asarray(pos, dtype=np.int64)
    if cp.ndim < 1 or pos.size == 0 or pos.max() >= cp.shape[0]:
        return None
    return cp[pos]


def _qoi_images(data: ReportData, est: QoIEstimate) -> list[tuple]:
    values, weights, note = _qoi_values_for_plot(data, est)
    out: list[tuple] = []
    if not values.size:
        return out
    h = est.headline or {}
    level = _level(est)
    comps = _components(est)
    rules = {str(c.get("rule")) for c in comps}
    png = qoi_plot_png(
        values,
        weights,
        name=est.name,
        units=est.units,
        mean=est.mean,
        quantiles=sorted(est.quantiles),
        thresholds=sorted(est.exceedance),
        estimate=h.get("estimate") if h else None,
        interval=(h["interval_low"], h["interval_high"]) if h else None,
        level=level,
        rule=rules.pop() if len(rules) == 1 else "",
        axis=_axis_of(data, est) if _is_vector(est) else None,
    )
    cap = (
        "Left: weighted histogram of the run values. Right: their weighted CDF drawn with the "
        "report's quantile definition (weighted Hazen: linear between the midpoints of the "
        "CDF's steps), so the stated quantiles lie on the curve. The shaded band is the "
        f"{_lvl(level)} interval for the posterior expectation, not a range of the quantity."
        if not _is_vector(est)
        else "Grey: the runs; blue band: weighted quantiles of the runs (the spread of the "
        f"quantity); green band: the {_lvl(level)} interval for the posterior expectation."
    )
    if note:
        cap += " " + note
    out.append(("image", png, f"weighted distribution of {est.name}", cap))
    cheap = _cheap_at_points(data, est)
    if cheap is not None and not _is_vector(est) and cheap.shape == values.shape:
        cv = est.control_variate or {}
        png = costly_cheap_png(
            cheap,
            values,
            weights,
            name=est.name,
            units=est.units,
            correlation=_num(cv["correlation"]) if "correlation" in cv else None,
        )
        out.append(
            (
                "image",
                png,
                f"costly against cheap values of {est.name}",
                "Costly run values against the cheap model at the chosen points, marker area "
                "proportional to weight: the basis of the stated correlation and of the "
                "multi-fidelity forms.",
            )
        )
    elif est.control_variate is not None:
        out.append(
            (
                "note",
                "The scatter of costly against cheap values at the chosen points needs the "
                "cheap predictions at those points, which this report's data do not hold.",
            )
        )
    return out


def _box(kind: str, title: str, items: list[str]) -> tuple:
    return ("box", kind, title, items)


def _answer_blocks(data: ReportData, est: QoIEstimate) -> list[tuple]:
    a = _answer(data, est)
    checks = (
        " The error model's checks flagged nothing (points carrying weight, leave-one-out, "
        "cheap model)."
        if est.headline is not None and not a["unreliable"]
        else ""
    )
    blocks: list[tuple] = [
        ("answer", a["text"]),
        ("p", a["estimator"] + " " + a["runs"] + checks),
    ]
    if a["unreliable"]:
        blocks.append(_box("unreliable", "NOT RELIABLE", a["flags"] or ["see the flags"]))
    if a["warning"]:
        blocks.append(_box("warn", "WARNING, surviving points", [a["warning"]]))
    return blocks


def _qoi_blocks(data: ReportData, est: QoIEstimate, t: dict[str, list]) -> list[tuple]:
    """The section of one QoI as renderer-neutral blocks: (kind, payload...) with kind one of
    ``p``, ``h3``, ``table``, ``note``, ``box`` and ``image``."""
    blocks: list[tuple] = []
    desc = data.qoi_descriptions.get(est.name)
    if desc:
        blocks.append(("p", desc))
    h = est.headline
    if est.n_used == 0:
        blocks.append(("note", "No run gave a usable value; the answer above says so."))
    elif h is None:
        blocks.append(
            (
                "note",
                "No error model: the estimate was made without the chain's points, so no "
                "interval is stated. Weighted summaries of the runs:",
            )
        )
        blocks.append(("table", _plain_summary_rows(data, est)))
    else:
        lvl = _lvl(_level(est))
        blocks += [
            ("h3", "Breakdown of the answer"),
            ("table", _breakdown_display(data, est, t)),
        ]
        if _is_vector(est) and np.size(est.mean) > _MAX_VECTOR_ROWS:
            blocks.append(
                (
                    "note",
                    f"{len(_rows_shown(int(np.size(est.mean))))} of {np.size(est.mean)} axis "
                    "values shown; all are in estimates.csv and uncertainty.csv.",
                )
            )
        blocks += [
            ("h3", "Estimator: the candidates the error model weighed"),
            ("table", _estimator_display(data, est, t)),
            (
                "note",
                "The plain weighted mean is used unless another form states less than "
                "exp(-2/sqrt(dof)) of its error (0.51 at 9 degrees of freedom, 0.82 at 99), a "
                "margin against the noise of errors fitted to few values; then the one "
                "stating the least. Coefficient 0: weighted mean; 1: discrepancy form; "
                "fitted: regression form.",
            ),
        ]
        cheap = _cheap_display(data, est, t)
        if cheap:
            blocks += [
                ("h3", "The cheap model's check of the selection"),
                ("table", cheap),
                (
                    "note",
                    "A check, not an error term: the cheap model is known on every chain row, "
                    "so its gap between the weighted points and the whole chain is a thinning "
                    "error measured exactly. The error model fitted to the cheap values states "
                    "an sd for that gap; |z| beyond the bound (the 99.5 % Student t point) "
                    "means the model understates errors of functions like the cheap one. The "
                    "multi-fidelity forms correct the estimate by this gap instead of adding it "
                    "to the error.",
                ),
            ]
        blocks += [
            ("h3", "Error model"),
            ("table", _fit_display(data, est, t)),
            ("note", "Assumptions: " + str(h.get("assumptions", ""))),
            ("h3", f"Quantiles and exceedance probabilities, with {lvl} intervals"),
            ("table", _distribution_display(data, est, t)),
            (
                "note",
                f"The {lvl} interval of a quantile inverts the {lvl} interval of the CDF at the "
                "estimated quantile (Woodruff 1952); an end marked inf is not bounded by the "
                "runs (more runs beyond the smallest or largest value are needed). The "
                f"{lvl} interval of a probability applies the error model to the indicator of "
                "the event.",
            ),
        ]
        blocks += _more_runs_blocks(data, est)
    left = _rows_of(t["left_out"], est.name)
    if left:
        blocks += [
            ("h3", "Runs left out of this estimate"),
            ("table", [{k: v for k, v in r.items() if k != "quantity"} for r in left]),
        ]
    if est.n_used:
        blocks.append(("h3", "Pictures"))
        blocks += _qoi_images(data, est)
    return blocks


def _more_runs_blocks(data: ReportData, est: QoIEstimate) -> list[tuple]:
    """What more runs would buy: the forecast sentence and its picture (none without one)."""
    sentence = _forecast_sentence(data, est)
    if not sentence:
        return []
    fc = (est.headline or {}).get("forecast") or {}
    extra = {int(float(k)): float(v) for k, v in (fc.get("extra_points") or {}).items()}
    j = int(fc.get("component", 0))
    png = forecast_png(
        est.n_used,
        float(_num(fc.get("now")) or np.nan),
        extra,
        name=est.name,
        units=est.units,
        where=_where(data, est, j) if _is_vector(est) else "",
    )
    return [
        ("h3", "More runs"),
        ("p", sentence),
        ("image", png, f"stated thinning error of {est.name} against the budget", ""),
    ]


def _plain_summary_rows(data: ReportData, est: QoIEstimate) -> list[dict[str, Any]]:
    vec = _is_vector(est)
    u = _u(est.units)
    comps: list[int | None] = list(_rows_shown(int(np.size(est.mean)))) if vec else [None]
    rows = []
    for j in comps:
        row: dict[str, Any] = {}
        if vec and j is not None:
            row[_axis_header(data, est)] = _axis_value(data, est, j)
        row[f"weighted mean of the runs{u}"] = _num(_comp(est.mean, j))
        row[f"sd of the runs{u}"] = _num(_comp(est.sd, j))
        for q in sorted(est.quantiles):
            row[f"{_pct(q)} quantile{u}"] = _num(_comp(est.quantiles[q], j))
        rows.append(row)
    return rows


# --------------------------------------------------------------------------------------------
# chain and points: text and pictures
# --------------------------------------------------------------------------------------------
def _diag_summary(data: ReportData) -> str:
    diag = data.chain_diagnostics
    if diag is None:
        return "No diagnostics recorded for this chain."
    acc = np.asarray(diag.acceptance, dtype=float)
    acc_text = (
        f"; acceptance rate {format_number(np.nanmin(acc))} to {format_number(np.nanmax(acc))}"
        if acc.size and np.any(np.isfinite(acc))
        else ""
    )
    verdict = "all convergence checks passed" if diag.passed else "SOME CONVERGENCE CHECKS FAILED"
    return (
        f"{diag.n_chains} chain(s) of {diag.n_draws} draws after removing {diag.burn_in} "
        f"({diag.burn_in_rule}){acc_text}: {verdict}."
    )


def _trace_rows(data: ReportData) -> tuple[np.ndarray | None, np.ndarray | None, str]:
    """Chain and draw of each plotted chain row, with a note on where they came from.

    From optional ``chain_index`` / ``draw_index`` attributes of the report data when given
    (one per row of ``chain_samples``); otherwise inferred when the rows are every stored row
    or evenly spaced over them (as the run store passes them) and the diagnostics say the
    chains have equal length: stored rows are chain after chain.
    """
    x = data.chain_samples
    if x is None:
        return None, None, ""
    k = len(x)
    ci, di = getattr(data, "chain_index", None), getattr(data, "draw_index", None)
    if ci is not None and di is not None and len(ci) == k and len(di) == k:
        return np.asarray(ci), np.asarray(di), ""
    diag = data.chain_diagnostics
    n = int(data.chain_rows or k)
    if diag is not None and diag.n_chains >= 1 and diag.n_chains * diag.n_draws == n:
        rows = np.arange(k) if k == n else np.linspace(0, n - 1, k).round().astype(np.int64)
        note = (
            ""
            if k == n
            else f" {k} of the {n} chain rows are drawn, evenly spaced over each chain."
        )
        return rows // diag.n_draws, rows % diag.n_draws, note
    return None, None, " Chains are not told apart: the rows are drawn in stored order."


def _observation_parts(data: ReportData) -> tuple[bytes | None, str] | None:
    """The cheap model's posterior predictions against the observations, when the report
    data hold them (an optional ``observations`` attribute: a dict with ``x``, ``observed``,
    ``predictions`` (k chain rows, n), optional ``sigma``, ``x_label``, ``y_label``)."""
    obs = getattr(data, "observations", None)
    if not isinstance(obs, dict) or not {"x", "observed", "predictions"} <= set(obs):
        return None
    png = observations_png(
        obs["x"],
        obs["observed"],
        obs["predictions"],
        sigma=obs.get("sigma"),
        x_label=str(obs.get("x_label", "observation")),
        y_label=str(obs.get("y_label", "observed value")),
    )
    pred = np.asarray(obs["predictions"], dtype=float)
    y = np.asarray(obs["observed"], dtype=float).reshape(-1)
    lo, hi = np.nanquantile(pred, [0.05, 0.95], axis=0)
    inside = int(np.sum((y >= lo) & (y <= hi)))
    text = (
        f"Blue band: 5 % to 95 % of the cheap model's predictions over {pred.shape[0]} chain "
        f"rows (the model without observation noise); {inside} of {y.size} observations lie "
        "inside it."
    )
    return png, text
