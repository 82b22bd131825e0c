"""Checks of the collect report with stated rules (shared with the command line): the
representation and weights warnings, the MMD of the chosen points beside random subsets, and
the caution text.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from winnow.tasks.records import QoIEstimate

from ._report_plots import format_number
from ._report_text import (
    _SCALE_ROWS,
    CAUTION,
    RANDOM_SUBSETS,
    REPRESENTATION_RULE,
    WEIGHTS_RULE,
    _num,
)

if TYPE_CHECKING:
    from ._collect import ReportData

__all__ = ["caution_text", "random_subset_mmd", "representation_warning", "weights_warning"]


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
