"""The column table of each record type the run store holds (private).

One :class:`~._columns.Table` per record of ``records.py``: every dataset and attribute
the record is stored in, with its codec, units, description and the fields it restores.
Writing and reading are driven by these tables (see :mod:`._columns`); ``KNOWN_FIELDS``
is derived from them. A field a table neither stores nor lists in ``linked`` goes to the
record's ``extra_json`` column or attribute. Layout in ``docs/store-layout.md``.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np

from winnow.tasks.records import (
    RUN_STATES,
    Attempt,
    Chain,
    Diagnostics,
    ParameterDiagnostics,
    QoIEstimate,
    QoIValue,
    RunOutcome,
    RunSpec,
    Selection,
)

from ._columns import Column, Table
from ._columns import extra_json as _extra_json
from ._h5 import ONE, TEXT, value_form


def _a(name: str, codec: str, *fields: str, **kw: Any) -> Column:
    """An attribute column (of a record stored as a group)."""
    return Column(name, codec, fields=fields, attr=True, **kw)


_UNIX = "s since 1970-01-01T00:00:00Z"

CHAIN = Table(
    Chain,
    "chain",
    (
        _a("source", "text", "source"),
        _a("n_rows", "int", value=lambda c: c.samples.shape[0]),
        _a("n_parameters", "int", value=lambda c: c.samples.shape[1]),
        _a("has_log_density", "bool", value=lambda c: c.log_density is not None),
        Column("chain_index", "array", ONE, "chain of each row", ("chain_index",)),
        Column(
            "draw_index",
            "array",
            ONE,
            "draw number within its chain, after burn-in",
            ("draw_index",),
        ),
        Column(
            "log_density",
            "array",
            "1 (natural log)",
            "unnormalised log posterior density of each row",
            ("log_density",),
            optional=True,
        ),
    ),
    linked={
        "samples": "dataset samples, with attributes names and units",
        "names": "attribute names of dataset samples",
        "units": "attribute units of dataset samples",
        "diagnostics": "subgroup diagnostics",
    },
)

DIAGNOSTICS = Table(
    Diagnostics,
    "diagnostics",
    (
        _a("n_chains", "int", "n_chains"),
        _a("n_draws", "int", "n_draws"),
        _a("burn_in", "int", "burn_in"),
        _a("burn_in_rule", "text", "burn_in_rule"),
        _a("passed", "bool", "passed"),
        _a("thresholds", "json", "thresholds"),
        _a("details", "json", "details", optional=True),
        Column(
            "acceptance",
            "array",
            ONE,
            "acceptance rate of each chain (NaN when unknown)",
            ("acceptance",),
        ),
        Column("messages", "texts", TEXT, "one line per failed threshold", ("messages",)),
    ),
    linked={"parameters": "table of one row per parameter (column parameter)"},
)

PARAMETER_DIAGNOSTICS = Table(
    ParameterDiagnostics,
    "diagnostics",
    (
        Column(
            "rhat", "float", ONE, "rank-normalised split R-hat (Vehtari et al. 2021)", ("rhat",)
        ),
        Column("ess_bulk", "float", ONE, "bulk effective sample size", ("ess_bulk",)),
        Column(
            "ess_tail",
            "float",
            ONE,
            "tail effective sample size (5% and 95% quantiles)",
            ("ess_tail",),
        ),
        Column(
            "mcse_mean",
            "float",
            "parameter units",
            "Monte Carlo standard error of the mean",
            ("mcse_mean",),
        ),
        Column(
            "mcse_q05",
            "float",
            "parameter units",
            "Monte Carlo standard error of the 5% quantile",
            ("mcse_q05",),
        ),
        Column(
            "mcse_q95",
            "float",
            "parameter units",
            "Monte Carlo standard error of the 95% quantile",
            ("mcse_q95",),
        ),
        Column("mean", "float", "parameter units", "posterior mean", ("mean",)),
        Column("sd", "float", "parameter units", "posterior standard deviation", ("sd",)),
    ),
    extra_description="fields of each row beyond the columns above (tagged JSON)",
)

_SELECTION_EXACT = (
    "bandwidth",
    "n_features",
    "seed",
    "mmd_features",
    "mmd_exact",
    "mmd_exact_rows",
)

SELECTION = Table(
    Selection,
    "selection",
    (
        _a("method", "text", "method"),
        _a("weights_rule", "text", "weights_rule"),
        _a("kernel", "text", "kernel"),
        _a("bandwidth", "float", value=lambda s: s.bandwidth),
        _a("feature_map", "text", "feature_map"),
        _a("n_features", "int", value=lambda s: s.n_features),
        _a("seed", "text", value=lambda s: "none" if s.seed is None else str(int(s.seed))),
        _a("mmd_features", "float", value=lambda s: s.mmd_features),
        _a("mmd_exact", "float", value=lambda s: s.mmd_exact),
        _a("mmd_exact_rows", "int", value=lambda s: s.mmd_exact_rows),
        _a("report", "json", "report"),
        # exact round trip of scalar settings given as numpy scalars or Python numbers
        _a("settings_json", "json", *_SELECTION_EXACT),
        Column(
            "indices", "array", ONE, "row index into the chain of each chosen point", ("indices",)
        ),
        Column(
            "weights",
            "array",
            ONE,
            "weight of each chosen point (non-negative, sum 1)",
            ("weights",),
        ),
    ),
    linked={
        "points": "dataset points, in the chain's units and names",
        "population": "subgroup population, one dataset per member",
    },
)

RUN_SPEC = Table(
    RunSpec,
    "specs",
    (
        Column("run_id", "text", TEXT, "stable id of the run (its folder name)", ("run_id",)),
        Column(
            "point_index", "int", ONE, "row index into the chain", value=lambda s: s.point_index
        ),
        Column(
            "params",
            "json",
            TEXT,
            "parameter values in the user's units (JSON object)",
            ("params",),
        ),
        Column("weight", "float", ONE, "weight of the point", value=lambda s: s.weight),
        Column(
            "spec_json",
            "json",
            TEXT,
            "point_index and weight with their exact Python/numpy types (JSON)",
            ("point_index", "weight"),
        ),
        Column("run_dir", "path", TEXT, "run folder (absolute path)", ("run_dir",)),
        Column(
            "argv", "json", TEXT, "solver command with placeholders filled (JSON array)", ("argv",)
        ),
        Column(
            "deck_hashes",
            "json",
            TEXT,
            "SHA-256 of each rendered deck keyed by its path relative to run_dir (JSON)",
            ("deck_hashes",),
            value=lambda s: dict(s.deck_hashes),
        ),
        Column("key", "text", TEXT, "reuse key: SHA-256 over deck hashes and argv", ("key",)),
    ),
    extra="spec_extra",
    extra_description="RunSpec fields beyond the columns above (tagged JSON)",
)


def _last_exit_status(o: RunOutcome) -> int:
    a = o.attempts[-1] if o.attempts else None
    return a.exit_status if a is not None and a.exit_status is not None else -1


RUN_OUTCOME = Table(
    RunOutcome,
    "outcomes",
    (
        Column(
            "state",
            "text",
            TEXT,
            "how the run ended: " + ", ".join(RUN_STATES) + " ('' when no outcome)",
            ("state",),
            empty="",
        ),
        Column("outcome_key", "text", TEXT, "key recorded by the outcome", ("key",), empty=""),
        Column(
            "outcome_run_dir",
            "json",
            TEXT,
            "run folder recorded by the outcome (JSON path)",
            ("run_dir",),
            empty="",
        ),
        Column(
            "n_attempts", "int", ONE, "number of attempts", value=lambda o: len(o.attempts), empty=0
        ),
        Column(
            "seconds",
            "float",
            "s",
            "wall time summed over attempts",
            value=lambda o: o.seconds,
            empty=0.0,
        ),
        Column(
            "exit_status",
            "int",
            ONE,
            "exit status of the last attempt (-1 when none: killed, not started or no attempt)",
            value=_last_exit_status,
            empty=-1,
        ),
        Column("message", "text", TEXT, "why the run ended so", ("message",), empty=""),
        Column(
            "reused_from",
            "text",
            TEXT,
            "store run reused instead of running ('' when it ran)",
            ("reused_from",),
            empty="",
        ),
        Column(
            "output_hashes",
            "json",
            TEXT,
            "SHA-256 of each output file keyed by its path relative to run_dir (JSON)",
            ("output_hashes",),
            value=lambda o: dict(o.output_hashes),
            empty="{}",
        ),
    ),
    extra="outcome_extra",
    extra_description="RunOutcome fields beyond the columns above (tagged JSON)",
    linked={
        "run_id": "the run_id of its row in runs",
        "attempts": "runs/attempts rows whose run_row is its row",
    },
)

ATTEMPT = Table(
    Attempt,
    "attempts",
    (
        Column("number", "int", ONE, "attempt number", value=lambda a: a.number),
        Column("argv", "json", TEXT, "command run (JSON array)", ("argv",)),
        Column("started", "float", _UNIX, "start time (Unix time)", value=lambda a: a.started),
        Column("ended", "float", _UNIX, "end time (Unix time)", value=lambda a: a.ended),
        Column(
            "exit_status",
            "int",
            ONE,
            "exit status (-1 when none; see exit_status_known)",
            value=lambda a: -1 if a.exit_status is None else a.exit_status,
        ),
        Column(
            "exit_status_known",
            "bool",
            ONE,
            "False when killed on timeout or never started",
            value=lambda a: a.exit_status is not None,
        ),
        Column("timed_out", "bool", ONE, "killed on timeout", ("timed_out",)),
        Column(
            "stdout_tail",
            "text",
            TEXT,
            "last lines of standard output (NUL characters stored as U+FFFD)",
            ("stdout_tail",),
            lossy_nul=True,
        ),
        Column(
            "stderr_tail",
            "text",
            TEXT,
            "last lines of standard error (NUL characters stored as U+FFFD)",
            ("stderr_tail",),
            lossy_nul=True,
        ),
        Column("error", "text", TEXT, "why it could not start, if so", ("error",)),
        Column(
            "exact_json",
            "json",
            TEXT,
            "number, times and exit status with their exact Python/numpy types (JSON)",
            ("number", "started", "ended", "exit_status"),
        ),
    ),
    extra_description="Attempt fields beyond the columns above (tagged JSON)",
)

QOI_VALUE = Table(
    QoIValue,
    "values",
    (
        Column("run_id", "text", TEXT, "run the value was read from", ("run_id",)),
        Column("name", "text", TEXT, "QoI name", ("name",)),
        Column(
            "status", "text", TEXT, "ok, missing, unparsable, nonfinite or run_failed", ("status",)
        ),
        Column("reason", "text", TEXT, "why the value is not ok", ("reason",)),
        Column(
            "value_shape",
            "text",
            TEXT,
            "shape of each value (JSON array; [] for a scalar)",
            value=lambda v: json.dumps(list(np.shape(np.asarray(v.value)))),
        ),
        Column(
            "value_dtype",
            "text",
            TEXT,
            "numpy dtype of each value",
            value=lambda v: np.asarray(v.value).dtype.str,
        ),
        Column(
            "value_form",
            "text",
            TEXT,
            "how each value was given: '' ndarray, numpy_scalar, float, int, bool, list",
            value=lambda v: value_form(v.value),
        ),
        Column(
            "value_count",
            "int",
            ONE,
            "number of elements",
            value=lambda v: np.asarray(v.value).size,
        ),
    ),
    extra_description="QoIValue fields beyond the columns here (tagged JSON)",
    linked={"value": "value_data[value_start : value_start + value_count], reshaped"},
)


def _qoi_units(e: QoIEstimate) -> str:
    return e.units


QOI_ESTIMATE = Table(
    QoIEstimate,
    "estimates",
    (
        _a("name", "text", "name"),
        _a("units", "text", "units"),
        _a("n_used", "int", value=lambda e: e.n_used),
        _a("n_missing", "int", value=lambda e: e.n_missing),
        _a("weights_resolved", "bool", value=lambda e: e.weights_resolved),
        _a("mmd_growth", "float", value=lambda e: e.mmd_growth),
        _a("control_variate", "json", "control_variate"),
        _a("details", "json", "details"),
        _a("exact_json", "json", "n_used", "n_missing", "weights_resolved", "mmd_growth"),
        Column("mean", "array", _qoi_units, "weighted posterior-predictive mean", ("mean",)),
        Column(
            "sd", "array", _qoi_units, "weighted posterior-predictive standard deviation", ("sd",)
        ),
    ),
    linked={
        "quantiles": "subgroup quantiles, one dataset per probability",
        "exceedance": "subgroup exceedance, one dataset per threshold",
        "uncertainty": "subgroup uncertainty, one dataset per source",
    },
)

#: The table of each stored record type, by class name.
TABLES: dict[str, Table] = {
    t.record.__name__: t
    for t in (
        CHAIN,
        DIAGNOSTICS,
        PARAMETER_DIAGNOSTICS,
        SELECTION,
        RUN_SPEC,
        RUN_OUTCOME,
        ATTEMPT,
        QOI_VALUE,
        QOI_ESTIMATE,
    )
}

#: Fields of each record that the layout stores in their own datasets/attributes (derived from
#: the tables). Fields added to a record later (with a default, as records.py asks) are kept in
#: an ``extra_json`` attribute or column, so that a round trip stays exact.
KNOWN_FIELDS: dict[str, frozenset[str]] = {name: t.known for name, t in TABLES.items()}


def extra_json(obj: Any) -> str:
    """Tagged JSON of the fields of ``obj`` that its table does not store on their own."""
    return _extra_json(obj, TABLES[type(obj).__name__].known)
