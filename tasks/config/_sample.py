"""Config of the sample stage: parameters, priors, the cheap model, observations, sampler."""

from __future__ import annotations

import math
from typing import Literal

from pydantic import (
    Field,
    model_validator,
)

from ._base import _NAME_PATTERN, _Model


# --------------------------------------------------------------------------------------------
# parameters and priors
# --------------------------------------------------------------------------------------------
class Prior(_Model):
    """Prior distribution of one parameter, in the parameter's own units."""

    dist: Literal["uniform", "normal", "lognormal", "truncnormal"] = Field(
        description="Prior family: uniform on [low, high]; normal(mu, sigma); lognormal with "
        "log-space mu and sigma; truncnormal(mu, sigma) restricted to [low, high]."
    )
    low: float | None = Field(
        None, description="Lower bound (parameter units). Required for uniform and truncnormal."
    )
    high: float | None = Field(
        None, description="Upper bound (parameter units). Required for uniform and truncnormal."
    )
    mu: float | None = Field(
        None,
        description="Location: the mean for normal/truncnormal (parameter units), the mean of "
        "log(x) for lognormal.",
    )
    sigma: float | None = Field(
        None,
        gt=0,
        description="Scale: the standard deviation for normal/truncnormal (parameter units), of "
        "log(x) for lognormal. Must be > 0.",
    )

    @model_validator(mode="after")
    def _check_family(self) -> Prior:
        needs = {
            "uniform": ("low", "high"),
            "normal": ("mu", "sigma"),
            "lognormal": ("mu", "sigma"),
            "truncnormal": ("mu", "sigma", "low", "high"),
        }[self.dist]
        missing = [k for k in needs if getattr(self, k) is None]
        if missing:
            raise ValueError(
                f"a {self.dist} prior needs {', '.join(needs)}; missing: {', '.join(missing)}"
            )
        for k in ("low", "high", "mu", "sigma"):
            v = getattr(self, k)
            if v is not None and not math.isfinite(v):
                raise ValueError(f"{k} must be a finite number, got {v}")
        if self.low is not None and self.high is not None and not self.low < self.high:
            raise ValueError(f"low must be < high, got low={self.low} and high={self.high}")
        return self


class Parameter(_Model):
    """One calibrated parameter of the cheap model."""

    name: str = Field(
        pattern=_NAME_PATTERN,
        description="Identifier used in templates and outputs (letters, digits, underscore).",
    )
    units: str = Field(description="Units of the parameter, e.g. 'log10(m2/s)' or '-'.")
    description: str = Field("", description="What the parameter is.")
    prior: Prior = Field(description="Prior distribution in the parameter's units.")


# --------------------------------------------------------------------------------------------
# sample stage
# --------------------------------------------------------------------------------------------
class ModelSettings(_Model):
    """The cheap model: a forward model with a likelihood, or a full log density."""

    forward: str | None = Field(
        None,
        pattern=r"^[A-Za-z_][\w.]*:[A-Za-z_]\w*$",
        description="Forward model 'module:function', called as f(theta, inputs) -> "
        "predictions in the observation's units.",
    )
    log_density: str | None = Field(
        None,
        pattern=r"^[A-Za-z_][\w.]*:[A-Za-z_]\w*$",
        description="Alternative to forward: 'module:function' returning the log posterior "
        "density of theta (prior included).",
    )
    vectorised: Literal["auto", "yes", "no"] = Field(
        "auto",
        description="Whether the model takes a batch of parameter rows (k, d); 'auto' detects.",
    )
    search_path: str = Field(
        ".",
        description="Folder (relative to the config file) put on the import path for the model.",
    )

    @model_validator(mode="after")
    def _one_model(self) -> ModelSettings:
        if (self.forward is None) == (self.log_density is None):
            raise ValueError("give exactly one of 'forward' or 'log_density'")
        return self


class NoiseSettings(_Model):
    """Observation noise: a known value, a column of per-observation values, or estimated."""

    value: float | None = Field(
        None, gt=0, description="Known noise standard deviation, in the observation's units."
    )
    column: str | None = Field(
        None, description="Column of the observation file holding per-observation sigmas."
    )
    estimate: Prior | None = Field(
        None,
        description="Estimate the noise standard deviation as an extra parameter 'sigma' "
        "with this prior (observation units).",
    )

    @model_validator(mode="after")
    def _exactly_one(self) -> NoiseSettings:
        given = [k for k in ("value", "column", "estimate") if getattr(self, k) is not None]
        if len(given) != 1:
            raise ValueError(
                f"give exactly one of 'value', 'column' or 'estimate' (got {given or 'none'})"
            )
        return self


class ObservationSettings(_Model):
    """The measurements the cheap model is calibrated against (a CSV file with a header)."""

    file: str = Field(description="CSV file of observations, relative to the config file.")
    target: str = Field(description="Column holding the observed values.")
    inputs: list[str] = Field(
        default_factory=list,
        description="Columns passed to the forward model in its inputs dict (e.g. times).",
    )
    constants: dict[str, float] = Field(
        default_factory=dict,
        description="Extra scalar inputs for the forward model (each in the model's units).",
    )
    noise: NoiseSettings = Field(description="Observation noise model.")
    likelihood: Literal["gaussian", "student_t"] = Field(
        "gaussian", description="Likelihood family; student_t is robust to outliers."
    )
    nu: float = Field(
        4.0, gt=0, description="Degrees of freedom of the Student t likelihood (dimensionless)."
    )


class ImportSettings(_Model):
    """An existing chain to import instead of sampling."""

    file: str = Field(description="Chain file (.npy, .csv or .h5/.hdf5), relative to the config.")
    dataset: str | None = Field(None, description="Dataset path inside an HDF5 file.")
    chain_column: str | None = Field(None, description="CSV column naming each row's chain.")
    draw_column: str | None = Field(None, description="CSV column giving each row's draw number.")
    chains: int | None = Field(
        None, ge=1, description="Split an (N, d) array into this many consecutive chains."
    )


class CheckSettings(_Model):
    """Convergence thresholds checked before any costly run is spent."""

    rhat_max: float = Field(
        1.01, gt=1.0, description="Largest acceptable rank-normalised split R-hat (dimensionless)."
    )
    ess_bulk_min: float = Field(
        400.0, gt=0, description="Smallest acceptable bulk effective sample size (draws)."
    )
    ess_tail_min: float = Field(
        400.0, gt=0, description="Smallest acceptable tail effective sample size (draws)."
    )
    on_failure: Literal["stop", "warn"] = Field(
        "stop",
        description="'stop' ends the study before thinning when a threshold fails; 'warn' goes "
        "on and records the warning.",
    )


class SampleSettings(_Model):
    """Sample stage: calibrate the cheap model, or import a chain."""

    model: ModelSettings | None = Field(None, description="The cheap model to calibrate.")
    observations: ObservationSettings | None = Field(
        None, description="Observations for a forward model."
    )
    import_chain: ImportSettings | None = Field(
        None, description="Import this chain instead of sampling."
    )
    sampler: Literal["adaptive_metropolis", "ensemble", "de_mcmc"] = Field(
        "adaptive_metropolis",
        description="adaptive_metropolis (Haario et al. 2001), ensemble (affine-invariant "
        "stretch move, Goodman & Weare 2010) or de_mcmc (differential evolution, ter Braak "
        "2006).",
    )
    chains: int | None = Field(
        None,
        ge=1,
        le=256,
        description="Number of chains (or ensemble walkers); default 4 chains for "
        "adaptive_metropolis and 2d+2 walkers for the ensemble samplers.",
    )
    draws: int = Field(4000, ge=10, description="Draws per chain, burn-in included.")
    burn_in: int | Literal["half"] = Field(
        default_factory=lambda data: 0 if data.get("import_chain") is not None else "half",
        description="Draws dropped from the start of each chain, or 'half'. Default: 'half' "
        "for the study's own sampler; 0 (every draw kept) for an imported chain, which a "
        "sampler elsewhere has normally already cleared of its warm-up.",
    )
    checks: CheckSettings = Field(
        default_factory=CheckSettings, description="Convergence thresholds."
    )

    @model_validator(mode="after")
    def _source(self) -> SampleSettings:
        if self.import_chain is not None:
            if self.model is not None:
                raise ValueError("give either 'model' (to sample) or 'import_chain', not both")
            return self
        if self.model is None:
            raise ValueError("give 'model' (to sample) or 'import_chain' (to import a chain)")
        if self.model.forward is not None and self.observations is None:
            raise ValueError("a forward model needs 'observations'")
        if isinstance(self.burn_in, int) and not 0 <= self.burn_in < self.draws:
            raise ValueError(f"burn_in must be in [0, draws={self.draws}), got {self.burn_in}")
        return self
