"""Config of the collect stage: the QoIs, their readers and the estimates."""

from __future__ import annotations

from typing import Any

from pydantic import (
    Field,
    field_validator,
    model_validator,
)

from ._base import _CALLABLE, _NAME_PATTERN, _Model


class QoISettings(_Model):
    """One quantity of interest read from every run."""

    name: str = Field(pattern=_NAME_PATTERN, description="Name of the quantity of interest.")
    units: str = Field(description="Units of the quantity, e.g. 'm'.")
    description: str = Field("", description="What the quantity is.")
    reader: dict[str, Any] = Field(
        description="How to read it from a run folder: {json: {file, key}}, {csv: {file, "
        "column, row}}, {hdf5: {file, dataset}}, {regex: {file, pattern, group}} or "
        "{function: 'module:function'}."
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
        kinds = ("json", "csv", "hdf5", "regex", "function")
        keys = [k for k in v if k in kinds]
        if len(keys) != 1 or len(v) != 1:
            raise ValueError(f"give exactly one reader among {', '.join(kinds)}; got {list(v)}")
        return v

    @model_validator(mode="after")
    def _reader_options(self) -> QoISettings:
        # The collect stage's own validation knows every reader's options; a pure check
        # (nothing is read or imported except a 'function' reader's module).
        from winnow.tasks.collect import validate_qoi_spec

        if "function" in self.reader:
            # importing the user's function waits for preflight, which knows the search path
            target = self.reader["function"]
            if not isinstance(target, str) or not _CALLABLE.match(target):
                raise ValueError(f"reader.function: expected 'module:function', got {target!r}")
            return self
        try:
            validate_qoi_spec(self.reader_spec())
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
