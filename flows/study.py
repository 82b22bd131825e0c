"""The study flow: sample -> thin -> dispatch -> collect, recorded in one HDF5 run store.

The flow is the store's only writer. Each stage's output is committed in one step, so a
killed flow, started again with the same config, resumes after the last committed stage;
runs that finished are journalled in their run folders and are never repeated.

Revisions: the first run of a config creates revision ``r0001``. Running again with the same
config and input files resumes (or, when complete, reports that it is up to date). Running
with changed inputs (new observations, an edited config) creates a new revision; costly runs
whose deck hash and solver command match a success in any revision are reused.
"""

import importlib.util
import time
from pathlib import Path
from typing import Any

from prefect import flow, get_run_logger, tags
from prefect.runtime import flow_run

from winnow.flows._orchestrate import (
    StudyResult,
    dispatch_runs,
    finish,
    recorded_values,
    summarise,
)
from winnow.flows._study_end import (
    StudyFailed,
    earlier_runs,
    reasons_text,
    run_reasons,
)
from winnow.flows._study_record import (
    _diagnostics_artifact,
    _log_chain,
    _log_estimates,
    _log_selection,
    _selection_artifact,
    _StageProgress,
)
from winnow.tasks.config import StudyConfig, config_hash, resolve
from winnow.tasks.prefect_tasks import collect_task, prepare_runs_task, sample_task, thin_stage_task
from winnow.tasks.sample import (
    ConvergenceError,
    convergence_gate,
    observation_columns,
    read_observations,
)

__all__ = [
    "StudyFailed",
    "StudyResult",
    "recorded_values",
    "study_flow",
    "study_inputs",
    "study_tags",
    "summarise",
]


def _module_file(spec: str | None, search: Path) -> Path | None:
    """Source file of a ``module:function`` spec, for hashing (None when not a plain file)."""
    if not spec:
        return None
    import sys

    module = spec.split(":", 1)[0]
    added = str(search) not in sys.path
    if added:
        sys.path.insert(0, str(search))
    try:
        found = importlib.util.find_spec(module)
    except (ImportError, ValueError):
        return None
    finally:
        if added:
            sys.path.remove(str(search))
    origin = getattr(found, "origin", None)
    return Path(origin) if origin and Path(origin).is_file() else None


def study_inputs(config: StudyConfig, base_dir: Path) -> dict[str, Path]:
    """Input files whose content defines a revision: observations, templates, staged inputs,
    model sources and solver scripts in the config's folder."""
    here = base_dir / "x"
    files: dict[str, Path] = {}
    s = config.sample
    if s.observations is not None:
        files["observations"] = resolve(here, s.observations.file)
    if s.import_chain is not None:
        files["chain"] = resolve(here, s.import_chain.file)
    search = resolve(here, s.model.search_path) if s.model else base_dir
    if s.model is not None:
        src = _module_file(s.model.forward or s.model.log_density, search)
        if src is not None:
            files["model"] = src
    tdir = resolve(here, config.dispatch.template_dir)
    for i, t in enumerate(config.dispatch.templates):
        files[f"template{i}"] = tdir / t
    for i, c in enumerate(config.dispatch.copy_files):
        files[f"copy{i}"] = tdir / c
    for q in config.collect.qoi:
        src = _module_file(q.cheap_qoi, search)
        if src is not None:
            files[f"cheap_qoi.{q.name}"] = src
    # a solver script the command names in the config's folder ({config_dir}/solver.py): not
    # part of any run key (a fix to it keeps the finished runs) but of the revision's record
    root = Path(base_dir).resolve()
    for i, arg in enumerate(config.dispatch.command):
        p = Path(arg)
        if p.is_absolute() and p.is_file() and root in p.resolve().parents:
            files[f"command{i}"] = p
    return files


def study_tags(config: StudyConfig) -> list[str]:
    """Prefect tags of a study's flow and task runs: its name, then ``study.tags``."""
    return list(dict.fromkeys([config.study.name, *config.study.tags]))


def _name_flow_run(name: str, run_tags: list[str]) -> None:
    """Rename the running flow run once its revision is known and add the study's tags
    (best effort)."""
    if flow_run.id is None:
        return
    from prefect.client.orchestration import get_client

    try:
        with get_client(sync_client=True) as client:
            have = list(client.read_flow_run(flow_run.id).tags or [])
            client.update_flow_run(
                flow_run.id, name=name, tags=list(dict.fromkeys([*have, *run_tags]))
            )
    except Exception as exc:  # noqa: BLE001 - a name is cosmetic; never fail a study on it
        get_run_logger().debug("could not rename the flow run: %s", exc)


def _flow_run_name() -> str:
    params = flow_run.parameters
    cfg = params.get("config")
    name = cfg.study.name if isinstance(cfg, StudyConfig) else cfg["study"]["name"]
    return f"{name}-{time.strftime('%Y%m%d-%H%M%S')}"


@flow(
    name="winnow-study",
    flow_run_name=_flow_run_name,
    validate_parameters=True,
    description="Calibrate a cheap model, thin its posterior, run the costly solver on the "
    "chosen points and collect weighted estimates, all recorded in one HDF5 run store.",
)
def study_flow(
    config: StudyConfig,
    base_dir: str = ".",
    config_text: str | None = None,
    force: bool = False,
    config_path: str | None = None,
) -> StudyResult:
    """Run (or resume) a whole study.

    Parameters
    ----------
    config : StudyConfig
        The validated study config (a plain dict is validated into one).
    base_dir : str
        Folder that relative paths in the config are relative to (the config file's folder).
    config_text : str, optional
        The config file's text, stored and hashed as given; a canonical YAML dump otherwise.
    force : bool
        Replace an existing run store instead of adding to it.
    config_path : str, optional
        The config file, recorded (with its hash) among the revision's inputs so that later
        commands (``winnow rerun``) find the folder its relative paths start from.
    """
    import yaml

    from winnow.flows._cli_common import note_progress, reassert_interrupt_handlers
    from winnow.tasks.store import RunStore

    reassert_interrupt_handlers()  # SIGTERM stops the study as Ctrl-C does (see _cli_common)
    log = get_run_logger()
    base = Path(base_dir).resolve()
    here = base / "x"
    if config_text is None:
        config_text = yaml.safe_dump(config.model_dump(mode="json", by_alias=True), sort_keys=False)
    store_path = resolve(here, config.store)
    note_progress(stage="the start of the study", store=store_path)
    inputs = study_inputs(config, base)
    if config_path is not None:
        inputs["config"] = Path(config_path).resolve()
    missing = [f"{k}: {p}" for k, p in inputs.items() if not p.is_file()]
    if missing:
        raise FileNotFoundError("input file(s) not found: " + "; ".join(missing))

    if force or not store_path.exists():
        RunStore.create(
            store_path, config.study.name, force=force, description=config.study.description
        )

    # every task run and subflow run below (the solver runs too) carries the study's tags, so
    # a Prefect tag concurrency limit can hold, e.g., solver licences across studies
    with tags(*study_tags(config)), RunStore.open_for_write(store_path) as store:
        rev = _choose_revision(store, config_text, inputs)
        if rev is None:
            rev = store.new_revision(
                config_text,
                inputs=inputs,
                observations=_observation_table(config, base),
                flow_run_id=str(flow_run.id) if flow_run.id else None,
                description=config.study.description,
            )
            log.info("study %s: new revision %s", config.study.name, rev)
        else:
            log.info("study %s: resuming revision %s", config.study.name, rev)
        done = store.stages_done(rev)
        _name_flow_run(f"{config.study.name}-{rev}", study_tags(config))

        # ---- sample ------------------------------------------------------------------
        if "chain" in done:
            chain = store.read_chain(rev)
            # a stored chain that failed the gate (issue 17 item 12) stops again, unsampled
            convergence_gate(chain, config.sample.checks.on_failure)
        else:
            note_progress(stage="sampling (it resumes from its last checkpoint)")

            def checkpoint(state: dict[str, Any]) -> None:
                store.save_checkpoint(rev, "sample", state)

            try:
                chain = sample_task(
                    config,
                    base,
                    revision=rev,
                    progress=_StageProgress(config.study.name, "sample", log),
                    checkpoint=checkpoint,
                    resume=store.load_checkpoint(rev, "sample"),
                )
            except ConvergenceError as exc:
                # stored with its failing diagnostics, for `winnow status` and inspection
                if exc.chain is not None:
                    store.write_chain(rev, exc.chain)
                    store.clear_checkpoint(rev, "sample")
                raise
            store.write_chain(rev, chain)
            store.clear_checkpoint(rev, "sample")
        _log_chain(log, chain, stored="chain" in done)
        _diagnostics_artifact(chain, config.study.name)

        # ---- thin ----------------------------------------------------------------------
        if "selection" in done:
            selection = store.read_selection(rev)
        else:
            note_progress(stage="thinning")
            selection = thin_stage_task(
                config, chain, revision=rev, progress=_StageProgress(config.study.name, "thin", log)
            )
            store.write_selection(rev, selection)
        _log_selection(log, selection, stored="selection" in done)
        _selection_artifact(chain, selection, config.study.name)

        # ---- dispatch --------------------------------------------------------------------
        note_progress(stage="rendering the input decks")
        specs = prepare_runs_task(config, base, chain, selection, revision=rev)
        if "runs" in done and "results" in done:
            _, stored = store.read_runs(rev)
            outcomes = {o.run_id: o for o in stored}
            up_to_date, ran = True, {}
        else:
            up_to_date = False
            outcomes = dispatch_runs(config, base, specs, store.successful_runs_by_key(), log)
            store.write_runs(rev, specs, [outcomes[s.run_id] for s in specs])
            # which runs ran and why (new point, failed before, decks changed since rN)
            ran = run_reasons(specs, outcomes, earlier_runs(store, rev))
            if ran:
                log.info("dispatch: %s", reasons_text(ran))

        # ---- collect ----------------------------------------------------------------------
        if "results" in done:
            values, estimates = store.read_results(rev)
        else:
            note_progress(stage="collecting (the runs are committed)")
            values, estimates = collect_task(
                config,
                base,
                chain,
                selection,
                specs,
                outcomes,
                revision=rev,
                recorded=recorded_values(store, outcomes.values()),
            )
            store.write_results(rev, values, estimates)
        _log_estimates(log, estimates, stored="results" in done)

    note_progress(stage="writing the report (every stage is committed)")
    return finish(
        store_path, rev, specs, outcomes, estimates, config,
        ran=ran, values=values, up_to_date=up_to_date,
    )  # fmt: skip


def _observation_table(config: StudyConfig, base: Path) -> dict[str, Any] | None:
    o = config.sample.observations
    if o is None:
        return None
    return read_observations(resolve(base / "x", o.file), observation_columns(o)).columns


def _choose_revision(store, config_text: str, inputs: dict[str, Path]) -> str | None:
    """The revision to resume (same config and inputs as the latest one), or None for new."""
    from winnow.tasks.store import hash_file

    revs = store.revisions()
    if not revs:
        return None
    latest = revs[-1]
    prov = store.read_provenance(latest)
    if prov.get("config_sha256") != config_hash(config_text):
        return None
    stored_inputs = store.read_inputs(latest)
    current = {k: hash_file(p) for k, p in inputs.items()}
    return latest if stored_inputs == current else None
