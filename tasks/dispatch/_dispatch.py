"""Dispatch stage: render an input deck per chosen point, run the costly solver, record outcomes.

Each point gets a run folder named by a stable id (:func:`point_run_id`) holding its rendered
decks and a manifest (:func:`render_run`). :func:`dispatch` runs the solver on every
:class:`~winnow.tasks.records.RunSpec` through a runner (:func:`make_runner`: local
processes, a Dask cluster or a batch scheduler) with a timeout per attempt, retries and a
concurrency limit, and returns one :class:`~winnow.tasks.records.RunOutcome` per spec.

Nothing finished is lost or repeated:

- every finished run journals ``winnow-outcome.json`` in its run folder (atomically), and a
  later dispatch of the same spec with the same key returns that success instead of running
  again (resume after a killed flow; :func:`scan_run_folders` lists the journal);
- ``known_successes`` maps run keys already successful elsewhere (e.g. in a store revision) to
  a label: those runs are not run again and their outcome names the label in ``reused_from``;
- :func:`select_for_rerun` lists the runs to run again.

This module never imports Prefect; :mod:`winnow.flows.dispatch` wraps it in a flow.

Examples
--------
>>> from winnow.tasks.dispatch import DeckSpec, render_run, dispatch   # doctest: +SKIP
>>> spec = render_run({"k": 1.5e-4}, point_index=12, weight=0.1, run_root="runs",
...                   decks=DeckSpec(["input.dat.j2"]), command=["solver", "{deck}"],
...                   template_root="templates")                      # doctest: +SKIP
>>> outcomes = dispatch([spec], runner="local", timeout=3600, retries=1)  # doctest: +SKIP
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

from winnow.tasks.records import RunOutcome, RunSpec

from ._decks import (
    DeckSpec,
    format_number,
    point_run_id,
    render_run,
    run_key,
)
from ._folders import MANIFEST_NAME, OUTCOME_NAME, DeckError, read_manifest
from ._process import (
    DEFAULT_TAIL_BYTES,
    RunOptions,
    execute_run,
    outcome_from_dict,
    outcome_to_dict,
    read_outcome,
    run_one,
    write_outcome,
)
from ._runners import BatchRunner, DaskRunner, LocalRunner, Runner, make_runner

__all__ = [
    "DEFAULT_TAIL_BYTES",
    "MANIFEST_NAME",
    "OUTCOME_NAME",
    "RERUN_STATES",
    "BatchRunner",
    "DaskRunner",
    "DeckError",
    "DeckSpec",
    "LocalRunner",
    "RunOptions",
    "Runner",
    "dispatch",
    "execute_run",
    "format_number",
    "make_runner",
    "outcome_from_dict",
    "outcome_to_dict",
    "plan_dispatch",
    "point_run_id",
    "read_manifest",
    "read_outcome",
    "render_run",
    "run_key",
    "run_one",
    "scan_run_folders",
    "select_for_rerun",
    "write_outcome",
]

#: States whose runs :func:`select_for_rerun` picks.
RERUN_STATES: tuple[str, ...] = ("failed", "timed_out", "output_missing", "not_run")


def _validate_specs(specs: Any) -> list[RunSpec]:
    if isinstance(specs, RunSpec):
        raise TypeError("specs must be a list of RunSpec, got a single RunSpec")
    specs = list(specs)
    bad = [type(s).__name__ for s in specs if not isinstance(s, RunSpec)]
    if bad:
        raise TypeError(f"specs must all be RunSpec, got {bad[0]}")
    seen: dict[str, RunSpec] = {}
    for s in specs:
        if s.run_id in seen:
            raise ValueError(f"run_id {s.run_id!r} appears twice in specs")
        seen[s.run_id] = s
    dirs = [Path(s.run_dir).absolute() for s in specs]
    if len(set(dirs)) != len(dirs):
        raise ValueError("two specs share one run folder")
    return specs


def plan_dispatch(
    specs: Iterable[RunSpec],
    *,
    known_successes: Mapping[str, str] | None = None,
    resume: bool = True,
) -> tuple[dict[str, RunOutcome], list[RunSpec]]:
    """Split specs into those already done and those to run.

    A spec is done when its run folder journals a success under the same key (``resume``),
    or when its key is in ``known_successes`` (the outcome is then ``succeeded`` with
    ``reused_from`` set to the label, and is journalled in the run folder).

    Returns
    -------
    done : dict of run_id to RunOutcome
    todo : list of RunSpec
        In the order given.
    """
    specs = _validate_specs(specs)
    known = dict(known_successes or {})
    bad = [k for k, v in known.items() if not isinstance(k, str) or not isinstance(v, str)]
    if bad:
        raise TypeError(f"known_successes must map run keys (str) to labels (str), got {bad[0]!r}")
    done: dict[str, RunOutcome] = {}
    todo: list[RunSpec] = []
    for spec in specs:
        if resume:
            journalled = read_outcome(spec.run_dir)
            if (
                journalled is not None
                and journalled.state == "succeeded"
                and journalled.key == spec.key
            ):
                done[spec.run_id] = journalled
                continue
        if spec.key in known:
            outcome = RunOutcome(
                run_id=spec.run_id,
                key=spec.key,
                state="succeeded",
                attempts=(),
                run_dir=Path(spec.run_dir),
                message=f"not run again: a run with the same key succeeded in {known[spec.key]}",
                reused_from=known[spec.key],
            )
            if Path(spec.run_dir).is_dir():
                try:
                    write_outcome(outcome)
                except OSError:
                    pass  # the journal is a convenience here; the label already records it
            done[spec.run_id] = outcome
            continue
        todo.append(spec)
    return done, todo


def dispatch(
    specs: Iterable[RunSpec],
    *,
    runner: Runner | str | Mapping[str, Any] | None = "local",
    known_successes: Mapping[str, str] | None = None,
    on_outcome: Callable[[RunOutcome], Any] | None = None,
    concurrency: int | None = None,
    timeout: float | None = None,
    retries: int = 0,
    retry_delay: float = 0.0,
    env: Mapping[str, str] | None = None,
    cwd: Path | str | None = None,
    outputs: Sequence[str] = (),
    tail_bytes: int = DEFAULT_TAIL_BYTES,
    check_output: Callable[[Path], str | None] | None = None,
    kill_grace: float = 5.0,
    resume: bool = True,
) -> list[RunOutcome]:
    """Run the solver for every spec and return one outcome per spec, in order.

    Parameters
    ----------
    specs : iterable of RunSpec
        From :func:`render_run`; run ids and folders must be distinct.
    runner : Runner, str or dict
        A runner, or a config value for :func:`make_runner` (``"local"``,
        ``{"dask": {...}}``, ``{"batch": {...}}``).
    known_successes : dict of str to str, optional
        Run key -> label of where its success is recorded; such runs are not run again.
    on_outcome : callable, optional
        Called with each outcome as it is known (reused and resumed ones first, then each run
        as it finishes), in the calling thread.
    concurrency : int, optional
        Runs at once when ``runner`` is a config value; default 1 (costly solvers usually
        use every core themselves).
    timeout, retries, retry_delay, env, cwd, outputs, tail_bytes, check_output, kill_grace
        As in :func:`run_one`.
    resume : bool
        Return a journalled success with the same key instead of running again.

    Returns
    -------
    list of RunOutcome
        One per spec (``succeeded``, ``failed``, ``timed_out``, ``output_missing`` or
        ``not_run``); a failure of one run never stops the others.
    """
    specs = _validate_specs(specs)
    options = RunOptions(
        timeout=timeout,
        retries=retries,
        retry_delay=retry_delay,
        env=env,
        cwd=cwd,
        outputs=tuple(outputs),
        tail_bytes=tail_bytes,
        check_output=check_output,
        kill_grace=kill_grace,
    )
    if on_outcome is not None and not callable(on_outcome):
        raise TypeError(f"on_outcome must be callable, got {on_outcome!r}")
    if not isinstance(runner, Runner):
        runner = make_runner(runner, concurrency=1 if concurrency is None else concurrency)
    done, todo = plan_dispatch(specs, known_successes=known_successes, resume=resume)
    if on_outcome is not None:
        for spec in specs:
            if spec.run_id in done:
                on_outcome(done[spec.run_id])
    ran = runner.run(todo, options, on_outcome=on_outcome)
    done.update({o.run_id: o for o in ran})
    return [done[s.run_id] for s in specs]


def scan_run_folders(run_root: Path | str) -> dict[str, RunOutcome]:
    """Outcomes journalled under ``run_root``, keyed by run id (for resume and rerun).

    Folders without a readable ``winnow-outcome.json`` (never run, half-written, killed
    mid-run) are left out; temporary folders of an interrupted render are ignored.
    """
    root = Path(run_root)
    if not root.is_dir():
        raise FileNotFoundError(f"run_root {root} is not a folder")
    found: dict[str, RunOutcome] = {}
    for child in sorted(root.iterdir()):
        if child.name.startswith(".") or not child.is_dir() or child.is_symlink():
            continue
        outcome = read_outcome(child)
        if outcome is not None and outcome.run_id == child.name:
            found[child.name] = outcome
    return found


def select_for_rerun(outcomes: Mapping[str, RunOutcome] | Iterable[RunOutcome]) -> list[str]:
    """Run ids whose state is failed, timed_out, output_missing or not_run, in given order."""
    items = list(outcomes.values()) if isinstance(outcomes, Mapping) else list(outcomes)
    bad = [type(o).__name__ for o in items if not isinstance(o, RunOutcome)]
    if bad:
        raise TypeError(f"outcomes must be RunOutcome records, got {bad[0]}")
    return [o.run_id for o in items if o.state in RERUN_STATES]
