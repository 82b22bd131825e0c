"""Prefect flow of the dispatch stage: one task run per point, on threads or a Dask cluster.

:func:`dispatch_flow` runs the same core as :func:`winnow.tasks.dispatch.dispatch`
(:func:`~winnow.tasks.dispatch.plan_dispatch` for reuse and resume, then
:func:`~winnow.tasks.dispatch.execute_run` per point) through Prefect tasks, so each solver run
is a task run named after its point. The ``runner`` config value picks the task runner:

- ``"local"`` -> ``ThreadPoolTaskRunner(max_workers=concurrency)``;
- ``{"dask": {"address": ...}}`` -> ``prefect_dask.DaskTaskRunner(address=...)``;
- ``{"dask": {"local_cluster": {"n_workers": n}}}`` ->
  ``DaskTaskRunner(cluster_kwargs={"n_workers": n, ...})``.

Whatever the task runner, at most ``concurrency`` runs are in flight: the flow submits a new
task run only when one has finished (a Dask cluster's own slots would otherwise decide, e.g.
every worker at once).

A run that does not succeed ends its task run Failed (visible in the UI), but the flow waits
for every task run, reads each final state and returns one outcome per spec: one failed run
never fails the flow, and no failed state is left unresolved (shared/prefect-notes.md).
The outcome of a failed task run is read back from the run folder's journal, which the run
wrote before the task failed.
"""

from __future__ import annotations

import queue
import signal
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

from prefect import flow, task
from prefect.cache_policies import NO_CACHE
from prefect.logging import get_run_logger

from winnow.tasks.dispatch import (
    DEFAULT_TAIL_BYTES,
    INTERRUPT_GRACE,
    INTERRUPTED,
    Interrupted,
    RunOptions,
    execute_run,
    failed_outcome,
    plan_dispatch,
    read_outcome,
    request_stop,
    signal_name,
    stop_requested,
    stop_signal,
    terminate_running,
    wait_idle,
)
from winnow.tasks.records import RunOutcome, RunSpec

__all__ = ["dispatch_flow", "make_task_runner", "run_point"]

_DASK_CLUSTER_DEFAULTS = {"threads_per_worker": 1, "dashboard_address": ":0"}


def make_task_runner(config_value: Any, *, concurrency: int):
    """Prefect task runner for a ``runner:`` config value (same shapes as ``make_runner``).

    Parameters
    ----------
    config_value : str, dict or None
        ``"local"``, ``{"dask": {"address": ...}}`` or
        ``{"dask": {"local_cluster": {"n_workers": ...}}}``.
    concurrency : int
        Threads of the local task runner.
    """
    from prefect.task_runners import ThreadPoolTaskRunner

    from winnow.tasks.dispatch import validate_concurrency as _validate_concurrency

    concurrency = _validate_concurrency(concurrency)
    if config_value is None or config_value == "local" or config_value == {"local": {}}:
        return ThreadPoolTaskRunner(max_workers=concurrency)
    if isinstance(config_value, Mapping) and set(config_value) == {"dask"}:
        value = config_value["dask"]
        if isinstance(value, Mapping) and len(value) == 1:
            ((kind, arg),) = value.items()
            from prefect_dask import DaskTaskRunner

            if kind == "address" and isinstance(arg, str) and arg:
                return DaskTaskRunner(address=arg)
            if kind == "local_cluster" and (arg is None or isinstance(arg, Mapping)):
                kwargs = dict(_DASK_CLUSTER_DEFAULTS)
                kwargs.update(arg or {})
                return DaskTaskRunner(cluster_kwargs=kwargs)
        raise ValueError(
            "runner 'dask' needs exactly one of {'address': '<scheduler address>'} or "
            f"{{'local_cluster': {{'n_workers': <int>}}}}, got {value!r}"
        )
    raise ValueError(
        "the dispatch flow runs with runner 'local' or {'dask': {...}}; got "
        f"{config_value!r} (a batch runner is used through winnow.tasks.dispatch.dispatch)"
    )


# No Prefect cache: reuse is decided by the run key and the journal (plan_dispatch), and a
# cached result must never stand in for a solver run.
@task(task_run_name="run-{spec.run_id}", cache_policy=NO_CACHE)
def run_point(spec: RunSpec, options: RunOptions) -> Any:
    """Run the solver of one point (journalled in its run folder).

    Returns the outcome when the run succeeded; otherwise returns a ``Failed`` state whose
    message gives the reason, so the task run shows Failed without a Python traceback (the
    solver failing is an expected event, not an error of this code).
    """
    from prefect.states import Failed

    outcome = execute_run(spec, options)
    if outcome.state != "succeeded":
        # the outcome travels with the state: the run folder (and its journal) may be gone
        return Failed(message=f"run {spec.run_id} {outcome.state}: {outcome.message}", data=outcome)
    return outcome


def _outcome_of_failed(spec: RunSpec, state: Any, since: float) -> RunOutcome:
    """Outcome of a failed task run: the one it returned with its state, else the journal it
    wrote, else the state's message (a task that crashed before running the solver)."""
    try:
        carried = state.result(raise_on_failure=False)
    except Exception:  # noqa: BLE001 - an unreadable result falls back to the journal
        carried = None
    if isinstance(carried, RunOutcome) and carried.run_id == spec.run_id:
        return carried
    journalled = read_outcome(spec.run_dir)
    if (
        journalled is not None
        and journalled.key == spec.key
        and journalled.attempts
        and journalled.attempts[0].started >= since
    ):
        return journalled
    return failed_outcome(spec, f"task run {state.name}: {state.message}")


@flow(name="winnow-dispatch", validate_parameters=False)
def dispatch_flow(
    specs: Sequence[RunSpec],
    runner: Any = "local",
    concurrency: int = 1,
    known_successes: Mapping[str, str] | None = None,
    on_outcome: Callable[[RunOutcome], Any] | None = None,
    timeout: float | None = None,
    retries: int = 0,
    retry_delay: float = 0.0,
    env: Mapping[str, str] | None = None,
    cwd: str | None = None,
    outputs: Sequence[str] = (),
    tail_bytes: int = DEFAULT_TAIL_BYTES,
    check_output: Callable[[Path], str | None] | None = None,
    kill_grace: float = 5.0,
    resume: bool = True,
) -> list[RunOutcome]:
    """Run the solver for every spec as Prefect task runs; return one outcome per spec.

    Parameters are those of :func:`winnow.tasks.dispatch.dispatch`; ``runner`` picks the
    Prefect task runner (see :func:`make_task_runner`) and ``concurrency`` is the number of
    runs in flight at once on any runner (and the local runner's thread count).

    Returns
    -------
    list of RunOutcome
        In the order of ``specs``, every spec accounted for.
    """
    from winnow.flows._cli_common import reassert_interrupt_handlers

    reassert_interrupt_handlers()
    logger = get_run_logger()
    specs = list(specs)
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
    from winnow.tasks.dispatch import validate_concurrency as _validate_concurrency

    concurrency = _validate_concurrency(concurrency)
    task_runner = make_task_runner(runner, concurrency=concurrency)
    done, todo = plan_dispatch(specs, known_successes=known_successes, resume=resume)
    for spec in specs:
        if spec.run_id in done and on_outcome is not None:
            on_outcome(done[spec.run_id])
    if done:
        logger.info("%d of %d runs already succeeded; not run again", len(done), len(specs))
    since = time.time() - 1.0
    if todo:
        with task_runner as active:
            in_flight: dict[int, tuple[RunSpec, Any]] = {}
            try:
                finished = _bounded(active, todo, options, limit=concurrency, in_flight=in_flight)
                for n_done, (spec, future) in enumerate(finished, start=1):
                    future.wait()
                    state = future.state
                    if state.is_completed():
                        outcome = state.result()
                    else:
                        outcome = _outcome_of_failed(spec, state, since)
                    _release(future)
                    done[spec.run_id] = outcome
                    logger.info("run %s %s (%d/%d)", spec.run_id, outcome.state, n_done, len(todo))
                    if on_outcome is not None:
                        on_outcome(outcome)
            except BaseException as exc:
                signum = _interrupt_signal(exc)
                if signum is None:
                    raise
                _stop_in_flight(active, signum, list(in_flight.values()), since)
                if isinstance(exc, Interrupted):
                    raise
                raise Interrupted(signum) from exc
    if stop_requested():
        # stopped from elsewhere (another thread): the runs not started have no outcome
        raise Interrupted(stop_signal() or signal.SIGINT)
    return [done[s.run_id] for s in specs]


def _interrupt_signal(exc: BaseException) -> int | None:
    """The signal behind an exception that interrupts the dispatch, or None for others."""
    from prefect.exceptions import TerminationSignal

    if isinstance(exc, Interrupted):
        return exc.signum
    if isinstance(exc, TerminationSignal):  # Prefect's SIGTERM handler was in force
        return int(exc.signal)
    if isinstance(exc, KeyboardInterrupt):
        return int(stop_signal() or signal.SIGINT)
    return None


def _release(future: Any) -> None:
    """Let a Dask cluster forget a finished run: a result it still held would be computed
    again -- the solver run again -- if its worker died (e.g. of the user's Ctrl-C)."""
    wrapped = getattr(future, "wrapped_future", None)
    release = getattr(wrapped, "release", None)
    if callable(release) and hasattr(wrapped, "key"):
        try:
            release()
        except Exception:  # noqa: BLE001 - a closed client: nothing held any more
            pass


def _stop_in_flight(
    active: Any, signum: int, in_flight: list[tuple[RunSpec, Any]], since: float
) -> None:
    """Stop the runs in flight: terminate their solvers and wait (a few seconds at most)
    until each has journalled how it ended."""
    request_stop(signum)  # solvers of this process (thread-pool task runner)
    client = getattr(active, "_client", None)
    if client is None:
        wait_idle(INTERRUPT_GRACE + 1.0)
        return
    # A Dask task runner: the solvers run in the workers' processes. Cancelled first, so that
    # the scheduler does not start them again elsewhere when a worker dies of the same signal.
    for _, future in in_flight:
        wrapped = getattr(future, "wrapped_future", None)
        try:
            wrapped.cancel()
        except Exception:  # noqa: BLE001 - a closed client
            pass
    _on_workers(client, terminate_running, signum)
    deadline = time.monotonic() + INTERRUPT_GRACE + 1.0
    waiting = [spec for spec, _ in in_flight]
    while waiting and time.monotonic() < deadline:
        waiting = [spec for spec in waiting if not _journalled_since(spec, since)]
        time.sleep(0.05)
    for spec, _ in in_flight:
        _journal_interrupted(spec, signum, since)


def _journalled_since(spec: RunSpec, since: float) -> bool:
    from winnow.tasks.dispatch import OUTCOME_NAME

    try:
        return (Path(spec.run_dir) / OUTCOME_NAME).stat().st_mtime >= since
    except OSError:
        return False


def _journal_interrupted(spec: RunSpec, signum: int, since: float) -> None:
    """Journal a run stopped on a worker as interrupted, unless it ended well or its worker
    already said so. A worker that lost its solver to the command's own stop (the same
    Ctrl-C reached it, or the command terminated the solver) records an ordinary failure, or
    nothing when it died first; the run's journal must still say why it ended."""
    import dataclasses

    from winnow.tasks.dispatch import write_outcome

    o = read_outcome(spec.run_dir)
    fresh = o is not None and o.key == spec.key and _journalled_since(spec, since)
    if fresh and (o.state == "succeeded" or o.message.startswith(INTERRUPTED)):
        return
    message = (
        f"{INTERRUPTED} by {signal_name(signum)}: the solver's process group "
        "was terminated; the run starts again when the study resumes"
    )
    if fresh:
        outcome = dataclasses.replace(o, state="not_run", message=message, output_hashes={})
    else:
        outcome = failed_outcome(spec, message + " (its worker stopped before journalling it)")
        outcome = dataclasses.replace(outcome, state="not_run")
    try:
        write_outcome(outcome)
    except OSError:
        pass  # the folder is gone: nothing to resume from there


def _on_workers(client: Any, func: Callable[..., Any], *args: Any, timeout: float = 3.0) -> None:
    """Call ``func(*args)`` on every Dask worker, waiting ``timeout`` seconds at most."""
    import threading

    def call() -> None:
        try:
            client.run(func, *args, on_error="ignore")
        except Exception:  # noqa: BLE001 - workers already gone: nothing left to stop there
            pass

    t = threading.Thread(target=call, name="winnow-stop-workers", daemon=True)
    t.start()
    t.join(timeout)


def _bounded(
    active: Any,
    todo: list[RunSpec],
    options: RunOptions,
    *,
    limit: int,
    in_flight: dict[int, tuple[RunSpec, Any]],
) -> Iterator[tuple[RunSpec, Any]]:
    """Submit the runs of ``todo`` with at most ``limit`` in flight; yield ``(spec, future)``
    as each finishes, submitting the next one first. No run is submitted once a stop was
    requested (:func:`winnow.tasks.dispatch.request_stop`).

    The limit is kept here rather than left to the task runner: a Dask cluster would run one
    task per worker slot, whatever the study's ``concurrency`` says. ``in_flight`` (filled
    here) lets the caller see the runs still going when it is interrupted.
    """
    finished: queue.SimpleQueue = queue.SimpleQueue()
    waiting = list(reversed(todo))

    def submit() -> None:
        spec = waiting.pop()
        future = active.submit(run_point, {"spec": spec, "options": options})
        in_flight[id(future)] = (spec, future)
        future.add_done_callback(lambda f, key=id(future): finished.put(key))

    while waiting and len(in_flight) < limit and not stop_requested():
        submit()
    while in_flight:
        try:
            # a timeout, so that the main thread runs its signal handlers promptly
            key = finished.get(timeout=0.25)
        except queue.Empty:
            continue
        spec, future = in_flight.pop(key)
        if waiting and not stop_requested():
            submit()
        yield spec, future
