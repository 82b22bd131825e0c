"""Readers that take one quantity of interest (QoI) out of one run folder.

A QoI spec is a plain dict::

    {"name": "drawdown_spring", "units": "m",
     "reader": {"json": {"file": "result.json", "key": "qoi.drawdown_spring"}}}

with exactly one reader kind among ``json``, ``csv``, ``hdf5``, ``regex`` and ``function``.
A vector QoI (a time series, a field at probe points) adds an ``axis`` shared by all runs::

    "axis": {"name": "t", "units": "s", "values": [0, 3600, 7200]}
    "axis": {"name": "t", "units": "s", "reader": {"csv": {"file": "out.csv", "column": "t",
                                                           "row": "all"}}}

Two kinds of failure are kept apart. A bad *spec* (unknown reader, missing option, a
``function`` that cannot be imported) is a configuration error: :func:`validate_qoi_spec`
raises ``ValueError``/``TypeError`` naming the option. A bad *run output* (file absent,
text that does not parse, NaN, a failed run) is data: :func:`read_qoi` never raises for it
and returns a :class:`~winnow.tasks.records.QoIValue` whose ``status`` says what went wrong
and whose ``reason`` says where, so that it is left out of the estimates instead of being
read as zero.
"""

from __future__ import annotations

import csv
import importlib
import json
import math
import re
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from winnow.tasks.config import (
    CsvReader,
    FunctionReader,
    Hdf5Reader,
    JsonReader,
    ReaderOptions,
    RegexReader,
    check_qoi_spec,
    parse_reader,
)
from winnow.tasks.records import QoIValue

__all__ = ["QoIReadError", "read_axis", "read_qoi", "validate_qoi_spec"]


class QoIReadError(Exception):
    """A run output that cannot give the QoI; ``status`` is the QoIValue status to record."""

    def __init__(self, status: str, reason: str) -> None:
        super().__init__(reason)
        self.status = status
        self.reason = reason


# --------------------------------------------------------------------------------------------
# spec validation (configuration errors raise); the readers' options are the config models
# --------------------------------------------------------------------------------------------
def _resolve_function(target: str, where: str) -> Callable[[Path], Any]:
    module_name, func_name = target.split(":")
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise ValueError(f"{where}: cannot import module {module_name!r} ({exc})") from exc
    func = getattr(module, func_name, None)
    if not callable(func):
        raise ValueError(f"{where}: module {module_name!r} has no function {func_name!r}")
    return func


def _parsed(reader: Any, where: str) -> ReaderOptions:
    """The validated options of one reader; a ``function`` reader's target is imported."""
    kind, options = parse_reader(reader, where)
    if isinstance(options, FunctionReader):
        _resolve_function(options.root, f"{where}.{kind}")
    return options


def validate_qoi_spec(spec: Mapping[str, Any]) -> dict[str, Any]:
    """Check a QoI spec and return it as a plain dict; raise on a configuration error.

    The options of each reader are those of its model in
    :data:`winnow.tasks.config.READERS`; a ``function`` reader's module is imported here.

    Parameters
    ----------
    spec : mapping
        ``name`` (str), ``units`` (str, optional), ``reader`` (one reader kind) and optional
        ``axis`` (``name``, ``units`` and either ``values`` or a ``reader``).

    Raises
    ------
    ValueError, TypeError
        Naming the option, the expected and the actual value.
    """
    checked = check_qoi_spec(spec)
    name = checked["name"]
    _parsed(checked["reader"], f"qoi {name!r}.reader")
    axis = checked.get("axis")
    if axis is not None and axis.get("reader") is not None:
        _parsed(axis["reader"], f"qoi {name!r}.axis.reader")
    return checked


# --------------------------------------------------------------------------------------------
# reading (bad output -> QoIReadError, turned into a status by read_qoi)
# --------------------------------------------------------------------------------------------
def _open_text(run_dir: Path, file: str) -> str:
    path = run_dir / file
    if not path.is_file():
        raise QoIReadError("missing", f"output file {file!r} not found in {run_dir}")
    try:
        return path.read_text(encoding="utf-8", errors="replace")
    except OSError as exc:
        raise QoIReadError("missing", f"cannot read {file!r}: {exc}") from exc


def _to_float_array(raw: Any, where: str) -> np.ndarray:
    if isinstance(raw, bool) or raw is None:
        raise QoIReadError("unparsable", f"{where}: expected a number, got {raw!r}")
    if isinstance(raw, str):
        try:
            return np.asarray(float(raw.strip()), dtype=np.float64)
        except ValueError as exc:
            raise QoIReadError(
                "unparsable", f"{where}: {raw.strip()[:40]!r} is not a number"
            ) from exc
    try:
        arr = np.asarray(raw, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise QoIReadError("unparsable", f"{where}: {str(raw)[:60]!r} is not numeric") from exc
    if arr.ndim > 1:
        raise QoIReadError(
            "unparsable", f"{where}: expected a scalar or a 1-D array, got shape {arr.shape}"
        )
    return arr


def _read_json(run_dir: Path, opt: JsonReader) -> np.ndarray:
    text = _open_text(run_dir, opt.file)
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise QoIReadError("unparsable", f"{opt.file!r} is not valid JSON ({exc})") from exc
    key = opt.key
    parts = key.split(".") if isinstance(key, str) else [str(p) for p in key]
    node: Any = doc
    for depth, part in enumerate(parts):
        path = ".".join(parts[: depth + 1])
        if isinstance(node, Mapping):
            if part not in node:
                raise QoIReadError("missing", f"key {path!r} not found in {opt.file!r}")
            node = node[part]
        elif isinstance(node, list):
            try:
                node = node[int(part)]
            except (ValueError, IndexError) as exc:
                raise QoIReadError("missing", f"index {path!r} not found in {opt.file!r}") from exc
        else:
            raise QoIReadError("missing", f"key {path!r} not found in {opt.file!r}")
    return _to_float_array(node, f"{opt.file}:{'.'.join(parts)}")


def _cell(text: str, where: str) -> float:
    try:
        return float(text.strip())
    except ValueError as exc:
        raise QoIReadError("unparsable", f"{where}: {text.strip()[:40]!r} is not a number") from exc


def _read_csv(run_dir: Path, opt: CsvReader) -> np.ndarray:
    file = opt.file
    text = _open_text(run_dir, file)
    rows = [
        r
        for r in csv.reader(text.splitlines(), delimiter=opt.delimiter)
        if r and any(c.strip() for c in r)
    ]
    if not rows:
        raise QoIReadError("missing", f"{file!r} is empty")
    header = [h.strip() for h in rows[0]]
    body = rows[1:]

    def column_index(col: str | int) -> int:
        if isinstance(col, int):
            if not -len(header) <= col < len(header):
                raise QoIReadError("missing", f"{file!r} has {len(header)} columns, asked {col}")
            return col % len(header)
        if col not in header:
            raise QoIReadError("missing", f"column {col!r} not in {file!r} (columns: {header})")
        return header.index(col)

    j = column_index(opt.column)
    if not body:
        raise QoIReadError("missing", f"{file!r} has a header but no data rows")
    row = opt.row
    if row == "all":
        picked = list(range(len(body)))
    elif row == "first":
        picked = [0]
    elif row == "last":
        picked = [len(body) - 1]
    elif isinstance(row, int):
        if not -len(body) <= row < len(body):
            raise QoIReadError("missing", f"{file!r} has {len(body)} data rows, asked row {row}")
        picked = [row % len(body)]
    else:
        ((wcol, wval),) = row.where.items()
        k = column_index(wcol)
        picked = []
        for i, r in enumerate(body):
            if k >= len(r):
                continue
            if isinstance(wval, str):
                hit = r[k].strip() == wval
            else:
                try:
                    hit = math.isclose(float(r[k]), float(wval), rel_tol=1e-12, abs_tol=0.0)
                except ValueError:
                    hit = False
            if hit:
                picked.append(i)
        if not picked:
            raise QoIReadError("missing", f"no row of {file!r} has {wcol} = {wval!r}")
        if len(picked) > 1:
            raise QoIReadError(
                "unparsable",
                f"{len(picked)} rows of {file!r} have {wcol} = {wval!r}; expected exactly one",
            )
    values = []
    for i in picked:
        r = body[i]
        if j >= len(r):
            raise QoIReadError("unparsable", f"{file!r} data row {i} is short ({len(r)} cells)")
        values.append(_cell(r[j], f"{file}: data row {i}, column {header[j]!r}"))
    return np.asarray(values if row == "all" else values[0], dtype=np.float64)


def _read_hdf5(run_dir: Path, opt: Hdf5Reader) -> np.ndarray:
    import h5py  # lazy: keeps the module import light

    path = run_dir / opt.file
    if not path.is_file():
        raise QoIReadError("missing", f"output file {opt.file!r} not found in {run_dir}")
    try:
        with h5py.File(path, "r") as h5:
            ds = h5.get(opt.dataset)
            if ds is None or not isinstance(ds, h5py.Dataset):
                raise QoIReadError("missing", f"dataset {opt.dataset!r} not found in {opt.file!r}")
            data = ds[()]
    except OSError as exc:
        raise QoIReadError(
            "unparsable", f"{opt.file!r} is not a readable HDF5 file ({exc})"
        ) from exc
    where = f"{opt.file}:{opt.dataset}"
    try:
        arr = np.asarray(data, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise QoIReadError(
            "unparsable", f"{where}: not numeric (dtype {np.asarray(data).dtype})"
        ) from exc
    index = opt.index
    if index is not None:
        try:
            arr = arr[tuple(index) if isinstance(index, list) else index]
        except IndexError as exc:
            raise QoIReadError(
                "missing", f"{where}: index {index} out of range for shape {arr.shape}"
            ) from exc
    return _to_float_array(arr, where)


def _read_regex(run_dir: Path, opt: RegexReader) -> np.ndarray:
    text = _open_text(run_dir, opt.file)
    pattern = re.compile(opt.pattern)
    group = opt.group
    hits = [m.group(group) for m in pattern.finditer(text)]
    if not hits:
        raise QoIReadError("missing", f"pattern {opt.pattern!r} not found in {opt.file!r}")
    occ = opt.occurrence
    where = f"{opt.file}: pattern {opt.pattern!r}"
    if occ == "all":
        return np.asarray([_cell(h or "", where) for h in hits], dtype=np.float64)
    if occ == "first":
        chosen = hits[0]
    elif occ == "last":
        chosen = hits[-1]
    else:
        if not -len(hits) <= occ < len(hits):
            raise QoIReadError(
                "missing", f"{where} matched {len(hits)} time(s), asked occurrence {occ}"
            )
        chosen = hits[occ]
    if chosen is None:
        raise QoIReadError("unparsable", f"{where}: group {group!r} did not take part in the match")
    return np.asarray(_cell(chosen, where), dtype=np.float64)


def _read_function(run_dir: Path, opt: FunctionReader, name: str) -> np.ndarray:
    target = opt.root
    func = _resolve_function(target, "reader.function")
    try:
        result = func(run_dir)
    except Exception as exc:  # noqa: BLE001 - a user function failing on bad output is data
        raise QoIReadError("unparsable", f"{target} raised {type(exc).__name__}: {exc}") from exc
    if not isinstance(result, Mapping):
        raise QoIReadError(
            "unparsable",
            f"{target} returned {type(result).__name__}, expected a dict of QoI name to value",
        )
    if name not in result:
        raise QoIReadError(
            "missing", f"{target} returned no value for {name!r} (keys: {sorted(result)})"
        )
    return _to_float_array(result[name], f"{target}[{name!r}]")


def _read_with(run_dir: Path, reader: Mapping[str, Any], name: str) -> np.ndarray:
    _, opt = parse_reader(reader, "reader")
    if isinstance(opt, FunctionReader):
        return _read_function(run_dir, opt, name)
    return _READ[type(opt)](run_dir, opt)


# the read function of each reader's options model (the names are those of config.READERS)
_READ: dict[type, Callable[[Path, Any], np.ndarray]] = {
    JsonReader: _read_json,
    CsvReader: _read_csv,
    Hdf5Reader: _read_hdf5,
    RegexReader: _read_regex,
}


def read_axis(run_dir: Path | str | None, spec: Mapping[str, Any]) -> np.ndarray | None:
    """Return the axis of a vector QoI, shape (k,), or None for a scalar QoI.

    The axis is read from ``spec["axis"]["values"]`` or, with an axis ``reader``, from the
    output of ``run_dir``; an unreadable axis raises :class:`QoIReadError`.
    """
    axis = spec.get("axis")
    if axis is None:
        return None
    if "values" in axis:
        return np.asarray(axis["values"], dtype=np.float64)
    if run_dir is None:
        raise QoIReadError("missing", "the axis is read from run output but no run folder given")
    values = np.atleast_1d(_read_with(Path(run_dir), axis["reader"], axis["name"]))
    if not np.all(np.isfinite(values)):
        raise QoIReadError("nonfinite", f"axis {axis['name']!r} has non-finite values")
    return values


def read_qoi(
    run_dir: Path | str,
    spec: Mapping[str, Any],
    *,
    run_id: str,
    run_state: str = "succeeded",
) -> QoIValue:
    """Read one QoI from one run folder; never raises for bad run output.

    Parameters
    ----------
    run_dir : path
        The run folder; reader file names are relative to it.
    spec : mapping
        A QoI spec (see :func:`validate_qoi_spec`); a bad spec raises ``ValueError``.
    run_id : str
        Id of the run, recorded in the result.
    run_state : str
        The run's final state; anything but ``"succeeded"`` gives status ``run_failed``
        without reading any file (the output of a failed run is not trusted).

    Returns
    -------
    QoIValue
        ``value`` is a float64 array, shape () for a scalar QoI or (k,) for a vector QoI with
        an axis of length k. Status ``ok``, or ``missing`` / ``unparsable`` / ``nonfinite`` /
        ``run_failed`` with a NaN-filled value and a ``reason``.
    """
    spec = validate_qoi_spec(spec)
    name = spec["name"]
    run_dir = Path(run_dir)
    fixed_axis = spec.get("axis", {}).get("values") if spec.get("axis") else None
    nan_shape: tuple[int, ...] = () if fixed_axis is None else (len(fixed_axis),)
    if spec.get("axis") is not None and fixed_axis is None:
        nan_shape = (0,)  # axis read from each run: length unknown when the run failed

    def bad(status: str, reason: str, shape: tuple[int, ...] = nan_shape) -> QoIValue:
        return QoIValue(
            run_id=run_id, name=name, value=np.full(shape, np.nan), status=status, reason=reason
        )  # type: ignore[arg-type]

    if run_state != "succeeded":
        return bad("run_failed", f"run ended as {run_state!r}; its output is not read")
    try:
        value = _read_with(run_dir, spec["reader"], name)
        axis = read_axis(run_dir, spec)
    except QoIReadError as exc:
        return bad(exc.status, exc.reason)
    if axis is None and value.ndim != 0:
        if value.size == 1:
            value = value.reshape(())
        else:
            return bad(
                "unparsable",
                f"expected a scalar, got {value.size} values (give an 'axis' for a vector QoI)",
            )
    if axis is not None:
        value = np.atleast_1d(value)
        if value.shape != axis.shape:
            return bad(
                "unparsable",
                f"got {value.size} values but the axis {spec['axis']['name']!r} has {axis.size}",
            )
    if not np.all(np.isfinite(value)):
        n_bad = int(np.size(value) - np.count_nonzero(np.isfinite(value)))
        return bad("nonfinite", f"{n_bad} non-finite value(s) read", np.shape(value))
    return QoIValue(
        run_id=run_id, name=name, value=np.asarray(value, dtype=np.float64), status="ok"
    )
