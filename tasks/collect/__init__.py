"""The collect stage: read the QoIs, make the weighted estimates with their uncertainty
breakdown and the multi-fidelity correction, and write the report.
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
from ._stage import (
    cheap_predictions,
    collect_stage,
)

__all__ = [
    "ChainGeometry",
    "GENERAL_CAUTION",
    "QoIReadError",
    "ReportData",
    "UNCERTAINTY_LABELS",
    "bootstrap_mean_se",
    "build_report",
    "chain_ess",
    "cheap_predictions",
    "collect_stage",
    "estimate_qoi",
    "export_csv",
    "fit_error_model",
    "kish_ess",
    "read_axis",
    "read_qoi",
    "read_qois",
    "report_markdown",
    "report_tables",
    "representation_warning",
    "validate_qoi_spec",
    "weighted_mean_sd",
    "weighted_quantile",
]
