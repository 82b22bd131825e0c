"""Config of the collect stage: the QoIs, their readers and the estimates.

The readers and their options are declared here once, as pydantic models in :data:`READERS`
(reader name -> options model); the collect stage reads with the validated options and the
config validates a QoI's reader without importing the stage.
"""

from __future__ import annotations

import math
import re
import types
import typing
from collections.abc import Mapping
from typing import Any, ClassVar, Literal, Union

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    RootModel,
    ValidationError,
    ValidationInfo,
    field_validator,
    model_validator,
)

from ._base import _CALLABLE, _NAME_PATTERN, _Model

_Pick = Literal["first", "last", "all"]


# --------------------------------------------------------------------------------------------
# reader options (one model per reader; READERS is the registry of reader names)
# --------------------------------------------------------------------------------------------
class _ReaderOptions(BaseModel):
    # strict: a YAML ``1`` is not the string "1", ``true`` is not the integer 1 (the readers
    # index with these values, so a silent conversion would read the wrong cell)
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)

    file: str = Field(description="Output file, relative to the run folder.")


class RowWhere(BaseModel):
    """The one data row whose ``column`` holds ``value``: ``{where: {column: value}}``."""

    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)
    shape: ClassVar[str] = "{'where': {column: value}}"

    where: dict[str, int | float | str] = Field(description="One {column: value} pair.")

    @field_validator("where")
    @classmethod
    def _one_pair(cls, v: dict[str, int | float | str]) -> dict[str, int | float | str]:
        if len(v) != 1:
            raise ValueError(f"expected one {{column: value}} pair, got {v!r}")
        return v


class JsonReader(_ReaderOptions):
    """A number or list of numbers at a key path of a JSON file."""

    key: str | list[str | int] = Field(
        description="Dotted key path ('qoi.drawdown') or list of keys and list indices."
    )

    @field_validator("key")
    @classmethod
    def _non_empty(cls, v: str | list[str | int]) -> str | list[str | int]:
        if isinstance(v, str) and not v:
            raise ValueError("expected a non-empty key path, got ''")
        return v


class CsvReader(_ReaderOptions):
    """A cell, or a whole column, of a CSV file with a header row."""

    column: str | int = Field(description="Column name from the header, or column number.")
    row: _Pick | int | RowWhere = Field(
        "last",
        description="Data row: 'first', 'last', 'all' (a vector QoI), a row number, or "
        "{where: {column: value}}.",
    )
    delimiter: str = Field(",", description="Field delimiter, one character.")

    @field_validator("delimiter")
    @classmethod
    def _one_character(cls, v: str) -> str:
        if len(v) != 1:
            raise ValueError(f"expected one character, got {v!r}")
        return v


class Hdf5Reader(_ReaderOptions):
    """A dataset of an HDF5 file, optionally indexed."""

    dataset: str = Field(description="Path of the dataset inside the file.")
    index: int | list[int] | None = Field(
        None, description="Index into the dataset (an int, or one int per dimension)."
    )


class RegexReader(_ReaderOptions):
    """A number captured by a regular expression in a text file (a solver log)."""

    pattern: str = Field(description="Python regular expression with a capturing group.")
    group: int | str = Field(1, description="Group number or name holding the number.")
    occurrence: _Pick | int = Field(
        "last", description="Which match: 'first', 'last', 'all' (a vector QoI) or a number."
    )

    @field_validator("pattern")
    @classmethod
    def _compiles(cls, v: str) -> str:
        try:
            re.compile(v)
        except re.error as exc:
            raise ValueError(f"not a valid regular expression ({exc})") from None
        return v

    @field_validator("group")
    @classmethod
    def _group_exists(cls, v: int | str, info: ValidationInfo) -> int | str:
        if "pattern" not in info.data:  # the pattern itself is bad (reported on its own)
            return v
        compiled = re.compile(info.data["pattern"])
        if isinstance(v, int) and v > compiled.groups:
            raise ValueError(f"pattern has {compiled.groups} group(s), got {v}")
        if isinstance(v, str) and v not in compiled.groupindex:
            raise ValueError(f"pattern has no group named {v!r}")
        return v


class FunctionReader(RootModel[str]):
    """A user function ``'module:function'``, called with the run folder, returning a dict of
    QoI name to value (it is imported by the collect stage, which knows the search path)."""

    model_config = ConfigDict(frozen=True, strict=True)
    shape: ClassVar[str] = "'module:function'"

    @field_validator("root")
    @classmethod
    def _module_function(cls, v: str) -> str:
        if not _CALLABLE.match(v):
            raise ValueError(f"expected 'module:function', got {v!r}")
        return v


ReaderOptions = JsonReader | CsvReader | Hdf5Reader | RegexReader | FunctionReader

READERS: dict[str, type[ReaderOptions]] = {
    "json": JsonReader,
    "csv": CsvReader,
    "hdf5": Hdf5Reader,
    "regex": RegexReader,
    "function": FunctionReader,
}
"""The QoI readers: name -> model of its options (the one registry of reader names)."""

_READERS_IN_WORDS = ", ".join(
    f"{{{name}: {getattr(model, 'shape', None) or '{' + ', '.join(model.model_fields) + '}'}}}"
    for name, model in READERS.items()
)
_TYPE_ERRORS = frozenset({"int_from_float", "model_type", "model_attributes_type"})


def _expected(annotation: Any) -> str:
    """An annotation in words: ``str | int`` -> "str or int"."""
    origin = typing.get_origin(annotation)
    if origin is Literal:
        return ", ".join(repr(a) for a in typing.get_args(annotation))
    if origin in (Union, types.UnionType):
        parts = [a for a in typing.get_args(annotation) if a is not type(None)]
        return " or ".join(_expected(a) for a in parts)
    if origin is list:
        (item,) = typing.get_args(annotation)
        return f"a list of {_expected(item)} values"
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return getattr(annotation, "shape", annotation.__name__)
    return {float: "number", int: "int", str: "str"}.get(annotation, str(annotation))


def _options_error(
    exc: ValidationError, model: type[BaseModel], options: Any, where: str
) -> ValueError | TypeError:
    """One pydantic error of a reader's (or an axis's) options as a message naming the option.

    A value of the wrong type gives ``TypeError``, anything else ``ValueError``; unknown
    options are named first, then missing ones, then the first bad value.
    """
    errors = exc.errors()
    by_kind = {e["type"]: e for e in reversed(errors)}
    if "extra_forbidden" in by_kind:
        extra = sorted(str(e["loc"][0]) for e in errors if e["type"] == "extra_forbidden")
        allowed = sorted(model.model_fields)
        return ValueError(f"{where}: unknown option(s) {extra}; valid options: {allowed}")
    if "missing" in by_kind:
        return ValueError(f"{where}: missing option {by_kind['missing']['loc'][0]!r}")
    first = errors[0]
    if not first["loc"] or first["loc"][0] == "root":  # a model-level check, or the function
        if first["type"] == "value_error":
            return ValueError(f"{where}: {first['ctx']['error']}")
        shape = getattr(model, "shape", model.__name__)
        return TypeError(f"{where}: expected {shape}, got {options!r}")
    name = first["loc"][0]
    same = [e for e in errors if e["loc"][:1] == (name,)]
    # a union member's own check (e.g. row {where: ...} with two pairs) says the most
    checked = [e for e in same if e["type"] == "value_error"]
    if checked:
        return ValueError(f"{where}.{name}: {checked[0]['ctx']['error']}")
    value = options.get(name) if isinstance(options, Mapping) else options
    text = (
        f"{where}.{name}: expected {_expected(model.model_fields[name].annotation)}, got {value!r}"
    )
    is_type = all(e["type"].endswith("_type") or e["type"] in _TYPE_ERRORS for e in same)
    return TypeError(text) if is_type else ValueError(text)


def parse_reader(reader: Any, where: str) -> tuple[str, ReaderOptions]:
    """Check one reader ``{name: options}`` and return its name and validated options.

    Parameters
    ----------
    reader : mapping
        Exactly one item, a name of :data:`READERS` and its options.
    where : str
        Where the reader sits in the config, for the messages ("qoi 'q'.reader").

    Raises
    ------
    ValueError, TypeError
        Naming the option, the expected and the actual value (``TypeError`` for a value of
        the wrong type).
    """
    if not isinstance(reader, Mapping) or len(reader) != 1:
        raise ValueError(
            f"{where}: expected exactly one reader among {list(READERS)}, got {reader!r}"
        )
    ((kind, options),) = reader.items()
    if kind not in READERS:
        raise ValueError(f"{where}: unknown reader {kind!r}; valid readers: {list(READERS)}")
    model = READERS[kind]
    w = f"{where}.{kind}"
    if model is not FunctionReader and not isinstance(options, Mapping):
        raise TypeError(f"{w}: expected a mapping of options, got {options!r}")
    try:
        return kind, model.model_validate(options)
    except ValidationError as exc:
        raise _options_error(exc, model, options, w) from None


class AxisSpec(BaseModel):
    """The axis of a vector QoI shared by all runs: given ``values`` or read from each run
    with a ``reader``."""

    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)
    shape: ClassVar[str] = "{name, units, values: [...]} or {name, units, reader: {...}}"

    name: str = Field(description="Name of the axis, e.g. 't'.")
    units: str = Field("", description="Units of the axis values.")
    values: list[float] | None = Field(None, description="The axis values, finite.")
    reader: dict[str, Any] | None = Field(None, description="Reader of the axis values.")

    @field_validator("values")
    @classmethod
    def _finite(cls, v: list[float] | None) -> list[float] | None:
        if v is not None and (not v or not all(math.isfinite(x) for x in v)):
            raise ValueError(f"expected a non-empty list of finite numbers, got {v!r}")
        return v

    @model_validator(mode="after")
    def _values_or_reader(self) -> AxisSpec:
        if (self.values is None) == (self.reader is None):
            raise ValueError("give exactly one of 'values' or 'reader'")
        return self


def check_qoi_spec(spec: Any) -> dict[str, Any]:
    """Check a QoI spec (the fields of :class:`QoISettings` as a plain dict) without reading
    or importing anything; return it as a plain dict.

    A ``function`` reader is checked for its form only; the collect stage imports it.

    Raises
    ------
    ValueError, TypeError
        Naming the option, the expected and the actual value.
    """
    if not isinstance(spec, Mapping):
        raise TypeError(f"spec: expected a mapping, got {type(spec).__name__}")
    extra = sorted(set(spec) - set(QoISettings.model_fields))
    if extra:
        raise ValueError(
            f"spec: unknown option(s) {extra}; valid options: {sorted(QoISettings.model_fields)}"
        )
    if "name" not in spec:
        raise ValueError("spec: missing option 'name'")
    name = spec["name"]
    if not isinstance(name, str):
        raise TypeError(f"spec.name: expected str, got {name!r}")
    if not name:
        raise ValueError("spec.name: expected a non-empty name, got ''")
    units = spec.get("units", "")
    if not isinstance(units, str):
        raise TypeError(f"spec.units: expected str, got {units!r}")
    if "reader" not in spec:
        raise ValueError(f"spec {name!r}: missing option 'reader'")
    parse_reader(spec["reader"], f"qoi {name!r}.reader")
    if spec.get("axis") is not None:
        _check_axis(spec["axis"], f"qoi {name!r}.axis")
    return dict(spec)


def _check_axis(axis: Any, where: str) -> None:
    if not isinstance(axis, Mapping):
        raise TypeError(f"{where}: expected a mapping, got {axis!r}")
    try:
        checked = AxisSpec.model_validate(axis)
    except ValidationError as exc:
        raise _options_error(exc, AxisSpec, axis, where) from None
    if checked.reader is not None:
        parse_reader(checked.reader, f"{where}.reader")


class QoISettings(_Model):
    """One quantity of interest read from every run."""

    name: str = Field(pattern=_NAME_PATTERN, description="Name of the quantity of interest.")
    units: str = Field(description="Units of the quantity, e.g. 'm'.")
    description: str = Field("", description="What the quantity is.")
    reader: dict[str, Any] = Field(
        description="How to read it from a run folder, one of: " + _READERS_IN_WORDS + "."
    )
    axis: dict[str, Any] | None = Field(
        None,
        description="For a vector quantity (a time series, a field at probes): the axis shared "
        "by all runs, {name, units, values: [...]} or {name, units, reader: {...}}.",
    )
    cheap_qoi: str | None = Field(
        None,
        pattern=r"^[A-Za-z_][\w.]*:[A-Za-z_]\w*$",
        description="'module:function' giving the cheap model's prediction of this quantity "
        "for a batch of parameter rows (k, d) -> (k,); enables the thinning-error check and "
        "the multi-fidelity estimate.",
    )
    thresholds: list[float] = Field(
        default_factory=list,
        description="Values whose exceedance probability is reported (quantity's units).",
    )

    @field_validator("reader")
    @classmethod
    def _one_reader(cls, v: dict[str, Any]) -> dict[str, Any]:
        if len(v) != 1 or next(iter(v)) not in READERS:
            raise ValueError(f"give exactly one reader among {', '.join(READERS)}; got {list(v)}")
        return v

    @model_validator(mode="after")
    def _reader_options(self) -> QoISettings:
        # a pure check: nothing is read or imported (importing a 'function' reader's module
        # waits for preflight, which knows the search path)
        try:
            check_qoi_spec(self.reader_spec())
        except TypeError as exc:  # pydantic turns only ValueError into a validation error
            raise ValueError(str(exc)) from None
        return self

    def reader_spec(self) -> dict[str, Any]:
        """This quantity as the collect stage's reader spec."""
        spec: dict[str, Any] = {"name": self.name, "units": self.units, "reader": self.reader}
        if self.axis is not None:
            spec["axis"] = self.axis
        return spec


class CollectSettings(_Model):
    """Collect stage: estimates and their uncertainty."""

    qoi: list[QoISettings] = Field(min_length=1, description="Quantities of interest.")
    quantiles: list[float] = Field(
        default_factory=lambda: [0.05, 0.5, 0.95],
        description="Probabilities of the reported weighted quantiles (dimensionless).",
    )
    bootstrap: int = Field(
        0,
        ge=0,
        description="Resamples of an i.i.d. pairs bootstrap of the weighted mean, stored for "
        "comparison only (it overstates the error of optimised points); 0: off.",
    )
    level: float = Field(
        0.95,
        ge=0.5,
        lt=1.0,
        description="Level of every stated interval (estimates, quantiles, exceedance "
        "probabilities), e.g. 0.95 for 95 % intervals.",
    )

    @field_validator("quantiles")
    @classmethod
    def _in_unit_interval(cls, v: list[float]) -> list[float]:
        bad = [q for q in v if not 0.0 < q < 1.0]
        if bad:
            raise ValueError(f"quantile probabilities must be in (0, 1), got {bad}")
        return v


# --------------------------------------------------------------------------------------------
