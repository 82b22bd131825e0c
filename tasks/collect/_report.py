"""The collect report: one self-contained HTML file, the same content as markdown and tables
(for Prefect artifacts), and CSV exports.

All renderers work from :func:`report_tables` and the same text helpers, so the HTML page,
the markdown and the artifacts never disagree. The HTML file has inline CSS and images
embedded as base64 PNG; it fetches nothing.

Top to bottom: the caution (general, then the study's own from ``study.caution``); the
answer, one headline per quantity (estimate and interval at the stated level for the
posterior expectation, the estimator and why, a NOT RELIABLE box listing the error model's
flags); the study; the chain (diagnostics, traces, the cheap model against the observations);
the chosen points (their MMD beside random subsets of the same size, a check of the weights);
the runs; one section per quantity breaking its answer down; weights; config; provenance.

Every number is printed by one helper (:func:`winnow.tasks.collect._report_plots.format_number`, 4
significant digits) and every interval names its level and what it is an interval for.
"""

from __future__ import annotations

import base64
import csv
import html
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from winnow.tasks.records import QoIEstimate

from ._headline import LEVEL
from ._report_plots import (
    costly_cheap_png,
    forecast_png,
    format_number,
    observations_png,
    pair_plot_png,
    qoi_plot_png,
    trace_plot_png,
)
from ._uncertainty import margin

if TYPE_CHECKING:
    from ._collect import ReportData

__all__ = [
    "CAUTION",
    "REPRESENTATION_RULE",
    "WEIGHTS_RULE",
    "build_report",
    "caution_text",
    "export_csv",
    "random_subset_mmd",
    "report_markdown",
    "report_tables",
    "representation_warning",
    "weights_warning",
]

CAUTION = (
    "These results feed engineering decisions. They do not replace the checks required by "
    "local codes and standards, nor review and sign-off by a licensed professional. The "
    "error statements below cover only the sources they name (thinning the chain to a few "
    "weighted runs, and the chain's own Monte Carlo error); they do not cover errors of the "
    "solver itself, of its input data or of the model's structure."
)

REPRESENTATION_RULE = (
    "warn when the weights were re-solved for the surviving points and either the MMD of the "
    "survivors to the chain is more than twice the MMD of the full selection, or the Kish "
    "effective number of the surviving weights is below half the number of survivors"
)

WEIGHTS_RULE = (
    "flag when the Kish effective number of points (sum w)^2 / sum w^2 is below half the "
    "number of points, or when one point carries more than 25 % of the weight"
)

RANDOM_SUBSETS = 5  # random subsets of the selection's size drawn for the MMD scale
_SCALE_ROWS = 5000  # chain rows the MMD scale is measured against
_MAX_VECTOR_ROWS = 15  # rows of a vector QoI shown in HTML/markdown (CSV has them all)

_RULE_NAMES = {
    "weighted mean": "the plain weighted mean of the runs",
    "discrepancy": "the multi-fidelity discrepancy form: the cheap model's chain mean plus the "
    "weighted mean of (costly minus cheap) at the points",
    "regression": "the multi-fidelity regression form: as the discrepancy form with the cheap "
    "model's coefficient fitted by generalised least squares",
}


# --------------------------------------------------------------------------------------------
# formatting
# --------------------------------------------------------------------------------------------
def _num(x: Any) -> float | None:
    v = float(np.asarray(x, dtype=float).reshape(-1)[0]) if np.size(x) else float("nan")
    return v if np.isfinite(v) else None


def _fmt(x: Any) -> str:
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
        return ", ".join(_fmt(v) for v in arr.reshape(-1))
    return format_number(arr)


def _end(x: Any) -> str:
    """An interval end; an infinite one is not bounded by the runs and says so."""
    v = float(np.asarray(x, dtype=float).reshape(-1)[0])
    if np.isposinf(v):
        return "+inf (above every run)"
    if np.isneginf(v):
        return "-inf (below every run)"
    return format_number(v)


def _interval(lo: Any, hi: Any, units: str = "") -> str:
    """``[lo, hi] units``; 'not estimable' when an end is NaN (never a zero-width interval)."""
    if np.isnan(np.asarray(lo, float)).any() or np.isnan(np.asarray(hi, float)).any():
        return "not estimable"
    u = f" {units}" if units else ""
    return f"[{_end(lo)},\u00a0{_end(hi)}]{u}"  # no break inside an interval


def _u(units: str) -> str:
    return f" ({units})" if units else ""


def _sp(units: str) -> str:
    return f" {units}" if units else ""


def _pct(q: float) -> str:
    return f"{100 * q:g}%"


def _lvl(level: float) -> str:
    return f"{100 * float(level):g} %"


def _is_vector(est: QoIEstimate) -> bool:
    return np.ndim(est.mean) > 0


def _comp(x: Any, j: int | None) -> Any:
    arr = np.asarray(x, dtype=float)
    return arr if j is None else arr.reshape(-1)[j]


def _get(d: dict, key: float) -> Any:
    """``d[key]`` for a key that may be stored as int, float or str."""
    for k in (key, float(key), int(key) if float(key).is_integer() else None, str(key)):
        if k is not None and k in d:
            return d[k]
    return None


def _axis_of(data: ReportData, est: QoIEstimate) -> dict[str, Any]:
    axis = dict(data.qoi_axes.get(est.name, {}))
    k = int(np.size(est.mean))
    if "values" not in axis:
        axis["values"] = np.arange(k, dtype=float)
    axis.setdefault("name", "index")
    axis.setdefault("units", "")
    return axis


def _axis_value(data: ReportData, est: QoIEstimate, j: int) -> float:
    return float(np.asarray(_axis_of(data, est)["values"], dtype=float).reshape(-1)[j])


def _where(data: ReportData, est: QoIEstimate, j: int) -> str:
    axis = _axis_of(data, est)
    return f"{axis['name']} = {format_number(_axis_value(data, est, j))}{_sp(axis['units'])}"


def _rows_shown(k: int) -> list[int]:
    if k <= _MAX_VECTOR_ROWS:
        return list(range(k))
    return sorted(set(np.linspace(0, k - 1, _MAX_VECTOR_ROWS).round().astype(int).tolist()))


def _level(est: QoIEstimate) -> float:
    h = est.headline or {}
    return float(h.get("level", est.details.get("level", LEVEL)))


def _components(est: QoIEstimate) -> list[dict[str, Any]]:
    return list((est.headline or {}).get("components") or [])


def _finite(x: Any) -> bool:
    return x is not None and bool(np.all(np.isfinite(np.asarray(x, dtype=float))))


# --------------------------------------------------------------------------------------------
# checks with stated rules (shared with the command line)
# --------------------------------------------------------------------------------------------
def representation_warning(estimate: QoIEstimate) -> str | None:
    """A warning when the surviving points of ``estimate`` no longer represent the chain.

    Rule (:data:`REPRESENTATION_RULE`): only when the weights were re-solved for the
    survivors (``details`` holds ``mmd_before`` and ``mmd_after``), warn when
    ``mmd_after > 2 mmd_before`` or when the Kish effective number of the surviving weights
    is below half the number of survivors. Failed runs that cluster in one region of the
    posterior do both. Returns None when there is nothing to warn about.
    """
    d = estimate.details
    if "mmd_before" not in d or "mmd_after" not in d:
        return None
    before, after = _num(d["mmd_before"]), _num(d["mmd_after"])
    n = int(estimate.n_used)
    ess = _num(d.get("ess_points"))
    reasons = []
    if before is not None and after is not None and after > 2.0 * before:
        reasons.append(
            f"the MMD to the chain grew from {format_number(before)} to {format_number(after)}, "
            "more than twice"
        )
    if ess is not None and n > 0 and ess < 0.5 * n:
        reasons.append(
            f"the Kish effective number of the surviving weights is {format_number(ess)} for "
            f"{n} points, below half"
        )
    if not reasons:
        return None
    return (
        f"{estimate.name}: the {n} surviving points no longer represent the chain: "
        + "; and ".join(reasons)
        + f" (rule: {REPRESENTATION_RULE}). The failed runs may cluster in one region of the "
        "posterior; run `winnow rerun --replace STORE` to replace the failed points with new "
        "ones."
    )


def weights_warning(weights: Any) -> str | None:
    """A warning when the weights lean on few points (rule: :data:`WEIGHTS_RULE`)."""
    w = np.asarray(weights, dtype=float).reshape(-1)
    if w.size == 0 or not np.all(np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
        return None
    w = w / w.sum()
    ess = 1.0 / float(np.sum(w * w))  # Kish (1965)
    reasons = []
    if ess < 0.5 * w.size:
        reasons.append(f"Kish effective number {format_number(ess)} of {w.size} points")
    if w.max() > 0.25:
        reasons.append(f"one point carries {format_number(100 * w.max())} % of the weight")
    if not reasons:
        return None
    return "The weights lean on few points: " + "; ".join(reasons) + f" (rule: {WEIGHTS_RULE})."


def random_subset_mmd(
    data: ReportData, subsets: int = RANDOM_SUBSETS, rows: int = _SCALE_ROWS, rng: int = 0
) -> dict[str, Any] | None:
    """The selection's MMD beside that of random subsets of the same size (a scale for it).

    Read from ``selection.report["random_subset_mmd"]`` when the thin stage recorded it;
    otherwise computed here from the report's chain rows: the exact-kernel MMD
    (:func:`winnow.tasks.thin.mmd_exact`, the selection's kernel and bandwidth, in the thin
    stage's standardised coordinates) of the weighted selection and of ``subsets`` uniform
    random subsets of the same size with equal weights, all against the same ``rows`` chain
    rows (fixed seed ``rng``). None without a selection or chain rows.
    """
    sel = data.selection
    if sel is None:
        return None
    stored = sel.report.get("random_subset_mmd") if isinstance(sel.report, dict) else None
    if isinstance(stored, dict) and "random_mean" in stored:
        return {**stored, "basis": "recorded by the thin stage"}
    x = data.chain_samples
    if x is None or len(x) < 2 or sel.m < 1:
        return None
    from winnow.tasks.thin import mmd_exact

    x = np.asarray(x, dtype=float)
    x = x[np.all(np.isfinite(x), axis=1)]
    rep = sel.report if isinstance(sel.report, dict) else {}
    mean = np.asarray(rep.get("standardisation_mean", x.mean(axis=0)), dtype=float)
    scale = np.asarray(rep.get("standardisation_scale", x.std(axis=0)), dtype=float)
    scale = np.where(scale > 0, scale, 1.0)
    if mean.shape != (x.shape[1],) or sel.points.shape[1] != x.shape[1] or sel.m > len(x):
        return None
    z = (x - mean) / scale
    gen = np.random.default_rng(rng)
    target = z[np.sort(gen.choice(len(z), min(rows, len(z)), replace=False))]
    try:

        def mmd(points: np.ndarray, w: np.ndarray) -> float:
            return float(
                mmd_exact(
                    target,
                    points,
                    w,
                    kernel=sel.kernel,
                    bandwidth=float(sel.bandwidth),
                    max_rows=len(target),
                )[0]
            )

        own = mmd((np.asarray(sel.points, dtype=float) - mean) / scale, sel.weights)
        rand = [
            mmd(z[gen.choice(len(z), sel.m, replace=False)], np.full(sel.m, 1.0 / sel.m))
            for _ in range(subsets)
        ]
    except (ValueError, TypeError):  # a kernel or bandwidth mmd_exact does not know
        return None
    return {
        "selection": own,
        "random_mean": float(np.mean(rand)),
        "random_min": float(np.min(rand)),
        "random_max": float(np.max(rand)),
        "subsets": int(subsets),
        "rows": int(len(target)),
        "basis": f"computed for this report against {len(target)} chain rows",
    }


# --------------------------------------------------------------------------------------------
# caution
# --------------------------------------------------------------------------------------------
def _study_caution(config_text: str) -> str:
    """``study.caution`` of the stored config ('' when absent or unreadable)."""
    if not config_text:
        return ""
    import yaml

    try:
        cfg = yaml.safe_load(config_text)
        text = cfg["study"].get("caution", "")
    except Exception:  # any YAML or shape problem: no study caution
        return ""
    return text.strip() if isinstance(text, str) else ""


def caution_text(data: ReportData) -> tuple[str, str]:
    """The standard caution and the study's own (``study.caution`` of its config, or '')."""
    return CAUTION, _study_caution(data.config_text)


# --------------------------------------------------------------------------------------------
# the answer of one QoI
# --------------------------------------------------------------------------------------------
def _why(comp: dict[str, Any], units: str) -> str:
    """The estimator used, why, and the stated errors of every candidate."""
    cands = comp.get("candidates") or {}
    rule = str(comp.get("rule", "weighted mean"))
    if not cands:
        return f"{rule}: no error model could be fitted, so only the plain weighted mean is shown"
    stated = "; ".join(
        f"{r} {format_number(c.get('se'))}{_sp(units)}" for r, c in sorted(cands.items())
    )
    if len(cands) == 1:
        why = "the only form available (no cheap model for this quantity)"
    elif rule == "weighted mean":
        alts = [c for r, c in cands.items() if r != "weighted mean"]
        dof = min(int(c.get("dof", 1)) for c in alts)
        why = (
            f"no multi-fidelity form stated less than {margin(dof):.0%} of the weighted mean's "
            f"error (the margin exp(-2/sqrt(dof)) at {dof} degrees of freedom)"
        )
    else:
        base = (cands.get("weighted mean") or {}).get("se")
        dof = int(cands[rule].get("dof", 1))
        why = (
            f"it states {format_number(cands[rule].get('se'))}{_sp(units)}, less than "
            f"{margin(dof):.0%} of the weighted mean's {format_number(base)}{_sp(units)} (the "
            f"margin exp(-2/sqrt(dof)) at {dof} degrees of freedom), and the least of the forms"
        )
    return (
        f"{rule} ({_RULE_NAMES.get(rule, rule)}), chosen because {why}. Stated thinning "
        f"errors (sd) of the candidates: {stated}"
    )


def _answer(data: ReportData, est: QoIEstimate) -> dict[str, Any]:
    """The headline of one QoI as text parts: ``text``, ``estimator``, ``flags``,
    ``unreliable``, ``warning`` (representation) and ``runs``."""
    u = _sp(est.units)
    runs = f"Runs used: {est.n_used} of {est.n_used + est.n_missing}."
    out: dict[str, Any] = {
        "text": "",
        "estimator": "",
        "flags": [],
        "unreliable": False,
        "warning": representation_warning(est),
        "runs": runs,
    }
    if est.n_used == 0:
        out["text"] = f"{est.name}: no run gave a usable value ({est.n_missing} left out)."
        out["unreliable"] = True
        out["flags"] = ["no usable run: nothing is estimated"]
        return out
    h = est.headline
    if h is None:
        text = (
            f"{est.name}: weighted mean of the runs {_fmt(est.mean)}{u}; no interval is stated: "
            "the error model needs the chain and the chosen points, and this estimate was "
            "made without them."
        )
        if _is_vector(est):
            text = (
                f"{est.name}: vector quantity; weighted means of the runs in its section; no "
                "interval is stated: the error model needs the chain and the chosen points, "
                "and this estimate was made without them."
            )
        out.update(text=text, unreliable=True, flags=["no error model: no interval"])
        return out
    level = _level(est)
    comps = _components(est)
    flags = list(h.get("flags") or [])
    out["flags"] = flags
    out["unreliable"] = not bool(h.get("reliable", False))
    for_what = (
        f"{_lvl(level)} interval for the posterior expectation of {est.name}: thinning error "
        "and the chain's Monte Carlo error"
    )
    if not _is_vector(est):
        c = comps[0] if comps else {}
        if not _finite(c.get("thinning_se")):
            out["text"] = (
                f"{est.name}: {_fmt(h['estimate'])}{u}; its error is not estimable, so no "
                "interval is stated (an error that cannot be estimated is not zero)."
            )
            if not flags:
                out["flags"] = ["error not estimable"]
            out["unreliable"] = True
        else:
            out["text"] = (
                f"{est.name}: {_fmt(h['estimate'])}{u} "
                f"{_interval(h['interval_low'], h['interval_high'], est.units)} ({for_what})."
            )
        out["estimator"] = "Estimator: " + _why(c, est.units) + "."
        return out
    axis = _axis_of(data, est)
    lo = np.asarray(h["interval_low"], dtype=float).reshape(-1)
    hi = np.asarray(h["interval_high"], dtype=float).reshape(-1)
    k = lo.size
    width = np.where(np.isfinite(hi - lo), hi - lo, -1.0)
    text = (
        f"{est.name}: vector quantity over {axis['name']}{_u(axis['units'])}, {k} values; "
        f"each with its {_lvl(level)} interval for the posterior expectation in the section "
        "below."
    )
    if np.any(np.isfinite(lo)):
        j = int(np.argmax(width))
        text += (
            f" Widest at {_where(data, est, j)}: "
            f"{_fmt(np.asarray(h['estimate']).reshape(-1)[j])}{u} "
            f"{_interval(lo[j], hi[j], est.units)} ({for_what})."
        )
    n_bad = int(np.sum(~np.isfinite(lo)))
    if n_bad:
        text += f" {n_bad} of {k} values: error not estimable, no interval stated."
        out["unreliable"] = True
    out["text"] = text
    rules = sorted({str(c.get("rule")) for c in comps})
    if len(rules) == 1 and comps:
        out["estimator"] = (
            f"Estimator: {rules[0]} ({_RULE_NAMES.get(rules[0], rules[0])}) at every "
            f"{axis['name']}; the candidates' stated errors are in the section below."
        )
    else:
        out["estimator"] = (
            f"Estimator per {axis['name']}: {', '.join(rules)}; each chosen as the plain "
            f"weighted mean unless a multi-fidelity form states less than exp(-2/sqrt(dof)) "
            "of its error (see the table in the section below)."
        )
    return out


def _answer_line(data: ReportData, est: QoIEstimate) -> str:
    a = _answer(data, est)
    parts = [a["text"], a["estimator"], a["runs"]]
    if a["unreliable"]:
        parts.append("NOT RELIABLE: " + "; ".join(a["flags"] or ["see the flags"]) + ".")
    if a["warning"]:
        parts.append(a["warning"])
    return " ".join(p for p in parts if p)


def _forecast_sentence(data: ReportData, est: QoIEstimate) -> str | None:
    h = est.headline or {}
    fc = h.get("forecast")
    if not fc:
        return None
    extra = {int(float(k)): float(v) for k, v in (fc.get("extra_points") or {}).items()}
    now = _num(fc.get("now"))
    where = f" at {_where(data, est, int(fc.get('component', 0)))}" if _is_vector(est) else ""
    if not extra or now is None or not all(np.isfinite(v) for v in extra.values()):
        return (
            f"The stated thinning error of {est.name}{where} with more runs is not estimable "
            "(the error model could not be fitted)."
        )
    k = 10 if 10 in extra else min(extra)
    u = _sp(est.units)
    text = (
        f"{k} more runs would bring the stated thinning error (sd) of {est.name}{where} from "
        f"{format_number(now)}{u} to {format_number(extra[k])}{u} "
        f"({est.n_used} to {est.n_used + k} runs; the error model's forecast, with the extra "
        "points chosen from the chain to reduce it and the fitted covariance held fixed)."
    )
    first = extra[min(extra)]
    if first < now / 3.0:
        text += (
            " Read it with care: the forecast gives the enlarged set optimal "
            "(Bayesian-quadrature) weights, while the error now is that of the present weights "
            f"and estimator; a drop from {format_number(now)} to {format_number(first)} at "
            f"{min(extra)} more runs comes mostly from that difference, not from the runs."
        )
    return text


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
        sentence = _forecast_sentence(data, est)
        if sentence:
            fc = h.get("forecast") or {}
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
            blocks += [
                ("h3", "More runs"),
                ("p", sentence),
                ("image", png, f"stated thinning error of {est.name} against the budget", ""),
            ]
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
    for b in blocks:
        kind = b[0]
        if kind == "p":
            out.append(f"{b[1]}\n")
        elif kind == "answer":
            out.append(f"**{b[1]}**\n")
        elif kind == "h3":
            out.append(f"#### {b[1]}\n")
        elif kind == "table":
            out.append(_md_table(b[1]))
        elif kind == "note":
            out.append(f"_{b[1]}_\n")
        elif kind == "box":
            out.append(f"> **{b[2]}:** " + " ".join(f"{x}" for x in _bullets(b[3])) + "\n")
    return out


def _bullets(items: list[str]) -> list[str]:
    return [f"({k + 1}) {x}" if len(items) > 1 else x for k, x in enumerate(items)]


def report_markdown(data: ReportData) -> str:
    """The report as markdown (for a Prefect markdown artifact; pictures are in the HTML)."""
    t = report_tables(data)
    general, own = caution_text(data)
    parts = [
        f"# Collect report: {data.study}\n",
        f"> **Caution.** {general}" + (f"\n>\n> **This study:** {own}" if own else "") + "\n",
        "## Answer\n",
    ]
    if data.estimates:
        for est in data.estimates:
            parts += _md_blocks(_answer_blocks(data, est))
    else:
        parts.append("_no estimates_\n")
    parts += [
        "## Study\n",
        _md_table(t["study"]),
        "## Posterior chain\n",
        _diag_summary(data) + "\n",
        _md_table(t["diagnostics"]),
    ]
    if data.chain_diagnostics is not None and data.chain_diagnostics.messages:
        parts.append("\n".join(f"- {m}" for m in data.chain_diagnostics.messages) + "\n")
    parts += ["## Chosen points\n", _md_table(t["selection_check"]), _md_table(t["points"])]
    parts += ["## Runs\n", _md_table(t["outcomes"])]
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
 margin:12px 0 18px} .caution b{color:#7d4e00} .caution p{margin:4px 0}
.answer{font-size:17px;font-weight:600;margin:14px 0 4px}
.unreliable{border:2px solid #b42318;background:#fef3f2;padding:8px 14px;border-radius:6px;
 margin:6px 0 12px} .unreliable b{color:#b42318}
.warn{border:2px solid #d4a72c;background:#fffbeb;padding:8px 14px;border-radius:6px;
 margin:6px 0 12px} .warn b{color:#7d4e00}
.unreliable ul,.warn ul{margin:4px 0 0;padding-left:20px}
.fail{color:#b42318;font-weight:600} .ok{color:#1a7f37;font-weight:600}
table{border-collapse:collapse;margin:6px 0 12px;font-size:13.5px}
th,td{border:1px solid #d0d7de;padding:4px 8px;vertical-align:top}
th{background:#f0f3f6;text-align:left;font-weight:600}
td.n{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
tr:nth-child(even) td{background:#fafbfc}
.wrap{overflow-x:auto} .note{color:#57606a;font-size:13px}
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


def _html_blocks(blocks: list[tuple]) -> list[str]:
    out = []
    for b in blocks:
        kind = b[0]
        if kind == "p":
            out.append(f"<p>{_h(b[1])}</p>")
        elif kind == "answer":
            out.append(f'<p class="answer">{_h(b[1])}</p>')
        elif kind == "h3":
            out.append(f"<h3>{_h(b[1])}</h3>")
        elif kind == "table":
            out.append(_html_table(b[1]))
        elif kind == "note":
            out.append(f'<p class="note">{_h(b[1])}</p>')
        elif kind == "box":
            _, cls, title, items = b
            out.append(
                f'<div class="{_h(cls)}"><b>{_h(title)}:</b><ul>'
                + "".join(f"<li>{_h(x)}</li>" for x in items)
                + "</ul></div>"
            )
        elif kind == "image":
            _, png, alt, cap = b
            if png is not None:
                out.append(_img(png, alt))
                if cap:
                    out.append(f'<p class="note">{_h(cap)}</p>')
    return out


def _html(data: ReportData) -> str:
    t = report_tables(data)
    nav = [("answer", "answer"), ("study", "study"), ("chain", "chain"), ("points", "points")]
    nav += [("runs", "runs")] + [(f"qoi-{e.name}", e.name) for e in data.estimates]
    if t["weights"]:
        nav.append(("weights", "weights"))
    if data.config_text:
        nav.append(("config", "config"))
    nav.append(("provenance", "provenance"))
    sub = " · ".join(
        x
        for x in (
            f"revision {data.revision}" if data.revision else "",
            f"config {data.config_hash[:12]}" if data.config_hash else "",
            data.created,
        )
        if x
    )
    general, own = caution_text(data)
    body = [
        f"<h1>Collect report: {_h(data.study)}</h1>",
        f'<p class="sub">{_h(sub)}</p>' if sub else "",
        f'<div class="caution"><p><b>Caution.</b> {_h(general)}</p>'
        + (f"<p><b>This study:</b> {_h(own)}</p>" if own else "")
        + "</div>",
        '<p class="note">Sections: '
        + " · ".join(f'<a href="#{_h(a)}">{_h(n)}</a>' for a, n in nav)
        + "</p>",
        '<h2 id="answer">Answer</h2>',
    ]
    if data.estimates:
        for est in data.estimates:
            body += _html_blocks(_answer_blocks(data, est))
    else:
        body.append('<p class="note">No estimates.</p>')
    body += ['<h2 id="study">Study</h2>', _html_table(t["study"])]
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
    if data.chain_samples is not None and len(data.chain_samples):
        chain, draw, note = _trace_rows(data)
        png = trace_plot_png(
            data.chain_samples, data.chain_names, data.chain_units, chain=chain, draw=draw
        )
        if png is not None:
            body += [
                "<h3>Traces</h3>",
                _img(png, "trace of every parameter"),
                f'<p class="note">{_h("Each parameter against the draw number, one colour per chain." + note)}</p>',
            ]
    obs = _observation_parts(data)
    body.append("<h3>The cheap model against the observations</h3>")
    if obs is None:
        body.append(
            '<p class="note">Not shown: this report\'s data hold no observations with the '
            "cheap model's predictions at them.</p>"
        )
    else:
        png, text = obs
        body += [
            _img(png, "cheap model against the observations"),
            f'<p class="note">{_h(text)}</p>',
        ]
    body.append('<h2 id="points">Chosen points</h2>')
    sel = data.selection
    if sel is not None:
        body.append(
            f"<p>{sel.m} points chosen by the {_h(sel.method)} selector with "
            f"{_h(sel.weights_rule)} weights; kernel {_h(sel.kernel)} with bandwidth "
            f"{_fmt(sel.bandwidth)} in standardised coordinates.</p>"
        )
        body.append(_html_table(t["selection_check"]))
        ww = weights_warning(sel.weights)
        if ww:
            body += _html_blocks([_box("warn", "Weights", [ww])])
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
        body.append(f'<h2 id="qoi-{_h(est.name)}">Quantity: {_h(est.name + _u(est.units))}</h2>')
        body += _html_blocks(_qoi_blocks(data, est, t))
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
    estimate with its interval for the posterior expectation, chain-mean interval and errors,
    per axis value; ``exceedance.csv`` and ``quantiles.csv``: with their intervals at the
    stated level; ``uncertainty.csv``: the breakdown of each answer with how each part was
    obtained.
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
        _write_csv(out / "quantiles.csv", t["quantiles"]),
        _write_csv(out / "uncertainty.csv", t["uncertainty"]),
    ]
