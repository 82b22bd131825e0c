"""Run store section ``results``: QoI values of every run and their estimates (private).

Columns and attributes come from the tables ``QOI_VALUE`` and ``QOI_ESTIMATE`` of
:mod:`._tables`; the values' flat data and the estimates' keyed arrays (quantiles,
exceedance, uncertainty) are written here. Layout in ``docs/store-layout.md``.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from typing import Any

import h5py
import numpy as np

from winnow.tasks.records import QoIEstimate, QoIValue

from ._columns import (
    build_group,
    build_row,
    group_attrs,
    put_column,
    write_columns,
    write_group_datasets,
)
from ._h5 import (
    ONE,
    StoreFormatError,
    attr_json,
    get_array,
    need,
    put_array,
    put_group,
    restore_form,
    to_json,
)
from ._hashes import hash_object
from ._tables import QOI_ESTIMATE, QOI_VALUE

# the keyed arrays of an estimate: subgroup, units (None: the QoI's), group and entry text
_KEYED = (
    (
        "quantiles",
        None,
        "weighted quantiles keyed by probability (attribute key)",
        "weighted quantile at probability",
    ),
    (
        "exceedance",
        ONE,
        "weighted exceedance probability keyed by threshold (attribute key)",
        "probability that the QoI exceeds",
    ),
    (
        "uncertainty",
        None,
        "standard errors or gaps by source (attribute key)",
        "uncertainty from source",
    ),
)


def validate_results(values: Sequence[QoIValue], estimates: Sequence[QoIEstimate]) -> None:
    for i, v in enumerate(values):
        if not isinstance(v, QoIValue):
            raise TypeError(f"values[{i}] must be a QoIValue, got {type(v).__name__}")
    for i, e in enumerate(estimates):
        if not isinstance(e, QoIEstimate):
            raise TypeError(f"estimates[{i}] must be a QoIEstimate, got {type(e).__name__}")


def _put_array_dict(
    parent: h5py.Group, name: str, d: Mapping[Any, Any], units: Any, desc: str, what: str
) -> None:
    g = put_group(parent, name, desc, count=len(d))
    for i, (k, v) in enumerate(d.items()):
        put_array(
            g,
            f"k{i:04d}",
            v,
            units=units,
            description=f"{what} {k!r}",
            key=to_json(k, f"{name} key"),
        )


def _get_array_dict(g: h5py.Group) -> dict[Any, np.ndarray]:
    out = {}
    for i in range(int(g.attrs["count"])):
        ds = need(g, f"k{i:04d}")
        out[attr_json(ds, "key")] = get_array(ds)
    return out


def write_values(g: h5py.Group, values: Sequence[QoIValue]) -> None:
    vg = put_group(g, "values", "one row per (run, QoI) pair", count=len(values))
    write_columns(vg, QOI_VALUE, values)
    flat = [np.asarray(v.value).ravel() for v in values]
    starts = np.cumsum([0] + [f.size for f in flat])[:-1] if flat else np.zeros(0, np.int64)
    put_column(
        vg,
        "value_start",
        [int(s) for s in starts],
        ONE,
        "offset of each value's first element in value_data",
        np.int64,
    )
    data = np.concatenate([f.astype(np.float64) for f in flat]) if flat else np.zeros(0)
    put_array(
        vg,
        "value_data",
        data,
        units="QoI units (see estimates)",
        description="all values, flattened and concatenated (NaN when not ok)",
    )


def write_results(
    rev: h5py.Group, values: Sequence[QoIValue], estimates: Sequence[QoIEstimate], digest: str
) -> None:
    g = put_group(
        rev, "results", "QoI values read from each run and their weighted estimates", sha256=digest
    )
    write_values(g, values)
    eg = put_group(
        g, "estimates", "weighted estimate of each QoI, one group per QoI", count=len(estimates)
    )
    for i, e in enumerate(estimates):
        q = put_group(
            eg, f"e{i:04d}", f"weighted estimate of QoI {e.name!r}", **group_attrs(QOI_ESTIMATE, e)
        )
        write_group_datasets(q, QOI_ESTIMATE, e)
        for name, units, desc, what in _KEYED:
            _put_array_dict(q, name, getattr(e, name), units or e.units, desc, what)


def read_values(g: h5py.Group) -> list[QoIValue]:
    vg = need(g, "values")
    cols = {k: get_array(v) for k, v in vg.items()}
    n = int(vg.attrs["count"])
    for k, v in cols.items():
        if k != "value_data" and len(v) != n:
            raise StoreFormatError(f"{vg.name}: column {k!r} has {len(v)} rows, expected {n}")
    data = cols["value_data"]
    values = []
    for i in range(n):
        s, c = int(cols["value_start"][i]), int(cols["value_count"][i])
        if s < 0 or s + c > data.size:
            raise StoreFormatError(f"{vg.name}: value {i} lies outside value_data")
        shape = tuple(json.loads(cols["value_shape"][i]))
        val = data[s : s + c].reshape(shape).astype(np.dtype(str(cols["value_dtype"][i])))
        if "value_form" in cols:
            val = restore_form(val, str(cols["value_form"][i]))
        values.append(build_row(QOI_VALUE, cols, i, vg.name, value=val))
    return values


def read_results(rev: h5py.Group) -> tuple[list[QoIValue], list[QoIEstimate]]:
    g = need(rev, "results")
    values = read_values(g)
    eg = need(g, "estimates")
    estimates = []
    for i in range(int(eg.attrs["count"])):
        q = need(eg, f"e{i:04d}")
        keyed = {name: _get_array_dict(need(q, name)) for name, *_ in _KEYED}
        estimates.append(build_group(QOI_ESTIMATE, q, **keyed))
    return values, estimates


def hash_results(values: Sequence[QoIValue], estimates: Sequence[QoIEstimate]) -> str:
    return hash_object({"values": list(values), "estimates": list(estimates)})
