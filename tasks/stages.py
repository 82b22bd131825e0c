"""The four stages driven by a study config, as plain functions (no Prefect).

Each function takes the validated :class:`~winnow.tasks.config.StudyConfig`, the folder that
relative paths in it are relative to, and the records produced by earlier stages; it returns
the record of its own stage. The Prefect tasks in :mod:`winnow.tasks.prefect_tasks` wrap these,
and the study flow writes what they return to the run store. Nothing here touches the store.
"""

from __future__ import annotations

import contextlib
import csv
import math
import sys
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .config import StudyConfig, resolve
from .records import Chain, QoIEstimate, QoIValue, RunOutcome, RunSpec, Selection

__all__ = [
    "ConvergenceError",
    "Observations",
    "cheap_predictions",
    "collect_stage",
    "deck_spec",
    "observation_columns",
    "preflight",
    "prepare_runs",
    "read_observations",
    "render_selection",
    "sample_stage",
    "solver_command",
    "thin_stage",
]

Progress = Callable[[int, int, str], None]


class ConvergenceError(RuntimeError):
    """The chain failed its convergence thresholds; the study stops before thinning."""


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
        raise ValueError(f"{path}: expected a header row and at least one data row")
    header = [h.strip() for h in rows[0]]
    if isinstance(required, Mapping):
        bad = [(f, c) for f, c in required.items() if c not in header]
        if bad:
            raise ValueError(
                "\n".join(
                    f"{f}: {c!r} is not a column of {path} (columns: {', '.join(header)})"
                    for f, c in bad
                )
            )
        required = list(required.values())
    missing = [c for c in required if c not in header]
    if missing:
        raise ValueError(f"{path}: missing column(s) {missing}; the file has {header}")
    data: dict[str, list[float]] = {h: [] for h in header}
    for lineno, row in enumerate(rows[1:], start=2):
        if len(row) != len(header):
            raise ValueError(f"{path}: line {lineno} has {len(row)} cells, expected {len(header)}")
        for h, cell in zip(header, row, strict=True):
            try:
                v = float(cell)
            except ValueError:
                raise ValueError(
                    f"{path}: line {lineno}, column {h!r}: expected a number, got {cell!r}"
                ) from None
            if not math.isfinite(v):
                raise ValueError(
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
    from . import diagnostics as diag
    from . import sampling
    from .chainfiles import read_chain_file

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
        search = _search_path(config, base_dir)
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
    d = chain.diagnostics
    if d is not None and not d.passed and s.checks.on_failure == "stop":
        raise ConvergenceError(
            "the chain did not converge; no costly run was started:\n  "
            + "\n  ".join(d.messages)
            + "\nRun longer chains, or set sample.checks.on_failure: warn to go on anyway."
        )
    return chain


# --------------------------------------------------------------------------------------------
# thin
# --------------------------------------------------------------------------------------------
def thin_stage(config: StudyConfig, chain: Chain, *, progress: Progress | None = None) -> Selection:
    """Choose ``config.budget`` weighted points of the chain by MMD; ``progress(done,
    total, step)`` hears of every long step (see :func:`~winnow.tasks.thinning.thin`)."""
    from .thinning import thin

    t = config.thin
    return thin(
        chain.samples,
        config.budget,
        kernel=t.kernel,
        bandwidth=t.bandwidth,
        method=t.method,
        weights=t.weights,
        feature_map=t.feature_map,
        n_features=t.features,
        replace_unweighted=t.replace_unweighted,
        exact_max_rows=t.exact_max_rows,
        rng=config.study.seed,
        progress=progress,
    )


# --------------------------------------------------------------------------------------------
# dispatch (deck rendering; running is the dispatch flow's job)
# --------------------------------------------------------------------------------------------
def solver_command(command: Sequence[str]) -> list[str]:
    """The configured argv with ``{python}`` replaced by the interpreter running winnow.

    Solvers written in Python then run in the same environment as winnow, whatever
    ``python`` on PATH happens to be.
    """
    import sys

    return [sys.executable if a == "{python}" else a for a in command]


def render_selection(
    selection: Selection,
    names: Sequence[str],
    *,
    run_root: Path,
    decks: Any,
    command: Sequence[str],
    template_root: Path,
    positions: Sequence[int] | None = None,
) -> list[RunSpec]:
    """Render one run folder per chosen point (or per listed position); return the specs.

    ``names`` are the parameter names of the selection's columns, ``decks`` a
    :class:`~winnow.tasks.dispatch.DeckSpec`; ``command`` may use ``{python}``.
    """
    from .dispatch import point_run_id, render_run

    argv = solver_command(command)
    Path(run_root).mkdir(parents=True, exist_ok=True)
    specs = []
    for k in range(selection.m) if positions is None else positions:
        params = {n: float(v) for n, v in zip(names, selection.points[k], strict=True)}
        idx = int(selection.indices[k])
        specs.append(
            render_run(
                params,
                run_id=point_run_id(idx, params),
                point_index=idx,
                weight=float(selection.weights[k]),
                run_root=run_root,
                decks=decks,
                command=argv,
                template_root=template_root,
            )
        )
    return specs


def prepare_runs(
    config: StudyConfig,
    base_dir: Path,
    chain: Chain,
    selection: Selection,
    *,
    positions: Sequence[int] | None = None,
) -> list[RunSpec]:
    """Render the run folders of a study's chosen points (or of the listed positions)."""
    decks, template_root = deck_spec(config, base_dir)
    return render_selection(
        selection,
        chain.names,
        run_root=resolve(base_dir / "x", config.work_dir),
        decks=decks,
        command=config.dispatch.command,
        template_root=template_root,
        positions=positions,
    )


def deck_spec(config: StudyConfig, base_dir: Path):
    """The dispatch stage's deck specification and template folder for a study."""
    from .dispatch import DeckSpec

    d = config.dispatch
    decks = DeckSpec(
        templates=list(d.templates),
        copies=list(d.copy_files),
        links=list(d.link_files),
        constants=dict(d.constants),
        formats=dict(d.formats),
    )
    return decks, resolve(base_dir / "x", d.template_dir)


# --------------------------------------------------------------------------------------------
# collect
# --------------------------------------------------------------------------------------------
def cheap_predictions(
    config: StudyConfig, base_dir: Path, chain: Chain, selection: Selection
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Evaluate each QoI's cheap prediction on every chain row and on the chosen points.

    Returns ``{qoi name: (on_chain (n, ...), on_points (m, ...))}`` for the QoIs that name one.
    """
    from .sampling import load_callable

    search = _search_path(config, base_dir)
    out = {}
    for q in config.collect.qoi:
        if q.cheap_qoi is None:
            continue
        f = load_callable(q.cheap_qoi, search_path=search)
        on_chain = np.asarray(f(chain.samples), dtype=np.float64)
        if on_chain.shape[:1] != (chain.n,):
            raise ValueError(
                f"collect.qoi[{q.name}].cheap_qoi: {q.cheap_qoi} returned shape {on_chain.shape} "
                f"for {chain.n} rows; expected ({chain.n},) or ({chain.n}, k)"
            )
        out[q.name] = (on_chain, on_chain[selection.indices])
    return out


@contextlib.contextmanager
def _importable(folder: Path):
    """Put ``folder`` first on the import path for the duration (user reader functions)."""
    added = str(folder) not in sys.path
    if added:
        sys.path.insert(0, str(folder))
    try:
        yield
    finally:
        if added:
            sys.path.remove(str(folder))


def _search_path(config: StudyConfig, base_dir: Path) -> Path:
    m = config.sample.model
    return resolve(base_dir / "x", m.search_path) if m is not None else Path(base_dir)


def _weights_resolver(chain: Chain, selection: Selection, order: Sequence[int]):
    """For the collect stage: re-solve the weights of surviving points against the chain.

    ``order[p]`` is the selection position of the p-th value the collect stage holds; the
    returned callable takes the surviving value positions and gives
    ``(weights, mmd before, mmd after)`` with exact-kernel MMDs.
    """
    from .thinning import reweight

    def resolve(surviving: np.ndarray) -> tuple[np.ndarray, float, float]:
        keep = np.asarray(order, dtype=np.int64)[np.asarray(surviving, dtype=np.int64)]
        new = reweight(chain.samples, selection, keep, by="position")
        return new.weights, float(selection.mmd_exact), float(new.mmd_exact)

    return resolve


def collect_stage(
    config: StudyConfig,
    base_dir: Path,
    chain: Chain,
    selection: Selection,
    specs: Sequence[RunSpec],
    outcomes: Mapping[str, RunOutcome],
    *,
    rng: Any = None,
    recorded: Mapping[tuple[str, str], QoIValue] | None = None,
) -> tuple[list[QoIValue], list[QoIEstimate]]:
    """Read every QoI from every run and make the weighted estimates with their uncertainty.

    ``recorded`` maps ``(reused_from, qoi name)`` to the value an earlier revision recorded
    for a run reused from it: when the run folder no longer holds that run's output, the
    recorded value is used (and says so) instead of counting the run as missing.
    """
    import dataclasses

    from .collect import estimate_qoi, read_qoi

    cheap = cheap_predictions(config, base_dir, chain, selection)
    positions = {s.run_id: k for k, s in enumerate(specs)}
    ess = None
    if chain.diagnostics is not None:
        ess = min(p.ess_bulk for p in chain.diagnostics.parameters.values())
    rng = np.random.default_rng(config.study.seed if rng is None else rng)
    from ._uncertainty import ChainGeometry

    # one view of the chain for every QoI's error model (its kernel embeddings are cached)
    finite_rows = np.isfinite(chain.samples).all(axis=1)
    geometry = ChainGeometry(chain.samples[finite_rows], rng=rng)
    chain_points = chain.samples[selection.indices]
    values: list[QoIValue] = []
    estimates: list[QoIEstimate] = []
    for q in config.collect.qoi:
        spec_dict = q.reader_spec()
        vals = []
        for s in specs:
            o = outcomes.get(s.run_id)
            state = o.state if o is not None else "not_run"
            with _importable(_search_path(config, base_dir)):
                v = read_qoi(s.run_dir, spec_dict, run_id=s.run_id, run_state=state)
            earlier = (recorded or {}).get((o.reused_from, q.name)) if o is not None else None
            if v.status != "ok" and earlier is not None and earlier.status == "ok":
                v = dataclasses.replace(
                    earlier,
                    run_id=s.run_id,
                    reason=f"recorded by {o.reused_from} (reused run; its folder no longer "
                    f"holds the output: {v.reason})",
                )
            vals.append(v)
        values.extend(vals)
        order = [positions[v.run_id] for v in vals]
        weights = selection.weights[order]
        on_chain, on_points = cheap.get(q.name, (None, None))
        estimates.append(
            estimate_qoi(
                vals,
                weights,
                name=q.name,
                units=q.units,
                quantiles=tuple(config.collect.quantiles),
                thresholds=tuple(q.thresholds),
                cheap_on_points=None if on_points is None else on_points[order],
                cheap_on_chain=on_chain,
                # the smaller of the parameters' ESS and the cheap prediction's is used
                chain_ess=ess,
                chain_index=chain.chain_index,
                resolve_weights=_weights_resolver(chain, selection, order),
                bootstrap=config.collect.bootstrap,
                points=chain_points[order],
                geometry=geometry,
                level=config.collect.level,
                rng=rng,
            )
        )
    return values, estimates


# --------------------------------------------------------------------------------------------
# preflight: everything that can be checked before anything is written
# --------------------------------------------------------------------------------------------
def _prior_midpoint(p) -> float:
    pr = p.prior
    if pr.dist in ("uniform",):
        return 0.5 * (pr.low + pr.high)
    if pr.dist == "lognormal":
        return float(math.exp(pr.mu))
    if pr.dist == "truncnormal":
        return float(min(max(pr.mu, pr.low), pr.high))
    return float(pr.mu)


def _check_creatable(field: str, path: Path, *, is_dir: bool) -> None:
    """Refuse a store or run folder path that cannot be made (before anything is written)."""
    import os

    if path.exists():
        if is_dir and not path.is_dir():
            raise ValueError(f"{field}: {path} exists and is not a folder")
        if not is_dir and path.is_dir():
            raise ValueError(f"{field}: {path} is a folder; expected an HDF5 file path")
        return
    parent = path.parent
    while not parent.exists():
        parent = parent.parent
    if not parent.is_dir():
        raise ValueError(f"{field}: cannot create {path}: {parent} is a file, not a folder")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise ValueError(f"{field}: cannot create {path}: {parent} is not writable")


def preflight(config: StudyConfig, base_dir: Path) -> None:
    """Check a study's files, model, templates and command without writing anything.

    Raises
    ------
    ValueError, FileNotFoundError
        Naming the config field and the file or value at fault.
    """
    import shutil

    from .sampling import load_callable

    here = Path(base_dir) / "x"
    s = config.sample
    search = _search_path(config, base_dir)
    if s.model is not None:
        spec = s.model.forward or s.model.log_density
        field = "sample.model.forward" if s.model.forward else "sample.model.log_density"
        try:
            load_callable(spec, search_path=search)
        except (ImportError, AttributeError, ValueError, TypeError) as exc:
            raise ValueError(f"{field}: {exc}") from None
    if s.observations is not None:
        o = s.observations
        read_observations(resolve(here, o.file), observation_columns(o))
    if s.import_chain is not None:
        from .chainfiles import read_chain_file

        imp = s.import_chain
        chain = read_chain_file(
            resolve(here, imp.file),
            dataset=imp.dataset,
            names=list(config.names),
            units=list(config.units),
            chain_column=imp.chain_column,
            draw_column=imp.draw_column,
        )
        finite = chain.samples[np.isfinite(chain.samples).all(axis=1)]
        distinct = len(np.unique(finite, axis=0)) if finite.size else 0
        if config.budget > distinct:
            raise ValueError(
                f"budget: {config.budget} is larger than the {distinct} distinct finite rows "
                f"of sample.import_chain.file {imp.file}"
            )
    from .collect import validate_qoi_spec

    for q in config.collect.qoi:
        with _importable(search):
            try:
                validate_qoi_spec(q.reader_spec())
            except (ValueError, TypeError) as exc:
                raise ValueError(f"collect.qoi[{q.name}].reader: {exc}") from None
        if q.cheap_qoi:
            try:
                load_callable(q.cheap_qoi, search_path=search)
            except (ImportError, AttributeError, ValueError, TypeError) as exc:
                raise ValueError(f"collect.qoi[{q.name}].cheap_qoi: {exc}") from None
    d = config.dispatch
    decks, template_root = deck_spec(config, base_dir)
    if not template_root.is_dir():
        raise FileNotFoundError(f"dispatch.template_dir: folder not found: {template_root}")
    for field, items in (
        ("templates", d.templates),
        ("copy", d.copy_files),
        ("link", d.link_files),
    ):
        for i, rel in enumerate(items):
            if not (template_root / rel).is_file():
                raise FileNotFoundError(
                    f"dispatch.{field}[{i}]: file not found: {template_root / rel}"
                )
    # Render one trial deck (prior midpoint) into a scratch folder: undefined names, syntax
    # errors and paths escaping the run folder are reported now, before the study starts.
    import tempfile

    from .dispatch import render_run

    params = {p.name: _prior_midpoint(p) for p in config.parameters}
    with tempfile.TemporaryDirectory(prefix="winnow-preflight-") as scratch:
        try:
            render_run(
                params,
                run_id="preflight",
                point_index=0,
                weight=1.0,
                run_root=scratch,
                decks=decks,
                command=solver_command(d.command),
                template_root=template_root,
            )
        except ValueError as exc:
            raise ValueError(f"dispatch.templates: {exc}") from None
    for field, rel in (("store", config.store), ("work_dir", config.work_dir)):
        _check_creatable(field, resolve(here, rel), is_dir=field == "work_dir")
    exe = solver_command(d.command)[0]
    if shutil.which(exe) is None and not resolve(here, exe).is_file():
        raise FileNotFoundError(
            f"dispatch.command[0]: {exe!r} is neither on PATH nor a file next to the config"
        )
