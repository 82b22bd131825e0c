"""The collect report's content as plain tables (:func:`report_tables`): one list of rows
per table, shared by the HTML page, the markdown and the Prefect table artifacts.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

from winnow.tasks.records import QoIEstimate

from ._report_answer import _answer
from ._report_checks import random_subset_mmd, representation_warning, weights_warning
from ._report_plots import format_number
from ._report_text import (
    WEIGHTS_RULE,
    _axis_of,
    _axis_value,
    _comp,
    _components,
    _finite,
    _fmt,
    _get,
    _is_vector,
    _level,
    _lvl,
    _num,
    _pct,
    _sp,
    _u,
)

if TYPE_CHECKING:
    from ._collect import ReportData

__all__ = ["report_tables"]


# --------------------------------------------------------------------------------------------
# tables
# --------------------------------------------------------------------------------------------
def _study_rows(data: ReportData) -> list[dict[str, Any]]:
    levels = sorted({_lvl(_level(e)) for e in data.estimates if e.headline is not None})
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
        ("Level of the stated intervals", ", ".join(levels)),
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
            "MCSE of mean (sd)": _num(p.mcse_mean),
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


def _selection_check_rows(data: ReportData) -> list[dict[str, Any]]:
    sel = data.selection
    if sel is None:
        return []
    w = np.asarray(sel.weights, dtype=float)
    ess = 1.0 / float(np.sum((w / w.sum()) ** 2)) if w.size and w.sum() > 0 else None
    rows: list[dict[str, Any]] = [
        {
            "check": "MMD of the weighted selection to the chain (thin stage)",
            "value": _num(sel.mmd_exact),
            "note": f"exact kernel, {sel.mmd_exact_rows} chain rows",
        },
    ]
    scale = random_subset_mmd(data)
    if scale is not None:
        rows += [
            {
                "check": "MMD of the weighted selection, against the same rows as the random subsets",
                "value": _num(scale["selection"]),
                "note": scale["basis"],
            },
            {
                "check": f"MMD of a random subset of {sel.m} rows with equal weights "
                f"(mean of {scale['subsets']})",
                "value": _num(scale["random_mean"]),
                "note": f"range {format_number(scale['random_min'])} to "
                f"{format_number(scale['random_max'])}; {scale['basis']}",
            },
            {
                "check": "selection's MMD / random subsets' mean MMD",
                "value": _num(scale["selection"] / scale["random_mean"])
                if scale["random_mean"] > 0
                else None,
                "note": "below 1: the chosen points stand for the chain better than random ones",
            },
        ]
    rows += [
        {
            "check": "Kish effective number of points of the weights",
            "value": _num(ess),
            "note": f"of {sel.m} points",
        },
        {
            "check": "largest weight",
            "value": _num(w.max() / w.sum()) if w.size and w.sum() > 0 else None,
            "note": "share of the total",
        },
        {
            "check": "weights check",
            "value": "flagged" if weights_warning(w) else "passed",
            "note": f"rule: {WEIGHTS_RULE}",
        },
    ]
    return rows


def _outcome_rows(data: ReportData) -> list[dict[str, Any]]:
    return [
        {
            "run id": o.run_id,
            "state": o.state,
            "attempts": len(o.attempts),
            "time (s)": float(o.seconds),
            "reused from": o.reused_from,
            "message": o.message,
        }
        for o in data.outcomes
    ]


def _flags_text(flags: Sequence[str]) -> str:
    return "; ".join(flags)


def _estimate_rows(data: ReportData) -> list[dict[str, Any]]:
    """Every estimate, one row per QoI (per axis value for a vector QoI), same columns."""
    probs = sorted({float(q) for e in data.estimates for q in e.quantiles})
    rows = []
    for est in data.estimates:
        vec = _is_vector(est)
        axis = _axis_of(data, est) if vec else None
        k = int(np.size(est.mean))
        comps_j: list[int | None] = list(range(k)) if vec else [None]
        h = est.headline or {}
        comps = _components(est)
        for idx, j in enumerate(comps_j):
            c = comps[idx] if idx < len(comps) else {}
            row: dict[str, Any] = {
                "quantity": est.name,
                "units": est.units,
                "axis": axis["name"] if axis else "",
                "axis units": axis["units"] if axis else "",
                "axis value": _axis_value(data, est, idx) if axis else None,
                "level": _level(est) if h else None,
                "estimate": _num(_comp(h["estimate"], j)) if h else None,
                "interval low": _num(_comp(h["interval_low"], j)) if h else None,
                "interval high": _num(_comp(h["interval_high"], j)) if h else None,
                "interval for": "posterior expectation (thinning and chain Monte Carlo error)"
                if h
                else "",
                "chain-mean interval low": _num(_comp(h["chain_mean_low"], j)) if h else None,
                "chain-mean interval high": _num(_comp(h["chain_mean_high"], j)) if h else None,
                "estimator": str(c.get("rule", "")),
                "reliable": bool(h.get("reliable")) if h else False,
                "flags": _flags_text(c.get("flags") or []),
            }
            for key in ("thinning_se", "chain_mcse", "total_se"):
                val = est.uncertainty.get(key)
                row[key] = None if val is None else _num(_comp(val, j))
            row["weighted mean of the runs"] = _num(_comp(est.mean, j))
            row["sd of the runs"] = _num(_comp(est.sd, j))
            for q in probs:
                qv = est.quantiles.get(q)
                row[f"quantile {_pct(q)}"] = None if qv is None else _num(_comp(qv, j))
            row["runs used"] = est.n_used
            row["runs left out"] = est.n_missing
            rows.append(row)
    return rows


def _quantile_rows(data: ReportData) -> list[dict[str, Any]]:
    rows = []
    for est in data.estimates:
        vec = _is_vector(est)
        comps = _components(est)
        for q in sorted(est.quantiles):
            vals = np.asarray(est.quantiles[q], dtype=float).reshape(-1)
            for j, v in enumerate(vals):
                c = comps[j] if j < len(comps) else {}
                iv = _get(c.get("quantile_intervals") or {}, q)
                rows.append(
                    {
                        "quantity": est.name,
                        "probability": float(q),
                        "units": est.units,
                        "axis value": _axis_value(data, est, j) if vec else None,
                        "quantile": _num(v),
                        "level": _level(est) if iv is not None else None,
                        "interval low": None if iv is None else _plain_end(iv[0]),
                        "interval high": None if iv is None else _plain_end(iv[1]),
                    }
                )
    return rows


def _plain_end(x: Any) -> float | str | None:
    """JSON-ready interval end: a number, or '-inf'/'+inf' when not bounded by the runs."""
    v = float(x)
    if np.isposinf(v):
        return "+inf"
    if np.isneginf(v):
        return "-inf"
    return v if np.isfinite(v) else None


def _exceedance_rows(data: ReportData) -> list[dict[str, Any]]:
    rows = []
    for est in data.estimates:
        vec = _is_vector(est)
        comps = _components(est)
        for t in sorted(est.exceedance):
            p = np.asarray(est.exceedance[t], dtype=float).reshape(-1)
            for j, pj in enumerate(p):
                c = comps[j] if j < len(comps) else {}
                iv = _get(c.get("exceedance_intervals") or {}, t)
                pe = _get(c.get("exceedance_estimates") or {}, t)
                rows.append(
                    {
                        "quantity": est.name,
                        "threshold": float(t),
                        "units": est.units,
                        "axis value": _axis_value(data, est, j) if vec else None,
                        "probability of exceeding": _num(pe) if pe is not None else _num(pj),
                        "weighted share of runs above": _num(pj),
                        "level": _level(est) if iv is not None else None,
                        "interval low": None if iv is None else _num(iv[0]),
                        "interval high": None if iv is None else _num(iv[1]),
                    }
                )
    return rows


def _chain_mcse_how(est: QoIEstimate) -> str:
    det = est.details
    if "chain_mcse" not in est.uncertainty:
        return "not computed (no effective sample size of the chain was available); taken as 0"
    ess = np.asarray(det.get("chain_ess", np.nan), dtype=float).reshape(-1)
    ess_text = (
        format_number(ess[0])
        if ess.size == 1
        else f"{format_number(np.nanmin(ess))} to {format_number(np.nanmax(ess))}"
    )
    return f"{det.get('chain_mcse', 'sd / sqrt(ESS)')}; chain ESS {ess_text}"


def _breakdown_rows(data: ReportData) -> list[dict[str, Any]]:
    """The answer of each QoI broken down: its errors and both intervals (per component)."""
    rows = []
    for est in data.estimates:
        h = est.headline
        if h is None:
            continue
        lvl = _lvl(_level(est))
        vec = _is_vector(est)
        for j, c in enumerate(_components(est)):
            base = {
                "quantity": est.name,
                "axis value": _axis_value(data, est, j) if vec else None,
                "units": est.units,
            }
            se = c.get("thinning_se")
            fit = (
                f"error model, estimator {c.get('rule')}: sigma {format_number(c.get('sigma'))}"
                f"{_sp(est.units)} x MMD {format_number(c.get('mmd'))} of the weighted points "
                f"to the chain under a Matern 5/2 covariance of length "
                f"{format_number(c.get('length_scale'))} (standardised units) with nugget "
                f"{format_number(c.get('nugget'))}; Student t on {c.get('dof')} degrees of "
                "freedom"
                if _finite(se)
                else "not estimable: " + _flags_text(c.get("flags") or [])
            )
            lo_c, hi_c = c.get("chain_mean_interval", (np.nan, np.nan))
            lo_p, hi_p = c.get("interval", (np.nan, np.nan))
            items = [
                ("thinning error (sd), of the estimate against the chain mean", se, None, fit),
                ("chain Monte Carlo error (sd)", c.get("chain_mcse"), None, _chain_mcse_how(est)),
                (
                    "total error (sd), against the posterior expectation",
                    c.get("total_se"),
                    None,
                    "thinning and chain errors added in quadrature",
                ),
                (
                    f"{lvl} interval for the chain mean",
                    None,
                    (lo_c, hi_c),
                    "thinning error only: where the mean over all chain rows lies",
                ),
                (
                    f"{lvl} interval for the posterior expectation",
                    None,
                    (lo_p, hi_p),
                    "thinning error and the chain's Monte Carlo error",
                ),
            ]
            for item, value, iv, how in items:
                rows.append(
                    {
                        **base,
                        "item": item,
                        "value": _num(value) if value is not None else None,
                        "interval low": None if iv is None else _num(iv[0]),
                        "interval high": None if iv is None else _num(iv[1]),
                        "how": how,
                    }
                )
    return rows


def _estimator_rows(data: ReportData) -> list[dict[str, Any]]:
    """Each candidate estimator the error model weighed, per QoI (and component)."""
    rows = []
    for est in data.estimates:
        vec = _is_vector(est)
        for j, c in enumerate(_components(est)):
            for rule, cand in sorted((c.get("candidates") or {}).items()):
                rows.append(
                    {
                        "quantity": est.name,
                        "axis value": _axis_value(data, est, j) if vec else None,
                        "units": est.units,
                        "estimator": rule,
                        "estimate": _num(cand.get("estimate")),
                        "stated thinning error (sd)": _num(cand.get("se")),
                        "coefficient of the cheap model": _num(cand.get("coefficient")),
                        "degrees of freedom": int(cand.get("dof", 0)),
                        "chosen": rule == c.get("rule"),
                    }
                )
    return rows


def _cheap_check_rows(data: ReportData) -> list[dict[str, Any]]:
    rows = []
    for est in data.estimates:
        vec = _is_vector(est)
        cv = est.control_variate or {}
        for j, c in enumerate(_components(est)):
            chk = c.get("cheap_check")
            if not chk:
                continue
            z, bound = _num(chk.get("z")), _num(chk.get("bound"))
            rows.append(
                {
                    "quantity": est.name,
                    "axis value": _axis_value(data, est, j) if vec else None,
                    "units": est.units,
                    "cheap model's gap, weighted points minus chain": _num(chk.get("gap")),
                    "error the model states for it (sd)": _num(chk.get("stated_sd")),
                    "z = gap / stated sd": z,
                    "bound on |z|": bound,
                    "check": "passed"
                    if z is not None and bound is not None and abs(z) <= bound
                    else "FAILED"
                    if z is not None and bound is not None
                    else "n/a",
                    "weighted correlation costly/cheap": _num(_comp(cv["correlation"], j))
                    if "correlation" in cv
                    else None,
                }
            )
    return rows


def _fit_rows(data: ReportData) -> list[dict[str, Any]]:
    rows = []
    for est in data.estimates:
        vec = _is_vector(est)
        for j, c in enumerate(_components(est)):
            rows.append(
                {
                    "quantity": est.name,
                    "axis value": _axis_value(data, est, j) if vec else None,
                    "units": est.units,
                    "sigma (process sd)": _num(c.get("sigma")),
                    "length scale (standardised)": _num(c.get("length_scale")),
                    "nugget (ratio)": _num(c.get("nugget")),
                    "MMD under the fitted covariance": _num(c.get("mmd")),
                    "leave-one-out largest |z|": _num(c.get("loo_max_z")),
                    "leave-one-out bound": _num(c.get("loo_bound")),
                }
            )
    return rows


def _forecast_rows(data: ReportData) -> list[dict[str, Any]]:
    rows = []
    for est in data.estimates:
        fc = (est.headline or {}).get("forecast")
        if not fc:
            continue
        j = int(fc.get("component", 0))
        av = _axis_value(data, est, j) if _is_vector(est) else None
        base = {"quantity": est.name, "axis value": av, "units": est.units}
        rows.append(
            {
                **base,
                "more runs": 0,
                "runs": est.n_used,
                "stated thinning error (sd)": _num(fc.get("now")),
            }
        )
        for k, v in sorted((int(float(k)), v) for k, v in (fc.get("extra_points") or {}).items()):
            rows.append(
                {
                    **base,
                    "more runs": k,
                    "runs": est.n_used + k,
                    "stated thinning error (sd)": _num(v),
                }
            )
    return rows


def _answer_rows(data: ReportData) -> list[dict[str, Any]]:
    rows = []
    for est in data.estimates:
        a = _answer(data, est)
        rows.append(
            {
                "quantity": est.name,
                "answer": a["text"],
                "estimator": a["estimator"],
                "reliable": not a["unreliable"],
                "flags": _flags_text(a["flags"]),
                "representation warning": a["warning"] or "",
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
        w = d.get("weights_used")
        row: dict[str, Any] = {
            "quantity": est.name,
            "runs used": est.n_used,
            "runs left out": est.n_missing,
            "weights": d.get("weights_rule", ""),
            "Kish ESS of the weights": _num(d.get("ess_points", float("nan"))),
            "weights check": (weights_warning(w) or "passed") if w is not None else "n/a",
        }
        if est.weights_resolved:
            row["MMD before"] = _num(d.get("mmd_before", float("nan")))
            row["MMD after"] = _num(d.get("mmd_after", float("nan")))
            row["MMD growth"] = _num(est.mmd_growth)
        row["representation"] = representation_warning(est) or "no warning"
        rows.append(row)
    return rows


def report_tables(data: ReportData) -> dict[str, list[dict[str, Any]]]:
    """The report's tables as lists of row dicts (for Prefect table artifacts and CSV).

    Keys: ``study``, ``diagnostics``, ``points``, ``selection_check`` (the selection's MMD
    beside random subsets, the weights check), ``outcomes``, ``reuse``, ``answers`` (one
    headline per QoI), ``estimates`` (one row per QoI, or per axis value for a vector QoI:
    estimate, interval for the posterior expectation at ``level``, chain-mean interval,
    errors, weighted summaries of the runs; the same columns for every QoI), ``uncertainty``
    (the breakdown of each answer, with how each part was obtained), ``estimators`` (the
    candidates weighed), ``cheap_check``, ``error_model``, ``quantiles`` and ``exceedance``
    (with intervals at ``level``; an end not bounded by the runs is ``'-inf'``/``'+inf'``),
    ``forecast``, ``weights``, ``left_out`` and ``provenance``. Values are plain str, int,
    float or None (JSON-ready); a table with nothing to show is an empty list.
    """
    return {
        "study": _study_rows(data),
        "diagnostics": _diagnostics_rows(data),
        "points": _points_rows(data),
        "selection_check": _selection_check_rows(data),
        "outcomes": _outcome_rows(data),
        "reuse": [{"runs": k, "count": int(v)} for k, v in data.reuse_counts.items()],
        "answers": _answer_rows(data),
        "estimates": _estimate_rows(data),
        "uncertainty": _breakdown_rows(data),
        "estimators": _estimator_rows(data),
        "cheap_check": _cheap_check_rows(data),
        "error_model": _fit_rows(data),
        "quantiles": _quantile_rows(data),
        "exceedance": _exceedance_rows(data),
        "forecast": _forecast_rows(data),
        "weights": _weights_rows(data),
        "left_out": _left_out_rows(data),
        "provenance": [
            {"item": str(k), "value": _fmt(v) if not isinstance(v, str) else v}
            for k, v in data.provenance.items()
        ],
    }
