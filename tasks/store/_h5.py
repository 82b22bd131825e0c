"""HDF5 primitives of the run store (private): constants, errors, tagged JSON and the
dataset helpers that give every dataset ``units``, ``description`` and ``sha256``.

Every other module of the store builds on these; ``docs/store-layout.md`` ("Conventions")
documents what they write.
"""

from __future__ import annotations

import base64
import json
import math
import re
from datetime import UTC, datetime
from pathlib import Path, PurePath
from typing import Any
from urllib.parse import quote, unquote

import h5py
import numpy as np

from ._hashes import hash_dataset_content

SCHEMA_VERSION = 1
# Oldest format that stores attributes above 64 KiB (dense attribute storage, HDF5 1.8).
LIBVER = ("v108", "latest")
STR = h5py.string_dtype("utf-8")
REV_RE = re.compile(r"^r(\d{4,})$")
# Sections of a revision, upstream first. Writing one removes those downstream of it.
DOWNSTREAM = {
    "chain": ("selection", "runs", "results"),
    "selection": ("runs", "results"),
    "runs": ("results",),
    "results": (),
}
TEXT = "text"  # the ``units`` of a dataset holding strings
ONE = "1"  # the ``units`` of a dimensionless number


class StoreBusyError(RuntimeError):
    """Another process holds the store's writer lock."""


class SchemaVersionError(ValueError):
    """The store was written with a newer schema than this winnow reads."""


class StoreFormatError(ValueError):
    """The file is not a winnow run store, or its structure is damaged."""


# The errors are known by the module that gathers the store's layout (the command line tells
# bad input from bugs by their module and name; pickles name it): keep that name.
for _cls in (StoreBusyError, SchemaVersionError, StoreFormatError):
    _cls.__module__ = "winnow.tasks.store._core"


def now_iso() -> str:
    """Current UTC time as ISO 8601 with seconds."""
    return datetime.now(UTC).isoformat(timespec="seconds")


def iso_from_unix(t: float) -> str:
    if not math.isfinite(t):
        return ""
    return datetime.fromtimestamp(t, UTC).isoformat(timespec="milliseconds")


# ------------------------------------------------------------------------------------------
# tagged JSON: exact round trip of dicts holding arrays, numpy scalars, tuples, NaN, ...
# ------------------------------------------------------------------------------------------
_TAGS = ("__float__", "__np__", "__ndarray__", "__tuple__", "__dict__", "__path__", "__bytes__")


def _enc(obj: Any, where: str) -> Any:
    if obj is None or isinstance(obj, bool | str):
        return obj
    if isinstance(obj, np.generic):
        if obj.dtype.kind in "OV":
            raise TypeError(f"{where}: cannot store a numpy {obj.dtype} scalar")
        return {"__np__": obj.dtype.str, "b64": base64.b64encode(obj.tobytes()).decode()}
    if isinstance(obj, int):
        return obj
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else {"__float__": repr(obj)}
    if isinstance(obj, np.ndarray):
        if obj.dtype.kind == "O" or obj.dtype.names is not None:
            raise TypeError(f"{where}: cannot store an array of dtype {obj.dtype}")
        return {
            "__ndarray__": obj.dtype.str,
            "shape": list(obj.shape),
            "b64": base64.b64encode(np.ascontiguousarray(obj).tobytes()).decode(),
        }
    if isinstance(obj, tuple):
        return {"__tuple__": [_enc(v, f"{where}[{i}]") for i, v in enumerate(obj)]}
    if isinstance(obj, list):
        return [_enc(v, f"{where}[{i}]") for i, v in enumerate(obj)]
    if isinstance(obj, dict):
        if all(isinstance(k, str) and not k.startswith("__") for k in obj):
            return {k: _enc(v, f"{where}[{k!r}]") for k, v in obj.items()}
        return {"__dict__": [[_enc(k, where), _enc(v, f"{where}[{k!r}]")] for k, v in obj.items()]}
    if isinstance(obj, PurePath):
        return {"__path__": str(obj), "kind": type(obj).__name__}
    if isinstance(obj, bytes):
        return {"__bytes__": base64.b64encode(obj).decode()}
    raise TypeError(f"{where}: cannot store a value of type {type(obj).__name__}")


def _dec(obj: Any) -> Any:
    if isinstance(obj, list):
        return [_dec(v) for v in obj]
    if not isinstance(obj, dict):
        return obj
    tag = next((t for t in _TAGS if t in obj), None)
    if tag is None:
        return {k: _dec(v) for k, v in obj.items()}
    if tag == "__float__":
        return float(obj[tag])
    if tag == "__np__":
        return np.frombuffer(base64.b64decode(obj["b64"]), dtype=np.dtype(obj[tag]))[0]
    if tag == "__ndarray__":
        raw = base64.b64decode(obj["b64"])
        arr = np.frombuffer(raw, dtype=np.dtype(obj[tag])).reshape(obj["shape"])
        return arr.copy()  # writable, owns its memory
    if tag == "__tuple__":
        return tuple(_dec(v) for v in obj[tag])
    if tag == "__dict__":
        return {_freeze(_dec(k)): _dec(v) for k, v in obj[tag]}
    if tag == "__path__":
        return (
            Path(obj[tag])
            if obj.get("kind", "") in ("PosixPath", "WindowsPath", "Path")
            else (PurePath(obj[tag]))
        )
    return base64.b64decode(obj["__bytes__"])


def _freeze(k: Any) -> Any:
    return tuple(_freeze(v) for v in k) if isinstance(k, list) else k


def to_json(obj: Any, where: str = "value") -> str:
    """Encode ``obj`` as strict JSON with type tags so that :func:`from_json` returns an
    equal object (NaN, numpy arrays and scalars, tuples, non-string keys included)."""
    return json.dumps(_enc(obj, where), ensure_ascii=False, allow_nan=False)


def from_json(text: str) -> Any:
    return _dec(json.loads(text))


# ------------------------------------------------------------------------------------------
# low-level dataset helpers: every dataset gets units, description and sha256
# ------------------------------------------------------------------------------------------
def _attr_value(v: Any) -> Any:
    if isinstance(v, list | tuple):
        return np.array([str(x) for x in v], dtype=STR)
    return v


def put_group(parent: h5py.Group, name: str, description: str, /, **attrs: Any) -> h5py.Group:
    """Create (replacing) a subgroup with a ``description`` and further attributes."""
    if name in parent:
        del parent[name]
    g = parent.create_group(name)
    g.attrs["description"] = description
    for k, v in attrs.items():
        g.attrs[k] = _attr_value(v)
    return g


def _check_text(s: str, where: str, lossy_nul: bool) -> str:
    if not isinstance(s, str):
        raise TypeError(f"{where} must be str, got {type(s).__name__}")
    if "\x00" in s:
        if lossy_nul:
            return s.replace("\x00", "\ufffd")
        raise ValueError(f"{where} contains a NUL character, which HDF5 text cannot hold")
    return s


def value_form(x: Any) -> str:
    """How an array-valued record field was given, so it reads back as the same kind of
    object: ``""`` for an ndarray, else ``numpy_scalar``, ``float``, ``int``, ``bool``,
    ``complex`` or ``list``."""
    if isinstance(x, np.ndarray):
        return ""
    if isinstance(x, np.generic):
        return "numpy_scalar"
    for t in (bool, int, float, complex, list):
        if isinstance(x, t):
            return t.__name__
    return ""


def restore_form(arr: np.ndarray, form: str) -> Any:
    """Inverse of :func:`value_form` applied to the stored array."""
    if not form:
        return arr
    if form == "numpy_scalar":
        return arr[()]
    if form == "list":
        return arr.tolist()
    return {"bool": bool, "int": int, "float": float, "complex": complex}[form](arr[()])


def put_array(
    group: h5py.Group,
    name: str,
    data: Any,
    /,
    *,
    units: Any,
    description: str,
    lossy_nul: bool = False,
    **attrs: Any,
) -> h5py.Dataset:
    """Store an array (numeric, bool, or text) with its metadata and content digest.

    The original numpy dtype is kept in the ``numpy_dtype`` attribute so that text arrays
    (``<U``, object) and datetimes read back with the dtype they were written with.
    """
    arr = np.asarray(data)
    where = f"{group.name}/{name}"
    kind = arr.dtype.kind
    if arr.dtype.names is not None:
        raise TypeError(f"{where}: structured arrays are stored column by column")
    if kind in "UO":
        flat = [_check_text(str(x) if kind == "U" else x, where, lossy_nul) for x in arr.ravel()]
        stored = np.empty(arr.shape, dtype=object)
        if arr.size:
            stored.ravel()[:] = flat
        ds = group.create_dataset(name, data=stored, dtype=STR)
    elif kind in "Mm":
        stored = arr.view(np.int64)
        ds = group.create_dataset(name, data=stored)
    elif kind in "biufcS":
        stored = arr
        ds = group.create_dataset(name, data=stored)
    else:
        raise TypeError(f"{where}: cannot store an array of dtype {arr.dtype}")
    ds.attrs["units"] = _attr_value(units)
    ds.attrs["description"] = description
    ds.attrs["numpy_dtype"] = arr.dtype.str if kind != "O" else "object"
    if value_form(data):
        ds.attrs["python_form"] = value_form(data)
    for k, v in attrs.items():
        ds.attrs[k] = _attr_value(v)
    ds.attrs["sha256"] = hash_dataset_content(stored)
    return ds


def put_text(group: h5py.Group, name: str, text: str, *, description: str, **attrs: Any) -> None:
    put_array(
        group, name, np.array(text, dtype=object), units=TEXT, description=description, **attrs
    )


def get_array(ds: h5py.Dataset) -> Any:
    """Read a dataset written by :func:`put_array`: same dtype, and the same kind of object
    (ndarray, numpy scalar, Python number or list) as was given."""
    return restore_form(_get_ndarray(ds), str(ds.attrs.get("python_form", "")))


def _get_ndarray(ds: h5py.Dataset) -> np.ndarray:
    nd = str(ds.attrs.get("numpy_dtype", ""))
    if h5py.check_string_dtype(ds.dtype) is not None:
        raw = ds.asstr()[()]
        if nd == "object":
            out = np.empty(ds.shape, dtype=object)
            if out.size:
                out.ravel()[:] = list(np.asarray(raw, dtype=object).ravel())
            return out
        return np.asarray(raw, dtype=np.dtype(nd) if nd else str)
    arr = ds[()]
    arr = np.asarray(arr)
    if nd and np.dtype(nd).kind in "Mm":
        return arr.view(np.dtype(nd))
    if nd and np.dtype(nd) != arr.dtype:
        return arr.astype(np.dtype(nd))
    return arr


def get_texts(ds: h5py.Dataset) -> list[str]:
    return [str(x) for x in np.asarray(ds.asstr()[()], dtype=object).ravel()]


def get_text(ds: h5py.Dataset) -> str:
    return str(ds.asstr()[()])


def attr_str(obj: h5py.HLObject, name: str, default: str | None = None) -> str:
    if name not in obj.attrs:
        if default is None:
            raise StoreFormatError(f"{obj.name}: attribute {name!r} is missing")
        return default
    v = obj.attrs[name]
    return v.decode() if isinstance(v, bytes) else str(v)


def attr_json(obj: h5py.HLObject, name: str) -> Any:
    return from_json(attr_str(obj, name))


def need(group: h5py.Group, name: str) -> Any:
    if name not in group:
        raise StoreFormatError(f"{group.name}/{name} is missing")
    return group[name]


def safe_name(key: str) -> str:
    """An HDF5 member name for an arbitrary string key (``/`` and ``.`` are escaped)."""
    n = quote(key, safe=" -_+,;:=@()[]{}'")
    return "%2E" if n == "." else ("%2E%2E" if n == ".." else (n or "%00empty"))


def unsafe_name(name: str) -> str:
    return "" if name == "%00empty" else unquote(name)
