"""Config of a multilevel study: a ladder of solver fidelities, coarse to fine (issue 16).

A study with a ``levels:`` section runs the solver at several fidelities (a coarse, medium and
fine grid; a reduced model and the full one), each dearer than the one below, and estimates
the finest level's expectation by the telescoping sum of level corrections (multilevel Monte
Carlo, Giles 2008). The section is optional; without it a study has its one costly solver as
before.

.. code-block:: yaml

    levels:
      pairing: nested            # or disjoint
      cost_budget: 4000          # for budgets 'auto' (or target_se)
      fidelities:
        - {name: coarse, cost: 10, budget: auto, dispatch: {constants: {grid: 20}}}
        - {name: fine, cost: 160, budget: auto, dispatch: {constants: {grid: 80}}}

A bare list (``levels: [{name: coarse, ...}, ...]``) is the same with the defaults.

Every level shares the study's ``dispatch:`` settings; a level's ``dispatch`` mapping overrides
the fields it names (``command``, ``templates``, ``timeout``, ``concurrency``, ``runner``...),
except ``constants`` and ``env``, whose entries are merged into the study's (the level's win),
so a per-level grid size is one constant. The QoI readers (``collect.qoi``) are shared: every
level writes the same outputs.

References
----------
.. [1] Giles, M. B. (2008). Multilevel Monte Carlo path simulation. Operations Research
   56(3), 607-617.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, Literal

from pydantic import Field, ValidationError, ValidationInfo, model_validator

from ._base import _Model
from ._dispatch import DispatchSettings

__all__ = ["LevelPairing", "LevelSettings", "LevelsSettings"]

#: How the points of the levels relate: ``nested`` (each finer level's points are a subset
#: of the coarser level's, so a correction ``Q_l - Q_{l-1}`` reuses the coarser run at the
#: same point) or ``disjoint`` (each level its own points, sharing none; every point of level
#: ``l >= 1`` then runs both ``Q_l`` and ``Q_{l-1}``).
LevelPairing = Literal["nested", "disjoint"]

#: Fields of a level's ``dispatch`` override merged key by key into the study's, not replaced.
_MERGED = ("constants", "env")


class LevelSettings(_Model):
    """One fidelity of the solver."""

    name: str = Field(
        pattern=r"^[A-Za-z0-9][A-Za-z0-9_-]*$",
        description="Level name (letters, digits, '-', '_'), shown in run ids and the report.",
    )
    cost: float = Field(
        gt=0,
        allow_inf_nan=False,
        description="Cost of one run at this level: seconds, or any unit shared by all levels "
        "(only the ratios between levels matter).",
    )
    budget: int | Literal["auto"] = Field(
        "auto",
        description="Runs at this level (at least 2), or 'auto': a pilot of levels.pilot runs, "
        "then the optimal allocation of levels.cost_budget or levels.target_se.",
    )
    dispatch: dict[str, Any] = Field(
        default_factory=dict,
        description="Overrides of the study's dispatch settings for this level (any dispatch "
        "field); constants and env are merged into the study's, the others replaced.",
    )

    @model_validator(mode="after")
    def _checks(self) -> LevelSettings:
        if isinstance(self.budget, int) and self.budget < 2:
            raise ValueError(
                f"budget: expected at least 2 runs (a level's variance "
                f"needs two) or 'auto', got {self.budget}"
            )
        unknown = sorted(set(self.dispatch) - set(DispatchSettings.model_fields))
        if unknown:
            raise ValueError(
                f"dispatch: unknown dispatch field(s) {unknown}; "
                f"valid: {sorted(DispatchSettings.model_fields)}"
            )
        return self


class LevelsSettings(_Model):
    """The ``levels:`` section: the solver fidelities, coarse to fine, and their pairing."""

    fidelities: list[LevelSettings] = Field(
        min_length=2,
        description="The levels, coarsest (cheapest) first; each finer level costs more.",
    )
    pairing: LevelPairing = Field(
        "nested",
        description="'nested': each finer level's points are a subset of the coarser level's "
        "(corrections reuse the coarser run); 'disjoint': each level its own points.",
    )
    cost_budget: float | None = Field(
        None,
        gt=0,
        allow_inf_nan=False,
        description="Total cost of all runs (units of the levels' cost) shared out by the "
        "optimal allocation among the levels whose budget is 'auto'.",
    )
    target_se: float | None = Field(
        None,
        gt=0,
        allow_inf_nan=False,
        description="Standard error (QoI units) the 'auto' budgets aim at, instead of "
        "cost_budget; also the target of the advice on more runs.",
    )
    pilot: int = Field(
        10,
        ge=2,
        description="Runs of each level with budget 'auto' before its variance is known and "
        "the allocation is made.",
    )

    @model_validator(mode="before")
    @classmethod
    def _bare_list(cls, v: Any) -> Any:
        # `levels: [{...}, {...}]` is the common case: the defaults with these fidelities
        return {"fidelities": v} if isinstance(v, list) else v

    @model_validator(mode="after")
    def _ladder(self) -> LevelsSettings:
        names = [f.name for f in self.fidelities]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise ValueError(f"fidelities: level names must be unique; repeated: {dup}")
        for below, above in zip(self.fidelities, self.fidelities[1:], strict=False):
            if not above.cost > below.cost:
                raise ValueError(
                    f"fidelities[{above.name}].cost: expected costs increasing from coarse to "
                    f"fine, got {above.cost} after {below.cost} ({below.name})"
                )
            if (
                self.pairing == "nested"
                and isinstance(below.budget, int)
                and isinstance(above.budget, int)
                and above.budget > below.budget
            ):
                raise ValueError(
                    f"fidelities[{above.name}].budget: with pairing 'nested' a finer level's "
                    f"points are a subset of the coarser level's, so at most {below.budget} "
                    f"({below.name}), got {above.budget}"
                )
        if self.cost_budget is not None and self.target_se is not None:
            raise ValueError(
                "cost_budget and target_se: give one (the allocation either spends a cost or "
                "reaches a standard error), got both"
            )
        auto = [f.name for f in self.fidelities if f.budget == "auto"]
        if auto and self.cost_budget is None and self.target_se is None:
            raise ValueError(
                f"cost_budget or target_se: levels {auto} have budget 'auto', which needs one "
                "of them"
            )
        return self

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(f.name for f in self.fidelities)

    @property
    def costs(self) -> tuple[float, ...]:
        return tuple(f.cost for f in self.fidelities)

    def dispatch_for(
        self, level: int | str, base: DispatchSettings, context: Mapping[str, Any] | None = None
    ) -> DispatchSettings:
        """The dispatch settings of one level: ``base`` with the level's overrides.

        Parameters
        ----------
        level : int or str
            Position (0 = coarsest) or name of the level.
        base : DispatchSettings
            The study's ``dispatch:`` settings.
        context : mapping, optional
            Validation context (``{"config_dir": ...}``) that fills ``{config_dir}`` in a
            level's own command.

        Raises
        ------
        ValueError
            An override the dispatch model refuses, the message naming
            ``levels.fidelities[<name>].dispatch.<field>``.
        """
        f = self._level(level)
        merged = base.model_dump(mode="python", by_alias=False)
        for key, value in f.dispatch.items():
            if key in _MERGED and isinstance(value, Mapping):
                merged[key] = {**merged.get(key, {}), **value}
            else:
                merged[key] = value
        try:
            return DispatchSettings.model_validate(merged, context=dict(context or {}))
        except ValidationError as exc:
            problems = "; ".join(
                f"levels.fidelities[{f.name}].dispatch.{'.'.join(str(p) for p in e['loc'])}: "
                f"{e['msg'].removeprefix('Value error, ')}"
                for e in exc.errors(include_url=False)
            )
            raise ValueError(problems) from None

    def _level(self, level: int | str) -> LevelSettings:
        if isinstance(level, str):
            if level not in self.names:
                raise ValueError(f"level: expected one of {list(self.names)}, got {level!r}")
            return self.fidelities[self.names.index(level)]
        if isinstance(level, bool) or not isinstance(level, int):
            raise TypeError(f"level: expected a position or a name, got {level!r}")
        if not 0 <= level < len(self.fidelities):
            raise ValueError(
                f"level: expected a position 0..{len(self.fidelities) - 1}, got {level}"
            )
        return self.fidelities[level]

    def check_dispatch(self, base: DispatchSettings, info: ValidationInfo | None = None) -> None:
        """Validate every level's dispatch settings against the study's (at config load)."""
        context = None if info is None else info.context
        for k in range(len(self.fidelities)):
            self.dispatch_for(k, base, context)
