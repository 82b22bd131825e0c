"""Runners: where the solver processes of a dispatch run.

One base class, :class:`Runner`, with ONE hook, :meth:`Runner._iter_outcomes`, which starts
the runs and yields each outcome as it finishes. The base class accounts for every run
(a run the hook never reported is ``not_run``), turns a runner error into a ``failed``
outcome and calls ``on_outcome`` in the dispatcher's thread.

- :class:`LocalRunner`: a thread pool of local subprocesses, at most ``concurrency`` at once.
- :class:`DaskRunner`: the same per-run function submitted to a ``distributed.Client``
  (a scheduler address, or a ``LocalCluster`` started and closed here).
- :class:`BatchRunner`: a job script per run from a replaceable Jinja2 template (Slurm
  ``sbatch`` by default), submitted, then polled for the completion marker the script writes.
"""

from __future__ import annotations

import abc
import math
import numbers
import os
import re
import shlex
import signal
import subprocess
import threading
import time
import uuid
from collections.abc import Callable, Iterator, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor, as_completed
from pathlib import Path
from typing import Any

from winnow.tasks.records import Attempt, RunOutcome, RunSpec

from ._folders import STDERR_NAME, STDOUT_NAME
from ._process import (
    RunOptions,
    _journal,
    _manifest_digest,
    check_success,
    execute_run,
    failed_outcome,
    kill_running,
    read_tail,
    request_stop,
    stop_requested,
    stop_signal,
    terminate_running,
)

__all__ = ["BatchRunner", "DaskRunner", "LocalRunner", "Runner", "make_runner"]

OnOutcome = Callable[[RunOutcome], Any]

JOB_SCRIPT_NAME = "winnow-job.sh"
MARKER_NAME = "winnow-exit-status"
BATCH_LOG_NAME = "winnow-batch.log"
DEFAULT_JOB_TEMPLATE = Path(__file__).parent / "templates" / "slurm_job.sh.j2"


def _validate_concurrency(value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"concurrency must be an int >= 1, got {value!r}")
    if value < 1:
        raise ValueError(f"concurrency must be >= 1, got {value}")
    return int(value)


class Runner(abc.ABC):
    """Base class of the runners. Subclasses implement :meth:`_iter_outcomes` only."""

    name = "runner"

    def run(
        self,
        specs: Sequence[RunSpec],
        options: RunOptions,
        on_outcome: OnOutcome | None = None,
    ) -> list[RunOutcome]:
        """Run every spec and return the outcomes in the order of ``specs``.

        ``on_outcome(outcome)`` is called in this thread as each run finishes. If it raises,
        the remaining runs still finish (and are journalled); the first error is raised at the
        end.

        An interrupt (``KeyboardInterrupt``, e.g. Ctrl-C) requests a stop
        (:func:`~winnow.tasks.dispatch._process.request_stop`: no run starts, running solvers are
        terminated and journalled as interrupted), lets the runner clean up (its solvers or
        jobs stopped) and propagates; nothing is returned for the unfinished runs.
        """
        specs = list(specs)
        by_id = {s.run_id: s for s in specs}
        outcomes: dict[str, RunOutcome] = {}
        callback_error: BaseException | None = None
        runner_error = ""
        if specs:
            it = self._iter_outcomes(specs, options)
            try:
                for spec, result in it:
                    if spec.run_id not in by_id or spec.run_id in outcomes:
                        continue
                    if isinstance(result, RunOutcome):
                        outcome = result
                    else:
                        outcome = _journal(
                            failed_outcome(
                                spec, f"{self.name} runner error: {type(result).__name__}: {result}"
                            )
                        )
                    outcomes[spec.run_id] = outcome
                    if on_outcome is not None and callback_error is None:
                        try:
                            on_outcome(outcome)
                        except Exception as exc:  # noqa: BLE001 - re-raised after all runs end
                            callback_error = exc
            except Exception as exc:  # noqa: BLE001 - the runner itself broke down
                runner_error = f"{self.name} runner stopped: {type(exc).__name__}: {exc}"
            except KeyboardInterrupt as exc:
                request_stop(getattr(exc, "signum", None) or stop_signal() or signal.SIGINT)
                it.close()  # now, not when the traceback is freed: the runner's cleanup
                raise
        for spec in specs:
            if spec.run_id not in outcomes:
                msg = runner_error or f"the {self.name} runner never reported this run"
                outcome = failed_outcome(spec, msg, state="not_run")
                outcomes[spec.run_id] = outcome
                if on_outcome is not None and callback_error is None:
                    try:
                        on_outcome(outcome)
                    except Exception as exc:  # noqa: BLE001
                        callback_error = exc
        if callback_error is not None:
            raise RuntimeError(
                f"on_outcome failed ({type(callback_error).__name__}: {callback_error}); every "
                "run has finished and is journalled in its run folder"
            ) from callback_error
        return [outcomes[s.run_id] for s in specs]

    @abc.abstractmethod
    def _iter_outcomes(
        self, specs: list[RunSpec], options: RunOptions
    ) -> Iterator[tuple[RunSpec, RunOutcome | BaseException]]:
        """Start the runs; yield ``(spec, outcome or exception)`` as each one finishes."""


class LocalRunner(Runner):
    """Local solver processes, at most ``concurrency`` at once (a thread pool).

    Parameters
    ----------
    concurrency : int
        Runs at once.
    """

    name = "local"

    def __init__(self, concurrency: int = 1) -> None:
        self.concurrency = _validate_concurrency(concurrency)

    def __repr__(self) -> str:
        return f"LocalRunner(concurrency={self.concurrency})"

    def _iter_outcomes(self, specs, options):
        threads: set[int] = set()

        def call(spec: RunSpec) -> RunOutcome:
            threads.add(threading.get_ident())
            return execute_run(spec, options)

        with ThreadPoolExecutor(
            max_workers=min(self.concurrency, len(specs)), thread_name_prefix="winnow-run"
        ) as pool:
            futures = {pool.submit(call, spec): spec for spec in specs}
            finished = False
            try:
                for fut in as_completed(futures):
                    exc = fut.exception()
                    yield futures[fut], (exc if exc is not None else fut.result())
                finished = True
            finally:
                for fut in futures:
                    fut.cancel()
                if not finished:
                    # Interrupted (Ctrl-C, generator closed): stop the solvers still running
                    # instead of waiting hours for them in the pool's shutdown.
                    kill_running(threads)


class DaskRunner(Runner):
    """Runs submitted to a Dask cluster (``distributed``), the same per-run function as local.

    Parameters
    ----------
    address : str, optional
        Scheduler address of a running cluster (``tcp://host:8786``).
    local_cluster : dict, optional
        Keyword arguments of ``distributed.LocalCluster`` for a cluster started for this
        dispatch and closed afterwards (default one thread per worker; the scheduler's HTTP
        server on a free port, so several clusters never fight over port 8787).
    concurrency : int, optional
        Runs in flight at once; default all (the cluster's own slots limit them).
    client : distributed.Client, optional
        An existing client (not closed here).

    Exactly one of ``address``, ``local_cluster``, ``client`` is given.
    """

    name = "dask"

    def __init__(
        self,
        *,
        address: str | None = None,
        local_cluster: Mapping[str, Any] | None = None,
        concurrency: int | None = None,
        client: Any = None,
    ) -> None:
        given = [
            n
            for n, v in (("address", address), ("local_cluster", local_cluster), ("client", client))
            if v is not None
        ]
        if len(given) != 1:
            raise ValueError(
                f"DaskRunner needs exactly one of address, local_cluster, client; got {given}"
            )
        if address is not None and (not isinstance(address, str) or not address):
            raise TypeError(f"address must be a scheduler address string, got {address!r}")
        if local_cluster is not None and not isinstance(local_cluster, Mapping):
            raise TypeError(
                f"local_cluster must be a dict of LocalCluster options, got {local_cluster!r}"
            )
        self.address = address
        self.local_cluster = dict(local_cluster) if local_cluster is not None else None
        self.client = client
        self.concurrency = None if concurrency is None else _validate_concurrency(concurrency)

    def __repr__(self) -> str:
        where = self.address or (
            f"local_cluster={self.local_cluster}" if self.local_cluster is not None else "client"
        )
        return f"DaskRunner({where}, concurrency={self.concurrency})"

    def _open(self):
        from distributed import Client, LocalCluster

        if self.client is not None:
            return self.client, None, False
        if self.address is not None:
            return Client(self.address, set_as_default=False), None, True
        kwargs = {"threads_per_worker": 1, "processes": True, "dashboard_address": ":0"}
        kwargs.update(self.local_cluster or {})
        cluster = LocalCluster(**kwargs)
        return Client(cluster, set_as_default=False), cluster, True

    def _iter_outcomes(self, specs, options):
        from distributed import as_completed as dask_as_completed

        client, cluster, owned = self._open()
        finished = False
        try:
            pending = list(specs)
            limit = self.concurrency or len(pending)
            token = uuid.uuid4().hex[:8]

            def submit(spec: RunSpec):
                return client.submit(
                    execute_run, spec, options, pure=False, key=f"winnow-{spec.run_id}-{token}"
                )

            first = [submit(s) for s in pending[:limit]]
            spec_of = {f.key: s for f, s in zip(first, pending[:limit], strict=True)}
            queue = pending[limit:]
            done = dask_as_completed(first, loop=client.loop)
            for fut in done:
                spec = spec_of[fut.key]
                try:
                    result: RunOutcome | BaseException = fut.result()
                except Exception as exc:  # noqa: BLE001 - worker died, lost data, ...
                    result = exc
                fut.release()
                if queue and not stop_requested():
                    nxt = queue.pop(0)
                    new = submit(nxt)
                    spec_of[new.key] = nxt
                    done.add(new)
                yield spec, result
            finished = True
        finally:
            if not finished and stop_requested():
                # the solvers run in the workers' processes: stop them there (best effort)
                try:
                    client.run(terminate_running, stop_signal() or signal.SIGINT, on_error="ignore")
                except Exception:  # noqa: BLE001 - workers gone: nothing left to stop
                    pass
            if owned:
                client.close()
                if cluster is not None:
                    cluster.close()


def _time_limit(seconds: float) -> str:
    """Slurm ``--time`` value ``HH:MM:SS`` (rounded up to whole seconds)."""
    total = int(math.ceil(seconds))
    return f"{total // 3600:02d}:{total % 3600 // 60:02d}:{total % 60:02d}"


class BatchRunner(Runner):
    """Runs submitted as batch-scheduler jobs, one job script per run.

    The job script is rendered from a Jinja2 template (Slurm by default,
    ``tasks/dispatch/templates/slurm_job.sh.j2``; pass your own ``template``). It runs the solver with
    coreutils ``timeout`` when a timeout is set, streams output to the run folder and writes
    the completion marker ``winnow-exit-status`` (``exit_status=<n>`` and ``timed_out=<0|1>``)
    by moving a finished temporary file into place. The runner submits the script with
    ``submit`` (argv; the script path is appended) and polls for the marker.

    Template variables: ``run_id``, ``job_name``, ``run_dir``, ``cwd``, ``argv`` (list),
    ``command`` (shell-quoted argv), ``stdout``, ``stderr``, ``marker``, ``marker_tmp``,
    ``batch_log``, ``timeout`` (whole seconds or None), ``kill_grace``, ``time_limit``
    (``HH:MM:SS`` or ""), ``env`` (dict), ``directives`` (list of str) and the filter ``q``
    (shell quoting).

    Parameters
    ----------
    submit : sequence of str
        Submission command, default ``["sbatch"]``.
    template : path, optional
        Job script template (Jinja2, sandboxed, strict undefined).
    directives : sequence of str
        Extra scheduler directives written as ``#SBATCH <directive>`` by the default template.
    poll_interval : float
        Seconds between checks for the marker.
    max_wait : float, optional
        Seconds after submission before a job without marker is cancelled (``cancel``) and
        recorded as timed out; default wait for ever.
    cancel : sequence of str
        Cancel command; the job id is appended. Default ``["scancel"]``.
    concurrency : int
        Jobs in flight at once.
    """

    name = "batch"

    def __init__(
        self,
        *,
        submit: Sequence[str] = ("sbatch",),
        template: str | Path | None = None,
        directives: Sequence[str] = (),
        poll_interval: float = 5.0,
        max_wait: float | None = None,
        cancel: Sequence[str] = ("scancel",),
        concurrency: int = 1,
    ) -> None:
        for name, value in (("submit", submit), ("cancel", cancel)):
            if isinstance(value, str) or not value or not all(isinstance(v, str) for v in value):
                raise TypeError(f"{name} must be a non-empty argv list of str, got {value!r}")
        if isinstance(directives, str) or not all(isinstance(d, str) for d in directives):
            raise TypeError(f"directives must be a list of str, got {directives!r}")
        for name, value in (("poll_interval", poll_interval), ("max_wait", max_wait)):
            if value is None and name == "max_wait":
                continue
            if isinstance(value, bool) or not isinstance(value, numbers.Real) or not value > 0:
                raise ValueError(f"{name} must be a number of seconds > 0, got {value!r}")
        self.template = Path(template) if template is not None else DEFAULT_JOB_TEMPLATE
        if not self.template.is_file():
            raise FileNotFoundError(f"batch job template {self.template} does not exist")
        self.submit = tuple(submit)
        self.cancel = tuple(cancel)
        self.directives = tuple(directives)
        self.poll_interval = float(poll_interval)
        self.max_wait = None if max_wait is None else float(max_wait)
        self.concurrency = _validate_concurrency(concurrency)

    def __repr__(self) -> str:
        return f"BatchRunner(submit={list(self.submit)}, concurrency={self.concurrency})"

    # -- job script -------------------------------------------------------------------------
    def render_job_script(self, spec: RunSpec, options: RunOptions) -> str:
        """Text of the job script of ``spec`` (also used to check a replacement template)."""
        from jinja2 import FileSystemLoader, StrictUndefined
        from jinja2.sandbox import SandboxedEnvironment

        env = SandboxedEnvironment(
            loader=FileSystemLoader(str(self.template.parent)),
            undefined=StrictUndefined,
            keep_trailing_newline=True,
            autoescape=False,
        )
        env.filters["q"] = lambda v: shlex.quote(str(v))
        run_dir = Path(spec.run_dir)
        if options.cwd is None:
            cwd = run_dir
        else:
            cwd = Path(options.cwd)
            cwd = cwd if cwd.is_absolute() else run_dir / cwd
        timeout = None if options.timeout is None else int(math.ceil(options.timeout))
        limit = "" if timeout is None else _time_limit(timeout + options.kill_grace + 60)
        context = {
            "run_id": spec.run_id,
            "job_name": f"winnow-{spec.run_id}",
            "run_dir": str(run_dir),
            "cwd": str(cwd),
            "argv": list(spec.argv),
            "command": shlex.join(spec.argv),
            "stdout": str(run_dir / STDOUT_NAME),
            "stderr": str(run_dir / STDERR_NAME),
            "marker": str(run_dir / MARKER_NAME),
            "marker_tmp": str(run_dir / f".{MARKER_NAME}.tmp"),
            "batch_log": str(run_dir / BATCH_LOG_NAME),
            "timeout": timeout,
            "kill_grace": max(1, int(math.ceil(options.kill_grace))),
            "time_limit": limit,
            "env": dict(options.env or {}),
            "directives": list(self.directives),
        }
        return env.get_template(self.template.name).render(context)

    @staticmethod
    def _read_marker(path: Path) -> tuple[int | None, bool] | None:
        try:
            text = path.read_text(encoding="utf-8")
        except OSError:
            return None
        fields = dict(line.split("=", 1) for line in text.splitlines() if "=" in line)
        try:
            status = int(fields["exit_status"])
        except (KeyError, ValueError):
            return (None, False)
        return status, fields.get("timed_out", "0").strip() == "1"

    def _cancel_job(self, job_id: str) -> None:
        if not job_id:
            return
        try:
            subprocess.run(  # noqa: S603 - argv list, never a shell
                [*self.cancel, job_id],
                capture_output=True,
                timeout=60,
                stdin=subprocess.DEVNULL,
            )
        except (OSError, subprocess.SubprocessError):
            pass

    def _attempt(
        self, spec: RunSpec, number: int, options: RunOptions, stop: threading.Event
    ) -> tuple[Attempt, str]:
        run_dir = Path(spec.run_dir)
        started = time.time()

        def record(status, timed_out, error) -> Attempt:
            return Attempt(
                number=number,
                argv=spec.argv,
                started=started,
                ended=time.time(),
                exit_status=status,
                timed_out=timed_out,
                stdout_tail=read_tail(run_dir / STDOUT_NAME, options.tail_bytes),
                stderr_tail=read_tail(run_dir / STDERR_NAME, options.tail_bytes),
                error=error,
            )

        if not run_dir.is_dir():
            return record(None, False, f"run folder {run_dir} does not exist"), "failed"
        marker = run_dir / MARKER_NAME
        script = run_dir / JOB_SCRIPT_NAME
        try:
            for stale in (marker, run_dir / STDOUT_NAME, run_dir / STDERR_NAME):
                if stale.exists() and number > 1 and stale != marker:
                    stem, suffix = stale.name.rsplit(".", 1)
                    os.replace(stale, run_dir / f"{stem}.attempt{number - 1}.{suffix}")
            marker.unlink(missing_ok=True)
            script.write_text(self.render_job_script(spec, options), encoding="utf-8")
            script.chmod(0o755)
            proc = subprocess.run(  # noqa: S603 - argv list, never a shell
                [*self.submit, str(script)],
                cwd=run_dir,
                capture_output=True,
                text=True,
                timeout=120,
                stdin=subprocess.DEVNULL,
            )
        except (OSError, subprocess.SubprocessError) as exc:
            return record(None, False, f"could not submit the job: {exc}"), "failed"
        if proc.returncode != 0:
            err = (proc.stderr or proc.stdout).strip()[-500:]
            return record(
                None, False, f"submission failed (status {proc.returncode}): {err}"
            ), "failed"
        ids = re.findall(r"\d+", proc.stdout)
        job_id = ids[-1] if ids else ""
        deadline = None if self.max_wait is None else time.monotonic() + self.max_wait
        while True:
            found = self._read_marker(marker)
            if found is not None:
                status, timed_out = found
                break
            if not run_dir.is_dir():
                return record(
                    None, False, f"run folder {run_dir} vanished while job {job_id} ran"
                ), "failed"
            if stop.is_set() or stop_requested():
                self._cancel_job(job_id)
                return record(
                    None, False, f"interrupted: dispatch stopped; job {job_id} cancelled"
                ), "not_run"
            if deadline is not None and time.monotonic() > deadline:
                self._cancel_job(job_id)
                msg = (
                    f"job {job_id} wrote no completion marker within {self.max_wait:g} s; cancelled"
                )
                return record(None, True, msg), "timed_out"
            stop.wait(self.poll_interval)
        if timed_out:
            return record(
                None, True, f"job {job_id}: killed after {options.timeout:g} s timeout"
            ), "timed_out"
        if status is None:
            return record(None, False, f"job {job_id}: unreadable completion marker"), "failed"
        if status != 0:
            return record(status, False, ""), "failed"
        return record(status, False, ""), "succeeded"

    def _run_batch(self, spec: RunSpec, options: RunOptions, stop: threading.Event) -> RunOutcome:
        run_dir = Path(spec.run_dir)
        attempts: list[Attempt] = []
        state, message, hashes = "failed", "", {}
        manifest_before = _manifest_digest(run_dir)
        for number in range(1, options.retries + 2):
            if stop.is_set() or stop_requested():
                if not attempts:  # never submitted: not journalled (it did not end)
                    return failed_outcome(spec, "interrupted: not submitted", state="not_run")
                state, message = "not_run", "interrupted: dispatch stopped before a retry"
                break
            if number > 1 and options.retry_delay > 0:
                stop.wait(options.retry_delay)
            attempt, state = self._attempt(spec, number, options, stop)
            attempts.append(attempt)
            hashes = {}
            if state == "not_run":
                message = attempt.error
                break
            if state == "succeeded":
                hashes, problem = check_success(run_dir, options, manifest_before)
                state, message = ("output_missing", problem) if problem else ("succeeded", "")
            else:
                message = attempt.error or f"exit status {attempt.exit_status}"
            if state == "succeeded":
                break
            if attempt.exit_status is None and not attempt.timed_out:
                break  # submission itself failed
        outcome = RunOutcome(
            run_id=spec.run_id,
            key=spec.key,
            state=state,  # type: ignore[arg-type]
            attempts=tuple(attempts),
            run_dir=run_dir,
            output_hashes=hashes,
            message=message,
        )
        return _journal(outcome)

    def _iter_outcomes(self, specs, options):
        with ThreadPoolExecutor(
            max_workers=min(self.concurrency, len(specs)), thread_name_prefix="winnow-batch"
        ) as pool:
            stop = threading.Event()
            futures = {pool.submit(self._run_batch, spec, options, stop): spec for spec in specs}
            try:
                for fut in as_completed(futures):
                    exc = fut.exception()
                    yield futures[fut], (exc if exc is not None else fut.result())
            finally:
                for fut in futures:
                    fut.cancel()
                # Interrupted: the polling threads cancel their jobs and return at once.
                stop.set()


# --------------------------------------------------------------------------------------------
# the config switch
# --------------------------------------------------------------------------------------------
_BATCH_KEYS = ("submit", "template", "directives", "poll_interval", "max_wait", "cancel")


def _make_local(value: Any, concurrency: int) -> Runner:
    if value not in (None, {}):
        raise ValueError(f"runner 'local' takes no options, got {value!r}")
    return LocalRunner(concurrency)


def _make_dask(value: Any, concurrency: int) -> Runner:
    if not isinstance(value, Mapping) or len(value) != 1:
        raise ValueError(
            "runner 'dask' needs exactly one of {'address': '<scheduler address>'} or "
            f"{{'local_cluster': {{'n_workers': <int>}}}}, got {value!r}"
        )
    ((kind, arg),) = value.items()
    if kind == "address":
        return DaskRunner(address=arg, concurrency=concurrency)
    if kind == "local_cluster":
        if arg is None:
            arg = {}
        if not isinstance(arg, Mapping):
            raise TypeError(
                f"dask.local_cluster must be a dict (e.g. {{'n_workers': 2}}), got {arg!r}"
            )
        return DaskRunner(local_cluster=arg, concurrency=concurrency)
    raise ValueError(
        f"runner 'dask' option {kind!r} is unknown; valid: ['address', 'local_cluster']"
    )


def _make_batch(value: Any, concurrency: int) -> Runner:
    value = {} if value is None else value
    if not isinstance(value, Mapping):
        raise TypeError(f"runner 'batch' options must be a dict, got {value!r}")
    unknown = sorted(set(value) - set(_BATCH_KEYS))
    if unknown:
        raise ValueError(
            f"runner 'batch' options {unknown} are unknown; valid: {list(_BATCH_KEYS)}"
        )
    return BatchRunner(concurrency=concurrency, **dict(value))


_RUNNERS: dict[str, Callable[[Any, int], Runner]] = {
    "local": _make_local,
    "dask": _make_dask,
    "batch": _make_batch,
}


def make_runner(config_value: Any, *, concurrency: int) -> Runner:
    """Build a runner from the ``runner:`` value of a study config.

    Accepted shapes (plain strings and dicts, as read from YAML)::

        "local"                                     # or None
        {"dask": {"address": "tcp://host:8786"}}
        {"dask": {"local_cluster": {"n_workers": 2}}}
        {"batch": {"submit": ["sbatch"], "template": "job.sh.j2", "directives": [...],
                   "poll_interval": 5, "max_wait": 86400, "cancel": ["scancel"]}}

    Parameters
    ----------
    config_value : str, dict or None
    concurrency : int
        Runs at once (local threads, Dask tasks in flight, batch jobs in flight).
    """
    concurrency = _validate_concurrency(concurrency)
    if isinstance(config_value, Runner):
        return config_value
    if config_value is None:
        config_value = "local"
    if isinstance(config_value, str):
        if config_value not in _RUNNERS:
            raise ValueError(f"runner {config_value!r} is unknown; valid: {sorted(_RUNNERS)}")
        if config_value == "dask":
            raise ValueError(
                "runner 'dask' needs options: {'dask': {'address': ...}} or "
                "{'dask': {'local_cluster': {'n_workers': ...}}}"
            )
        return _RUNNERS[config_value](None, concurrency)
    if isinstance(config_value, Mapping):
        if len(config_value) != 1:
            raise ValueError(
                f"runner must be one of {sorted(_RUNNERS)} or a dict with one of those keys, "
                f"got {dict(config_value)!r}"
            )
        ((kind, value),) = config_value.items()
        if kind not in _RUNNERS:
            raise ValueError(f"runner {kind!r} is unknown; valid: {sorted(_RUNNERS)}")
        return _RUNNERS[kind](value, concurrency)
    raise TypeError(f"runner must be a string or a dict, got {type(config_value).__name__}")


#: Public name of the concurrency check, for the flows that take the same argument.
validate_concurrency = _validate_concurrency
