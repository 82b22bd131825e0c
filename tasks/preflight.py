"""Preflight: everything about a study config that can be checked before anything is written."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from winnow.tasks.errors import InputError

from .config import StudyConfig, importable, model_search_path, resolve
from .dispatch import deck_spec, solver_command
from .sample import observation_columns, read_observations


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
            raise InputError(f"{field}: {path} exists and is not a folder")
        if not is_dir and path.is_dir():
            raise InputError(f"{field}: {path} is a folder; expected an HDF5 file path")
        return
    parent = path.parent
    while not parent.exists():
        parent = parent.parent
    if not parent.is_dir():
        raise InputError(f"{field}: cannot create {path}: {parent} is a file, not a folder")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(f"{field}: cannot create {path}: {parent} is not writable")


def _check_staged_files(d, template_root: Path) -> None:
    """Every template and input file exists (a linked input may be a folder)."""
    for i, rel in enumerate(d.templates):
        if not (template_root / rel).is_file():
            raise FileNotFoundError(
                f"dispatch.templates[{i}]: file not found: {template_root / rel}"
            )
    for i, f in enumerate(d.inputs):
        found = (template_root / f.file).is_file() or (
            f.stage == "link" and (template_root / f.file).is_dir()  # a linked folder
        )
        if not found:
            raise FileNotFoundError(
                f"dispatch.inputs[{i}].file: file not found: {template_root / f.file}"
            )


def preflight(config: StudyConfig, base_dir: Path) -> None:
    """Check a study's files, model, templates and command without writing anything.

    Raises
    ------
    ValueError, FileNotFoundError
        Naming the config field and the file or value at fault.
    """
    import shutil

    from winnow.tasks.sample import load_callable

    here = Path(base_dir) / "x"
    s = config.sample
    search = model_search_path(config, base_dir)
    if s.model is not None:
        spec = s.model.forward or s.model.log_density
        field = "sample.model.forward" if s.model.forward else "sample.model.log_density"
        try:
            load_callable(spec, search_path=search)
        except (ImportError, AttributeError, ValueError, TypeError) as exc:
            raise InputError(f"{field}: {exc}") from None
    if s.observations is not None:
        o = s.observations
        read_observations(resolve(here, o.file), observation_columns(o))
    if s.import_chain is not None:
        from winnow.tasks.sample import read_chain_file

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
            raise InputError(
                f"budget: {config.budget} is larger than the {distinct} distinct finite rows "
                f"of sample.import_chain.file {imp.file}"
            )
    from winnow.tasks.collect import validate_qoi_spec

    for q in config.collect.qoi:
        with importable(search):
            try:
                validate_qoi_spec(q.reader_spec())
            except (ValueError, TypeError) as exc:
                raise InputError(f"collect.qoi[{q.name}].reader: {exc}") from None
        if q.cheap_qoi:
            try:
                load_callable(q.cheap_qoi, search_path=search)
            except (ImportError, AttributeError, ValueError, TypeError) as exc:
                raise InputError(f"collect.qoi[{q.name}].cheap_qoi: {exc}") from None
    d = config.dispatch
    decks, template_root = deck_spec(config, base_dir)
    if not template_root.is_dir():
        raise FileNotFoundError(f"dispatch.template_dir: folder not found: {template_root}")
    _check_staged_files(d, template_root)
    # Render one trial deck (prior midpoint) into a scratch folder: undefined names, syntax
    # errors and paths escaping the run folder are reported now, before the study starts.
    import tempfile

    from winnow.tasks.dispatch import render_run

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
            raise InputError(f"dispatch.templates: {exc}") from None
    for field, rel in (("store", config.store), ("run_root", config.run_root)):
        _check_creatable(field, resolve(here, rel), is_dir=field == "run_root")
    exe = solver_command(d.command)[0]
    if shutil.which(exe) is None and not resolve(here, exe).is_file():
        raise FileNotFoundError(
            f"dispatch.command[0]: {exe!r} is neither on PATH nor a file next to the config"
        )
