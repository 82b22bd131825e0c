"""Config of the thin stage."""

from __future__ import annotations

from typing import Literal

from pydantic import (
    Field,
    field_validator,
)

from ._base import _Model


# --------------------------------------------------------------------------------------------
# thin stage
# --------------------------------------------------------------------------------------------
class ThinSettings(_Model):
    """Thin stage: which points to spend the costly runs on."""

    method: Literal["greedy", "swap", "genetic", "random", "stride"] = Field(
        "greedy",
        description="Selector: greedy MMD minimisation, greedy then swap refinement, genetic "
        "algorithm seeded by greedy, or the random/stride baselines.",
    )
    weights: Literal["simplex", "uniform"] = Field(
        "simplex", description="Optimal MMD weights on the simplex, or equal weights."
    )
    kernel: Literal["gaussian", "laplace", "matern32", "matern52"] = Field(
        "gaussian", description="Kernel of the MMD, on standardised coordinates."
    )
    bandwidth: float | None = Field(
        None,
        gt=0,
        description="Kernel bandwidth in standardised units; median heuristic when omitted.",
    )
    feature_map: Literal["rff", "orf", "qmc"] = Field(
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
