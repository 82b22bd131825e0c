"""The collect report: one self-contained HTML file, the same content as markdown and tables
(for Prefect artifacts), and CSV exports.

All renderers work from :func:`report_tables`, so the HTML page, the markdown and the
artifacts never disagree. The HTML file has inline CSS and images embedded as base64 PNG; it
fetches nothing.
"""

from __future__ import annotations

import base64
import csv
import html
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from winnow.tasks._estimates import UNCERTAINTY_LABELS
from winnow.tasks._report_plots import pair_plot_png, qoi_plot_png
from winnow.tasks.records import QoIEstimate

if TYPE_CHECKING:
    from winnow.tasks.collect import ReportData

__all__ = ["CAUTION", "build_report", "export_csv", "report_markdown", "report_tables"]

CAUTION = (
    "These results feed engineering judgement; they do not replace the checks required by "
    "local codes and standards, nor review and sign-off by a licensed professional, in "
    "particular for decisions on water supply. The error bars below cover only the sources "
    "listed; they do not cover errors of the solver itself, of its input data or of the "
    "model's structure."
)

_MAX_VECTOR_ROWS = 15  # rows of a vector QoI shown in HTML/markdown (CSV has them all)


# --------------------------------------------------------------------------------------------
# formatting
# --------------------------------------------------------------------------------------------
def _num(x: Any) -> float | None:
    v = float(np.asarray(x, dtype=float).reshape(-1)[0]) if np.size(x) else float("nan")
    return v if np.isfinite(v) else None


def _fmt(x: Any, digits: int = 4) -> str:
    if x is None:
        return "n/a"
    if isinstance(x, str):
        return x
    if isinstance(x, bool | np.bool_):
        return "yes" if x else "no"
    if isinstance(x, int | np.integer):
        return str(int(x))
    arr = np.asarray(x, dtype=float)
    if arr.size != 1:
        return ", ".join(_fmt(v, digits) for v in arr.reshape(-1))
    v = float(arr.reshape(-1)[0])
    if not np.isfinite(v):
        return "n/a"
    return f"{v:.{digits}g}"


def _u(units: str) -> str:
    return f" ({units})" if units else ""


def _pct(q: float) -> str:
    return f"{100 * q:g}%"


def _is_vector(est: QoIEstimate) -> bool:
    return np.ndim(est.mean) > 0


def _comp(x: Any, j: int | None) -> Any:
    arr = np.asarray(x, dtype=float)
    return arr if j is None else arr.reshape(-1)[j]


def _axis_of(data: ReportData, est: QoIEstimate) -> dict[str, Any]:
    axis = dict(data.qoi_axes.get(est.name, {}))
    k = int(np.size(est.mean))
    if "values" not in axis:
        axis["values"] = np.arange(k, dtype=float)
    axis.setdefault("name", "index")
    axis.setdefault("units", "")
    return axis


def _rows_shown(k: int) -> list[int]:
    if k <= _MAX_VECTOR_ROWS:
        return list(range(k))
    return sorted(set(np.linspace(0, k - 1, _MAX_VECTOR_ROWS).round().astype(int).tolist()))


# --------------------------------------------------------------------------------------------
# tables
# --------------------------------------------------------------------------------------------
def _study_rows(data: ReportData) -> list[dict[str, Any]]:
    rows = [
        ("Study", data.study),
        ("Description", data.description),
        ("Store revision", data.revision),
        ("Config hash", data.config_hash),
        ("Chain source", data.chain_source),
        (
            "Chain rows",
            data.chain_rows or (len(data.chain_samples) if data.chain_samples is not None else ""),
        ),
        ("Chosen points", data.selection.m if data.selection is not None else ""),
        ("Report data assembled", data.created),
    ]
    return [{"item": k, "value": v} for k, v in rows if v not in ("", None)]


def _diagnostics_rows(data: ReportData) -> list[dict[str, Any]]:
    diag = data.chain_diagnostics
    if diag is None:
        return []
    units = dict(zip(data.chain_names, data.chain_units, strict=False))
    return [
        {
            "parameter": name,
            "units": units.get(name, ""),
            "mean": _num(p.mean),
            "sd": _num(p.sd),
            "R-hat": _num(p.rhat),
            "bulk ESS": _num(p.ess_bulk),
            "tail ESS": _num(p.ess_tail),
            "MCSE of mean": _num(p.mcse_mean),
        }
        for name, p in diag.parameters.items()
    ]


def _points_rows(data: ReportData) -> list[dict[str, Any]]:
    sel = data.selection
    if sel is None:
        return []
    state = {o.run_id: o.state for o in data.outcomes}
    run_ids = list(data.point_run_ids) if len(data.point_run_ids) == sel.m else [""] * sel.m
    rows = []
    for k in range(sel.m):
        row: dict[str, Any] = {"point": k + 1}
        if any(run_ids):
            row["run id"] = run_ids[k]
        row["chain row"] = int(sel.indices[k])
        row["weight"] = _num(sel.weights[k])
        for j, name in enumerate(data.chain_names):
            unit = data.chain_units[j] if j < len(data.chain_units) else ""
            row[f"{name}{_u(unit)}"] = _num(sel.points[k, j])
        if any(run_ids):
            row["run state"] = state.get(run_ids[k], "no record")
        rows.append(row)
    return rows


def _outcome_rows(data: ReportData) -> list[dict[str, Any]]:
    return [
        {
            "run id": o.run_id,
            "state": o.state,
            "attempts": len(o.attempts),
            "time (s)": round(o.seconds, 1),
            "reused from": o.reused_from,
            "message": o.message,
        }
        for o in data.outcomes
    ]


def _display_estimate_rows(data: ReportData, est: QoIEstimate) -> list[dict[str, Any]]:
    """Estimate table of one QoI for reading: units in the headers, long vectors thinned."""
    vec = _is_vector(est)
    axis = _axis_of(data, est) if vec else None
    comps: list[int | None] = list(_rows_shown(int(np.size(est.mean)))) if vec else [None]
    u = _u(est.units)
    rows = []
    for j in comps:
        row: dict[str, Any] = {}
        if axis is not None and j is not None:
            row[f"{axis['name']}{_u(axis['units'])}"] = float(np.asarray(axis["values"])[j])
        row[f"mean{u}"] = _num(_comp(est.mean, j))
        row[f"sd{u}"] = _num(_comp(est.sd, j))
        for q in sorted(est.quantiles):
            row[f"{_pct(q)} quantile{u}"] = _num(_comp(est.quantiles[q], j))
        for t in sorted(est.exceedance):
            row[f"P(> {t:g}{' ' + est.units if est.units else ''})"] = _num(
                _comp(est.exceedance[t], j)
            )
        if est.control_variate is not None:
            row[f"multi-fidelity estimate{u}"] = _num(_comp(est.control_variate["mean"], j))
        if not vec:
            row["runs used"] = est.n_used
            row["runs left out"] = est.n_missing
        rows.append(row)
    return rows


def _estimate_rows(data: ReportData) -> list[dict[str, Any]]:
    """Every estimate, one row per QoI (per axis value for a vector QoI), same columns."""
    probs = sorted({float(q) for e in data.estimates for q in e.quantiles})
    rows = []
    for est in data.estimates:
        vec = _is_vector(est)
        axis = _axis_of(data, est) if vec else None
        comps: list[int | None] = list(range(int(np.size(est.mean)))) if vec else [None]
        cv = est.control_variate
        for j in comps:
            row: dict[str, Any] = {
                "quantity": est.name,
                "units": est.units,
                "axis": axis["name"] if axis else "",
                "axis units": axis["units"] if axis else "",
                "axis value": float(np.asarray(axis["values"])[j]) if axis else None,
                "mean": _num(_comp(est.mean, j)),
                "sd": _num(_comp(est.sd, j)),
            }
            for q in probs:
                qv = est.quantiles.get(q)
                row[f"quantile {_pct(q)}"] = None if qv is None else _num(_comp(qv, j))
            for key in UNCERTAINTY_LABELS:
                val = est.uncertainty.get(key)
                row[key] = None if val is None else _num(_comp(val, j))
            row["multi-fidelity estimate"] = None if cv is None else _num(_comp(cv["mean"], j))
            row["multi-fidelity se"] = None if cv is None else _num(_comp(cv["se"], j))
            row["runs used"] = est.n_used
            row["runs left out"] = est.n_missing
            rows.append(row)
    return rows


def _exceedance_rows(data: ReportData) -> list[dict[str, Any]]:
    rows = []
    for est in data.estimates:
        axis = _axis_of(data, est) if _is_vector(est) else None
        for t in sorted(est.exceedance):
            p = np.asarray(est.exceedance[t], dtype=float).reshape(-1)
            for j, pj in enumerate(p):
                rows.append(
                    {
                        "quantity": est.name,
                        "threshold": float(t),
                        "units": est.units,
                        "axis value": float(np.asarray(axis["values"])[j]) if axis else None,
                        "probability of exceeding": _num(pj),
                    }
                )
    return rows


def _range_text(x: Any, digits: int = 4) -> str:
    arr = np.asarray(x, dtype=float).reshape(-1)
    if arr.size == 1:
        return _fmt(arr[0], digits)
    return f"{_fmt(np.nanmin(arr), digits)} to {_fmt(np.nanmax(arr), digits)}"


def _how(est: QoIEstimate, key: str) -> str:
    """Plain words on how a source was obtained, with the numbers that went into it."""
    det = est.details
    if key == "thinning_gap":
        rows = det.get("chain_rows")
        where = f"all {rows} chain rows" if rows else "the whole chain"
        return (
            "Cheap prediction averaged over the chosen points with their weights, minus "
            f"its average over {where}: how far thinning alone moves the mean."
        )
    if key == "bootstrap_se":
        b = det.get("bootstrap", {})
        return (
            f"{b.get('resamples', '?')} resamples of the chosen points, drawn uniformly "
            "with replacement and each keeping its weight; spread of the weighted means "
            "(pairs bootstrap, Efron & Tibshirani 1993)."
        )
    if key == "control_variate_se":
        return (
            "Spread of (costly minus cheap) over the chosen points divided by the square "
            f"root of the Kish effective number of points ({_fmt(det.get('ess_points'), 3)}),"
            " combined with the chain's Monte Carlo error."
        )
    if key == "chain_mcse":
        basis = str(det.get("chain_mcse", ""))
        what = (
            "spread of the cheap prediction over the chain"
            if basis.startswith("sd of the cheap")
            else "weighted spread of the quantity (no cheap prediction on the chain)"
        )
        return (
            f"{what[0].upper()}{what[1:]} divided by the square root of the chain's "
            f"effective sample size ({_range_text(det.get('chain_ess', float('nan')), 4)})."
        )
    return ""


def _vector_uncertainty_rows(data: ReportData, est: QoIEstimate) -> list[dict[str, Any]]:
    """Per-axis-value breakdown of a vector QoI (rows thinned like the estimate table)."""
    axis = _axis_of(data, est)
    u = _u(est.units)
    short = {
        "thinning_gap": "thinning gap",
        "control_variate_se": "multi-fidelity se",
        "bootstrap_se": "bootstrap se",
        "chain_mcse": "chain MC error",
    }
    rows = []
    for j in _rows_shown(int(np.size(est.mean))):
        row: dict[str, Any] = {
            f"{axis['name']}{_u(axis['units'])}": float(np.asarray(axis["values"])[j])
        }
        for key in UNCERTAINTY_LABELS:
            if key in est.uncertainty:
                row[f"{short[key]}{u}"] = _num(_comp(est.uncertainty[key], j))
        if est.control_variate is not None:
            cv = est.control_variate
            row[f"multi-fidelity estimate{u}"] = _num(_comp(cv["mean"], j))
            row["correlation costly/cheap"] = _num(_comp(cv["correlation"], j))
        rows.append(row)
    return rows


def _uncertainty_rows(data: ReportData) -> list[dict[str, Any]]:
    rows = []
    for est in data.estimates:
        vec = _is_vector(est)
        for key, label in UNCERTAINTY_LABELS.items():
            if key not in est.uncertainty:
                continue
            val = np.asarray(est.uncertainty[key], dtype=float)
            if vec:
                j = int(np.nanargmax(np.abs(val))) if np.any(np.isfinite(val)) else 0
                shown = float(val.reshape(-1)[j])
                note = "Largest in magnitude along the axis. " + _how(est, key)
            else:
                shown, note = _num(val), _how(est, key)
            rows.append(
                {
                    "quantity": est.name,
                    "source": label,
                    "key": key,
                    "value": shown,
                    "units": est.units,
                    "how": note,
                }
            )
    return rows


def _multifidelity_rows(data: ReportData) -> list[dict[str, Any]]:
    rows = []
    for est in data.estimates:
        cv = est.control_variate
        if cv is None:
            continue
        vec = _is_vector(est)
        note = "vector: largest standard error along the axis" if vec else ""
        variants = [("discrepancy form (coefficient 1)", cv, 1.0)]
        if cv.get("optimal") is not None:
            opt = cv["optimal"]
            variants.append(
                (
                    "optimal coefficient alpha = rho sd_costly / sd_cheap",
                    opt,
                    None if vec else _num(opt["alpha"]),
                )
            )
        for label, part, coef in variants:
            rows.append(
                {
                    "quantity": est.name,
                    "units": est.units,
                    "variant": label,
                    "estimate": None if vec else _num(part["mean"]),
                    "standard error": (
                        float(np.nanmax(np.asarray(part["se"], dtype=float)))
                        if vec
                        else _num(part["se"])
                    ),
                    "correlation costly/cheap": None if vec else _num(cv["correlation"]),
                    "coefficient": coef,
                    "note": note,
                }
            )
    return rows


def _left_out_rows(data: ReportData) -> list[dict[str, Any]]:
    rows = []
    for v in data.qoi_values:
        if v.status != "ok":
            rows.append(
                {"quantity": v.name, "run id": v.run_id, "status": v.status, "reason": v.reason}
            )
    return rows


def _weights_rows(data: ReportData) -> list[dict[str, Any]]:
    rows = []
    for est in data.estimates:
        d = est.details
        row: dict[str, Any] = {
            "quantity": est.name,
            "runs used": est.n_used,
            "runs left out": est.n_missing,
            "weights": d.get("weights_rule", ""),
            "Kish ESS of the weights": _num(d.get("ess_points", float("nan"))),
        }
        if est.weights_resolved:
            row["MMD before"] = _num(d.get("mmd_before", float("nan")))
            row["MMD after"] = _num(d.get("mmd_after", float("nan")))
            row["MMD growth"] = est.mmd_growth
        rows.append(row)
    return rows


def report_tables(data: ReportData) -> dict[str, list[dict[str, Any]]]:
    """The report's tables as lists of row dicts (for Prefect table artifacts and CSV).

    Keys: ``study``, ``diagnostics``, ``points``, ``outcomes``, ``reuse``, ``estimates`` (one
    row per QoI, or per axis value for a vector QoI, with every uncertainty source; the same
    columns for every QoI, units in a column), ``exceedance`` (one row per QoI, threshold and
    axis value), ``uncertainty`` (one row per QoI and source, with how it was obtained),
    ``multifidelity``, ``weights``, ``left_out`` and ``provenance``. Values are plain str,
    int, float or None (JSON-ready); a table with nothing to show is an empty list.
    """
    return {
        "study": _study_rows(data),
        "diagnostics": _diagnostics_rows(data),
        "points": _points_rows(data),
        "outcomes": _outcome_rows(data),
        "reuse": [{"runs": k, "count": int(v)} for k, v in data.reuse_counts.items()],
        "estimates": _estimate_rows(data),
        "exceedance": _exceedance_rows(data),
        "uncertainty": _uncertainty_rows(data),
        "multifidelity": _multifidelity_rows(data),
        "weights": _weights_rows(data),
        "left_out": _left_out_rows(data),
        "provenance": [
            {"item": str(k), "value": _fmt(v) if not isinstance(v, str) else v}
            for k, v in data.provenance.items()
        ],
    }


# --------------------------------------------------------------------------------------------
# text shared by markdown and HTML
# --------------------------------------------------------------------------------------------
def _headline(data: ReportData, est: QoIEstimate) -> str:
    u = f" {est.units}" if est.units else ""
    if est.n_used == 0:
        return f"{est.name}: no run gave a usable value ({est.n_missing} left out)."
    if _is_vector(est):
        axis = _axis_of(data, est)
        text = (
            f"{est.name}: vector quantity over {axis['name']}{_u(axis['units'])}, "
            f"{np.size(est.mean)} values; see the plot and the table."
        )
    else:
        text = f"{est.name}: weighted mean {_fmt(est.mean)}{u}, sd {_fmt(est.sd)}{u}"
        qs = sorted(est.quantiles)
        if len(qs) >= 2:
            text += (
                f"; {_pct(qs[0])} to {_pct(qs[-1])} quantiles "
                f"{_fmt(est.quantiles[qs[0]])} to {_fmt(est.quantiles[qs[-1]])}{u}"
            )
        if est.control_variate is not None:
            cv = est.control_variate
            text += f"; multi-fidelity estimate {_fmt(cv['mean'])} ± {_fmt(cv['se'], 2)}{u}"
        text += "."
    text += f" Runs used: {est.n_used} of {est.n_used + est.n_missing}."
    if est.n_missing:
        if est.weights_resolved:
            d = est.details
            text += (
                f" Weights re-solved for the surviving points: the MMD to the chain grew "
                f"from {_fmt(d.get('mmd_before'))} to {_fmt(d.get('mmd_after'))} "
                f"(+{_fmt(est.mmd_growth, 3)})."
            )
        else:
            text += " Surviving weights renormalised (not re-solved); discrepancy growth unknown."
    return text


def _diag_summary(data: ReportData) -> str:
    diag = data.chain_diagnostics
    if diag is None:
        return "No diagnostics recorded for this chain."
    acc = np.asarray(diag.acceptance, dtype=float)
    acc_text = (
        f"; acceptance rate {_fmt(np.nanmin(acc), 2)} to {_fmt(np.nanmax(acc), 2)}"
        if acc.size and np.any(np.isfinite(acc))
        else ""
    )
    verdict = "all convergence checks passed" if diag.passed else "SOME CONVERGENCE CHECKS FAILED"
    return (
        f"{diag.n_chains} chain(s) of {diag.n_draws} draws after removing {diag.burn_in} "
        f"({diag.burn_in_rule}){acc_text}: {verdict}."
    )


# --------------------------------------------------------------------------------------------
# markdown
# --------------------------------------------------------------------------------------------
def _md_cell(v: Any) -> str:
    return _fmt(v).replace("|", "\\|").replace("\n", " ")


def _md_table(rows: Sequence[dict[str, Any]]) -> str:
    if not rows:
        return "_none_\n"
    cols = list(dict.fromkeys(k for r in rows for k in r))
    out = [
        "| " + " | ".join(c.replace("|", "\\|") for c in cols) + " |",
        "|" + "|".join("---" for _ in cols) + "|",
    ]
    out += ["| " + " | ".join(_md_cell(r.get(c, "")) for c in cols) + " |" for r in rows]
    return "\n".join(out) + "\n"


def _md_blocks(blocks: list[tuple]) -> list[str]:
    out = []
    for kind, payload in blocks:
        if kind == "p":
            out.append(f"{payload}\n")
        elif kind == "h3":
            out.append(f"#### {payload}\n")
        elif kind == "table":
            out.append(_md_table(payload))
        elif kind == "note":
            out.append(f"_{payload}_\n")
        elif kind == "list" and payload:
            out.append("\n".join(f"- **{b}**: {t}" for b, t in payload) + "\n")
    return out


def report_markdown(data: ReportData) -> str:
    """The report as markdown (for a Prefect markdown artifact; pictures are in the HTML)."""
    t = report_tables(data)
    parts = [
        f"# Collect report: {data.study}\n",
        f"> **Caution.** {CAUTION}\n",
        "## Study\n",
        _md_table(t["study"]),
        "## Summary\n",
        "\n".join(f"- {_headline(data, e)}" for e in data.estimates) + "\n"
        if data.estimates
        else "_no estimates_\n",
        "## Posterior chain\n",
        _diag_summary(data) + "\n",
        _md_table(t["diagnostics"]),
    ]
    if data.chain_diagnostics is not None and data.chain_diagnostics.messages:
        parts.append("\n".join(f"- {m}" for m in data.chain_diagnostics.messages) + "\n")
    parts += ["## Chosen points\n", _md_table(t["points"]), "## Runs\n", _md_table(t["outcomes"])]
    if t["reuse"]:
        parts += ["\n", _md_table(t["reuse"])]
    for est in data.estimates:
        parts.append(f"## Quantity: {est.name}{_u(est.units)}\n")
        parts += _md_blocks(_qoi_blocks(data, est, t))
    if t["weights"]:
        parts += ["## Weights used per quantity\n", _md_table(t["weights"])]
    parts += ["## Provenance\n", _md_table(t["provenance"])]
    return "\n".join(parts)


# --------------------------------------------------------------------------------------------
# HTML
# --------------------------------------------------------------------------------------------
_CSS = """
body{font-family:-apple-system,'Segoe UI',Helvetica,Arial,sans-serif;font-size:15px;
 line-height:1.45;color:#1f2328;max-width:1180px;margin:24px auto;padding:0 20px}
h1{font-size:26px;margin:0 0 6px} h2{font-size:20px;margin:28px 0 8px;
 border-bottom:2px solid #d0d7de;padding-bottom:4px} h3{font-size:16px;margin:18px 0 6px}
.sub{color:#57606a;margin:0 0 14px}
.caution{border:2px solid #d4a72c;background:#fff8e1;padding:10px 14px;border-radius:6px;
 margin:12px 0 18px} .caution b{color:#7d4e00}
.fail{color:#b42318;font-weight:600} .ok{color:#1a7f37;font-weight:600}
table{border-collapse:collapse;margin:6px 0 12px;font-size:13.5px}
th,td{border:1px solid #d0d7de;padding:4px 8px;vertical-align:top}
th{background:#f0f3f6;text-align:left;font-weight:600;white-space:nowrap}
td.n{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
tr:nth-child(even) td{background:#fafbfc}
.wrap{overflow-x:auto} .note{color:#57606a;font-size:13px}
ul.head li{margin:4px 0}
img{max-width:100%;height:auto;border:1px solid #e5e7eb;margin:6px 0}
pre{background:#f6f8fa;padding:10px;overflow-x:auto;font-size:12.5px}
details summary{cursor:pointer;color:#0b5cad}
"""


def _h(x: Any) -> str:
    return html.escape(str(x), quote=True)


def _html_table(rows: Sequence[dict[str, Any]], empty: str = "none") -> str:
    if not rows:
        return f'<p class="note">{_h(empty)}</p>'
    cols = list(dict.fromkeys(k for r in rows for k in r))
    head = "".join(f"<th>{_h(c)}</th>" for c in cols)
    body = []
    for r in rows:
        cells = []
        for c in cols:
            v = r.get(c, "")
            numeric = isinstance(v, int | float | np.integer | np.floating) and not isinstance(
                v, bool
            )
            cls = ' class="n"' if numeric or v is None else ""
            cells.append(f"<td{cls}>{_h(_fmt(v))}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return (
        f'<div class="wrap"><table><thead><tr>{head}</tr></thead>'
        f"<tbody>{''.join(body)}</tbody></table></div>"
    )


def _img(png: bytes | None, alt: str) -> str:
    if png is None:
        return ""
    b64 = base64.b64encode(png).decode("ascii")
    return f'<img alt="{_h(alt)}" src="data:image/png;base64,{b64}">'


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


_MF_NOTE = (
    "Chain mean of the cheap prediction plus the weighted mean of (costly minus cheap) at the "
    "chosen points; its standard error combines the spread of that difference over the Kish "
    "effective number of points with the chain's Monte Carlo error."
)


def _qoi_blocks(data: ReportData, est: QoIEstimate, tables: dict[str, list]) -> list[tuple]:
    """The section of one QoI as renderer-neutral blocks: (kind, payload) with kind one of
    ``p``, ``h3``, ``table``, ``note``, ``list`` (of (bold, text)) and ``image``."""
    blocks: list[tuple] = []
    desc = data.qoi_descriptions.get(est.name)
    if desc:
        blocks.append(("p", desc))
    blocks.append(("p", _headline(data, est)))
    rows = _display_estimate_rows(data, est)
    blocks += [("h3", "Estimate"), ("table", rows)]
    if _is_vector(est) and np.size(est.mean) > _MAX_VECTOR_ROWS:
        blocks.append(
            (
                "note",
                f"{len(rows)} of {np.size(est.mean)} axis values shown; all are in estimates.csv.",
            )
        )
    blocks.append(("h3", "Uncertainty of the estimate, by source"))
    if _is_vector(est):
        blocks.append(("table", _vector_uncertainty_rows(data, est)))
        blocks.append(
            (
                "list",
                [
                    (UNCERTAINTY_LABELS[k], _how(est, k))
                    for k in UNCERTAINTY_LABELS
                    if k in est.uncertainty
                ],
            )
        )
    else:
        blocks.append(
            (
                "table",
                [
                    {"source": r["source"], f"value{_u(est.units)}": r["value"], "how": r["how"]}
                    for r in tables["uncertainty"]
                    if r["quantity"] == est.name
                ],
            )
        )
    mf = [r for r in tables["multifidelity"] if r["quantity"] == est.name]
    if mf and not _is_vector(est):
        u = _u(est.units)
        blocks += [
            ("h3", "Multi-fidelity (control-variate) estimate"),
            (
                "table",
                [
                    {
                        "variant": r["variant"],
                        f"estimate{u}": r["estimate"],
                        f"standard error{u}": r["standard error"],
                        "correlation costly/cheap": r["correlation costly/cheap"],
                        "coefficient": r["coefficient"],
                    }
                    for r in mf
                ],
            ),
            ("note", _MF_NOTE),
        ]
    left = [r for r in tables["left_out"] if r["quantity"] == est.name]
    if left:
        blocks += [
            ("h3", "Runs left out of this estimate"),
            ("table", [{k: v for k, v in r.items() if k != "quantity"} for r in left]),
        ]
    blocks.append(("image", est))
    return blocks


def _qoi_section(data: ReportData, est: QoIEstimate, tables: dict[str, list]) -> str:
    title = est.name + _u(est.units)
    out = [f'<h2 id="qoi-{_h(est.name)}">Quantity: {_h(title)}</h2>']
    for kind, payload in _qoi_blocks(data, est, tables):
        if kind == "p":
            out.append(f"<p>{_h(payload)}</p>")
        elif kind == "h3":
            out.append(f"<h3>{_h(payload)}</h3>")
        elif kind == "table":
            out.append(_html_table(payload, "No uncertainty source could be computed."))
        elif kind == "note":
            out.append(f'<p class="note">{_h(payload)}</p>')
        elif kind == "list" and payload:
            out.append(
                '<ul class="note">'
                + "".join(f"<li><b>{_h(b)}</b>: {_h(t)}</li>" for b, t in payload)
                + "</ul>"
            )
        elif kind == "image":
            out.append(_qoi_image(data, payload))
    return "\n".join(out)


def _qoi_image(data: ReportData, est: QoIEstimate) -> str:
    values, weights, note = _qoi_values_for_plot(data, est)
    if not values.size:
        return ""
    cv = est.control_variate["mean"] if est.control_variate is not None else None
    png = qoi_plot_png(
        values,
        weights,
        name=est.name,
        units=est.units,
        mean=est.mean,
        quantiles=est.quantiles,
        thresholds=sorted(est.exceedance),
        cv_mean=cv,
        axis=_axis_of(data, est) if _is_vector(est) else None,
    )
    out = _img(png, f"weighted distribution of {est.name}")
    if note and png is not None:
        out += f'<p class="note">{_h(note)}</p>'
    return out


def _html(data: ReportData) -> str:
    t = report_tables(data)
    nav = ["study", "summary", "chain", "points", "runs"] + [
        f"qoi-{e.name}" for e in data.estimates
    ]
    sub = " · ".join(
        x
        for x in (
            f"revision {data.revision}" if data.revision else "",
            f"config {data.config_hash[:12]}" if data.config_hash else "",
            data.created,
        )
        if x
    )
    body = [
        f"<h1>Collect report: {_h(data.study)}</h1>",
        f'<p class="sub">{_h(sub)}</p>' if sub else "",
        f'<div class="caution"><b>Caution.</b> {_h(CAUTION)}</div>',
        '<p class="note">Sections: '
        + " · ".join(f'<a href="#{_h(n)}">{_h(n)}</a>' for n in nav)
        + "</p>",
        '<h2 id="study">Study</h2>',
        _html_table(t["study"]),
        '<h2 id="summary">Summary</h2>',
        '<ul class="head">'
        + "".join(f"<li>{_h(_headline(data, e))}</li>" for e in data.estimates)
        + "</ul>"
        if data.estimates
        else '<p class="note">No estimates.</p>',
    ]
    diag = data.chain_diagnostics
    cls = "ok" if diag is not None and diag.passed else "fail" if diag is not None else "note"
    body += [
        '<h2 id="chain">Posterior chain</h2>',
        f'<p class="{cls}">{_h(_diag_summary(data))}</p>',
    ]
    if diag is not None and diag.messages:
        body.append(
            "<ul>" + "".join(f'<li class="fail">{_h(m)}</li>' for m in diag.messages) + "</ul>"
        )
    body.append(_html_table(t["diagnostics"], "No per-parameter diagnostics recorded."))
    body.append('<h2 id="points">Chosen points</h2>')
    sel = data.selection
    if sel is not None:
        body.append(
            f"<p>{sel.m} points chosen by the {_h(sel.method)} selector with "
            f"{_h(sel.weights_rule)} weights; MMD to the chain {_fmt(sel.mmd_exact)} "
            f"(exact kernel, {sel.mmd_exact_rows} rows), kernel {_h(sel.kernel)} with "
            f"bandwidth {_fmt(sel.bandwidth)} in standardised coordinates.</p>"
        )
        png = pair_plot_png(
            data.chain_samples, data.chain_names, data.chain_units, sel.points, sel.weights
        )
        if png is not None:
            body.append(_img(png, "chosen points over the posterior chain"))
            cap = (
                "Grey: posterior chain rows; red: chosen points, marker area proportional "
                "to weight (on the diagonal, line height grows with weight)."
            )
            if sel.points.shape[1] > 6:
                cap += f" Only the first 6 of {sel.points.shape[1]} parameters are drawn."
            body.append(f'<p class="note">{_h(cap)}</p>')
        else:
            body.append('<p class="note">Pictures left out: matplotlib is not installed.</p>')
    body.append(_html_table(t["points"], "No selection recorded."))
    body.append('<h2 id="runs">Runs</h2>')
    if data.outcomes:
        counts: dict[str, int] = {}
        for o in data.outcomes:
            counts[o.state] = counts.get(o.state, 0) + 1
        body.append("<p>" + _h(", ".join(f"{v} {k}" for k, v in counts.items())) + ".</p>")
    if t["reuse"]:
        body.append(_html_table(t["reuse"]))
    body.append(_html_table(t["outcomes"], "No run outcomes recorded."))
    for est in data.estimates:
        body.append(_qoi_section(data, est, t))
    if t["weights"]:
        body += ['<h2 id="weights">Weights used per quantity</h2>', _html_table(t["weights"])]
    if data.config_text:
        body += [
            '<h2 id="config">Study config</h2>',
            f"<details><summary>Show the config file</summary><pre>{_h(data.config_text)}"
            "</pre></details>",
        ]
    body += ['<h2 id="provenance">Provenance</h2>', _html_table(t["provenance"], "None recorded.")]
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f"<title>Collect report: {_h(data.study)}</title><style>{_CSS}</style></head>"
        "<body>\n" + "\n".join(b for b in body if b) + "\n</body></html>\n"
    )


def build_report(data: ReportData, out_dir: Path | str) -> Path:
    """Write the self-contained HTML report into ``out_dir`` and return its path.

    The file (``report.html``) has inline CSS and base64 PNG images and refers to no
    external URL; without matplotlib it is written without pictures.
    """
    out = Path(out_dir)
    text = _html(data)  # build everything before touching the disk
    out.mkdir(parents=True, exist_ok=True)
    path = out / "report.html"
    path.write_text(text, encoding="utf-8")
    return path


# --------------------------------------------------------------------------------------------
# CSV
# --------------------------------------------------------------------------------------------
def _value_rows(data: ReportData) -> list[dict[str, Any]]:
    units = {e.name: e.units for e in data.estimates}
    rows = []
    for v in data.qoi_values:
        arr = np.asarray(v.value, dtype=float)
        axis = data.qoi_axes.get(v.name)
        base = {
            "run id": v.run_id,
            "quantity": v.name,
            "units": units.get(v.name, ""),
            "status": v.status,
            "reason": v.reason,
        }
        if arr.ndim == 0:
            rows.append({**base, "axis": "", "axis value": "", "value": _num(arr)})
            continue
        ax_vals = np.asarray(axis["values"], dtype=float) if axis and "values" in axis else None
        for j, x in enumerate(arr):
            av = ax_vals[j] if ax_vals is not None and j < ax_vals.size else j
            rows.append(
                {
                    **base,
                    "axis": axis.get("name", "index") if axis else "index",
                    "axis value": float(av),
                    "value": _num(x),
                }
            )
    return rows


def _write_csv(path: Path, rows: Sequence[dict[str, Any]]) -> Path:
    cols = list(dict.fromkeys(k for r in rows for k in r))
    with path.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=cols)
        writer.writeheader()
        for r in rows:
            writer.writerow({c: ("" if r.get(c) is None else r.get(c, "")) for c in cols})
    return path


def export_csv(data: ReportData, out_dir: Path | str) -> list[Path]:
    """Write the chosen points and results as CSV files into ``out_dir``; return their paths.

    ``points.csv``: chosen points, weights and run state; ``qoi_values.csv``: every value read,
    with status and reason (one row per axis value for a vector QoI); ``estimates.csv``: every
    estimate with every uncertainty source, per axis value; ``exceedance.csv``: exceedance
    probabilities; ``uncertainty.csv``: the breakdown table with how each source was obtained.
    """
    t = report_tables(data)
    values = _value_rows(data)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    return [
        _write_csv(out / "points.csv", t["points"]),
        _write_csv(out / "qoi_values.csv", values),
        _write_csv(out / "estimates.csv", t["estimates"]),
        _write_csv(out / "exceedance.csv", t["exceedance"]),
        _write_csv(out / "uncertainty.csv", t["uncertainty"]),
    ]
