"""The whole study config: the study block and the four stage blocks."""

from __future__ import annotations

from pydantic import (
    Field,
    ValidationInfo,
    field_validator,
    model_validator,
)

# the study
from ._base import _Model
from ._collect import CollectSettings
from ._dispatch import DispatchSettings
from ._levels import LevelsSettings
from ._sample import Parameter, SampleSettings
from ._thin import ThinSettings


# --------------------------------------------------------------------------------------------
class StudySettings(_Model):
    name: str = Field(
        pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$",
        description="Study name (letters, digits, '-', '_', '.'), shown in flow run names.",
    )
    description: str = Field("", description="One line on what the study predicts.")
    seed: int = Field(
        0, ge=0, description="Seed of every random choice in the study (sampling, thinning)."
    )
    caution: str = Field(
        "",
        description="The study's own caution, shown in the report after the standard one "
        "(e.g. which decisions the results must not be used for without further review).",
    )
    tags: list[str] = Field(
        default_factory=list,
        description="Prefect tags put, with the study name, on the study's flow run and on "
        "every task run, solver runs included: a Prefect tag concurrency limit on one of them "
        "(e.g. 'fem-licence') caps the solver runs in flight across studies.",
    )

    @field_validator("tags")
    @classmethod
    def _tags_not_blank(cls, v: list[str]) -> list[str]:
        bad = [t for t in v if not t.strip()]
        if bad:
            raise ValueError(f"study.tags: expected non-empty tag names, got {v!r}")
        return v


class StudyConfig(_Model):
    """A whole study: sample -> thin -> dispatch -> collect, recorded in one run store."""

    study: StudySettings = Field(description="Name, description and seed.")
    store: str = Field(description="HDF5 run store of the study, relative to the config file.")
    run_root: str = Field(
        description="Folder of the run folders (one per chosen point), relative to the config."
    )
    budget: int = Field(gt=0, description="Number of costly solver runs (chosen points).")
    parameters: list[Parameter] = Field(min_length=1, description="Calibrated parameters.")
    sample: SampleSettings = Field(description="Sample stage settings.")
    thin: ThinSettings = Field(default_factory=ThinSettings, description="Thin stage settings.")
    dispatch: DispatchSettings = Field(description="Dispatch stage settings.")
    collect: CollectSettings = Field(description="Collect stage settings.")
    levels: LevelsSettings | None = Field(
        None,
        description="Multilevel study: the solver fidelities, coarse to fine, with their "
        "costs, budgets, dispatch overrides and pairing (omit for one costly solver).",
    )

    @model_validator(mode="after")
    def _names(self) -> StudyConfig:
        names = [p.name for p in self.parameters]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise ValueError(f"parameter names must be unique; repeated: {dup}")
        clash = sorted(set(names) & set(self.dispatch.constants))
        if clash:
            raise ValueError(f"dispatch.constants repeat parameter names: {clash}")
        return self

    @model_validator(mode="after")
    def _levels_dispatch(self, info: ValidationInfo) -> StudyConfig:
        # each level's dispatch settings are checked now, not when its first run starts
        if self.levels is None:
            return self
        self.levels.check_dispatch(self.dispatch, info)
        names = set(self.names)
        for f in self.levels.fidelities:
            clash = sorted(names & set(f.dispatch.get("constants") or {}))
            if clash:
                raise ValueError(
                    f"levels.fidelities[{f.name}].dispatch.constants repeat parameter "
                    f"names: {clash}"
                )
        return self

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.parameters)

    @property
    def units(self) -> tuple[str, ...]:
        return tuple(p.units for p in self.parameters)


# --------------------------------------------------------------------------------------------
