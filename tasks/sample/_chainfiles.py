"""Read and write posterior chains kept in plain files (``.npy``, ``.csv``, HDF5).

A chain file holds draws as rows, one column per parameter, and optionally a column naming
the chain each row belongs to and a column with the draw number. A ``.npy`` file may instead
hold a 3-D array ``(chains, draws, d)``. Whatever the file, the result is a
:class:`~winnow.tasks.records.Chain` in the user's units with the rows in file order.

Conventions
-----------
* CSV: the first non-blank line is a header of column names; a header cell may carry units
  in square brackets, ``logT [log10(m2/s)]``. Lines starting with ``#`` are comments.
  Cells are parsed with Python's ``float`` (``nan``, ``inf`` accepted); anything else is an
  error naming the line and the column.
* HDF5: ``dataset`` is the path of a 2-D or 3-D dataset; its attributes ``names`` and
  ``units`` (a string array, or one comma-separated string) name the columns.
* ``names`` / ``units`` given by the caller (the study configuration) override the file's
  and must have one entry per parameter column (chain and draw columns excluded).
* ``chain_column`` / ``draw_column`` are column names, or integer column positions for files
  without names. Chain labels may be any integers; they are renumbered ``0..K-1`` in sorted
  order. Without a draw column, draws are numbered in file order within each chain.
* Rows with NaN or infinite values are kept here (the thin stage counts and drops them);
  :func:`nonfinite_rows` counts them.
"""

from __future__ import annotations

import csv
import re
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from winnow.tasks.errors import InputError
from winnow.tasks.records import Chain

__all__ = [
    "SUFFIXES",
    "nonfinite_rows",
    "read_chain_file",
    "write_chain_csv",
    "write_chain_npy",
]

SUFFIXES: tuple[str, ...] = (".npy", ".csv", ".h5", ".hdf5")

_UNITS_IN_HEADER = re.compile(r"^(?P<name>.*?)\s*\[(?P<units>[^\]]*)\]\s*$")


# --------------------------------------------------------------------------------------------
# public API
# --------------------------------------------------------------------------------------------
def read_chain_file(
    path: str | Path,
    *,
    dataset: str | None = None,
    names: Sequence[str] | None = None,
    units: Sequence[str] | None = None,
    chain_column: str | int | None = None,
    draw_column: str | int | None = None,
) -> Chain:
    """Read a posterior chain from a ``.npy``, ``.csv`` or HDF5 file.

    Parameters
    ----------
    path : str or Path
        The chain file; the suffix selects the format (one of :data:`SUFFIXES`).
    dataset : str, optional
        HDF5 only (required there): path of the dataset inside the file.
    names, units : sequence of str, optional
        Parameter names and units, one per parameter column; override the file's.
    chain_column, draw_column : str or int, optional
        Column holding the chain label / draw number (by name, or by position).

    Returns
    -------
    Chain
        ``samples`` shape (n, d) float64, ``chain_index``/``draw_index`` shape (n,) int64,
        ``source`` ``"imported:<path>"``, no diagnostics.

    Raises
    ------
    FileNotFoundError
        The file does not exist.
    ValueError
        Unknown suffix, empty file, 1-D array, ragged or non-numeric CSV, missing or unreadable
        HDF5 dataset, wrong number of names or units, bad chain/draw column.
    """
    p = Path(path)
    if not p.exists():
        raise FileNotFoundError(f"chain file {str(p)!r} does not exist")
    if p.is_dir():
        raise InputError(f"chain file {str(p)!r} is a folder, not a file")
    suffix = p.suffix.lower()
    readers = {".npy": _read_npy, ".csv": _read_csv, ".h5": _read_hdf5, ".hdf5": _read_hdf5}
    if suffix not in readers:
        raise InputError(
            f"chain file {str(p)!r}: unknown suffix {p.suffix!r}; expected one of "
            f"{', '.join(SUFFIXES)}"
        )
    if suffix == ".csv" and dataset is not None:
        raise InputError(f"chain file {str(p)!r}: 'dataset' applies to HDF5 files only")
    if p.stat().st_size == 0:
        raise InputError(f"chain file {str(p)!r} is empty")
    data, file_names, file_units = readers[suffix](p, dataset)
    if data.ndim == 3:
        if chain_column is not None or draw_column is not None:
            raise InputError(
                f"chain file {str(p)!r}: a 3-D array (chains, draws, d) already separates "
                "chains; do not give chain_column/draw_column"
            )
        return _chain_from_3d(p, data, file_names, file_units, names, units)
    return _chain_from_table(
        p, data, file_names, file_units, names, units, chain_column, draw_column
    )


def nonfinite_rows(chain: Chain | np.ndarray) -> int:
    """Number of rows holding at least one NaN or infinite value.

    Parameters
    ----------
    chain : Chain or ndarray, shape (n, d)
    """
    samples = chain.samples if isinstance(chain, Chain) else np.asarray(chain, dtype=float)
    if samples.ndim != 2:
        raise ValueError(f"samples must be 2-D (n, d), got shape {samples.shape}")
    return int(np.count_nonzero(~np.isfinite(samples).all(axis=1)))


def write_chain_csv(path: str | Path, chain: Chain, *, with_index: bool = True) -> Path:
    """Write a chain as CSV (header ``name [units]``; ``chain``/``draw`` columns first).

    The file reads back with ``read_chain_file(path, chain_column="chain",
    draw_column="draw")`` (or without those arguments when ``with_index`` is False).
    Values are written with 17 significant digits, so they round-trip exactly.
    """
    p = Path(path)
    header = [f"{n} [{u}]" if u else n for n, u in zip(chain.names, chain.units, strict=True)]
    with p.open("w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow((["chain", "draw"] if with_index else []) + header)
        for k in range(chain.n):
            row = [repr(float(v)) for v in chain.samples[k]]
            if with_index:
                row = [str(int(chain.chain_index[k])), str(int(chain.draw_index[k]))] + row
            writer.writerow(row)
    return p


def write_chain_npy(path: str | Path, chain: Chain) -> Path:
    """Write a chain as ``.npy``: shape (chains, draws, d) when every chain has the same
    number of rows in draw order, else the flat (n, d) rows."""
    p = Path(path)
    chains = np.unique(chain.chain_index)
    counts = np.array([np.count_nonzero(chain.chain_index == c) for c in chains])
    if chain.n and np.all(counts == counts[0]):
        order = np.lexsort((chain.draw_index, chain.chain_index))
        arr = chain.samples[order].reshape(len(chains), int(counts[0]), chain.d)
    else:
        arr = chain.samples
    np.save(p, arr)
    return p


# --------------------------------------------------------------------------------------------
# readers: each returns (data 2-D or 3-D float64, column names or None, column units or None)
# --------------------------------------------------------------------------------------------
def _read_npy(p: Path, dataset: str | None) -> tuple[np.ndarray, None, None]:
    if dataset is not None:
        raise InputError(f"chain file {str(p)!r}: 'dataset' applies to HDF5 files only")
    try:
        raw = np.load(p, allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        raise InputError(f"chain file {str(p)!r} is not a readable .npy array: {exc}") from None
    return _as_numeric(p, raw, "array"), None, None


def _read_csv(p: Path, dataset: str | None) -> tuple[np.ndarray, list[str], list[str]]:
    header: list[str] | None = None
    header_line = 0
    rows: list[list[float]] = []
    try:
        fh = p.open(newline="", encoding="utf-8-sig")
    except OSError as exc:
        raise InputError(f"chain file {str(p)!r} cannot be opened: {exc}") from None
    with fh:
        try:
            for lineno, cells in enumerate(csv.reader(fh), start=1):
                if not cells or all(not c.strip() for c in cells):
                    continue
                if cells[0].lstrip().startswith("#"):
                    continue
                if header is None:
                    header = [c.strip() for c in cells]
                    header_line = lineno
                    continue
                if len(cells) != len(header):
                    raise InputError(
                        f"chain file {str(p)!r}, line {lineno}: {len(cells)} cells, but the "
                        f"header (line {header_line}) has {len(header)} columns"
                    )
                row = []
                for j, cell in enumerate(cells):
                    try:
                        row.append(float(cell))
                    except ValueError:
                        raise InputError(
                            f"chain file {str(p)!r}, line {lineno}, column {j + 1} "
                            f"({header[j]!r}): {cell!r} is not a number"
                        ) from None
                rows.append(row)
        except (UnicodeDecodeError, csv.Error) as exc:
            raise InputError(f"chain file {str(p)!r} is not readable CSV text: {exc}") from None
    if header is None:
        raise InputError(f"chain file {str(p)!r} is empty (no header row)")
    if not rows:
        raise InputError(f"chain file {str(p)!r} has a header but no data rows")
    names, units = [], []
    for j, cell in enumerate(header):
        m = _UNITS_IN_HEADER.match(cell)
        name, unit = (m.group("name").strip(), m.group("units").strip()) if m else (cell, "")
        if not name:
            raise InputError(
                f"chain file {str(p)!r}, line {header_line}: column {j + 1} has no name"
            )
        names.append(name)
        units.append(unit)
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise InputError(f"chain file {str(p)!r}: repeated column names {dup}")
    return np.asarray(rows, dtype=np.float64), names, units


def _read_hdf5(
    p: Path, dataset: str | None
) -> tuple[np.ndarray, list[str] | None, list[str] | None]:
    import h5py  # imported here: only HDF5 users pay for it

    try:
        fh = h5py.File(p, "r")
    except OSError as exc:
        raise InputError(
            f"chain file {str(p)!r} is not a readable HDF5 file (truncated or corrupt?): {exc}"
        ) from None
    with fh:
        available: list[str] = []

        def _collect(name: str, obj: object) -> None:
            if isinstance(obj, h5py.Dataset):
                available.append(f"{name} {obj.shape}")

        try:
            fh.visititems(_collect)
        except (OSError, RuntimeError, KeyError) as exc:
            raise InputError(
                f"chain file {str(p)!r}: HDF5 structure unreadable (truncated or corrupt?): {exc}"
            ) from None
        listing = ", ".join(available) if available else "no datasets"
        if dataset is None:
            raise InputError(
                f"chain file {str(p)!r}: give the HDF5 dataset path (datasets in the file: "
                f"{listing})"
            )
        obj = fh.get(dataset.strip("/") or "/")
        if not isinstance(obj, h5py.Dataset):
            raise InputError(
                f"chain file {str(p)!r} has no dataset {dataset!r} (datasets in the file: "
                f"{listing})"
            )
        try:
            raw = obj[()]
            names = _attr_strings(obj.attrs.get("names"))
            units = _attr_strings(obj.attrs.get("units"))
        except (OSError, RuntimeError, KeyError, TypeError) as exc:
            raise InputError(
                f"chain file {str(p)!r}, dataset {dataset!r}: cannot be read (truncated or "
                f"corrupt?): {exc}"
            ) from None
    data = _as_numeric(p, np.asarray(raw), f"dataset {dataset!r}")
    width = data.shape[-1]
    for label, values in (("names", names), ("units", units)):
        if values is not None and len(values) != width:
            raise InputError(
                f"chain file {str(p)!r}, dataset {dataset!r}: attribute {label!r} has "
                f"{len(values)} entries but the dataset has {width} columns"
            )
    return data, names, units


def _attr_strings(value: object) -> list[str] | None:
    if value is None:
        return None
    if isinstance(value, bytes):
        value = value.decode()
    if isinstance(value, str):
        return [s.strip() for s in value.split(",")]
    arr = np.atleast_1d(np.asarray(value))
    return [v.decode() if isinstance(v, bytes) else str(v) for v in arr.tolist()]


def _as_numeric(p: Path, raw: np.ndarray, what: str) -> np.ndarray:
    if raw.dtype.names is not None or not (
        np.issubdtype(raw.dtype, np.number) or raw.dtype == np.bool_
    ):
        raise InputError(f"chain file {str(p)!r}: {what} has dtype {raw.dtype}, expected numbers")
    if np.iscomplexobj(raw):
        raise InputError(f"chain file {str(p)!r}: {what} is complex, expected real numbers")
    if raw.ndim not in (2, 3):
        raise InputError(
            f"chain file {str(p)!r}: {what} has shape {raw.shape}; expected (n, d) rows or "
            "(chains, draws, d)"
        )
    if raw.size == 0:
        raise InputError(f"chain file {str(p)!r}: {what} is empty (shape {raw.shape})")
    return np.asarray(raw, dtype=np.float64)


# --------------------------------------------------------------------------------------------
# assembling the Chain
# --------------------------------------------------------------------------------------------
def _labels(
    p: Path, given: Sequence[str] | None, fallback: list[str], what: str, d: int
) -> tuple[str, ...]:
    if given is None:
        return tuple(fallback)
    if isinstance(given, str):
        raise TypeError(f"{what} must be a sequence of str, got the single string {given!r}")
    values = tuple(str(v) for v in given)
    if len(values) != d:
        raise InputError(
            f"chain file {str(p)!r} has {d} parameter column(s) but {len(values)} {what} "
            f"were given ({list(values)})"
        )
    return values


def _chain_from_3d(
    p: Path,
    data: np.ndarray,
    file_names: list[str] | None,
    file_units: list[str] | None,
    names: Sequence[str] | None,
    units: Sequence[str] | None,
) -> Chain:
    k, m, d = data.shape
    names_t = _labels(p, names, file_names or [f"x{j}" for j in range(d)], "names", d)
    units_t = _labels(p, units, file_units or [""] * d, "units", d)
    return Chain(
        samples=np.ascontiguousarray(data.reshape(k * m, d)),
        names=names_t,
        units=units_t,
        chain_index=np.repeat(np.arange(k, dtype=np.int64), m),
        draw_index=np.tile(np.arange(m, dtype=np.int64), k),
        source=f"imported:{p}",
    )


def _column_position(
    p: Path, col: str | int, file_names: list[str] | None, width: int, what: str
) -> int:
    if isinstance(col, bool) or not isinstance(col, (str, int, np.integer)):
        raise TypeError(f"{what} must be a column name or position, got {col!r}")
    if isinstance(col, str):
        if file_names is None:
            raise InputError(
                f"chain file {str(p)!r} has no column names; give {what} as a column "
                f"position (0..{width - 1}), not {col!r}"
            )
        if col not in file_names:
            raise InputError(
                f"chain file {str(p)!r} has no column {col!r} for {what} (columns: "
                f"{', '.join(file_names)})"
            )
        return file_names.index(col)
    j = int(col)
    if not 0 <= j < width:
        raise InputError(f"chain file {str(p)!r}: {what} position {j} outside 0..{width - 1}")
    return j


def _integer_column(p: Path, values: np.ndarray, what: str) -> np.ndarray:
    bad = ~np.isfinite(values) | (values != np.round(values))
    if bad.any():
        row = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"chain file {str(p)!r}: {what} must hold integers; data row {row + 1} has "
            f"{values[row]!r}"
        )
    return values.astype(np.int64)


def _chain_from_table(
    p: Path,
    data: np.ndarray,
    file_names: list[str] | None,
    file_units: list[str] | None,
    names: Sequence[str] | None,
    units: Sequence[str] | None,
    chain_column: str | int | None,
    draw_column: str | int | None,
) -> Chain:
    n, width = data.shape
    special: dict[str, int] = {}
    for what, col in (("chain_column", chain_column), ("draw_column", draw_column)):
        if col is not None:
            special[what] = _column_position(p, col, file_names, width, what)
    if len(set(special.values())) < len(special):
        raise InputError(f"chain file {str(p)!r}: chain_column and draw_column are the same")
    keep = [j for j in range(width) if j not in special.values()]
    if not keep:
        raise InputError(f"chain file {str(p)!r} has no parameter columns")
    d = len(keep)
    fallback_names = [file_names[j] for j in keep] if file_names else [f"x{j}" for j in keep]
    fallback_units = [file_units[j] for j in keep] if file_units else [""] * d
    names_t = _labels(p, names, fallback_names, "names", d)
    units_t = _labels(p, units, fallback_units, "units", d)
    if len(set(names_t)) < d:
        raise InputError(f"chain file {str(p)!r}: parameter names repeat: {list(names_t)}")

    if "chain_column" in special:
        labels = _integer_column(p, data[:, special["chain_column"]], "chain_column")
        _, chain_index = np.unique(labels, return_inverse=True)
        chain_index = chain_index.astype(np.int64)
    else:
        chain_index = np.zeros(n, dtype=np.int64)
    if "draw_column" in special:
        draw_index = _integer_column(p, data[:, special["draw_column"]], "draw_column")
    else:
        # Running count within each chain, in file order (stable sort keeps that order).
        order = np.argsort(chain_index, kind="stable")
        sorted_chain = chain_index[order]
        starts = np.r_[0, np.flatnonzero(np.diff(sorted_chain)) + 1]
        first = np.repeat(starts, np.diff(np.r_[starts, n]))
        draw_index = np.empty(n, dtype=np.int64)
        draw_index[order] = np.arange(n) - first
    return Chain(
        samples=np.ascontiguousarray(data[:, keep]),
        names=names_t,
        units=units_t,
        chain_index=chain_index,
        draw_index=draw_index,
        source=f"imported:{p}",
    )
