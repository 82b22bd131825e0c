"""Run store sections written with a revision: ``config``, ``inputs``, ``observations`` and
``provenance`` (private). Layout in ``docs/store-layout.md``.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from ._h5 import (
    TEXT,
    StoreFormatError,
    _check_text,
    attr_json,
    attr_str,
    get_array,
    get_texts,
    need,
    now_iso,
    put_array,
    put_group,
    put_text,
    safe_name,
    to_json,
)
from ._hashes import hash_config, hash_object


def write_config(rev: h5py.Group, text: str) -> str:
    digest = hash_config(text)
    g = put_group(rev, "config", "study configuration (YAML text) exactly as given", sha256=digest)
    put_text(g, "text", _check_text(text, "config text", False), description="YAML config text")
    return digest


def write_inputs(rev: h5py.Group, inputs: Mapping[str, tuple[Path, str, int]]) -> str:
    """``inputs`` maps a name to (absolute path, sha256, size in bytes)."""
    names = list(inputs)
    hashes = {k: inputs[k][1] for k in names}
    digest = hash_object(hashes)
    g = put_group(
        rev, "inputs", "SHA-256 of each input file when the revision was made", sha256=digest
    )
    put_array(g, "name", np.array(names, dtype=object), units=TEXT, description="input name")
    put_array(
        g,
        "path",
        np.array([str(inputs[k][0]) for k in names], dtype=object),
        units=TEXT,
        description="absolute path of the input file when hashed",
    )
    put_array(
        g,
        "sha256",
        np.array([inputs[k][1] for k in names], dtype=object),
        units=TEXT,
        description="SHA-256 (hex) of the file's bytes",
    )
    put_array(
        g,
        "size_bytes",
        np.array([inputs[k][2] for k in names], dtype=np.int64),
        units="byte",
        description="file size",
    )
    return digest


def read_inputs(rev: h5py.Group) -> dict[str, dict[str, Any]]:
    g = need(rev, "inputs")
    names = get_texts(need(g, "name"))
    paths = get_texts(need(g, "path"))
    hashes = get_texts(need(g, "sha256"))
    sizes = get_array(need(g, "size_bytes"))
    if not len(names) == len(paths) == len(hashes) == len(sizes):
        raise StoreFormatError(f"{g.name}: columns have different lengths")
    return {
        n: {"path": p, "sha256": h, "size_bytes": int(s)}
        for n, p, h, s in zip(names, paths, hashes, sizes, strict=True)
    }


def normalise_observations(obs: Any) -> tuple[str, dict[str, np.ndarray], str]:
    """(form, columns, structured dtype descr as JSON) of an observation table."""
    if isinstance(obs, Mapping):
        cols = {}
        for k, v in obs.items():
            if not isinstance(k, str):
                raise TypeError(f"observation column names must be str, got {k!r}")
            cols[k] = np.asarray(v)
        return "dict", cols, ""
    arr = np.asarray(obs)
    if arr.dtype.names is not None:
        nested = [n for n in arr.dtype.names if arr.dtype[n].names is not None]
        if nested:
            raise TypeError(
                f"observations: column(s) {', '.join(map(repr, nested))} are themselves "
                "structured; give a table of flat columns"
            )
        cols = {n: np.ascontiguousarray(arr[n]) for n in arr.dtype.names}
        return "structured", cols, to_json(np.lib.format.dtype_to_descr(arr.dtype))
    return "array", {"values": arr}, ""


def write_observations(
    rev: h5py.Group, obs: Any, units: Mapping[str, str] | None, source: str
) -> str:
    form, cols, descr = normalise_observations(obs)
    digest = hash_object(cols)
    g = put_group(
        rev,
        "observations",
        "observation table copied from the observation file, one dataset per column",
        form=form,
        columns=list(cols),
        dtype_descr=descr,
        source=source,
        sha256=digest,
    )
    units = dict(units or {})
    for name, col in cols.items():
        put_array(
            g,
            safe_name(name),
            col,
            units=units.get(name, "as in the observation file"),
            description=f"observation column {name!r}",
            column=name,
        )
    return digest


def read_observations(rev: h5py.Group) -> Any:
    g = need(rev, "observations")
    form = attr_str(g, "form")
    names = [str(x) for x in g.attrs["columns"]]
    cols = {n: get_array(need(g, safe_name(n))) for n in names}
    if form == "dict":
        return cols
    if form == "array":
        return cols["values"]
    descr = attr_json(g, "dtype_descr")
    dtype = np.lib.format.descr_to_dtype(descr)
    n = len(next(iter(cols.values()))) if cols else 0
    out = np.empty(n, dtype=dtype)
    for name in names:
        out[name] = cols[name]
    return out


def write_provenance(rev: h5py.Group, versions: Mapping[str, str], flow_run_id: str) -> None:
    g = put_group(
        rev,
        "provenance",
        "content hashes of this revision's sections and the software that wrote it",
        flow_run_id=flow_run_id,
        **dict(versions),
    )
    for sec in ("config", "inputs", "observations", "chain", "selection", "runs", "results"):
        g.attrs[f"{sec}_sha256"] = ""


def set_provenance_hash(rev: h5py.Group, section: str, digest: str) -> None:
    rev["provenance"].attrs[f"{section}_sha256"] = digest


def read_provenance(rev: h5py.Group) -> dict[str, Any]:
    g = need(rev, "provenance")
    out: dict[str, Any] = {}
    for k in g.attrs:
        if k == "description":
            continue
        v = g.attrs[k]
        out[k] = v.decode() if isinstance(v, bytes) else (str(v) if isinstance(v, str) else v)
    out["flow_run_id"] = out.get("flow_run_id") or None
    out["revision"] = rev.name.rsplit("/", 1)[-1]
    return out


def stamp(group: h5py.Group, winnow_version: str) -> None:
    group.attrs["written"] = now_iso()
    group.attrs["winnow_version"] = winnow_version
