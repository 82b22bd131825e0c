"""The sample stage driven by a study config: observations, the chain, the convergence gate."""

from __future__ import annotations

import csv
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from winnow.tasks.config import StudyConfig, model_search_path, resolve
from winnow.tasks.errors import InputError
from winnow.tasks.records import (
    Chain,
    Progress,
)


class ConvergenceError(RuntimeError):
    """The chain failed its convergence thresholds; the study stops before thinning.

    ``chain`` is the chain that failed (with its diagnostics), so that it can be stored and
    inspected.
    """

    def __init__(self, message: str, chain: Chain | None = None) -> None:
        super().__init__(message)
        self.chain = chain

    def __reduce__(self):  # picklable with its chain (the default passes only the message)
        return type(self), (str(self), self.chain)


def convergence_gate(chain: Chain, on_failure: str) -> None:
    """Raise :class:`ConvergenceError` when the chain failed its thresholds and
    ``on_failure`` (``sample.checks.on_failure``) is ``"stop"``."""
    d = chain.diagnostics
    if d is not None and not d.passed and on_failure == "stop":
        raise ConvergenceError(
            "the chain did not converge; no costly run was started:\n  "
            + "\n  ".join(d.messages)
            + "\nRun longer chains, or set sample.checks.on_failure: warn to go on anyway.",
            chain=chain,
        )


# --------------------------------------------------------------------------------------------
# observations
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Observations:
    """Observation table read from the config's CSV file: one float64 array per column."""

    path: Path
    columns: dict[str, np.ndarray]

    @property
    def n(self) -> int:
        return len(next(iter(self.columns.values()))) if self.columns else 0


def observation_columns(o: Any) -> dict[str, str]:
    """The columns a config's ``sample.observations`` names, keyed by the field naming each."""
    where = "sample.observations"
    cols = {f"{where}.target": o.target}
    cols.update({f"{where}.inputs[{k}]": c for k, c in enumerate(o.inputs)})
    if o.noise.column:
        cols[f"{where}.noise.column"] = o.noise.column
    return cols


def read_observations(path: Path, required: Sequence[str] | Mapping[str, str]) -> Observations:
    """Read a CSV observation file with a header row; every cell must be a finite number.

    ``required`` lists the columns that must be there, or maps the config field naming each
    to it (:func:`observation_columns`), so that a missing column names its field.

    Raises
    ------
    ValueError
        Naming the file, the line and the column of the first bad cell, or a missing column
        (and the field that named it).
    """
    if not path.is_file():
        raise FileNotFoundError(f"{path}: observation file not found")
    with path.open(newline="", encoding="utf-8") as fh:
        rows = [r for r in csv.reader(fh) if r and not r[0].lstrip().startswith("#")]
    if len(rows) < 2:
        raise InputError(f"{path}: expected a header row and at least one data row")
    header = [h.strip() for h in rows[0]]
    if isinstance(required, Mapping):
        bad = [(f, c) for f, c in required.items() if c not in header]
        if bad:
            raise InputError(
                "\n".join(
                    f"{f}: {c!r} is not a column of {path} (columns: {', '.join(header)})"
                    for f, c in bad
                )
            )
        required = list(required.values())
    missing = [c for c in required if c not in header]
    if missing:
        raise InputError(f"{path}: missing column(s) {missing}; the file has {header}")
    data: dict[str, list[float]] = {h: [] for h in header}
    for lineno, row in enumerate(rows[1:], start=2):
        if len(row) != len(header):
            raise InputError(f"{path}: line {lineno} has {len(row)} cells, expected {len(header)}")
        for h, cell in zip(header, row, strict=True):
            try:
                v = float(cell)
            except ValueError:
                raise InputError(
                    f"{path}: line {lineno}, column {h!r}: expected a number, got {cell!r}"
                ) from None
            if not math.isfinite(v):
                raise InputError(
                    f"{path}: line {lineno}, column {h!r}: missing or non-finite value {cell!r}"
                )
            data[h].append(v)
    return Observations(path, {h: np.asarray(v, dtype=np.float64) for h, v in data.items()})


# --------------------------------------------------------------------------------------------
# sample
# --------------------------------------------------------------------------------------------
def _thresholds(config: StudyConfig) -> dict[str, float]:
    c = config.sample.checks
    return {"rhat_max": c.rhat_max, "ess_bulk_min": c.ess_bulk_min, "ess_tail_min": c.ess_tail_min}


def sample_stage(
    config: StudyConfig,
    base_dir: Path,
    *,
    progress: Progress | None = None,
    checkpoint: Callable[[dict[str, Any]], None] | None = None,
    resume: dict[str, Any] | None = None,
) -> Chain:
    """Calibrate the cheap model (or import a chain) and diagnose convergence.

    ``progress(done, total, what)`` hears of the sampler's iterations (at most once per 1 %
    and per 0.5 s), or of the start and end of an import (0 then 1 of 1), like
    :func:`thin_stage`'s. Returns the chain with its diagnostics. Raises
    :class:`ConvergenceError` when a threshold fails and the config says
    ``on_failure: stop``.
    """
    from . import _diagnostics as diag
    from . import _sampling as sampling
    from ._chainfiles import read_chain_file

    s = config.sample
    if s.import_chain is not None:
        imp = s.import_chain
        what = "importing the chain (reading, diagnostics)"
        if progress is not None:
            progress(0, 1, what)
        chain = read_chain_file(
            resolve(base_dir / "x", imp.file),
            dataset=imp.dataset,
            names=list(config.names),
            units=list(config.units),
            chain_column=imp.chain_column,
            draw_column=imp.draw_column,
        )
        chain = diag.diagnose_chain(
            chain,
            chains=imp.chains,
            burn_in=s.burn_in,
            thresholds=_thresholds(config),
        )
        if progress is not None:
            progress(1, 1, what)
    else:
        assert s.model is not None  # guaranteed by SampleSettings validation
        priors = [
            {"name": p.name, "units": p.units, **p.prior.model_dump()} for p in config.parameters
        ]
        search = model_search_path(config, base_dir)
        if s.model.forward is not None:
            assert s.observations is not None
            obs_cfg = s.observations
            obs = read_observations(
                resolve(base_dir / "x", obs_cfg.file), observation_columns(obs_cfg)
            )
            inputs: dict[str, Any] = {k: obs.columns[k] for k in obs_cfg.inputs}
            inputs.update(obs_cfg.constants)
            if obs_cfg.noise.value is not None:
                sigma: Any = obs_cfg.noise.value
            elif obs_cfg.noise.column is not None:
                sigma = obs.columns[obs_cfg.noise.column]
            else:
                assert obs_cfg.noise.estimate is not None
                sigma = {"estimate": obs_cfg.noise.estimate.model_dump()}
            log_post = sampling.build_log_posterior(
                priors,
                forward=sampling.load_callable(s.model.forward, search_path=search),
                inputs=inputs,
                observations=obs.columns[obs_cfg.target],
                sigma=sigma,
                likelihood=obs_cfg.likelihood,
                nu=obs_cfg.nu,
                vectorised=s.model.vectorised,
            )
        else:
            log_post = sampling.build_log_posterior(
                priors,
                log_density=sampling.load_callable(s.model.log_density, search_path=search),
                vectorised=s.model.vectorised,
            )
        chain = sampling.sample(
            log_post,
            priors,
            sampler=s.sampler,
            n_chains=s.chains,
            n_draws=s.draws,
            burn_in=s.burn_in,
            rng=config.study.seed,
            progress=progress,
            checkpoint=checkpoint,
            resume=resume,
            thresholds=_thresholds(config),
        )
    convergence_gate(chain, s.checks.on_failure)
    return chain


# --------------------------------------------------------------------------------------------
