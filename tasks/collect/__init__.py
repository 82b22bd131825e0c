"""The collect stage: read the QoIs, make the weighted estimates with their uncertainty
breakdown and the multi-fidelity correction, and write the report; the multilevel estimate,
the points of each level and the allocation of runs across levels (issue 16).
"""

from __future__ import annotations

from ._collect import (
    GENERAL_CAUTION,
    UNCERTAINTY_LABELS,
    ChainGeometry,
    QoIReadError,
    ReportData,
    bootstrap_mean_se,
    build_report,
    chain_ess,
    estimate_qoi,
    export_csv,
    fit_error_model,
    kish_ess,
    read_axis,
    read_qoi,
    read_qois,
    report_markdown,
    report_tables,
    representation_warning,
    validate_qoi_spec,
    weighted_mean_sd,
    weighted_quantile,
)
from ._multilevel import (
    Allocation,
    LevelContribution,
    LevelValues,
    MultilevelEstimate,
    correction_costs,
    more_runs,
    multilevel_estimate,
    optimal_allocation,
)
from ._multilevel_points import (
    LevelPoints,
    MultilevelPoints,
    extend_levels,
    select_levels,
)
from ._stage import (
    cheap_predictions,
    collect_stage,
)

__all__ = [
    "Allocation",
    "ChainGeometry",
    "GENERAL_CAUTION",
    "LevelContribution",
    "LevelPoints",
    "LevelValues",
    "MultilevelEstimate",
    "MultilevelPoints",
    "QoIReadError",
    "ReportData",
    "UNCERTAINTY_LABELS",
    "bootstrap_mean_se",
    "build_report",
    "chain_ess",
    "cheap_predictions",
    "collect_stage",
    "correction_costs",
    "estimate_qoi",
    "export_csv",
    "extend_levels",
    "fit_error_model",
    "kish_ess",
    "more_runs",
    "multilevel_estimate",
    "optimal_allocation",
    "read_axis",
    "read_qoi",
    "read_qois",
    "report_markdown",
    "report_tables",
    "representation_warning",
    "select_levels",
    "validate_qoi_spec",
    "weighted_mean_sd",
    "weighted_quantile",
]
