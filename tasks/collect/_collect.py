"""Collect stage: read each quantity of interest from the runs, estimate it with an honest
error bar, and report.

Reading
    :func:`read_qoi` takes one QoI out of one run folder with a JSON, CSV, HDF5, regular
    expression or user-function reader and never raises for bad output: a missing,
    unparsable or non-finite value, or a failed run, is recorded with its status and reason
    and left out of the estimates. :func:`read_qois` does it for every run and QoI.
Estimating
    :func:`estimate_qoi` gives the weighted posterior-predictive mean, sd, quantiles
    (:func:`weighted_quantile`) and exceedance probabilities, and the error of the estimate by
    source: thinning gap of the cheap model, multi-fidelity control-variate estimate and its
    standard error, bootstrap standard error, and Monte Carlo error of the chain.
Reporting
    :class:`ReportData` gathers everything a report shows; :func:`build_report` writes a
    self-contained HTML file, :func:`report_markdown` and :func:`report_tables` give the same
    content for Prefect artifacts, :func:`export_csv` writes the chosen points and results.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from winnow.tasks.records import Diagnostics, QoIEstimate, QoIValue, RunOutcome, Selection

from ._estimates import UNCERTAINTY_LABELS, estimate_qoi
from ._readers import QoIReadError, read_axis, read_qoi, validate_qoi_spec
from ._report_checks import representation_warning
from ._report_csv import export_csv
from ._report_page import build_report, report_markdown
from ._report_tables import report_tables
from ._report_text import CAUTION as GENERAL_CAUTION
from ._uncertainty import ChainGeometry, fit_error_model
from ._weighted import bootstrap_mean_se, chain_ess, kish_ess, weighted_mean_sd, weighted_quantile

__all__ = [
    "GENERAL_CAUTION",
    "UNCERTAINTY_LABELS",
    "ChainGeometry",
    "QoIReadError",
    "ReportData",
    "bootstrap_mean_se",
    "build_report",
    "chain_ess",
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


@dataclass
class ReportData:
    """Everything the collect report shows, as plain values (no store handle).

    Attributes
    ----------
    study : str
        Study name.
    revision : str
        Store revision the report describes.
    config_hash : str
        Hash of the study config; ``config_text`` is the config file itself.
    description : str
        One line on what the study predicts.
    chain_names, chain_units : tuple of str, length d
        Parameter names and units.
    chain_diagnostics : Diagnostics or None
        Convergence diagnostics of the chain.
    chain_samples : ndarray, shape (k, d), or None
        Chain rows for plotting (may be a subsample); ``chain_rows`` is the full row count.
    chain_source : str
        Where the chain came from (``sampled:...`` or ``imported:...``).
    selection : Selection or None
        The chosen points and weights.
    point_run_ids : tuple of str
        Run id of each chosen point, in selection order (optional; links points to runs).
    outcomes : list of RunOutcome
    qoi_values : list of QoIValue
        Every value read (all runs, all QoIs), including those left out.
    estimates : list of QoIEstimate
    qoi_axes : dict of str to dict
        For vector QoIs: ``{qoi name: {"name", "units", "values"}}``.
    qoi_descriptions : dict of str to str
        Optional one-line description of each QoI.
    reuse_counts : dict of str to int
        E.g. ``{"ran": 20, "reused": 12}``; shown as given.
    provenance : dict
        Versions, host, times, store path...; shown as given.
    created : str
        When the report data was assembled (ISO 8601).
    """

    study: str
    revision: str = ""
    config_hash: str = ""
    config_text: str = ""
    description: str = ""
    chain_names: tuple[str, ...] = ()
    chain_units: tuple[str, ...] = ()
    chain_diagnostics: Diagnostics | None = None
    chain_samples: np.ndarray | None = None
    chain_rows: int = 0
    chain_source: str = ""
    selection: Selection | None = None
    point_run_ids: tuple[str, ...] = ()
    outcomes: list[RunOutcome] = field(default_factory=list)
    qoi_values: list[QoIValue] = field(default_factory=list)
    estimates: list[QoIEstimate] = field(default_factory=list)
    qoi_axes: dict[str, dict[str, Any]] = field(default_factory=dict)
    qoi_descriptions: dict[str, str] = field(default_factory=dict)
    reuse_counts: dict[str, int] = field(default_factory=dict)
    provenance: dict[str, Any] = field(default_factory=dict)
    created: str = ""


def read_qois(
    outcomes: Iterable[RunOutcome], specs: Sequence[Mapping[str, Any]]
) -> dict[str, list[QoIValue]]:
    """Read every QoI of ``specs`` from every run of ``outcomes``.

    The specs are all validated first (a bad spec raises before any file is read). Runs
    whose state is not ``succeeded`` give status ``run_failed``.

    Returns
    -------
    dict of str to list of QoIValue
        Keyed by QoI name, one record per outcome in the order given.
    """
    checked = [validate_qoi_spec(s) for s in specs]
    names = [s["name"] for s in checked]
    if len(set(names)) != len(names):
        raise ValueError(f"specs: QoI names must be distinct, got {names}")
    outcomes = list(outcomes)
    return {
        s["name"]: [read_qoi(o.run_dir, s, run_id=o.run_id, run_state=o.state) for o in outcomes]
        for s in checked
    }
