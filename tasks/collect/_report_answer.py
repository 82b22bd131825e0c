"""The answer of one QoI in the collect report: the headline estimate and interval, the
estimator and why it was chosen, and what more runs would buy.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from winnow.tasks.records import QoIEstimate

from ._report_checks import representation_warning
from ._report_plots import format_number
from ._report_text import (
    _RULE_NAMES,
    _axis_of,
    _components,
    _finite,
    _fmt,
    _interval,
    _is_vector,
    _level,
    _lvl,
    _num,
    _sp,
    _u,
    _where,
)
from ._uncertainty import margin

if TYPE_CHECKING:
    from ._collect import ReportData


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
