"""CSV exports of the collect report: the chosen points with their weights and run states,
and every value read.
"""

from __future__ import annotations

import csv
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ._report_tables import report_tables
from ._report_text import _num

if TYPE_CHECKING:
    from ._collect import ReportData

__all__ = ["export_csv"]


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
