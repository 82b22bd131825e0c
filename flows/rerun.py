"""Rerun only what failed, or replace points that failed for good.

:func:`rerun_flow` works on the latest revision of a run store, from what the store records:

* by default it runs again, with the same decks, every run that did not succeed (failed,
  timed out, output missing, never finished), then collects again;
* with ``replace=True`` it asks the thin stage for the best substitutes of the points whose
  runs did not succeed, given the surviving points (:func:`winnow.tasks.thin.replace`),
  renders and runs only the substitutes, and collects with the re-solved weights. The
  replaced runs stay recorded in the store, with a message naming their substitute.

Succeeded runs are never run again.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import yaml
from prefect import flow, get_run_logger

from winnow.flows._orchestrate import StudyResult, dispatch_runs, finish, recorded_values
from winnow.flows._study_end import StudyRefused, reasons_text
from winnow.tasks.config import parse_config
from winnow.tasks.prefect_tasks import collect_task, prepare_runs_task
from winnow.tasks.records import RunOutcome, RunSpec

__all__ = ["rerun_flow"]


@flow(
    name="winnow-rerun",
    flow_run_name="rerun-{store}",
    description="Run again only the failed, timed-out and unfinished runs of a study's latest "
    "revision, replace the points that failed for good, or add points.",
)
def rerun_flow(store: str, replace: bool = False, extend: int = 0) -> StudyResult:
    """Rerun or replace the unsuccessful runs of the latest revision of ``store``.

    With ``extend=k`` (k > 0), first add ``k`` points to the selection, chosen by the thin
    stage to shrink the MMD most with every earlier point kept
    (:func:`winnow.tasks.thin.extend`), and run them; weights are re-solved over all
    points. The report's "more runs" forecast says what ``k`` buys.
    """
    from winnow.flows._cli_common import note_progress, reassert_interrupt_handlers
    from winnow.tasks.dispatch import select_for_rerun
    from winnow.tasks.store import RunStore
    from winnow.tasks.thin import extend as extend_points
    from winnow.tasks.thin import replace as replace_points

    if isinstance(extend, bool) or not isinstance(extend, int) or extend < 0:
        raise ValueError(f"extend: expected a whole number >= 0 of points to add, got {extend!r}")
    reassert_interrupt_handlers()  # SIGTERM stops the rerun as Ctrl-C does (see _cli_common)
    log = get_run_logger()
    store_path = Path(store).resolve()
    refusal = rerun_refusal(store_path)
    if refusal is not None:
        raise StudyRefused(refusal)
    for note in changed_inputs(store_path)[1]:
        log.warning(
            "input changed since the revision was run (%s); runs that succeeded are kept", note
        )
    note_progress(stage="the start of the rerun", store=store_path)
    with RunStore.open_for_write(store_path) as w:
        rev = w.latest_revision()
        done = w.stages_done(rev) if rev else set()
        if rev is None or not {"chain", "selection"} <= done:
            raise ValueError(
                f"{store_path}: nothing to rerun: the latest revision has no selection yet; "
                "run the study with `winnow run CONFIG`"
            )
        text = w.read_config_text(rev)
        details = w.read_input_details(rev)
        base = Path(details["config"]["path"]).parent if "config" in details else Path.cwd()
        # {config_dir} in the command is the config's folder, as when the study ran
        config = parse_config(
            yaml.safe_load(text), source=f"{store_path} ({rev} config)", config_dir=base
        )
        chain = w.read_chain(rev)
        selection = w.read_selection(rev)
        if "runs" in done:
            specs, stored = w.read_runs(rev)
        else:  # killed before the runs were recorded: the run folders' journals know
            specs, stored = prepare_runs_task(config, base, chain, selection, revision=rev), []
        outcomes: dict[str, RunOutcome] = {o.run_id: o for o in stored}
        pending = set(select_for_rerun(outcomes))
        pending |= {s.run_id for s in specs if s.run_id not in outcomes}
        current = {int(i) for i in selection.indices}
        pending = {rid for rid in pending if _spec(specs, rid).point_index in current}
        if extend:
            new_sel = extend_points(chain.samples, selection, extend)
            known = {s.point_index for s in specs}
            fresh = [k for k, i in enumerate(new_sel.indices) if int(i) not in known]
            new_specs = prepare_runs_task(
                config, base, chain, new_sel, revision=rev, positions=fresh
            )
            log.info("adding %d point(s) to the %d chosen", len(new_specs), selection.m)
            w.write_selection(rev, new_sel)
            by_point = {s.point_index: s for s in (*specs, *new_specs)}
            in_sel = {int(i) for i in new_sel.indices}
            specs = [
                dataclasses.replace(by_point[int(i)], weight=float(wt))
                for i, wt in zip(new_sel.indices, new_sel.weights, strict=True)
            ] + [s for s in specs if s.point_index not in in_sel]
            selection = new_sel
            pending |= {s.run_id for s in new_specs}
            todo_new = new_specs
        else:
            todo_new = []
        ran: dict[str, str] = {}  # run id -> why it ran now
        if not pending:
            log.info("%s %s: every run already succeeded; nothing to rerun", store_path, rev)
        elif not replace:
            new_ids = {s.run_id for s in todo_new}
            todo = todo_new + _rerender(
                config,
                base,
                chain,
                selection,
                [s for s in specs if s.run_id in pending and s.run_id not in new_ids],
            )
            log.info("rerunning %d run(s) with their recorded decks", len(todo))
            ran = {
                s.run_id: f"{outcomes[s.run_id].state} before" for s in todo if s.run_id in outcomes
            }
            ran.update({s.run_id: "added point" for s in todo if s.run_id not in outcomes})
            outcomes.update(dispatch_runs(config, base, todo, w.successful_runs_by_key(), log))
        else:
            positions = [
                k
                for k, i in enumerate(selection.indices)
                if _spec_of_point(specs, int(i)).run_id in pending
            ]
            new_sel = replace_points(chain.samples, selection, positions, by="position")
            known_points = {s.point_index: s for s in specs}
            fresh = [k for k, i in enumerate(new_sel.indices) if int(i) not in known_points]
            new_specs = prepare_runs_task(
                config, base, chain, new_sel, revision=rev, positions=fresh
            )
            log.info(
                "replacing %d point(s) that did not succeed by %d substitute(s)",
                len(positions),
                len(new_specs),
            )
            w.write_selection(rev, new_sel)
            outcomes.update(dispatch_runs(config, base, new_specs, w.successful_runs_by_key(), log))
            ran = {s.run_id: "substitute for a point that did not succeed" for s in new_specs}
            for k in positions:
                old = _spec_of_point(specs, int(selection.indices[k]))
                o = outcomes[old.run_id]
                outcomes[old.run_id] = dataclasses.replace(
                    o, message=(o.message + "; " if o.message else "") + "replaced by rerun"
                )
            by_point = {s.point_index: s for s in (*specs, *new_specs)}
            selected = [
                dataclasses.replace(by_point[int(i)], weight=float(wt))
                for i, wt in zip(new_sel.indices, new_sel.weights, strict=True)
            ]
            replaced = [s for s in specs if s.point_index not in {int(i) for i in new_sel.indices}]
            specs = selected + replaced
            selection = new_sel
        note_progress(stage="collecting (the runs are committed)")
        w.write_runs(rev, specs, [outcomes[s.run_id] for s in specs if s.run_id in outcomes])
        in_selection = [_spec_of_point(specs, int(i)) for i in selection.indices]
        values, estimates = collect_task(
            config,
            base,
            chain,
            selection,
            in_selection,
            outcomes,
            revision=rev,
            recorded=recorded_values(w, outcomes.values()),
        )
        w.write_results(rev, values, estimates)
    if ran:
        log.info("rerun: %s", reasons_text(ran))
    return finish(
        store_path, rev, in_selection, outcomes, estimates, config, ran=ran, values=values
    )


#: inputs of a revision that are part of every run key (deck templates, staged copies)
_KEYED_INPUTS = ("template", "copy")


def changed_inputs(store: str | Path) -> tuple[list[str], list[str]]:
    """Input files of the latest revision that changed since it was recorded.

    Returns ``(keyed, other)`` as ``"name: path"`` strings: ``keyed`` are deck templates and
    staged copies (part of every run key, so a rerun would not repeat the recorded decks),
    ``other`` the rest (observations, model sources, solver scripts in the config's folder).
    A file that is gone counts as changed.
    """
    from winnow.tasks.store import RunStore, hash_file

    with RunStore.open_read(store) as r:
        rev = r.latest_revision()
        details = r.read_input_details(rev) if rev else {}
    keyed, other = [], []
    for name, d in details.items():
        p = Path(d["path"])
        now = hash_file(p) if p.is_file() else None
        if now != d["sha256"]:
            in_keys = name.rstrip("0123456789") in _KEYED_INPUTS  # template0, copy1, ...
            (keyed if in_keys else other).append(f"{name}: {p}")
    return keyed, other


def rerun_refusal(store: str | Path) -> str | None:
    """Why ``winnow rerun STORE`` must refuse (before anything is written), or None.

    A rerun repeats failed runs with their recorded decks; when a deck template or staged
    input changed since, it cannot, and ``winnow run CONFIG`` is the way on: a new revision
    that keeps every run whose decks did not change and runs the others, saying why.
    """
    keyed, _ = changed_inputs(store)
    if not keyed:
        return None
    return (
        f"rerun: the deck templates or staged inputs changed since the latest revision was "
        f"run ({'; '.join(keyed)}), so its failed runs cannot be repeated as recorded. "
        "Nothing was written. To continue after a template or input fix, run `winnow run "
        "CONFIG`: it makes a new revision that keeps every finished run whose decks did not "
        "change, runs the others and lists which and why"
    )


def _rerender(config, base: Path, chain, selection, todo: list[RunSpec]) -> list[RunSpec]:
    """Render the decks of the runs to repeat again, as recorded.

    A failed solver may have deleted or edited its run folder; running the recorded command
    in it would fail to start or use an edited deck. Rendering is deterministic, so the fresh
    specs carry the recorded keys; a different key means the templates changed since.
    """
    position = {int(i): k for k, i in enumerate(selection.indices)}
    fresh = prepare_runs_task(
        config, base, chain, selection, positions=[position[s.point_index] for s in todo]
    )
    for old, new in zip(todo, fresh, strict=True):
        if new.key != old.key:
            raise ValueError(
                f"run {old.run_id}: its decks no longer render as recorded (templates or "
                "constants changed); run the study again with `winnow run CONFIG`"
            )
    return fresh


def _spec(specs: list[RunSpec], run_id: str) -> RunSpec:
    return next(s for s in specs if s.run_id == run_id)


def _spec_of_point(specs: list[RunSpec], point_index: int) -> RunSpec:
    return next(s for s in specs if s.point_index == point_index)
