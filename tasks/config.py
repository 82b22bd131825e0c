"""Study configuration: one YAML file per study, validated by pydantic models.

Every model forbids unknown keys and every field carries a description (with its units where
it has any), so ``winnow schema`` prints a JSON Schema that documents the whole file. Relative
paths in a config are relative to the folder of the config file.

Use :func:`load_config` to read a file: a bad file raises :class:`ConfigError`, whose message
names the file, the field path and what was expected.
"""

from __future__ import annotations

import contextlib
import difflib
import hashlib
import math
import os
import re
import shlex
import sys
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path, PurePosixPath
from typing import Annotated, Any, Literal, get_args

import yaml
from pydantic import (
    BaseModel,
    ConfigDict,
    Discriminator,
    Field,
    Tag,
    ValidationError,
    ValidationInfo,
    field_validator,
    model_validator,
)

from .errors import InputError

__all__ = [
    "CheckSettings",
    "CollectSettings",
    "ConfigError",
    "DaskRunner",
    "DispatchSettings",
    "ImportSettings",
    "ModelSettings",
    "ObservationSettings",
    "Parameter",
    "Prior",
    "QoISettings",
    "SampleSettings",
    "StudyConfig",
    "StudySettings",
    "ThinSettings",
    "config_schema",
    "format_validation_error",
    "load_config",
    "parse_config",
]


class ConfigError(InputError):
    """A study config that cannot be used; the message names the file and the field."""


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, validate_default=True)


def _units(units: str) -> dict[str, Any]:
    return {"units": units}


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


_NAME_PATTERN = r"^[A-Za-z_][A-Za-z0-9_]*$"
_CALLABLE = re.compile(r"^[A-Za-z_][\w.]*:[A-Za-z_]\w*$")


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


# --------------------------------------------------------------------------------------------
# dispatch stage
# --------------------------------------------------------------------------------------------
class LocalClusterSettings(_Model):
    n_workers: int = Field(2, ge=1, description="Worker processes of the local Dask cluster.")
    threads_per_worker: int = Field(1, ge=1, description="Threads per Dask worker.")


class DaskSettings(_Model):
    address: str | None = Field(
        None, description="Address of a running Dask scheduler, e.g. 'tcp://10.0.0.5:8786'."
    )
    local_cluster: LocalClusterSettings | None = Field(
        None, description="Start a Dask LocalCluster with these settings."
    )

    @model_validator(mode="after")
    def _one(self) -> DaskSettings:
        if (self.address is None) == (self.local_cluster is None):
            raise ValueError("give exactly one of 'address' or 'local_cluster'")
        return self


class DaskRunner(_Model):
    """Run on a Dask cluster."""

    dask: DaskSettings = Field(description="Dask cluster to run on.")


class BatchSettings(_Model):
    submit: list[str] = Field(
        default_factory=lambda: ["sbatch"],
        description="Submit command (argv) that takes the job script path as last argument.",
    )
    template: str | None = Field(
        None,
        description="Job script template (Jinja2), relative to the config; a Slurm script is "
        "built in.",
    )
    directives: list[str] = Field(
        default_factory=list,
        description="Extra scheduler directives written at the top of each job script, e.g. "
        "'--time=04:00:00'.",
    )
    poll_interval: float = Field(5.0, gt=0, description="Seconds between completion checks (s).")
    max_wait: float | None = Field(
        None, gt=0, description="Give up on a job after this long (s); no limit when omitted."
    )
    cancel: list[str] = Field(
        default_factory=lambda: ["scancel"],
        description="Cancel command (argv) that takes the job id as last argument.",
    )


class BatchRunner(_Model):
    """Run through a batch scheduler: one job script per run."""

    batch: BatchSettings = Field(description="Batch scheduler settings.")


_RUNNER_TAGS = ("local", "dask", "batch")


def _runner_kind(v: Any) -> str | None:
    # A tag per shape keeps a bad runner to one error message instead of one per union member.
    if isinstance(v, str):
        return "local"
    keys = set(v) if isinstance(v, dict) else set(getattr(v, "model_fields_set", ()))
    for kind in ("dask", "batch"):
        if kind in keys:
            return kind
    return None


def _argv_list(v: Any) -> Any:
    if isinstance(v, str):
        raise ValueError(
            "the solver command must be a list of arguments, not one shell string; "
            f"for example {shlex.split(v)!r}"
        )
    return v


#: Placeholder of the command for the config file's folder (absolute), filled in when the
#: config is read from a file (``load_config``, or ``parse_config(..., config_dir=...)``).
CONFIG_DIR_PLACEHOLDER = "{config_dir}"


def _fill_config_dir(v: list[str], info: ValidationInfo) -> list[str]:
    folder = (info.context or {}).get("config_dir")
    if folder is None:  # read without its file (e.g. a saved block): left for the renderer
        return v
    return [a.replace(CONFIG_DIR_PLACEHOLDER, str(folder)) for a in v]


# Suffixes of scripts an interpreter is given by name (``python solver.py``): such an argv
# entry is a file even without a path separator.
_SCRIPT_SUFFIXES = (
    ".py", ".sh", ".bash", ".zsh", ".csh", ".ksh", ".pl", ".rb", ".r", ".jl", ".m", ".lua",
    ".js", ".tcl", ".bat", ".cmd", ".ps1",
)  # fmt: skip
_NOT_A_PATH = re.compile(r"[\s()'\";$`|&<>*?\[\]{}]")


def _posix(text: str) -> PurePosixPath:
    """``text`` as a clean relative POSIX path (``./`` and empty parts dropped)."""
    parts = [q for q in PurePosixPath(text.replace("\\", "/")).parts if q not in ("", ".")]
    return PurePosixPath(*parts) if parts else PurePosixPath(".")


def _is_absolute(text: str) -> bool:
    return text.startswith(("/", "\\", "~")) or re.match(r"^[A-Za-z]:", text) is not None


def _relative_file_in_argv(i: int, arg: str) -> str | None:
    """The relative file path an argv entry names, or None when it names none.

    An entry names a file when it has a path separator or ends in a script suffix
    (``solver.py``); for an option (``--mesh=grid/a.msh``, ``mesh=grid/a.msh``) the value
    counts. Entry 0 without a separator is a program looked up on PATH. Placeholders,
    absolute paths, URLs and text with spaces, quotes or shell characters (code given to
    ``-c``) are not checked.
    """
    if "=" in arg:
        arg = arg.split("=", 1)[1]
    elif arg.startswith("-"):
        return None
    if not arg or "://" in arg or _NOT_A_PATH.search(arg) or _is_absolute(arg):
        return None
    has_sep = "/" in arg or "\\" in arg
    if not has_sep and (i == 0 or not arg.lower().endswith(_SCRIPT_SUFFIXES)):
        return None
    return arg


def _dotdot_message(field: str, i: int, entry: str, tdir: str, folder: Any) -> str:
    """Why a staging path with ``..`` is refused, and what to write instead."""
    name = PurePosixPath(entry.replace("\\", "/")).name
    where = f"dispatch.{field}[{i}]: path {entry!r} contains '..'"
    if field == "templates":
        return (
            f"{where}; templates are read from inside template_dir ({tdir!r}) and must stay "
            f"inside the run folder: move {name!r} under template_dir, or set template_dir "
            "to a folder that holds it"
        )
    if folder is not None:
        absolute = repr(os.path.normpath(os.path.join(str(folder), tdir, entry)))
    else:
        absolute = "its absolute path"
    return (
        f"{where}; a staged file keeps its relative name, which must stay inside the run "
        f"folder: write {field}: [{absolute}] (staged as {name!r}) or move the file under "
        f"template_dir ({tdir!r})"
    )


def _unstaged_message(i: int, arg: str, rel: str, tdir: str, folder: Any) -> str:
    """Why a relative file in the command is refused, and what to write instead."""
    clean = str(_posix(rel))
    where = "" if rel == arg else f" (the path {rel!r})"
    beside = None if folder is None else os.path.join(str(folder), *_posix(rel).parts)
    if beside is not None and "/" not in clean and os.path.isfile(beside):
        stage = f"copy: [{beside!r}]"  # an absolute copy is staged under its base name
    elif tdir in (".", "./", ""):
        stage = f"copy: [{clean!r}]"
    else:
        stage = f"copy: [{clean!r}] (a path relative to template_dir {tdir!r})"
    return (
        f"dispatch.command[{i}]: {arg!r}{where} is a relative path, but the solver runs in "
        "its run folder, where no such file is staged (templates, copy, link, outputs); "
        f"use {{config_dir}}/{clean} for a file next to the config, or stage it with {stage}"
    )


class DispatchSettings(_Model):
    """Dispatch stage: input decks and solver runs."""

    template_dir: str = Field(
        ".",
        description="Folder of the deck templates and of the files to copy or link, relative "
        "to the config file.",
    )
    templates: list[str] = Field(
        min_length=1,
        description="Deck templates (Jinja2), relative to template_dir; each is rendered into "
        "the run folder under the same relative path without a trailing '.j2'.",
    )
    copy_files: list[str] = Field(
        default_factory=list,
        alias="copy",
        description="Files copied unchanged into every run folder (meshes, tables), relative "
        "to template_dir.",
    )
    link_files: list[str] = Field(
        default_factory=list,
        alias="link",
        description="Files linked (symlink) into every run folder, relative to template_dir.",
    )
    constants: dict[str, Any] = Field(
        default_factory=dict, description="User constants available in the templates."
    )
    formats: dict[str, str] = Field(
        default_factory=dict,
        description="Format spec per parameter for fixed-width decks, e.g. {'log10_T': '.6e'}; "
        "shortest round-trip text by default.",
    )
    command: Annotated[list[str], Field(min_length=1)] = Field(
        description="Solver command as an argument list (never a shell string), run in the "
        "run folder; placeholders {deck} (first rendered deck), {run_dir}, {python} (the "
        "Python running winnow) and {config_dir} (the config file's folder, absolute). A "
        "relative file in it (solver.py, bin/solver) must be staged into the run folder "
        "(templates, copy, link); a file next to the config is {config_dir}/solver.py."
    )
    env: dict[str, str] = Field(
        default_factory=dict, description="Extra environment variables for the solver."
    )
    outputs: list[str] = Field(
        default_factory=list,
        description="Output files (relative to the run folder) a successful run must leave.",
    )
    timeout: float = Field(3600.0, gt=0, description="Wall-time limit of one attempt (s).")
    retries: int = Field(0, ge=0, le=20, description="Extra attempts after a failed one.")
    retry_delay: float = Field(0.0, ge=0, description="Pause before a retry (s).")
    concurrency: int = Field(2, ge=1, le=1024, description="Runs at the same time.")
    runner: Annotated[
        Annotated[Literal["local"], Tag("local")]
        | Annotated[DaskRunner, Tag("dask")]
        | Annotated[BatchRunner, Tag("batch")],
        Discriminator(
            _runner_kind,
            custom_error_type="runner_kind",
            custom_error_message="expected 'local', {dask: {address | local_cluster}} or "
            "{batch: {submit, template, directives, poll_interval, max_wait, cancel}}",
        ),
    ] = Field("local", description="'local' processes, {dask: ...} or {batch: ...}.")

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    _check_command = field_validator("command", mode="before")(_argv_list)
    _config_dir = field_validator("command", mode="after")(_fill_config_dir)

    @model_validator(mode="after")
    def _staged_paths(self, info: ValidationInfo) -> DispatchSettings:
        """Staging paths that stay in the run folder; relative files of the command staged.

        The solver's working folder is its run folder, so ``["{python}", "solver.py"]``
        with solver.py next to the config would fail in every run.
        """
        folder = (info.context or {}).get("config_dir")
        tdir = self.template_dir
        root = None  # the template folder, when it is known without the config's folder
        if _is_absolute(tdir) or folder is not None:
            root = _posix(os.path.normpath(os.path.join(folder or "", tdir)))
        staged: set[PurePosixPath] = set()
        tails: list[PurePosixPath] = []  # absolute templates whose place in root is unknown
        for field, items in (
            ("templates", self.templates),
            ("copy", self.copy_files),
            ("link", self.link_files),
        ):
            for i, entry in enumerate(items):
                if not _is_absolute(entry):
                    dest = _posix(entry)
                    if ".." in dest.parts:
                        raise ValueError(_dotdot_message(field, i, entry, tdir, folder))
                elif field != "templates":  # copied or linked under its base name
                    dest = PurePosixPath(_posix(entry).name)
                elif root is not None and _posix(entry).is_relative_to(root):
                    dest = _posix(entry).relative_to(root)  # rendered under its path in root
                else:
                    tails.append(
                        _posix(entry).with_suffix("") if entry.endswith(".j2") else _posix(entry)
                    )
                    continue
                if field == "templates" and dest.name.endswith(".j2"):
                    dest = dest.with_name(dest.name[:-3])
                staged.add(dest)
        staged |= {_posix(o) for o in self.outputs}  # written by the solver: fine to name

        def found(rel: PurePosixPath) -> bool:
            if ".." in rel.parts:
                return False
            # the file itself, a folder holding staged files, or a file in a linked folder
            if any(rel == h or rel in h.parents or h in rel.parents for h in staged):
                return True
            return any(t.parts[-len(rel.parts) :] == rel.parts for t in tails)

        for i, arg in enumerate(self.command):
            rel = _relative_file_in_argv(i, arg)
            if rel is not None and not found(_posix(rel)):
                raise ValueError(_unstaged_message(i, arg, rel, tdir, folder))
        return self


# --------------------------------------------------------------------------------------------
# collect stage
# --------------------------------------------------------------------------------------------
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
# the study
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
    work_dir: str = Field(
        description="Folder of the run folders (one per chosen point), relative to the config."
    )
    budget: int = Field(gt=0, description="Number of costly solver runs (chosen points).")
    parameters: list[Parameter] = Field(min_length=1, description="Calibrated parameters.")
    sample: SampleSettings = Field(description="Sample stage settings.")
    thin: ThinSettings = Field(default_factory=ThinSettings, description="Thin stage settings.")
    dispatch: DispatchSettings = Field(description="Dispatch stage settings.")
    collect: CollectSettings = Field(description="Collect stage settings.")

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

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.parameters)

    @property
    def units(self) -> tuple[str, ...]:
        return tuple(p.units for p in self.parameters)


# --------------------------------------------------------------------------------------------
# loading
# --------------------------------------------------------------------------------------------
# lists whose entries the messages name by their 'name' key instead of their position
_NAMED_LISTS = {("parameters",), ("collect", "qoi")}


def _entry_label(entry: Any, index: int) -> str:
    name = entry.get("name") if isinstance(entry, dict) else None
    if isinstance(name, str) and name:
        return f"[{name}]" if re.match(_NAME_PATTERN, name) else f"[{name!r}]"
    return f"[{index}]"


def _field_path(loc: Sequence[Any], data: Any) -> str:
    """``parameters.0.prior`` as ``parameters[log10_T].prior``, using the config's names."""
    out = ""
    node = data
    for i, part in enumerate(loc):
        head = tuple(p for p in loc[:i] if not isinstance(p, int))
        if isinstance(part, int) and head in _NAMED_LISTS:
            entry = node[part] if isinstance(node, list) and 0 <= part < len(node) else None
            out += _entry_label(entry, part)
        else:
            out += ("." if out else "") + str(part)
        if isinstance(node, dict):
            node = node.get(part)
        elif isinstance(node, list) and isinstance(part, int) and 0 <= part < len(node):
            node = node[part]
        else:
            node = None
    return out


def _models_in(annotation: Any) -> list[type[BaseModel]]:
    """The pydantic models an annotation can hold (through Optional, unions, lists, Annotated)."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    found: list[type[BaseModel]] = []
    for arg in get_args(annotation):
        found.extend(m for m in _models_in(arg) if m not in found)
    return found


def _keys_at(loc: Sequence[Any]) -> list[str]:
    """Keys the config accepts in the mapping at ``loc`` (aliases as written in YAML)."""
    models: list[type[BaseModel]] = [StudyConfig]
    for part in loc:
        if isinstance(part, int):
            continue
        nxt: list[type[BaseModel]] = []
        for m in models:
            for name, f in m.model_fields.items():
                if part in (name, f.alias):
                    nxt.extend(_models_in(f.annotation))
        models = nxt
        if not models:
            return []
    keys: list[str] = []
    for m in models:
        keys.extend(f.alias or name for name, f in m.model_fields.items())
    return sorted(set(keys))


def _unknown_key_hint(loc: Sequence[Any]) -> str:
    """A suggestion for a misspelt key ("; did you mean 'units'?"), else the accepted keys."""
    key = loc[-1] if loc else None
    if not isinstance(key, str):
        return ""
    keys = _keys_at(loc[:-1])
    if not keys:
        return ""
    close = difflib.get_close_matches(key, keys, n=3, cutoff=0.6)
    if close:
        return "; did you mean " + " or ".join(repr(k) for k in close) + "?"
    return f"; expected one of: {', '.join(keys)}"


def format_validation_error(exc: ValidationError, source: str, data: Any = None) -> str:
    """One line per problem: ``source: field.path: message (got value)``.

    ``data`` is the mapping that was validated: with it, entries of ``parameters`` and
    ``collect.qoi`` are named by their ``name`` (``parameters[log10_T].prior``) instead of
    their position. An unknown key gets the closest accepted keys as a suggestion.
    """
    lines = []
    for err in exc.errors(include_url=False):
        parts = list(err["loc"])
        # a tagged union adds its tag to the path (runner.dask.dask...); drop the repeat
        parts = [
            p
            for i, p in enumerate(parts)
            if not (i and parts[i - 1] == "runner" and p in _RUNNER_TAGS)
        ]
        loc = _field_path(parts, data)
        msg = err["msg"].removeprefix("Value error, ")
        got = err.get("input")
        shown = "" if err["type"] == "missing" or isinstance(got, dict) else f" (got {got!r})"
        hint = _unknown_key_hint(parts) if err["type"] == "extra_forbidden" else ""
        lines.append(f"{source}: {loc or '<top>'}: {msg}{shown}{hint}")
    return "\n".join(lines)


def parse_config(
    data: Any, *, source: str = "<config>", config_dir: str | Path | None = None
) -> StudyConfig:
    """Validate an already-parsed mapping; raise :class:`ConfigError` naming ``source``.

    ``config_dir``, the folder of the config file, fills in ``{config_dir}`` in
    ``dispatch.command`` (made absolute); without it the placeholder is left as it is.
    """
    if not isinstance(data, dict):
        raise ConfigError(
            f"{source}: expected a mapping of settings at the top level, got {type(data).__name__}"
        )
    context = None if config_dir is None else {"config_dir": str(Path(config_dir).resolve())}
    try:
        return StudyConfig.model_validate(data, context=context)
    except ValidationError as exc:
        raise ConfigError(format_validation_error(exc, source, data)) from None


def load_config(
    path: str | Path, *, preprocess: Callable[[Any], Any] | None = None
) -> tuple[StudyConfig, str]:
    """Read and validate a study config file.

    Parameters
    ----------
    path : str or Path
        YAML file.
    preprocess : callable, optional
        Applied to the parsed YAML before validation (the command line uses it to expand
        references to saved Prefect blocks); a ``ValueError`` it raises becomes a
        :class:`ConfigError`.

    Returns
    -------
    config : StudyConfig
        With ``{config_dir}`` in ``dispatch.command`` replaced by the file's folder.
    text : str
        The file's text as read (it is stored, and hashed, in the run store).

    Raises
    ------
    ConfigError
        The file is missing, is not YAML, or does not validate; the message names the file,
        the field path and what was expected.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{path}: config file not found") from None
    except (IsADirectoryError, UnicodeDecodeError, PermissionError) as exc:
        raise ConfigError(f"{path}: cannot read the config file ({exc})") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise ConfigError(f"{path}: not valid YAML: {exc}") from None
    if preprocess is not None:
        try:
            data = preprocess(data)
        except ValueError as exc:
            raise ConfigError(str(exc)) from None
    return parse_config(data, source=str(path), config_dir=path.resolve().parent), text


def config_hash(text: str) -> str:
    """SHA-256 of a config's text (hex)."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def config_schema() -> dict[str, Any]:
    """The JSON Schema of a study config."""
    return StudyConfig.model_json_schema(by_alias=True)


def resolve(config_path: str | Path, relative: str) -> Path:
    """A path from a config, resolved against the config file's folder."""
    p = Path(relative).expanduser()
    return p if p.is_absolute() else (Path(config_path).resolve().parent / p)


@contextlib.contextmanager
def importable(folder: Path) -> Iterator[None]:
    """Put ``folder`` first on the import path for the duration (user reader functions)."""
    added = str(folder) not in sys.path
    if added:
        sys.path.insert(0, str(folder))
    try:
        yield
    finally:
        if added:
            sys.path.remove(str(folder))


def model_search_path(config: StudyConfig, base_dir: Path) -> Path:
    """The folder the cheap model and user reader modules are imported from."""
    m = config.sample.model
    return resolve(base_dir / "x", m.search_path) if m is not None else Path(base_dir)
