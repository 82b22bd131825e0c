"""Declarative column tables of the run store: the machinery (private).

Each record of ``records.py`` that the store holds has one :class:`Table` (they are in
:mod:`._tables`): the
datasets (table columns, or datasets of the record's group) and attributes it is stored in,
each with its name, codec (how a value is encoded and decoded), units and description, and
the record fields it restores. Writing and reading are driven by these tables
(:func:`write_columns` / :func:`row_kwargs` for records stored as table rows,
:func:`group_attrs` / :func:`write_group_datasets` / :func:`group_kwargs` for records stored as
a group). Fields a table neither stores in a column nor names in ``linked`` (fields the layout
keeps in its structure, written by the section module) go to the table's ``extra_json``
column or attribute, so a field added to a record later survives a round trip without a
layout change. ``docs/store-layout.md`` documents the result.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from ._h5 import (
    ONE,
    TEXT,
    StoreFormatError,
    attr_str,
    from_json,
    get_array,
    need,
    put_array,
    to_json,
)


# ------------------------------------------------------------------------------------------
# codecs
# ------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Codec:
    """How one value is stored: ``dtype`` of a table column, ``encode(value, where)`` to
    what is stored, ``decode(stored)`` back; ``text``: attributes are read as text."""

    name: str
    dtype: Any
    encode: Callable[[Any, str], Any]
    decode: Callable[[Any], Any]
    text: bool


def _same(v: Any, where: str = "") -> Any:
    return v


def _texts(v: Any, where: str = "") -> np.ndarray:
    return np.array(list(v), dtype=object)


CODECS: dict[str, Codec] = {
    "text": Codec("text", object, _same, str, True),
    "float": Codec("float", np.float64, lambda v, w: float(v), float, False),
    "int": Codec("int", np.int64, lambda v, w: int(v), int, False),
    "bool": Codec("bool", np.bool_, lambda v, w: bool(v), bool, False),
    # tagged JSON (docs/store-layout.md): exact types, NaN, tuples, paths
    "json": Codec("json", object, lambda v, w: to_json(v, w), lambda x: from_json(str(x)), True),
    "path": Codec("path", object, lambda v, w: str(v), lambda x: Path(str(x)), True),
    # a whole dataset of a record's group (numeric array, any kind given; see put_array)
    "array": Codec("array", None, _same, _same, False),
    # a 1-D text dataset holding a sequence of strings, read back as a tuple
    "texts": Codec("texts", None, _texts, lambda a: tuple(str(x) for x in a), False),
}


# ------------------------------------------------------------------------------------------
# columns and tables
# ------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Column:
    """One dataset or attribute of a record.

    ``fields`` are the record fields restored from it: one field is stored as its value, more
    than one as a JSON object of them (their exact Python/numpy types), none means the column
    is there for people and other tools only (``value`` then says what it holds). ``units``
    may be a function of the record (group datasets in the record's own units).
    """

    name: str
    codec: str
    units: Any = ONE
    description: str = ""
    fields: tuple[str, ...] = ()
    value: Callable[[Any], Any] | None = None
    attr: bool = False  # an attribute of the record's group instead of a dataset
    optional: bool = False  # group dataset: absent when the value is None; may be absent
    empty: Any = None  # stored in a table row that has no record (a run without outcome)
    lossy_nul: bool = False  # NUL characters stored as U+FFFD (output tails)

    def __post_init__(self) -> None:
        if self.codec not in CODECS:
            raise ValueError(f"column {self.name!r}: codec must be one of {', '.join(CODECS)}")
        if self.value is None and not self.fields:
            raise ValueError(f"column {self.name!r}: give the fields it stores or a value")

    def get(self, rec: Any) -> Any:
        if self.value is not None:
            return self.value(rec)
        if len(self.fields) == 1:
            return getattr(rec, self.fields[0])
        return {f: getattr(rec, f) for f in self.fields}

    def units_of(self, rec: Any) -> Any:
        return self.units(rec) if callable(self.units) else self.units


@dataclass
class Table:
    """The columns of one record type. ``linked`` maps the fields the layout keeps in its
    structure (a subgroup, a link to another table, the group's datasets) to where."""

    record: type
    where: str  # prefix of error messages
    columns: tuple[Column, ...]
    extra: str = "extra_json"
    extra_description: str = ""
    linked: Mapping[str, str] = field(default_factory=dict)

    @property
    def known(self) -> frozenset[str]:
        """Fields stored by the layout; any other field goes to ``extra``."""
        return frozenset(f for c in self.columns for f in c.fields) | frozenset(self.linked)

    def column(self, name: str) -> Column:
        return next(c for c in self.columns if c.name == name)


def extra_json(obj: Any, known: frozenset[str]) -> str:
    """Tagged JSON of a record's fields that the layout does not store on their own."""
    extra = {f.name: getattr(obj, f.name) for f in dataclasses.fields(obj) if f.name not in known}
    return to_json(extra, f"{type(obj).__name__} extra fields")


def build(cls: type, kwargs: dict[str, Any], extra: str | None) -> Any:
    """``cls(**kwargs)`` plus the stored extra fields that ``cls`` still has."""
    if extra:
        names = {f.name for f in dataclasses.fields(cls)}
        kwargs.update({k: v for k, v in from_json(extra).items() if k in names})
    return cls(**kwargs)


def _restore(kwargs: dict[str, Any], c: Column, decoded: Any) -> None:
    if len(c.fields) == 1:
        kwargs[c.fields[0]] = decoded
    else:
        kwargs.update({f: decoded[f] for f in c.fields})


# ------------------------------------------------------------------------------------------
# records stored as table rows: one 1-D dataset per column
# ------------------------------------------------------------------------------------------
def put_column(
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


def write_columns(
    group: h5py.Group, table: Table, records: Sequence[Any], *, extra: bool = True
) -> None:
    """One dataset per column of ``table`` over ``records`` (``None``: a row without a
    record, stored as each column's ``empty``), then the extra-fields column."""
    for c in table.columns:
        codec = CODECS[c.codec]
        where = f"{table.where}.{c.name}"
        values = [c.empty if r is None else codec.encode(c.get(r), where) for r in records]
        put_column(group, c.name, values, c.units, c.description, codec.dtype, c.lossy_nul)
    if extra:
        put_column(
            group,
            table.extra,
            ["" if r is None else extra_json(r, table.known) for r in records],
            TEXT,
            table.extra_description,
        )


def row_kwargs(table: Table, cols: Mapping[str, np.ndarray], i: int, where: str) -> dict:
    """Constructor arguments of row ``i`` from the columns that restore fields."""
    kwargs: dict[str, Any] = {}
    for c in table.columns:
        if not c.fields:
            continue
        if c.name not in cols:
            raise StoreFormatError(f"{where}: column {c.name!r} is missing")
        _restore(kwargs, c, CODECS[c.codec].decode(cols[c.name][i]))
    return kwargs


def build_row(
    table: Table, cols: Mapping[str, np.ndarray], i: int, where: str, **linked: Any
) -> Any:
    """The record of row ``i``: its columns, the ``linked`` fields given, its extra fields."""
    kwargs = row_kwargs(table, cols, i, where)
    kwargs.update(linked)
    extra = str(cols[table.extra][i]) if table.extra in cols else ""
    return build(table.record, kwargs, extra)


# ------------------------------------------------------------------------------------------
# records stored as a group: attributes and datasets
# ------------------------------------------------------------------------------------------
def group_attrs(table: Table, rec: Any) -> dict[str, Any]:
    """The attribute columns of ``rec``, encoded, plus its extra fields."""
    out = {}
    for c in table.columns:
        if c.attr:
            out[c.name] = CODECS[c.codec].encode(c.get(rec), f"{table.where}.{c.name}")
    out[table.extra] = extra_json(rec, table.known)
    return out


def write_group_datasets(g: h5py.Group, table: Table, rec: Any) -> None:
    for c in table.columns:
        if c.attr:
            continue
        v = c.get(rec)
        if v is None and c.optional:
            continue
        data = CODECS[c.codec].encode(v, f"{table.where}.{c.name}")
        put_array(g, c.name, data, units=c.units_of(rec), description=c.description)


def group_kwargs(table: Table, g: h5py.Group) -> dict[str, Any]:
    """Constructor arguments restored from a group's attributes and datasets."""
    kwargs: dict[str, Any] = {}
    for c in table.columns:
        if not c.fields:
            continue
        codec = CODECS[c.codec]
        if c.attr:
            if c.optional and c.name not in g.attrs:
                continue
            raw = attr_str(g, c.name) if codec.text else g.attrs[c.name]
        elif c.optional and c.name not in g:
            raw = None
        else:
            raw = get_array(need(g, c.name))
        _restore(kwargs, c, None if raw is None else codec.decode(raw))
    return kwargs


def build_group(table: Table, g: h5py.Group, **linked: Any) -> Any:
    kwargs = group_kwargs(table, g)
    kwargs.update(linked)
    return build(table.record, kwargs, attr_str(g, table.extra, ""))
