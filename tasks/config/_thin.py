"""Settings of the thin stage, declared once.

:class:`ThinSettings` is the ``thin:`` section of a study config; the ``winnow thin`` command's
options are generated from its fields. :class:`ThinOptions` adds the tuning options of the
library call :func:`winnow.tasks.thin.thin` that a study config does not carry. The thin
engine runs on a validated :class:`ThinOptions`, and a selection records it (its
``model_dump``) as ``report["settings"]``, read back through the model by ``extend``,
``replace``, ``disjoint`` and ``reweight``.

The name lists below (``KernelName``, ``MethodName``, ``FeatureMapName``) are the choices of
the thin stage's registries (``KERNELS``, ``SELECTORS``, ``FEATURE_MAPS`` of
:mod:`winnow.tasks.thin`); the config imports no stage, so ``tests/test_thin_registry.py``
holds them equal.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, Literal, TypeVar

from pydantic import (
    Field,
    ValidationError,
    field_validator,
)

from winnow.tasks.errors import InputError

from ._base import _Model

__all__ = [
    "FeatureMapName",
    "KernelName",
    "MethodName",
    "SettingTypeError",
    "ThinOptions",
    "ThinSettings",
    "WeightsRule",
    "validate_settings",
]

KernelName = Literal["gaussian", "laplace", "matern32", "matern52"]
MethodName = Literal["greedy", "swap", "genetic", "random", "stride"]
FeatureMapName = Literal["rff", "orf", "qmc"]
WeightsRule = Literal["simplex", "uniform"]


# --------------------------------------------------------------------------------------------
# thin stage
# --------------------------------------------------------------------------------------------
class ThinSettings(_Model):
    """Thin stage: which points to spend the costly runs on."""

    method: MethodName = Field(
        "greedy",
        description="Selector: greedy MMD minimisation, greedy then swap refinement, genetic "
        "algorithm seeded by greedy, or the random/stride baselines.",
    )
    weights: WeightsRule = Field(
        "simplex", description="Optimal MMD weights on the simplex, or equal weights."
    )
    kernel: KernelName = Field(
        "gaussian", description="Kernel of the MMD, on standardised coordinates."
    )
    bandwidth: float | None = Field(
        None,
        gt=0,
        allow_inf_nan=False,
        description="Kernel bandwidth in standardised units; median heuristic when omitted.",
    )
    feature_map: FeatureMapName = Field(
        "orf",
        description="Random Fourier features, orthogonal random features, or quasi-Monte "
        "Carlo frequencies.",
    )
    features: int | Literal["auto"] = Field(
        "auto", description="Number of random features, or 'auto' (doubling until stable)."
    )
    replace_unweighted: bool = Field(
        True,
        description="With simplex weights (greedy, swap, genetic): replace chosen points whose "
        "optimal weight is at most 1e-6/m by the selector's next choices and re-solve, so no "
        "costly run goes to a point without weight; points that still get none are left out "
        "and the saved runs reported. False keeps the first selection, zero weights included.",
    )
    exact_max_rows: int = Field(
        20_000,
        ge=0,
        description="Chain rows of the exact-kernel MMD check: all rows up to this many, else "
        "a uniform random subsample of this many, whose MMD estimate's standard error and "
        "~95 % interval the selection report states; 0 skips the check. Its cost grows as "
        "the square (100,000 rows: ~20 s).",
    )

    @field_validator("features")
    @classmethod
    def _positive_features(cls, v: int | str) -> int | str:
        if isinstance(v, int) and v < 1:
            raise ValueError(f"features must be a positive integer or 'auto', got {v}")
        return v


class ThinOptions(ThinSettings):
    """The thin stage's settings plus the tuning options of :func:`winnow.tasks.thin.thin`
    that a study config does not carry (a study runs them at these defaults)."""

    nonfinite: Literal["drop", "raise"] = Field(
        "drop", description="Rows with NaN/inf are dropped and counted, or refused."
    )
    standardise: bool = Field(
        True, description="Scale each parameter to mean 0, standard deviation 1 before the kernel."
    )
    chunk_size: int | None = Field(
        None,
        ge=1,
        description="Rows per chunk in the streaming passes; default about 16 MB of features.",
    )
    n_candidates: int | Literal["auto"] = Field(
        "auto",
        description="Candidate pool of distinct rows for greedy/swap/genetic, drawn in "
        "proportion to multiplicity; 'auto' is max(10000, 50 m) capped at 512 MB of features.",
    )
    features_tol: float = Field(
        0.05,
        gt=0,
        lt=1,
        description="Relative tolerance of the automatic feature count (features='auto').",
    )
    precision: Literal["single", "double"] = Field(
        "single", description="Precision of feature values (sums are float64 either way)."
    )
    workers: int = Field(
        2,
        ge=1,
        description="Threads of the streaming pass over the chain (the result does not "
        "depend on it).",
    )

    @field_validator("n_candidates")
    @classmethod
    def _positive_candidates(cls, v: int | str) -> int | str:
        if isinstance(v, int) and v < 1:
            raise ValueError(f"n_candidates must be a positive integer or 'auto', got {v}")
        return v


# --------------------------------------------------------------------------------------------
# validation of settings given as keywords or command-line options
# --------------------------------------------------------------------------------------------
class SettingTypeError(InputError, TypeError):
    """A setting of the wrong type (an :class:`InputError` that is also a ``TypeError``)."""


M = TypeVar("M", bound=_Model)

# what a pydantic error type says was expected, in the words of our messages
_EXPECTED = {
    "int_type": "an integer",
    "int_parsing": "an integer",
    "int_from_float": "an integer",
    "bool_type": "True or False",
    "bool_parsing": "True or False",
    "float_type": "a number",
    "float_parsing": "a number",
    "string_type": "a string",
    "none_required": "None",
    "finite_number": "finite",
}
_TYPE_ERRORS = {"int_type", "int_from_float", "bool_type", "float_type", "string_type"}


def _expected(err: Mapping[str, Any]) -> str:
    kind, ctx = err["type"], err.get("ctx") or {}
    if kind == "literal_error":
        choices = str(ctx["expected"])
        return f"one of {choices}" if " or " in choices else choices
    for bound, sign in (("gt", ">"), ("ge", ">="), ("lt", "<"), ("le", "<=")):
        if bound in ctx:
            return f"{sign} {ctx[bound]}"
    if kind == "value_error":  # our own validators: "<name> must be <what>, got <value>"
        text = str(ctx.get("error", err["msg"]))
        return text.split(" must be ", 1)[-1].rsplit(", got ", 1)[0]
    return _EXPECTED.get(kind, err["msg"].removeprefix("Input should be "))


def validate_settings(
    model: type[M],
    values: Mapping[str, Any],
    *,
    strict: bool = False,
    names: Mapping[str, str] | None = None,
) -> M:
    """``model`` validated from ``values``; bad values raise :class:`InputError` (a
    :class:`SettingTypeError` for a value of the wrong type) naming the setting as the
    caller wrote it (``names``: field -> keyword or option), the expected and the actual value.

    ``strict`` refuses conversions (``"64"`` for an integer, ``1`` for ``True``): the library
    call passes Python values, the command line passes text.
    """
    names = dict(names or {})
    try:
        return model.model_validate(dict(values), strict=strict)
    except ValidationError as exc:
        by_field: dict[str, list[Mapping[str, Any]]] = {}
        for err in exc.errors(include_url=False):
            by_field.setdefault(str(err["loc"][0]) if err["loc"] else "", []).append(err)
        field, errs = next(iter(by_field.items()))
        if errs[0]["type"] == "extra_forbidden":
            valid = ", ".join(sorted(names.get(f, f) for f in model.model_fields))
            raise SettingTypeError(f"unknown setting {field!r}; valid: {valid}") from None
        parts = list(dict.fromkeys(_expected(e) for e in errs))
        name = names.get(field, field)
        message = f"{name} must be {' or '.join(parts)}, got {values.get(field)!r}"
        # of the wrong type: no type of the field takes it (a literal's choices are strings)
        typed = [e["type"] in _TYPE_ERRORS for e in errs]
        wrong_type = any(typed) and all(
            t or (e["type"] == "literal_error" and not isinstance(e.get("input"), str))
            for t, e in zip(typed, errs, strict=True)
        )
        kind = SettingTypeError if wrong_type else InputError
        raise kind(message) from None
