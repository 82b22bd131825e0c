"""Fixed texts of the collect report (the caution, the stated rules) and the helpers that
format numbers, units, levels and intervals for every renderer.

Every number is printed by one helper (:func:`._report_plots.format_number`, 4 significant
digits) and every interval names its level and what it is an interval for.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from winnow.tasks.records import QoIEstimate

from ._headline import LEVEL
from ._report_plots import format_number

if TYPE_CHECKING:
    from ._collect import ReportData

__all__ = ["CAUTION", "REPRESENTATION_RULE", "WEIGHTS_RULE"]


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
