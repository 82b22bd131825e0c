"""The HDF5 run store: one file per study holding the chain, the selection, every run and
the estimates, with hashes for provenance.
"""

from __future__ import annotations

from ._api import (
    SCHEMA_VERSION,
    CheckReport,
    RunStore,
    RunStoreReader,
    RunStoreWriter,
    SchemaVersionError,
    StoreBusyError,
    StoreFormatError,
    check,
    diff,
    hash_config,
    hash_file,
    inputs_changed,
    load_report_data,
    status,
    to_strict_json,
    trace,
)

__all__ = [
    "CheckReport",
    "RunStore",
    "RunStoreReader",
    "RunStoreWriter",
    "SCHEMA_VERSION",
    "SchemaVersionError",
    "StoreBusyError",
    "StoreFormatError",
    "check",
    "diff",
    "hash_config",
    "hash_file",
    "inputs_changed",
    "load_report_data",
    "status",
    "to_strict_json",
    "trace",
]
