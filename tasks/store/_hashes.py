"""Content hashes and version information for the run store.

Two kinds of SHA-256 digest are used:

* :func:`hash_file` / :func:`hash_config` -- plain digests of a file's bytes or of a config
  text's UTF-8 bytes, so that a user can check them with any ``sha256sum`` tool;
* :func:`hash_object` -- a canonical digest of a Python value (records, dicts, arrays). Every
  value is fed with a type tag, its length and, for arrays, the little-endian dtype, the shape
  and the C-order bytes, so different values cannot give the same byte stream. Numpy scalars
  hash like the Python scalars they equal, because HDF5 attributes come back as numpy scalars
  and a round trip through the store must not change a record's digest. Dict entries are
  hashed in an order that does not depend on insertion order (dict equality ignores it).

:func:`hash_dataset_content` digests what an HDF5 dataset holds (header plus data, read in row
blocks so that a 10^6 x 10 chain never needs a second copy in memory); the store keeps this
digest as the dataset's ``sha256`` attribute and ``check`` recomputes it.
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import math
import platform
import struct
import sys
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path, PurePath
from typing import Any

import numpy as np

__all__ = [
    "hash_chain",
    "hash_config",
    "hash_dataset_content",
    "hash_file",
    "hash_object",
    "hash_selection",
    "version_info",
]

_BLOCK = 1 << 20  # bytes read at a time when hashing files and datasets


def hash_file(path: str | Path) -> str:
    """SHA-256 (hex) of a file's bytes, read in 1 MiB blocks.

    Raises
    ------
    FileNotFoundError
        When ``path`` does not exist (the message names it).
    """
    p = Path(path)
    if not p.exists():
        raise FileNotFoundError(f"input file {str(p)!r} does not exist")
    if p.is_dir():
        raise IsADirectoryError(f"input {str(p)!r} is a folder, expected a file")
    h = hashlib.sha256()
    with p.open("rb") as fh:
        for block in iter(lambda: fh.read(_BLOCK), b""):
            h.update(block)
    return h.hexdigest()


def hash_config(text: str) -> str:
    """SHA-256 (hex) of a config text's UTF-8 bytes, exactly as given."""
    if not isinstance(text, str):
        raise TypeError(f"config text must be str, got {type(text).__name__}")
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# ------------------------------------------------------------------------------------------
# canonical object hashing
# ------------------------------------------------------------------------------------------
def _le_dtype(dtype: np.dtype) -> np.dtype:
    """The little-endian twin of a numeric dtype (byte order must not change a digest)."""
    return dtype.newbyteorder("<") if dtype.byteorder in (">", "=") else dtype


def _feed_str(h: Any, s: str) -> None:
    b = s.encode("utf-8", "surrogatepass")
    h.update(struct.pack("<Q", len(b)))
    h.update(b)


def _feed_array(h: Any, a: np.ndarray) -> None:
    h.update(b"A")
    if a.dtype.kind in "OUS":
        # strings (or objects holding strings): hash each element as text
        _feed_str(h, "str")
        h.update(struct.pack("<Q", a.ndim))
        h.update(struct.pack(f"<{a.ndim}q", *a.shape))
        for item in a.ravel(order="C"):
            if isinstance(item, bytes):
                item = item.decode("utf-8", "surrogateescape")
            if not isinstance(item, str):
                raise TypeError(f"cannot hash an object array holding {type(item).__name__}")
            _feed_str(h, item)
        return
    dt = _le_dtype(a.dtype)
    _feed_str(h, dt.str if dt.names is None else repr(dt.descr))
    h.update(struct.pack("<Q", a.ndim))
    h.update(struct.pack(f"<{a.ndim}q", *a.shape))
    _feed_bytes(h, np.ascontiguousarray(a, dtype=dt))


def _feed_bytes(h: Any, a: np.ndarray) -> None:
    """Feed a C-contiguous array's bytes without copying them (large chains)."""
    if a.size:
        h.update(a.reshape(-1).view(np.uint8))


def _feed(h: Any, obj: Any) -> None:
    if isinstance(obj, np.generic) and not isinstance(obj, np.void):
        obj = obj.item()  # numpy scalars hash like the Python value they equal
    if obj is None:
        h.update(b"N")
    elif isinstance(obj, bool):
        h.update(b"B1" if obj else b"B0")
    elif isinstance(obj, int):
        h.update(b"I")
        _feed_str(h, str(obj))
    elif isinstance(obj, float):
        h.update(b"F")
        # all NaNs hash alike (payload bits are not meaningful)
        h.update(struct.pack("<d", math.nan if math.isnan(obj) else obj))
    elif isinstance(obj, complex):
        h.update(b"C")
        h.update(struct.pack("<dd", obj.real, obj.imag))
    elif isinstance(obj, str):
        h.update(b"S")
        _feed_str(h, obj)
    elif isinstance(obj, bytes):
        h.update(b"Y")
        h.update(struct.pack("<Q", len(obj)))
        h.update(obj)
    elif isinstance(obj, PurePath):
        h.update(b"P")
        _feed_str(h, str(obj))
    elif isinstance(obj, np.ndarray):
        _feed_array(h, obj)
    elif isinstance(obj, tuple | list):
        h.update(b"T" if isinstance(obj, tuple) else b"L")
        h.update(struct.pack("<Q", len(obj)))
        for item in obj:
            _feed(h, item)
    elif isinstance(obj, dict):
        h.update(b"D")
        h.update(struct.pack("<Q", len(obj)))
        pairs = sorted(((hash_object(k), v) for k, v in obj.items()), key=lambda kv: kv[0])
        for kd, v in pairs:
            h.update(bytes.fromhex(kd))
            _feed(h, v)
    elif dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        h.update(b"R")
        _feed_str(h, type(obj).__name__)
        for f in dataclasses.fields(obj):
            _feed_str(h, f.name)
            _feed(h, getattr(obj, f.name))
    else:
        raise TypeError(f"cannot hash a value of type {type(obj).__name__}")


def hash_object(obj: Any) -> str:
    """Canonical SHA-256 (hex) of a Python value built from scalars, str, arrays, tuples,
    lists, dicts, paths and dataclass records."""
    h = hashlib.sha256()
    _feed(h, obj)
    return h.hexdigest()


def hash_chain(chain: Any) -> str:
    """Digest of a :class:`~winnow.tasks.records.Chain`'s data: samples, names, units,
    chain and draw indices, log density and source (dtype, shape and bytes of each array).
    Diagnostics are hashed separately."""
    return hash_object(
        {
            "samples": np.asarray(chain.samples),
            "names": tuple(chain.names),
            "units": tuple(chain.units),
            "chain_index": np.asarray(chain.chain_index),
            "draw_index": np.asarray(chain.draw_index),
            "log_density": None if chain.log_density is None else np.asarray(chain.log_density),
            "source": chain.source,
        }
    )


def hash_selection(sel: Any) -> str:
    """Digest of a :class:`~winnow.tasks.records.Selection`: indices, weights, points and
    every setting (method, kernel, bandwidth, feature map, seed, MMDs, report, population)."""
    return hash_object(sel)


def hash_dataset_content(data: Any) -> str:
    """Digest of an HDF5 dataset's content, or of the array about to be stored in one.

    ``data`` is an ``h5py.Dataset`` or an ``ndarray`` (numeric, or object/str holding text).
    The digest covers the canonical dtype, the shape and the C-order data; numeric datasets
    are read in blocks of rows so that large ones are hashed without a full copy.
    """
    h = hashlib.sha256()
    if isinstance(data, np.ndarray):
        _feed_array(h, data)
        return h.hexdigest()
    # h5py.Dataset
    import h5py  # local: keeps this module importable without h5py for plain hashing

    is_text = h5py.check_string_dtype(data.dtype) is not None
    shape = data.shape
    if is_text or data.ndim == 0 or data.size * data.dtype.itemsize <= 8 * _BLOCK:
        arr = data.asstr()[()] if is_text else data[()]
        arr = np.asarray(arr, dtype=object) if is_text else np.asarray(arr)
        _feed_array(h, arr)
        return h.hexdigest()
    dt = _le_dtype(data.dtype)
    h.update(b"A")
    _feed_str(h, dt.str if dt.names is None else repr(dt.descr))
    h.update(struct.pack("<Q", len(shape)))
    h.update(struct.pack(f"<{len(shape)}q", *shape))
    row_bytes = max(1, int(np.prod(shape[1:], dtype=np.int64)) * dt.itemsize)
    step = max(1, (8 * _BLOCK) // row_bytes)
    for start in range(0, shape[0], step):
        block = data[start : start + step]
        _feed_bytes(h, np.ascontiguousarray(block, dtype=dt))
    return h.hexdigest()


# ------------------------------------------------------------------------------------------
# versions
# ------------------------------------------------------------------------------------------
def _dist_version(name: str) -> str:
    try:
        return version(name)
    except PackageNotFoundError:
        return "not installed"


def version_info() -> dict[str, str]:
    """Versions of winnow, Python, numpy, h5py, HDF5 and Prefect, plus the platform.

    Prefect's version is read from the installed distribution's metadata; Prefect itself is
    never imported (importing it costs seconds and starts logging machinery).
    """
    return dict(_version_info())


@functools.lru_cache(maxsize=1)
def _version_info() -> dict[str, str]:
    import h5py

    from winnow import __version__

    return {
        "winnow_version": __version__,
        "python_version": sys.version.split()[0],
        "numpy_version": np.__version__,
        "h5py_version": h5py.__version__,
        "hdf5_version": h5py.version.hdf5_version,
        "prefect_version": _dist_version("prefect"),
        "platform": platform.platform(),
    }
