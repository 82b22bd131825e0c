"""HDF5 layout, atomic commit and writer lock of the run store (private).

The public face is :mod:`winnow.tasks.store`; ``docs/store-layout.md`` documents every group,
dataset and attribute written here. This module knows how each record maps onto HDF5
(``write_*`` / ``read_*`` functions taking an open revision group), how a change is committed
in one step (copy-on-write + ``os.replace``) and how a single writer is enforced (``flock`` on a
sidecar lock file).
"""

from __future__ import annotations

import base64
import dataclasses
import errno
import fcntl
import json
import math
import os
import re
import shutil
from collections.abc import Callable, Iterator, Mapping, Sequence
from datetime import UTC, datetime
from pathlib import Path, PurePath
from typing import Any
from urllib.parse import quote, unquote

import h5py
import numpy as np

from ._provenance import hash_config, hash_dataset_content, hash_object
from ._provenance import hash_selection as _hash_selection
from .records import (
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


# ------------------------------------------------------------------------------------------
# writer lock
# ------------------------------------------------------------------------------------------
def lock_path(store: Path) -> Path:
    # through symlinks, so that every path to one store shares one lock file
    real = store.resolve()
    return real.with_name(real.name + ".lock")


class WriterLock:
    """Exclusive ``flock`` on ``STORE.lock`` held for a writer's whole session."""

    def __init__(self, store: Path) -> None:
        self.store = store
        self.path = lock_path(store)
        self.fd: int | None = None

    def acquire(self) -> None:
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            if exc.errno not in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                os.close(fd)
                raise
            holder = os.pread(fd, 256, 0).decode("utf-8", "replace").split()
            os.close(fd)
            pid = holder[0] if holder else "unknown"
            since = holder[1] if len(holder) > 1 else "unknown time"
            raise StoreBusyError(
                f"store {self.store} is being written by another process (pid {pid} since {since})"
            ) from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()} {now_iso()}\n".encode(), 0)
        self.fd = fd

    def release(self) -> None:
        if self.fd is None:
            return
        try:
            os.ftruncate(self.fd, 0)
            fcntl.flock(self.fd, fcntl.LOCK_UN)
        finally:
            os.close(self.fd)
            self.fd = None


# ------------------------------------------------------------------------------------------
# atomic commit (copy-on-write)
# ------------------------------------------------------------------------------------------
#: Test hook called with the stage name at each step of a commit ("copied", "applied",
#: "synced", "replaced"); lets a test kill the process between steps.
commit_hook: Callable[[str], None] | None = None


def _hook(stage: str) -> None:
    if commit_hook is not None:
        commit_hook(stage)


def temp_path(store: Path) -> Path:
    return store.with_name(f".{store.name}.tmp-{os.getpid()}")


def _fsync_path(path: Path, directory: bool = False) -> None:
    fd = os.open(path, os.O_RDONLY | (os.O_DIRECTORY if directory else 0))
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def commit(store: Path, apply: Callable[[h5py.File], None], *, new: bool = False) -> None:
    """Apply ``apply`` to a copy of ``store`` and move the copy over it in one step.

    The copy lives in the same folder (``.STORE.tmp-<pid>``), is flushed, closed and
    fsynced before ``os.replace``; the folder is fsynced after. A crash at any point leaves
    either the old file or the new one; a leftover temp file is removed on the next open.
    With ``new=True`` the temp file starts empty (store creation).
    """
    store = store.resolve()  # replace a symlink's target, never the symlink itself
    tmp = temp_path(store)
    try:
        if not new:
            shutil.copyfile(store, tmp)
            shutil.copymode(store, tmp)  # keep the store's permission bits
        _hook("copied")
        # a new file tracks its free space persistently, so that space freed by rewriting a
        # section is reused by later commits instead of growing the file
        kw = {"fs_strategy": "fsm", "fs_persist": True} if new else {}
        with h5py.File(tmp, "w" if new else "r+", libver=LIBVER, **kw) as f:
            apply(f)
            f.flush()
            _hook("applied")
        _fsync_path(tmp)
        _hook("synced")
        os.replace(tmp, store)
        _hook("replaced")
        _fsync_path(store.parent, directory=True)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def stale_temps(store: Path) -> list[Path]:
    store = store.resolve()
    return sorted(store.parent.glob(f".{glob_escape(store.name)}.tmp-*"))


def glob_escape(name: str) -> str:
    return re.sub(r"([*?\[])", r"[\1]", name)


def clean_stale_temps(store: Path, *, holding_lock: bool) -> list[Path]:
    """Remove temp files left by crashed commits.

    A writer holding the lock removes them all (only a lock holder commits). A reader removes
    only those whose process is gone (same host assumed).
    """
    removed = []
    for p in stale_temps(store):
        pid_text = p.name.rsplit("-", 1)[-1]
        if not holding_lock:
            if not pid_text.isdigit() or _pid_alive(int(pid_text)):
                continue
        try:
            p.unlink()
            removed.append(p)
        except FileNotFoundError:
            pass
    return removed


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


# ------------------------------------------------------------------------------------------
# opening
# ------------------------------------------------------------------------------------------
def open_h5(path: Path) -> h5py.File:
    """Open a store read-only after checking it exists, is HDF5 and has a schema we read."""
    if not path.exists():
        raise FileNotFoundError(f"store {str(path)!r} does not exist")
    if path.is_dir():
        raise IsADirectoryError(f"store {str(path)!r} is a folder, expected an HDF5 file")
    try:
        f = h5py.File(path, "r")
    except OSError as exc:
        raise StoreFormatError(
            f"cannot read store {str(path)!r}: not a readable HDF5 file ({exc})"
        ) from None
    try:
        check_schema(f, path)
    except BaseException:
        f.close()
        raise
    return f


def check_schema(f: h5py.File, path: Path) -> int:
    if "schema_version" not in f.attrs:
        raise StoreFormatError(
            f"{str(path)!r} is not a winnow run store (root attribute 'schema_version' missing)"
        )
    v = int(f.attrs["schema_version"])
    if v > SCHEMA_VERSION:
        raise SchemaVersionError(
            f"store {str(path)!r} has schema version {v}, newer than version {SCHEMA_VERSION} "
            "that this winnow reads; upgrade winnow to read it"
        )
    return v


def revisions(f: h5py.File) -> list[str]:
    if "revisions" not in f:
        return []
    names = [n for n in f["revisions"] if REV_RE.match(n)]
    return sorted(names, key=lambda n: int(n[1:]))


def rev_name(number: int) -> str:
    return f"r{number:04d}"


def resolve_revision(f: h5py.File, revision: str | int | None, path: Path) -> str:
    """Turn ``None``/``"latest"``, ``3``, ``"3"`` or ``"r0003"`` into a stored revision name."""
    revs = revisions(f)
    if revision is None or revision == "latest":
        if not revs:
            raise ValueError(f"store {str(path)!r} has no revisions yet")
        return revs[-1]
    if isinstance(revision, bool):
        raise TypeError(f"revision must be str or int, got {revision!r}")
    if isinstance(revision, int | np.integer):
        name = rev_name(int(revision))
    elif isinstance(revision, str):
        s = revision.strip()
        name = rev_name(int(s)) if s.isdigit() else s
    else:
        raise TypeError(f"revision must be str or int, got {type(revision).__name__}")
    if name not in revs:
        known = ", ".join(revs) if revs else "none"
        raise ValueError(f"revision {revision!r} not in store {str(path)!r} (revisions: {known})")
    return name


# ------------------------------------------------------------------------------------------
# section: config, inputs, observations, provenance
# ------------------------------------------------------------------------------------------
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


# Fields of each record that the layout stores in their own datasets/attributes. Fields added
# to a record later (with a default, as records.py asks) are kept in an ``extra_json``
# attribute or column, so that a round trip stays exact without a layout change.
KNOWN_FIELDS = {
    "Chain": {
        "samples",
        "names",
        "units",
        "chain_index",
        "draw_index",
        "log_density",
        "source",
        "diagnostics",
    },
    "Diagnostics": {
        "parameters",
        "n_chains",
        "n_draws",
        "burn_in",
        "burn_in_rule",
        "acceptance",
        "thresholds",
        "passed",
        "messages",
        "details",
    },
    "ParameterDiagnostics": {
        "rhat",
        "ess_bulk",
        "ess_tail",
        "mcse_mean",
        "mcse_q05",
        "mcse_q95",
        "mean",
        "sd",
    },
    "Selection": {
        "indices",
        "weights",
        "points",
        "method",
        "weights_rule",
        "kernel",
        "bandwidth",
        "feature_map",
        "n_features",
        "seed",
        "mmd_features",
        "mmd_exact",
        "mmd_exact_rows",
        "report",
        "population",
    },
    "RunSpec": {
        "run_id",
        "point_index",
        "params",
        "weight",
        "run_dir",
        "argv",
        "deck_hashes",
        "key",
    },
    "RunOutcome": {
        "run_id",
        "key",
        "state",
        "attempts",
        "run_dir",
        "output_hashes",
        "message",
        "reused_from",
    },
    "Attempt": {
        "number",
        "argv",
        "started",
        "ended",
        "exit_status",
        "timed_out",
        "stdout_tail",
        "stderr_tail",
        "error",
    },
    "QoIValue": {"run_id", "name", "value", "status", "reason"},
    "QoIEstimate": {
        "name",
        "units",
        "mean",
        "sd",
        "quantiles",
        "exceedance",
        "uncertainty",
        "control_variate",
        "n_used",
        "n_missing",
        "weights_resolved",
        "mmd_growth",
        "details",
    },
}


def extra_json(obj: Any) -> str:
    """Tagged JSON of a record's fields that the layout does not store on their own."""
    known = KNOWN_FIELDS[type(obj).__name__]
    extra = {f.name: getattr(obj, f.name) for f in dataclasses.fields(obj) if f.name not in known}
    return to_json(extra, f"{type(obj).__name__} extra fields")


def build(cls: type, kwargs: dict[str, Any], extra: str | None) -> Any:
    """``cls(**kwargs)`` plus the stored extra fields that ``cls`` still has."""
    if extra:
        names = {f.name for f in dataclasses.fields(cls)}
        kwargs.update({k: v for k, v in from_json(extra).items() if k in names})
    return cls(**kwargs)


# ------------------------------------------------------------------------------------------
# section: chain (+ diagnostics)
# ------------------------------------------------------------------------------------------
_PD_FIELDS = ("rhat", "ess_bulk", "ess_tail", "mcse_mean", "mcse_q05", "mcse_q95", "mean", "sd")
_PD_DESC = {
    "rhat": ("1", "rank-normalised split R-hat (Vehtari et al. 2021)"),
    "ess_bulk": ("1", "bulk effective sample size"),
    "ess_tail": ("1", "tail effective sample size (5% and 95% quantiles)"),
    "mcse_mean": ("parameter units", "Monte Carlo standard error of the mean"),
    "mcse_q05": ("parameter units", "Monte Carlo standard error of the 5% quantile"),
    "mcse_q95": ("parameter units", "Monte Carlo standard error of the 95% quantile"),
    "mean": ("parameter units", "posterior mean"),
    "sd": ("parameter units", "posterior standard deviation"),
}


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
    n, d = chain.samples.shape
    g = put_group(
        rev,
        "chain",
        "posterior sample flattened to rows, in the user's units",
        source=chain.source,
        n_rows=n,
        n_parameters=d,
        has_log_density=chain.log_density is not None,
        sha256=digest,
        extra_json=extra_json(chain),
    )
    put_array(
        g,
        "samples",
        chain.samples,
        units=list(chain.units),
        description="posterior draws, one row per draw, one column per parameter",
        names=list(chain.names),
    )
    put_array(g, "chain_index", chain.chain_index, units=ONE, description="chain of each row")
    put_array(
        g,
        "draw_index",
        chain.draw_index,
        units=ONE,
        description="draw number within its chain, after burn-in",
    )
    if chain.log_density is not None:
        put_array(
            g,
            "log_density",
            chain.log_density,
            units="1 (natural log)",
            description="unnormalised log posterior density of each row",
        )
    if chain.diagnostics is not None:
        write_diagnostics(g, chain.diagnostics)


def write_diagnostics(parent: h5py.Group, diag: Diagnostics) -> None:
    if not isinstance(diag, Diagnostics):
        raise TypeError(f"chain.diagnostics must be Diagnostics, got {type(diag).__name__}")
    g = put_group(
        parent,
        "diagnostics",
        "convergence diagnostics per parameter (Vehtari et al. 2021 definitions)",
        n_chains=int(diag.n_chains),
        n_draws=int(diag.n_draws),
        burn_in=int(diag.burn_in),
        burn_in_rule=diag.burn_in_rule,
        passed=bool(diag.passed),
        thresholds=to_json(diag.thresholds, "diagnostics.thresholds"),
        details=to_json(getattr(diag, "details", {}), "diagnostics.details"),
        sha256=hash_object(diag),
        extra_json=extra_json(diag),
    )
    names = list(diag.parameters)
    put_array(
        g,
        "parameter",
        np.array(names, dtype=object),
        units=TEXT,
        description="parameter name of each row",
    )
    for fld in _PD_FIELDS:
        units, desc = _PD_DESC[fld]
        vals = np.array([getattr(diag.parameters[n], fld) for n in names], dtype=np.float64)
        put_array(g, fld, vals, units=units, description=desc)
    put_array(
        g,
        "extra_json",
        np.array([extra_json(diag.parameters[n]) for n in names], dtype=object),
        units=TEXT,
        description="fields of each row beyond the columns above (tagged JSON)",
    )
    put_array(
        g,
        "acceptance",
        diag.acceptance,
        units=ONE,
        description="acceptance rate of each chain (NaN when unknown)",
    )
    put_array(
        g,
        "messages",
        np.array(list(diag.messages), dtype=object),
        units=TEXT,
        description="one line per failed threshold",
    )


def read_diagnostics(g: h5py.Group) -> Diagnostics:
    names = get_texts(need(g, "parameter"))
    cols = {f: get_array(need(g, f)) for f in _PD_FIELDS}
    extras = get_texts(g["extra_json"]) if "extra_json" in g else [""] * len(names)
    params = {
        n: build(ParameterDiagnostics, {f: float(cols[f][i]) for f in _PD_FIELDS}, extras[i])
        for i, n in enumerate(names)
    }
    kwargs = dict(
        parameters=params,
        n_chains=int(g.attrs["n_chains"]),
        n_draws=int(g.attrs["n_draws"]),
        burn_in=int(g.attrs["burn_in"]),
        burn_in_rule=attr_str(g, "burn_in_rule"),
        acceptance=get_array(need(g, "acceptance")),
        thresholds=attr_json(g, "thresholds"),
        passed=bool(g.attrs["passed"]),
        messages=tuple(get_texts(need(g, "messages"))),
    )
    if "details" in g.attrs:
        kwargs["details"] = attr_json(g, "details")
    return build(Diagnostics, kwargs, attr_str(g, "extra_json", ""))


def read_chain(rev: h5py.Group) -> Chain:
    g = need(rev, "chain")
    s = need(g, "samples")
    names = tuple(str(x) for x in s.attrs["names"])
    units = tuple(str(x) for x in s.attrs["units"])
    kwargs = dict(
        samples=get_array(s),
        names=names,
        units=units,
        chain_index=get_array(need(g, "chain_index")),
        draw_index=get_array(need(g, "draw_index")),
        log_density=get_array(g["log_density"]) if "log_density" in g else None,
        source=attr_str(g, "source"),
        diagnostics=read_diagnostics(g["diagnostics"]) if "diagnostics" in g else None,
    )
    return build(Chain, kwargs, attr_str(g, "extra_json", ""))


# ------------------------------------------------------------------------------------------
# section: selection
# ------------------------------------------------------------------------------------------
def validate_selection(sel: Selection) -> None:
    if not isinstance(sel, Selection):
        raise TypeError(f"selection must be a Selection, got {type(sel).__name__}")
    idx = np.asarray(sel.indices)
    if idx.ndim != 1:
        raise ValueError(f"selection.indices must have shape (m,), got {idx.shape}")
    if np.asarray(sel.weights).shape != idx.shape:
        raise ValueError(
            f"selection.weights must have shape {idx.shape}, got {np.asarray(sel.weights).shape}"
        )
    if np.asarray(sel.points).ndim != 2 or np.asarray(sel.points).shape[0] != idx.shape[0]:
        raise ValueError(
            f"selection.points must have shape ({idx.shape[0]}, d), "
            f"got {np.asarray(sel.points).shape}"
        )
    if sel.seed is not None and not isinstance(sel.seed, int | np.integer):
        raise TypeError(f"selection.seed must be int or None, got {type(sel.seed).__name__}")


def write_selection(rev: h5py.Group, sel: Selection, digest: str) -> None:
    names: list[str] = []
    units: Any = "chain units"
    if "chain" in rev:
        s = rev["chain/samples"]
        names = [str(x) for x in s.attrs["names"]]
        units = [str(x) for x in s.attrs["units"]]
    g = put_group(
        rev,
        "selection",
        "weighted subset of chain rows chosen to minimise MMD to the whole chain",
        method=sel.method,
        weights_rule=sel.weights_rule,
        kernel=sel.kernel,
        bandwidth=float(sel.bandwidth),
        feature_map=sel.feature_map,
        n_features=int(sel.n_features),
        seed="none" if sel.seed is None else str(int(sel.seed)),
        mmd_features=float(sel.mmd_features),
        mmd_exact=float(sel.mmd_exact),
        mmd_exact_rows=int(sel.mmd_exact_rows),
        report=to_json(sel.report, "selection.report"),
        sha256=digest,
        extra_json=extra_json(sel),
    )
    # exact round trip of scalar settings given as numpy scalars or Python numbers
    g.attrs["settings_json"] = to_json(
        {
            k: getattr(sel, k)
            for k in (
                "bandwidth",
                "n_features",
                "seed",
                "mmd_features",
                "mmd_exact",
                "mmd_exact_rows",
            )
        },
        "selection",
    )
    put_array(
        g,
        "indices",
        sel.indices,
        units=ONE,
        description="row index into the chain of each chosen point",
    )
    put_array(
        g,
        "weights",
        sel.weights,
        units=ONE,
        description="weight of each chosen point (non-negative, sum 1)",
    )
    put_array(
        g,
        "points",
        sel.points,
        units=units,
        description="the chosen rows, chain.samples[indices]",
        names=names,
    )
    if sel.population is not None:
        pop = put_group(
            g,
            "population",
            "near-optimal index sets of the genetic selector",
            count=len(sel.population),
        )
        for i, item in enumerate(sel.population):
            ind, mmd = item
            put_array(
                pop,
                f"p{i:04d}",
                ind,
                units=ONE,
                description="chain row indices of one member",
                mmd=to_json(mmd, "population mmd"),
            )


def read_selection(rev: h5py.Group) -> Selection:
    g = need(rev, "selection")
    settings = attr_json(g, "settings_json")
    population = None
    if "population" in g:
        pop = g["population"]
        population = [
            (get_array(pop[f"p{i:04d}"]), attr_json(pop[f"p{i:04d}"], "mmd"))
            for i in range(int(pop.attrs["count"]))
        ]
    kwargs = dict(
        indices=get_array(need(g, "indices")),
        weights=get_array(need(g, "weights")),
        points=get_array(need(g, "points")),
        method=attr_str(g, "method"),
        weights_rule=attr_str(g, "weights_rule"),
        kernel=attr_str(g, "kernel"),
        bandwidth=settings["bandwidth"],
        feature_map=attr_str(g, "feature_map"),
        n_features=settings["n_features"],
        seed=settings["seed"],
        mmd_features=settings["mmd_features"],
        mmd_exact=settings["mmd_exact"],
        mmd_exact_rows=settings["mmd_exact_rows"],
        report=attr_json(g, "report"),
        population=population,
    )
    return build(Selection, kwargs, attr_str(g, "extra_json", ""))


def hash_selection(sel: Selection) -> str:
    return _hash_selection(sel)


# ------------------------------------------------------------------------------------------
# section: runs
# ------------------------------------------------------------------------------------------
def validate_runs(specs: Sequence[RunSpec], outcomes: Sequence[RunOutcome]) -> dict[str, int]:
    """Check the run records and return, for each run id, the index of its outcome."""
    seen: set[str] = set()
    for i, s in enumerate(specs):
        if not isinstance(s, RunSpec):
            raise TypeError(f"specs[{i}] must be a RunSpec, got {type(s).__name__}")
        if s.run_id in seen:
            raise ValueError(f"specs: run id {s.run_id!r} appears twice")
        seen.add(s.run_id)
    by_id: dict[str, int] = {}
    for j, o in enumerate(outcomes):
        if not isinstance(o, RunOutcome):
            raise TypeError(f"outcomes[{j}] must be a RunOutcome, got {type(o).__name__}")
        if o.run_id not in seen:
            raise ValueError(f"outcomes[{j}]: run id {o.run_id!r} has no RunSpec")
        if o.run_id in by_id:
            raise ValueError(f"outcomes: run id {o.run_id!r} appears twice")
        if o.state not in RUN_STATES:
            raise ValueError(
                f"outcomes[{j}].state must be one of {', '.join(RUN_STATES)}, got {o.state!r}"
            )
        for k, a in enumerate(o.attempts):
            if not isinstance(a, Attempt):
                raise TypeError(f"outcomes[{j}].attempts[{k}] must be an Attempt")
        by_id[o.run_id] = j
    return by_id


def _col(
    group: h5py.Group,
    name: str,
    values: list,
    units: Any,
    desc: str,
    dtype: Any = object,
    lossy_nul: bool = False,
) -> None:
    put_array(
        group,
        name,
        np.array(values, dtype=dtype).reshape(len(values)),
        units=units,
        description=desc,
        lossy_nul=lossy_nul,
    )


def write_runs(
    rev: h5py.Group,
    specs: Sequence[RunSpec],
    outcomes: Sequence[RunOutcome],
    by_id: Mapping[str, int],
    digest: str,
) -> None:
    g = put_group(
        rev,
        "runs",
        "one row per solver run: its spec and how it ended",
        n_runs=len(specs),
        n_outcomes=len(outcomes),
        sha256=digest,
    )
    outs = [outcomes[by_id[s.run_id]] if s.run_id in by_id else None for s in specs]
    J = to_json
    _col(g, "run_id", [s.run_id for s in specs], TEXT, "stable id of the run (its folder name)")
    _col(
        g,
        "point_index",
        [int(s.point_index) for s in specs],
        ONE,
        "row index into the chain",
        np.int64,
    )
    _col(
        g,
        "params",
        [J(s.params, "params") for s in specs],
        TEXT,
        "parameter values in the user's units (JSON object)",
    )
    _col(g, "weight", [float(s.weight) for s in specs], ONE, "weight of the point", np.float64)
    _col(
        g,
        "spec_json",
        [J({"point_index": s.point_index, "weight": s.weight}) for s in specs],
        TEXT,
        "point_index and weight with their exact Python/numpy types (JSON)",
    )
    _col(g, "run_dir", [str(s.run_dir) for s in specs], TEXT, "run folder (absolute path)")
    _col(
        g,
        "argv",
        [J(s.argv) for s in specs],
        TEXT,
        "solver command with placeholders filled (JSON array)",
    )
    _col(
        g,
        "deck_hashes",
        [J(dict(s.deck_hashes)) for s in specs],
        TEXT,
        "SHA-256 of each rendered deck keyed by its path relative to run_dir (JSON)",
    )
    _col(g, "key", [s.key for s in specs], TEXT, "reuse key: SHA-256 over deck hashes and argv")
    _col(
        g,
        "outcome_row",
        [by_id.get(s.run_id, -1) for s in specs],
        ONE,
        "position of this run's outcome in the list written (-1: no outcome)",
        np.int64,
    )
    _col(
        g,
        "state",
        [o.state if o else "" for o in outs],
        TEXT,
        "how the run ended: " + ", ".join(RUN_STATES) + " ('' when no outcome)",
    )
    _col(g, "outcome_key", [o.key if o else "" for o in outs], TEXT, "key recorded by the outcome")
    _col(
        g,
        "outcome_run_dir",
        [J(o.run_dir) if o else "" for o in outs],
        TEXT,
        "run folder recorded by the outcome (JSON path)",
    )
    _col(
        g,
        "n_attempts",
        [len(o.attempts) if o else 0 for o in outs],
        ONE,
        "number of attempts",
        np.int64,
    )
    _col(
        g,
        "seconds",
        [o.seconds if o else 0.0 for o in outs],
        "s",
        "wall time summed over attempts",
        np.float64,
    )
    last = [o.attempts[-1] if o and o.attempts else None for o in outs]
    _col(
        g,
        "exit_status",
        [a.exit_status if a and a.exit_status is not None else -1 for a in last],
        ONE,
        "exit status of the last attempt (-1 when none: killed, not started or no attempt)",
        np.int64,
    )
    _col(g, "message", [o.message if o else "" for o in outs], TEXT, "why the run ended so")
    _col(
        g,
        "reused_from",
        [o.reused_from if o else "" for o in outs],
        TEXT,
        "store run reused instead of running ('' when it ran)",
    )
    _col(
        g,
        "output_hashes",
        [J(dict(o.output_hashes)) if o else "{}" for o in outs],
        TEXT,
        "SHA-256 of each output file keyed by its path relative to run_dir (JSON)",
    )

    _col(
        g,
        "spec_extra",
        [extra_json(s) for s in specs],
        TEXT,
        "RunSpec fields beyond the columns above (tagged JSON)",
    )
    _col(
        g,
        "outcome_extra",
        [extra_json(o) if o else "" for o in outs],
        TEXT,
        "RunOutcome fields beyond the columns above (tagged JSON)",
    )
    att = put_group(g, "attempts", "one row per attempt of every run")
    rows = [(r, a) for r, o in enumerate(outs) if o for a in o.attempts]
    _col(att, "run_row", [r for r, _ in rows], ONE, "row of the run in the runs table", np.int64)
    _col(att, "number", [int(a.number) for _, a in rows], ONE, "attempt number", np.int64)
    _col(att, "argv", [J(a.argv) for _, a in rows], TEXT, "command run (JSON array)")
    _col(
        att,
        "started",
        [float(a.started) for _, a in rows],
        "s since 1970-01-01T00:00:00Z",
        "start time (Unix time)",
        np.float64,
    )
    _col(
        att,
        "ended",
        [float(a.ended) for _, a in rows],
        "s since 1970-01-01T00:00:00Z",
        "end time (Unix time)",
        np.float64,
    )
    _col(
        att,
        "exit_status",
        [a.exit_status if a.exit_status is not None else -1 for _, a in rows],
        ONE,
        "exit status (-1 when none; see exit_status_known)",
        np.int64,
    )
    _col(
        att,
        "exit_status_known",
        [a.exit_status is not None for _, a in rows],
        ONE,
        "False when killed on timeout or never started",
        np.bool_,
    )
    _col(att, "timed_out", [bool(a.timed_out) for _, a in rows], ONE, "killed on timeout", np.bool_)
    _col(
        att,
        "stdout_tail",
        [a.stdout_tail for _, a in rows],
        TEXT,
        "last lines of standard output (NUL characters stored as U+FFFD)",
        lossy_nul=True,
    )
    _col(
        att,
        "stderr_tail",
        [a.stderr_tail for _, a in rows],
        TEXT,
        "last lines of standard error (NUL characters stored as U+FFFD)",
        lossy_nul=True,
    )
    _col(att, "error", [a.error for _, a in rows], TEXT, "why it could not start, if so")
    _col(
        att,
        "extra_json",
        [extra_json(a) for _, a in rows],
        TEXT,
        "Attempt fields beyond the columns above (tagged JSON)",
    )
    _col(
        att,
        "exact_json",
        [
            J(
                {
                    "number": a.number,
                    "started": a.started,
                    "ended": a.ended,
                    "exit_status": a.exit_status,
                }
            )
            for _, a in rows
        ],
        TEXT,
        "number, times and exit status with their exact Python/numpy types (JSON)",
    )


def read_runs(rev: h5py.Group) -> tuple[list[RunSpec], list[RunOutcome]]:
    g = need(rev, "runs")
    t = {k: get_array(v) for k, v in g.items() if isinstance(v, h5py.Dataset)}
    a = {k: get_array(v) for k, v in need(g, "attempts").items()}
    n = int(g.attrs["n_runs"])
    n_att = len(a.get("run_row", ()))
    for table, cols, expect in (("runs", t, n), ("runs/attempts", a, n_att)):
        for k, v in cols.items():
            if len(v) != expect:
                raise StoreFormatError(
                    f"{g.name}: column {table}/{k} has {len(v)} rows, expected {expect}"
                )
    specs = []
    for i in range(n):
        sj = from_json(t["spec_json"][i])
        specs.append(
            build(
                RunSpec,
                dict(
                    run_id=str(t["run_id"][i]),
                    point_index=sj["point_index"],
                    params=from_json(t["params"][i]),
                    weight=sj["weight"],
                    run_dir=Path(t["run_dir"][i]),
                    argv=from_json(t["argv"][i]),
                    deck_hashes=from_json(t["deck_hashes"][i]),
                    key=str(t["key"][i]),
                ),
                str(t["spec_extra"][i]) if "spec_extra" in t else "",
            )
        )
    attempts: dict[int, list[Attempt]] = {}
    for j in range(len(a["run_row"])):
        ex = from_json(a["exact_json"][j])
        attempts.setdefault(int(a["run_row"][j]), []).append(
            build(
                Attempt,
                dict(
                    number=ex["number"],
                    argv=from_json(a["argv"][j]),
                    started=ex["started"],
                    ended=ex["ended"],
                    exit_status=ex["exit_status"],
                    timed_out=bool(a["timed_out"][j]),
                    stdout_tail=str(a["stdout_tail"][j]),
                    stderr_tail=str(a["stderr_tail"][j]),
                    error=str(a["error"][j]),
                ),
                str(a["extra_json"][j]) if "extra_json" in a else "",
            )
        )
    n_out = int(g.attrs["n_outcomes"])
    outcomes: list[RunOutcome | None] = [None] * n_out
    for i in range(n):
        row = int(t["outcome_row"][i])
        if row < 0:
            continue
        if row >= n_out:
            raise StoreFormatError(f"{g.name}: outcome_row {row} out of range")
        outcomes[row] = build(
            RunOutcome,
            dict(
                run_id=specs[i].run_id,
                key=str(t["outcome_key"][i]),
                state=str(t["state"][i]),
                attempts=tuple(attempts.get(i, ())),
                run_dir=from_json(t["outcome_run_dir"][i]),
                output_hashes=from_json(t["output_hashes"][i]),
                message=str(t["message"][i]),
                reused_from=str(t["reused_from"][i]),
            ),
            str(t["outcome_extra"][i]) if "outcome_extra" in t else "",
        )
    if any(o is None for o in outcomes):
        raise StoreFormatError(f"{g.name}: outcome rows are not a permutation")
    return specs, outcomes  # type: ignore[return-value]


# ------------------------------------------------------------------------------------------
# section: results
# ------------------------------------------------------------------------------------------
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


def write_results(
    rev: h5py.Group, values: Sequence[QoIValue], estimates: Sequence[QoIEstimate], digest: str
) -> None:
    g = put_group(
        rev, "results", "QoI values read from each run and their weighted estimates", sha256=digest
    )
    vg = put_group(g, "values", "one row per (run, QoI) pair", count=len(values))
    arrays = [np.asarray(v.value) for v in values]
    flat = [a.ravel() for a in arrays]
    starts = np.cumsum([0] + [f.size for f in flat])[:-1] if flat else np.zeros(0, np.int64)
    _col(vg, "run_id", [v.run_id for v in values], TEXT, "run the value was read from")
    _col(vg, "name", [v.name for v in values], TEXT, "QoI name")
    _col(
        vg,
        "status",
        [v.status for v in values],
        TEXT,
        "ok, missing, unparsable, nonfinite or run_failed",
    )
    _col(vg, "reason", [v.reason for v in values], TEXT, "why the value is not ok")
    _col(
        vg,
        "extra_json",
        [extra_json(v) for v in values],
        TEXT,
        "QoIValue fields beyond the columns here (tagged JSON)",
    )
    _col(
        vg,
        "value_shape",
        [json.dumps(list(a.shape)) for a in arrays],
        TEXT,
        "shape of each value (JSON array; [] for a scalar)",
    )
    _col(vg, "value_dtype", [a.dtype.str for a in arrays], TEXT, "numpy dtype of each value")
    _col(
        vg,
        "value_form",
        [value_form(v.value) for v in values],
        TEXT,
        "how each value was given: '' ndarray, numpy_scalar, float, int, bool, list",
    )
    _col(
        vg,
        "value_start",
        [int(s) for s in starts],
        ONE,
        "offset of each value's first element in value_data",
        np.int64,
    )
    _col(vg, "value_count", [f.size for f in flat], ONE, "number of elements", np.int64)
    data = np.concatenate([f.astype(np.float64) for f in flat]) if flat else np.zeros(0)
    put_array(
        vg,
        "value_data",
        data,
        units="QoI units (see estimates)",
        description="all values, flattened and concatenated (NaN when not ok)",
    )
    eg = put_group(
        g, "estimates", "weighted estimate of each QoI, one group per QoI", count=len(estimates)
    )
    for i, e in enumerate(estimates):
        q = put_group(
            eg,
            f"e{i:04d}",
            f"weighted estimate of QoI {e.name!r}",
            name=e.name,
            units=e.units,
            n_used=int(e.n_used),
            n_missing=int(e.n_missing),
            weights_resolved=bool(e.weights_resolved),
            mmd_growth=float(e.mmd_growth),
            control_variate=to_json(e.control_variate, "control_variate"),
            details=to_json(e.details, "details"),
            extra_json=extra_json(e),
            exact_json=to_json(
                {
                    "n_used": e.n_used,
                    "n_missing": e.n_missing,
                    "weights_resolved": e.weights_resolved,
                    "mmd_growth": e.mmd_growth,
                }
            ),
        )
        put_array(
            q,
            "mean",
            e.mean,
            units=e.units,
            description="weighted posterior-predictive mean",
        )
        put_array(
            q,
            "sd",
            e.sd,
            units=e.units,
            description="weighted posterior-predictive standard deviation",
        )
        _put_array_dict(
            q,
            "quantiles",
            e.quantiles,
            e.units,
            "weighted quantiles keyed by probability (attribute key)",
            "weighted quantile at probability",
        )
        _put_array_dict(
            q,
            "exceedance",
            e.exceedance,
            ONE,
            "weighted exceedance probability keyed by threshold (attribute key)",
            "probability that the QoI exceeds",
        )
        _put_array_dict(
            q,
            "uncertainty",
            e.uncertainty,
            e.units,
            "standard errors or gaps by source (attribute key)",
            "uncertainty from source",
        )


def read_results(rev: h5py.Group) -> tuple[list[QoIValue], list[QoIEstimate]]:
    g = need(rev, "results")
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
        values.append(
            build(
                QoIValue,
                dict(
                    run_id=str(cols["run_id"][i]),
                    name=str(cols["name"][i]),
                    value=val,
                    status=str(cols["status"][i]),
                    reason=str(cols["reason"][i]),
                ),
                str(cols["extra_json"][i]) if "extra_json" in cols else "",
            )
        )
    eg = need(g, "estimates")
    estimates = []
    for i in range(int(eg.attrs["count"])):
        q = need(eg, f"e{i:04d}")
        ex = attr_json(q, "exact_json")
        estimates.append(
            build(
                QoIEstimate,
                dict(
                    name=attr_str(q, "name"),
                    units=attr_str(q, "units"),
                    mean=get_array(need(q, "mean")),
                    sd=get_array(need(q, "sd")),
                    quantiles=_get_array_dict(need(q, "quantiles")),
                    exceedance=_get_array_dict(need(q, "exceedance")),
                    uncertainty=_get_array_dict(need(q, "uncertainty")),
                    control_variate=attr_json(q, "control_variate"),
                    n_used=ex["n_used"],
                    n_missing=ex["n_missing"],
                    weights_resolved=ex["weights_resolved"],
                    mmd_growth=ex["mmd_growth"],
                    details=attr_json(q, "details"),
                ),
                attr_str(q, "extra_json", ""),
            )
        )
    return values, estimates


def hash_runs(specs: Sequence[RunSpec], outcomes: Sequence[RunOutcome]) -> str:
    return hash_object({"specs": list(specs), "outcomes": list(outcomes)})


def hash_results(values: Sequence[QoIValue], estimates: Sequence[QoIEstimate]) -> str:
    return hash_object({"values": list(values), "estimates": list(estimates)})


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


def iter_datasets(f: h5py.File, problems: list[str]) -> Iterator[tuple[str, h5py.Dataset]]:
    """Every dataset of the file; damage met while walking it is added to ``problems``."""
    found: list[tuple[str, h5py.Dataset]] = []

    def walk(group: h5py.Group) -> None:
        try:
            names = list(group)
        except Exception as exc:  # damaged group index: many error types
            problems.append(f"{group.name}: members cannot be listed ({exc})")
            return
        for name in names:
            try:
                obj = group[name]
            except Exception as exc:
                problems.append(f"{group.name.rstrip('/')}/{name}: cannot be opened ({exc})")
                continue
            if isinstance(obj, h5py.Dataset):
                found.append((obj.name.lstrip("/"), obj))
            elif isinstance(obj, h5py.Group):
                walk(obj)

    walk(f)
    yield from found
