"""Run store section ``chain`` (with its diagnostics) and sampler ``checkpoints`` (private).

Columns and attributes come from the tables ``CHAIN``, ``DIAGNOSTICS`` and
``PARAMETER_DIAGNOSTICS`` of :mod:`._tables`; layout in ``docs/store-layout.md``.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import h5py
import numpy as np

from winnow.tasks.records import Chain, Diagnostics

from ._columns import (
    build_group,
    build_row,
    group_attrs,
    put_column,
    write_columns,
    write_group_datasets,
)
from ._h5 import (
    TEXT,
    attr_json,
    from_json,
    get_array,
    get_text,
    get_texts,
    need,
    now_iso,
    put_array,
    put_group,
    put_text,
    safe_name,
    to_json,
)
from ._hashes import hash_object
from ._tables import CHAIN, DIAGNOSTICS, PARAMETER_DIAGNOSTICS


def validate_chain(chain: Chain) -> None:
    if not isinstance(chain, Chain):
        raise TypeError(f"chain must be a Chain, got {type(chain).__name__}")
    s = np.asarray(chain.samples)
    if s.ndim != 2:
        raise ValueError(f"chain.samples must have shape (n, d), got shape {s.shape}")
    n, d = s.shape
    for fld in ("names", "units"):
        v = getattr(chain, fld)
        if len(v) != d:
            raise ValueError(f"chain.{fld} must have length d={d}, got {len(v)}")
    for fld in ("chain_index", "draw_index") + (
        ("log_density",) if chain.log_density is not None else ()
    ):
        v = np.asarray(getattr(chain, fld))
        if v.shape != (n,):
            raise ValueError(f"chain.{fld} must have shape ({n},), got {v.shape}")


def write_chain(rev: h5py.Group, chain: Chain, digest: str) -> None:
    g = put_group(
        rev,
        "chain",
        "posterior sample flattened to rows, in the user's units",
        **group_attrs(CHAIN, chain),
        sha256=digest,
    )
    put_array(
        g,
        "samples",
        chain.samples,
        units=list(chain.units),
        description="posterior draws, one row per draw, one column per parameter",
        names=list(chain.names),
    )
    write_group_datasets(g, CHAIN, chain)
    if chain.diagnostics is not None:
        write_diagnostics(g, chain.diagnostics)


def write_diagnostics(parent: h5py.Group, diag: Diagnostics) -> None:
    if not isinstance(diag, Diagnostics):
        raise TypeError(f"chain.diagnostics must be Diagnostics, got {type(diag).__name__}")
    g = put_group(
        parent,
        "diagnostics",
        "convergence diagnostics per parameter (Vehtari et al. 2021 definitions)",
        **group_attrs(DIAGNOSTICS, diag),
        sha256=hash_object(diag),
    )
    names = list(diag.parameters)
    put_column(g, "parameter", names, TEXT, "parameter name of each row")
    write_columns(g, PARAMETER_DIAGNOSTICS, [diag.parameters[n] for n in names])
    write_group_datasets(g, DIAGNOSTICS, diag)


def read_diagnostics(g: h5py.Group) -> Diagnostics:
    names = get_texts(need(g, "parameter"))
    cols = {c.name: get_array(need(g, c.name)) for c in PARAMETER_DIAGNOSTICS.columns}
    if PARAMETER_DIAGNOSTICS.extra in g:
        cols[PARAMETER_DIAGNOSTICS.extra] = get_array(g[PARAMETER_DIAGNOSTICS.extra])
    params = {n: build_row(PARAMETER_DIAGNOSTICS, cols, i, g.name) for i, n in enumerate(names)}
    return build_group(DIAGNOSTICS, g, parameters=params)


def read_chain(rev: h5py.Group) -> Chain:
    g = need(rev, "chain")
    s = need(g, "samples")
    return build_group(
        CHAIN,
        g,
        samples=get_array(s),
        names=tuple(str(x) for x in s.attrs["names"]),
        units=tuple(str(x) for x in s.attrs["units"]),
        diagnostics=read_diagnostics(g["diagnostics"]) if "diagnostics" in g else None,
    )


# ------------------------------------------------------------------------------------------
# checkpoints
# ------------------------------------------------------------------------------------------
def write_checkpoint(rev: h5py.Group, name: str, state: Mapping[str, Any]) -> None:
    if not isinstance(state, Mapping):
        raise TypeError(f"checkpoint state must be a dict, got {type(state).__name__}")
    keys = list(state)
    for k in keys:
        if not isinstance(k, str):
            raise TypeError(f"checkpoint keys must be str, got {k!r}")
    arrays = {
        k: v for k, v in state.items() if isinstance(v, np.ndarray) and v.dtype.kind in "biufc"
    }
    others = {k: v for k, v in state.items() if k not in arrays}
    parent = (
        rev["checkpoints"]
        if "checkpoints" in rev
        else put_group(rev, "checkpoints", "sampler checkpoints (resume state), one group per name")
    )
    g = put_group(
        parent,
        safe_name(name),
        f"checkpoint {name!r}",
        name=name,
        keys=to_json(keys),
        saved=now_iso(),
        sha256=hash_object(dict(state)),
    )
    for k, v in arrays.items():
        put_array(g, safe_name(k), v, units="sampler-defined", description=f"state entry {k!r}")
    put_text(
        g,
        "values_json",
        to_json(others, f"checkpoint {name!r}"),
        description="non-array state entries (tagged JSON)",
    )


def read_checkpoint(rev: h5py.Group, name: str) -> dict[str, Any] | None:
    if "checkpoints" not in rev or safe_name(name) not in rev["checkpoints"]:
        return None
    g = rev["checkpoints"][safe_name(name)]
    others = from_json(get_text(need(g, "values_json")))
    out = {}
    for k in attr_json(g, "keys"):
        out[k] = others[k] if k in others else get_array(need(g, safe_name(k)))
    return out
