"""Running one solver process: process group, timeout, bounded output tails, retries, journal.

The solver is started without a shell, in a new session (``start_new_session=True``) so that
it leads its own process group: on timeout the whole group (the solver and anything it spawned)
is sent SIGTERM, then SIGKILL after a grace period. Standard output and error are streamed to
files in the run folder and only their last bytes are read back, so a solver that prints
megabytes never fills the dispatcher's memory.

Every finished run writes ``winnow-outcome.json`` into its run folder atomically (temporary
file + ``os.replace``): this journal lets a killed dispatch resume without repeating a
finished run.

Stopping (Ctrl-C, SIGTERM): :func:`request_stop` sets a process-wide stop flag and sends
SIGTERM to the process group of every solver running in this process (SIGKILL after
:data:`INTERRUPT_GRACE` seconds). An attempt that was stopped so journals its run as
``not_run`` with a message starting ``"interrupted"``; a run not yet started when the flag is
set does not start, and no retry starts after it. The ``winnow`` command line calls
:func:`request_stop` from its signal handler; the dispatch loops call it when an interrupt
reaches them.
"""

from __future__ import annotations

import atexit
import hashlib
import math
import numbers
import os
import signal
import subprocess
import threading
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from winnow.tasks.records import RUN_STATES, Attempt, RunOutcome, RunSpec

from ._folders import (
    MANIFEST_NAME,
    OUTCOME_NAME,
    STDERR_NAME,
    STDOUT_NAME,
    DeckError,
    _validate_relative,
    write_json_atomic,
)

__all__ = [
    "DEFAULT_TAIL_BYTES",
    "INTERRUPTED",
    "INTERRUPT_GRACE",
    "Interrupted",
    "RunOptions",
    "check_outputs",
    "execute_run",
    "outcome_from_dict",
    "outcome_to_dict",
    "read_outcome",
    "read_tail",
    "request_stop",
    "reset_stop",
    "run_one",
    "stop_requested",
    "stop_signal",
    "terminate_descendant_solvers",
    "terminate_running",
    "wait_idle",
    "write_outcome",
]

DEFAULT_TAIL_BYTES = 8192
OUTCOME_FORMAT = "winnow-run-outcome"
OUTCOME_VERSION = 1

#: ``check_output(run_dir) -> None | str``: a reason string (or an exception) marks the
#: outputs unusable and the run ``output_missing``. Must be a module-level function to travel
#: to Dask workers.
OutputCheck = Callable[[Path], "str | None"]


# --------------------------------------------------------------------------------------------
# options
# --------------------------------------------------------------------------------------------
def _validate_nonneg(value: Any, name: str, *, allow_none: bool = False) -> float | None:
    if value is None and allow_none:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise TypeError(f"{name} must be a number of seconds, got {value!r}")
    value = float(value)
    if not math.isfinite(value) or value < 0:
        raise ValueError(f"{name} must be finite and >= 0, got {value!r}")
    return value


@dataclass(frozen=True)
class RunOptions:
    """How each run is executed (shared by every runner; picklable for Dask workers).

    Attributes
    ----------
    timeout : float or None
        Seconds per attempt before the process group is killed.
    retries : int
        Extra attempts after a failed, timed-out or output-less attempt.
    retry_delay : float
        Seconds between attempts.
    env : dict of str to str or None
        Variables added to (overriding) the dispatcher's environment.
    cwd : path or None
        Working folder; relative paths are taken inside the run folder; default the run folder.
    outputs : tuple of str
        Expected output files relative to the run folder; missing or empty ones make the run
        ``output_missing``.
    tail_bytes : int
        Bytes of stdout/stderr kept in each attempt record.
    check_output : callable or None
        ``check_output(run_dir) -> str | None``; a returned reason marks the run
        ``output_missing``.
    kill_grace : float
        Seconds between SIGTERM and SIGKILL of the process group on timeout.
    """

    timeout: float | None = None
    retries: int = 0
    retry_delay: float = 0.0
    env: Mapping[str, str] | None = None
    cwd: str | Path | None = None
    outputs: tuple[str, ...] = ()
    tail_bytes: int = DEFAULT_TAIL_BYTES
    check_output: OutputCheck | None = None
    kill_grace: float = 5.0

    def __post_init__(self) -> None:
        timeout = _validate_nonneg(self.timeout, "timeout", allow_none=True)
        if timeout is not None and timeout == 0:
            raise ValueError("timeout must be > 0 seconds or None, got 0")
        object.__setattr__(self, "timeout", timeout)
        if isinstance(self.retries, bool) or not isinstance(self.retries, numbers.Integral):
            raise TypeError(f"retries must be an int, got {self.retries!r}")
        if self.retries < 0:
            raise ValueError(f"retries must be >= 0, got {self.retries}")
        object.__setattr__(self, "retries", int(self.retries))
        object.__setattr__(self, "retry_delay", _validate_nonneg(self.retry_delay, "retry_delay"))
        object.__setattr__(self, "kill_grace", _validate_nonneg(self.kill_grace, "kill_grace"))
        if isinstance(self.tail_bytes, bool) or not isinstance(self.tail_bytes, numbers.Integral):
            raise TypeError(f"tail_bytes must be an int, got {self.tail_bytes!r}")
        if not 0 <= self.tail_bytes <= 16 * 1024 * 1024:
            raise ValueError(f"tail_bytes must be in [0, 16 MiB], got {self.tail_bytes}")
        if self.env is not None:
            if not isinstance(self.env, Mapping):
                raise TypeError(f"env must be a mapping of str to str, got {self.env!r}")
            bad = [
                (k, v)
                for k, v in self.env.items()
                if not isinstance(k, str) or not isinstance(v, str)
            ]
            if bad:
                raise TypeError(f"env must map str to str, got {bad[0]!r}")
            object.__setattr__(self, "env", dict(self.env))
        if isinstance(self.outputs, str):
            raise TypeError(
                f"outputs must be a list of relative paths, got the string {self.outputs!r}"
            )
        outs = tuple(os.fspath(o) for o in self.outputs)
        for o in outs:
            _validate_relative(o, what=f"output {o!r}")
        object.__setattr__(self, "outputs", outs)
        if self.check_output is not None and not callable(self.check_output):
            raise TypeError(f"check_output must be callable, got {self.check_output!r}")


# --------------------------------------------------------------------------------------------
# journal
# --------------------------------------------------------------------------------------------
def outcome_to_dict(outcome: RunOutcome) -> dict[str, Any]:
    """Plain-JSON form of a :class:`RunOutcome`."""
    return {
        "format": OUTCOME_FORMAT,
        "version": OUTCOME_VERSION,
        "run_id": outcome.run_id,
        "key": outcome.key,
        "state": outcome.state,
        "run_dir": str(outcome.run_dir),
        "output_hashes": dict(outcome.output_hashes),
        "message": outcome.message,
        "reused_from": outcome.reused_from,
        "attempts": [
            {
                "number": a.number,
                "argv": list(a.argv),
                "started": a.started,
                "ended": a.ended,
                "exit_status": a.exit_status,
                "timed_out": a.timed_out,
                "stdout_tail": a.stdout_tail,
                "stderr_tail": a.stderr_tail,
                "error": a.error,
            }
            for a in outcome.attempts
        ],
    }


def outcome_from_dict(data: Mapping[str, Any]) -> RunOutcome:
    """Inverse of :func:`outcome_to_dict`; raises ValueError on a malformed record."""
    try:
        if data.get("format") != OUTCOME_FORMAT:
            raise ValueError(f"not a winnow outcome record (format {data.get('format')!r})")
        state = str(data["state"])
        if state not in RUN_STATES:
            raise ValueError(f"unknown run state {state!r}; valid: {RUN_STATES}")
        attempts = tuple(
            Attempt(
                number=int(a["number"]),
                argv=tuple(str(x) for x in a["argv"]),
                started=float(a["started"]),
                ended=float(a["ended"]),
                exit_status=None if a["exit_status"] is None else int(a["exit_status"]),
                timed_out=bool(a["timed_out"]),
                stdout_tail=str(a["stdout_tail"]),
                stderr_tail=str(a["stderr_tail"]),
                error=str(a.get("error", "")),
            )
            for a in data["attempts"]
        )
        return RunOutcome(
            run_id=str(data["run_id"]),
            key=str(data["key"]),
            state=state,  # type: ignore[arg-type]
            attempts=attempts,
            run_dir=Path(data["run_dir"]),
            output_hashes={str(k): str(v) for k, v in dict(data["output_hashes"]).items()},
            message=str(data.get("message", "")),
            reused_from=str(data.get("reused_from", "")),
        )
    except (KeyError, TypeError, AttributeError) as exc:
        raise ValueError(f"malformed outcome record: {exc!r}") from exc


def write_outcome(outcome: RunOutcome) -> None:
    """Journal ``outcome`` into its run folder atomically (raises OSError if impossible)."""
    write_json_atomic(Path(outcome.run_dir) / OUTCOME_NAME, outcome_to_dict(outcome))


def read_outcome(run_dir: Path | str) -> RunOutcome | None:
    """The journalled outcome of a run folder, or None when absent or unreadable."""
    import json

    try:
        with open(Path(run_dir) / OUTCOME_NAME, encoding="utf-8") as fh:
            return outcome_from_dict(json.load(fh))
    except (OSError, ValueError):
        return None


# --------------------------------------------------------------------------------------------
# output files
# --------------------------------------------------------------------------------------------
def read_tail(path: Path, n_bytes: int) -> str:
    """The last ``n_bytes`` of a file as text (invalid UTF-8 replaced); "" when unreadable."""
    if n_bytes <= 0:
        return ""
    try:
        with open(path, "rb") as fh:
            fh.seek(0, os.SEEK_END)
            size = fh.tell()
            fh.seek(max(0, size - n_bytes))
            data = fh.read(n_bytes)
    except OSError:
        return ""
    if len(data) == n_bytes and size > n_bytes:
        # Drop continuation bytes of a UTF-8 character cut by the window.
        i = 0
        while i < min(3, len(data)) and (data[i] & 0xC0) == 0x80:
            i += 1
        data = data[i:]
    return data.decode("utf-8", errors="replace")


def _sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def check_outputs(
    run_dir: Path, outputs: Sequence[str], check_output: OutputCheck | None = None
) -> tuple[dict[str, str], str]:
    """Hash the expected outputs and report what is missing.

    Returns
    -------
    hashes : dict of str to str
        SHA-256 of each present, non-empty output, keyed by its relative path.
    problem : str
        Empty when every output is present and the check passed; otherwise the reason.
    """
    hashes: dict[str, str] = {}
    problems: list[str] = []
    if not run_dir.is_dir():
        return hashes, f"run folder {run_dir} was deleted during the run"
    for rel in outputs:
        path = run_dir / rel
        try:
            if not path.is_file():
                problems.append(f"output {rel!r} is missing")
                continue
            if path.stat().st_size == 0:
                problems.append(f"output {rel!r} is empty")
                continue
            hashes[rel] = _sha256_file(path)
        except OSError as exc:
            problems.append(f"output {rel!r} is unreadable: {exc}")
    if not problems and check_output is not None:
        try:
            reason = check_output(run_dir)
        except Exception as exc:  # noqa: BLE001 - a user check failing marks the outputs bad
            reason = f"output check raised {type(exc).__name__}: {exc}"
        if reason:
            problems.append(str(reason))
    return hashes, "; ".join(problems)


# --------------------------------------------------------------------------------------------
# one process
# --------------------------------------------------------------------------------------------
def _group_alive(pgid: int) -> bool:
    try:
        os.killpg(pgid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _kill_group(proc: subprocess.Popen, grace: float) -> None:
    """SIGTERM the process group, wait up to ``grace`` seconds, then SIGKILL what is left."""
    pgid = proc.pid  # start_new_session=True: the solver leads its own group
    try:
        os.killpg(pgid, signal.SIGTERM)
    except ProcessLookupError:
        pass
    deadline = time.monotonic() + grace
    while time.monotonic() < deadline:
        proc.poll()
        if proc.returncode is not None and not _group_alive(pgid):
            break
        time.sleep(0.02)
    try:
        os.killpg(pgid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    proc.wait()


def _reap_strays(pgid: int) -> None:
    """Kill processes the solver left behind in its group after it exited."""
    try:
        os.killpg(pgid, signal.SIGKILL)
    except (ProcessLookupError, PermissionError):
        pass


# Solver processes running now, by the thread waiting on them (see kill_running). Reentrant:
# request_stop may run in a signal handler on a thread that holds the lock.
_LIVE: dict[int, subprocess.Popen] = {}
_LIVE_LOCK = threading.RLock()


def kill_running(thread_idents: Iterable[int]) -> int:
    """Kill the process groups of solvers waited on by the given threads; return how many.

    Used by a runner whose dispatch is interrupted (Ctrl-C, cancelled flow), so no solver
    keeps running behind it. The interrupted runs journal as ``not_run`` with a message
    starting ``"interrupted"`` and are run again later.
    """
    with _LIVE_LOCK:
        procs = [_LIVE[i] for i in thread_idents if i in _LIVE]
        for proc in procs:
            _STOPPED.setdefault(proc.pid, stop_signal() or 0)
    for proc in procs:
        _signal_group(proc.pid, signal.SIGKILL)
    return len(procs)


# --------------------------------------------------------------------------------------------
# stopping every run of this process (Ctrl-C, SIGTERM)
# --------------------------------------------------------------------------------------------
#: Seconds between SIGTERM and SIGKILL of the solvers' process groups on an interrupt.
INTERRUPT_GRACE = 2.0
#: Start of the journal message of a run stopped by an interrupt.
INTERRUPTED = "interrupted"

_STOP = threading.Event()
_STOP_SIGNAL: list[int] = []
_STOPPED: dict[int, int] = {}  # solver pid -> the signal that stopped it (terminate_running)
_EXECUTING = [0]  # runs between the start of _run_with_options and their journal
_IDLE = threading.Condition()


class Interrupted(KeyboardInterrupt):
    """A study stopped by a signal (SIGINT or SIGTERM); ``signum`` names it.

    A ``KeyboardInterrupt``, so that no ``except Exception`` on the way turns the stop into
    an ordinary failure whose outcomes would be committed.
    """

    def __init__(self, signum: int) -> None:
        self.signum = int(signum)
        super().__init__(signal_name(self.signum))


def signal_name(signum: int) -> str:
    """``"SIGINT"`` for 2, and so on (``"signal <n>"`` for an unknown number)."""
    try:
        return signal.Signals(signum).name
    except ValueError:
        return f"signal {signum}"


def _signal_group(pgid: int, sig: int) -> None:
    try:
        os.killpg(pgid, sig)
    except (ProcessLookupError, PermissionError):
        pass


def _kill_after(procs: list[subprocess.Popen], grace: float) -> None:
    deadline = time.monotonic() + grace
    while time.monotonic() < deadline and any(_group_alive(p.pid) for p in procs):
        time.sleep(0.02)
    for proc in procs:
        _signal_group(proc.pid, signal.SIGKILL)


def request_stop(signum: int = signal.SIGINT, *, grace: float | None = None) -> int:
    """Start no more solver runs in this process and terminate the running ones.

    Sets the stop flag (the first call records ``signum``) and calls
    :func:`terminate_running`. Safe to call from a signal handler in the main thread and from
    any thread, more than once.

    Returns
    -------
    int
        The number of solver process groups signalled.
    """
    if not _STOP.is_set():
        _STOP_SIGNAL[:] = [int(signum)]
        _STOP.set()
    return terminate_running(signum, grace=grace)


def terminate_running(signum: int = signal.SIGINT, *, grace: float | None = None) -> int:
    """Terminate the solvers running in this process now; their runs journal as interrupted.

    Sends SIGTERM to the process group of every solver running now and SIGKILL to what is
    left of them after ``grace`` seconds (default :data:`INTERRUPT_GRACE`; from a background
    thread, so this returns at once). Unlike :func:`request_stop` it leaves the stop flag
    alone: a Dask worker told to stop the runs of one interrupted study goes on serving others.

    Returns
    -------
    int
        The number of solver process groups signalled.
    """
    with _LIVE_LOCK:
        procs = list(_LIVE.values())
        for proc in procs:
            _STOPPED.setdefault(proc.pid, int(signum))
    for proc in procs:
        _signal_group(proc.pid, signal.SIGTERM)
    if procs:
        wait = INTERRUPT_GRACE if grace is None else grace
        threading.Thread(
            target=_kill_after, args=(procs, wait), name="winnow-stop", daemon=True
        ).start()
    return len(procs)


def kill_all_now() -> int:
    """SIGKILL the process group of every solver running in this process; return how many."""
    with _LIVE_LOCK:
        procs = list(_LIVE.values())
    for proc in procs:
        _signal_group(proc.pid, signal.SIGKILL)
    return len(procs)


def _descendant_solvers() -> list[int]:
    """Pids of this process's descendants that lead their own session, not looking inside
    them: the solvers started here or by processes started here (the workers of a local Dask
    cluster), each with its process group. Linux ``/proc`` only; ``[]`` elsewhere."""
    try:
        entries = [e for e in os.listdir("/proc") if e.isdigit()]
    except OSError:
        return []
    children: dict[int, list[int]] = {}
    session: dict[int, int] = {}
    for e in entries:
        try:
            with open(f"/proc/{e}/stat", encoding="ascii", errors="replace") as fh:
                stat = fh.read()
        except OSError:
            continue
        fields = stat[stat.rindex(")") + 2 :].split()  # after "pid (comm) "
        pid, ppid, sid = int(e), int(fields[1]), int(fields[3])
        children.setdefault(ppid, []).append(pid)
        session[pid] = sid
    found, stack = [], [os.getpid()]
    while stack:
        for child in children.get(stack.pop(), []):
            if session.get(child) == child:
                found.append(child)  # a solver: its group is signalled as a whole
            else:
                stack.append(child)
    return found


def terminate_descendant_solvers(*, grace: float | None = None) -> int:
    """SIGTERM the process group of every solver below this process (see
    :func:`_descendant_solvers`), SIGKILL after ``grace`` seconds; return how many.

    The command line's backstop on an interrupt: a local Dask worker that dies of the same
    Ctrl-C cannot stop the solvers it started any more. Only for a process that knows every
    session leader below it is a solver (the ``winnow`` command).
    """
    pgids = _descendant_solvers()
    for pgid in pgids:
        _signal_group(pgid, signal.SIGTERM)
    if pgids:
        wait = INTERRUPT_GRACE if grace is None else grace

        def later() -> None:
            deadline = time.monotonic() + wait
            while time.monotonic() < deadline and any(_group_alive(g) for g in pgids):
                time.sleep(0.02)
            for g in pgids:
                _signal_group(g, signal.SIGKILL)

        threading.Thread(target=later, name="winnow-stop-descendants", daemon=True).start()
    return len(pgids)


def kill_descendant_solvers() -> int:
    """SIGKILL the process group of every solver below this process; return how many."""
    pgids = _descendant_solvers()
    for pgid in pgids:
        _signal_group(pgid, signal.SIGKILL)
    return len(pgids)


def _kill_live_at_exit() -> None:
    """A process that exits (a Dask worker stopped by Ctrl-C, an interpreter shutting down)
    takes the solvers it started with it: they run in their own sessions, so nothing else
    would stop them."""
    kill_all_now()


atexit.register(_kill_live_at_exit)


def stop_requested() -> bool:
    """Whether :func:`request_stop` was called (and not reset since)."""
    return _STOP.is_set()


def stop_signal() -> int | None:
    """The signal of the first :func:`request_stop` call, or None."""
    return _STOP_SIGNAL[0] if _STOP.is_set() and _STOP_SIGNAL else None


def reset_stop() -> None:
    """Clear the stop flag (after the interrupted command has been reported)."""
    _STOP.clear()
    _STOP_SIGNAL.clear()


def wait_idle(timeout: float) -> bool:
    """Wait until no run of this process is between its start and its journal; True if so."""
    deadline = time.monotonic() + timeout
    with _IDLE:
        while _EXECUTING[0]:
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                return False
            _IDLE.wait(remaining)
    return True


def _interrupted_message(sig: int | None = None) -> str:
    sig = stop_signal() if sig is None else sig
    by = f" by {signal_name(sig)}" if sig else ""  # 0: stopped by the dispatcher, no signal
    return (
        f"{INTERRUPTED}{by}: the solver's process group was terminated; the run starts again "
        "when the study resumes"
    )


def _rotate_logs(run_dir: Path, number: int) -> None:
    """Keep the logs of the previous attempt as ``winnow-stdout.attempt<k>.txt``."""
    for name in (STDOUT_NAME, STDERR_NAME):
        src = run_dir / name
        if src.exists():
            stem, suffix = name.rsplit(".", 1)
            os.replace(src, run_dir / f"{stem}.attempt{number - 1}.{suffix}")


def _manifest_digest(run_dir: Path) -> str:
    try:
        return _sha256_file(run_dir / MANIFEST_NAME)
    except OSError:
        return ""


def check_success(
    run_dir: Path, options: RunOptions, manifest_before: str
) -> tuple[dict[str, str], str]:
    """After an attempt that exited 0: output hashes and the reason not to trust it ("" if
    none). Declared outputs must be there, and the folder winnow rendered must not have been
    rewritten (its manifest digest, taken before the first attempt, unchanged). Every runner
    judges a success through this one function."""
    hashes, problem = check_outputs(run_dir, options.outputs, options.check_output)
    if not problem and manifest_before and _manifest_digest(run_dir) != manifest_before:
        problem = "run folder was rewritten during the run (its manifest changed)"
    return hashes, problem


def _one_attempt(spec: RunSpec, number: int, options: RunOptions) -> tuple[Attempt, str]:
    """Run one attempt. Returns the record and the attempt's state."""
    run_dir = Path(spec.run_dir)
    started = time.time()
    if not run_dir.is_dir():
        msg = f"run folder {run_dir} does not exist"
        return Attempt(number, spec.argv, started, time.time(), None, False, "", "", msg), "failed"
    if options.cwd is None:
        cwd = run_dir
    else:
        cwd = Path(options.cwd)
        cwd = cwd if cwd.is_absolute() else run_dir / cwd
    env = None
    if options.env:
        env = dict(os.environ)
        env.update(options.env)
    out_path, err_path = run_dir / STDOUT_NAME, run_dir / STDERR_NAME
    if _STOP.is_set():  # internal state "not_started": the caller records no attempt
        msg = f"{INTERRUPTED}: not started"
        return Attempt(number, spec.argv, started, started, None, False, "", "", msg), (
            "not_started"
        )
    try:
        if number > 1:
            _rotate_logs(run_dir, number)
        with open(out_path, "wb") as out, open(err_path, "wb") as err:
            proc = subprocess.Popen(  # noqa: S603 - argv list, never a shell
                list(spec.argv),
                stdin=subprocess.DEVNULL,
                stdout=out,
                stderr=err,
                cwd=cwd,
                env=env,
                start_new_session=True,
                close_fds=True,
            )
    except OSError as exc:
        msg = f"could not start {spec.argv[0]!r}: {exc}"
        return Attempt(number, spec.argv, started, time.time(), None, False, "", "", msg), "failed"
    timed_out = False
    ident = threading.get_ident()
    with _LIVE_LOCK:
        _LIVE[ident] = proc
    if _STOP.is_set():
        # a stop requested between the start and the line above did not see this solver
        _signal_group(proc.pid, signal.SIGTERM)
        threading.Thread(target=_kill_after, args=([proc], INTERRUPT_GRACE), daemon=True).start()
    try:
        status: int | None = proc.wait(timeout=options.timeout)
    except subprocess.TimeoutExpired:
        timed_out = True
        _kill_group(proc, options.kill_grace)
        status = None
    except BaseException:
        # Interrupted dispatcher: never leave the solver group running behind us.
        _kill_group(proc, 0.0)
        raise
    finally:
        with _LIVE_LOCK:
            _LIVE.pop(ident, None)
            stopped_by = _STOPPED.pop(proc.pid, None)
    _reap_strays(proc.pid)
    ended = time.time()
    # A solver that still ended well keeps its success; any other end after a stop request
    # is the stop's doing (the group was sent SIGTERM), not the solver's failure.
    interrupted = (_STOP.is_set() or stopped_by is not None) and status != 0
    if interrupted:
        error = _interrupted_message(stopped_by)
    elif timed_out:
        error = f"killed after {options.timeout:g} s timeout"
    else:
        error = ""
    attempt = Attempt(
        number=number,
        argv=spec.argv,
        started=started,
        ended=ended,
        exit_status=status,
        timed_out=timed_out and not interrupted,
        stdout_tail=read_tail(out_path, options.tail_bytes),
        stderr_tail=read_tail(err_path, options.tail_bytes),
        error=error,
    )
    if interrupted:
        return attempt, "not_run"
    if timed_out:
        return attempt, "timed_out"
    if status != 0:
        return attempt, "failed"
    return attempt, "succeeded"


def run_one(
    spec: RunSpec,
    *,
    timeout: float | None = None,
    retries: int = 0,
    retry_delay: float = 0.0,
    env: Mapping[str, str] | None = None,
    cwd: Path | str | None = None,
    outputs: Sequence[str] = (),
    tail_bytes: int = DEFAULT_TAIL_BYTES,
    check_output: OutputCheck | None = None,
    kill_grace: float = 5.0,
    journal: bool = True,
) -> RunOutcome:
    """Run the solver of one :class:`RunSpec` with limits and return its outcome.

    Parameters
    ----------
    spec : RunSpec
        A rendered run (see :func:`render_run`).
    timeout : float, optional
        Seconds per attempt; on expiry the whole process group is killed (SIGTERM, then
        SIGKILL after ``kill_grace`` seconds).
    retries : int
        Extra attempts when an attempt fails, times out or leaves its outputs missing.
        A command that cannot start at all is not retried.
    retry_delay : float
        Seconds to wait between attempts.
    env : dict, optional
        Variables added to the environment.
    cwd : path, optional
        Working folder (relative to the run folder); default the run folder.
    outputs : sequence of str
        Expected output files relative to the run folder.
    tail_bytes : int
        Bytes of stdout/stderr kept per attempt (the full streams are in
        ``winnow-stdout.txt``/``winnow-stderr.txt`` in the run folder).
    check_output : callable, optional
        ``check_output(run_dir) -> str | None``; a reason marks the run ``output_missing``.
    kill_grace : float
        Seconds between SIGTERM and SIGKILL on timeout.
    journal : bool
        Write ``winnow-outcome.json`` into the run folder.

    Returns
    -------
    RunOutcome
        ``state`` is ``succeeded``, ``failed`` (exit status not 0 or could not start),
        ``timed_out`` or ``output_missing``.
    """
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
    return _run_with_options(spec, options, journal=journal)


def _run_with_options(spec: RunSpec, options: RunOptions, *, journal: bool = True) -> RunOutcome:
    if not isinstance(spec, RunSpec):
        raise TypeError(f"spec must be a RunSpec, got {type(spec).__name__}")
    if not spec.argv:
        raise ValueError(f"RunSpec {spec.run_id!r} has an empty argv")
    with _IDLE:
        _EXECUTING[0] += 1
    try:
        return _attempts(spec, options, journal=journal)
    finally:
        with _IDLE:
            _EXECUTING[0] -= 1
            _IDLE.notify_all()


def _attempts(spec: RunSpec, options: RunOptions, *, journal: bool) -> RunOutcome:
    run_dir = Path(spec.run_dir)
    attempts: list[Attempt] = []
    hashes: dict[str, str] = {}
    state, message = "failed", ""
    manifest_before = _manifest_digest(run_dir)
    for number in range(1, options.retries + 2):
        if number > 1 and options.retry_delay > 0:
            _STOP.wait(options.retry_delay)
        if _STOP.is_set():
            # no new attempt after a stop request; a run that never started is not journalled
            # (it did not end), so an earlier journal of its folder stays as it was
            if not attempts:
                return failed_outcome(spec, f"{INTERRUPTED}: not started", state="not_run")
            state, message = "not_run", _interrupted_message()
            break
        attempt, state = _one_attempt(spec, number, options)
        if state == "not_started":  # the stop came just before the process would start
            if not attempts:
                return failed_outcome(spec, attempt.error, state="not_run")
            state, message = "not_run", _interrupted_message()
            break
        attempts.append(attempt)
        hashes = {}
        if state == "not_run":
            message = attempt.error
            break
        if state == "succeeded":
            hashes, problem = check_success(run_dir, options, manifest_before)
            if problem:
                state, message = "output_missing", problem
            else:
                message = ""
        elif attempt.error:
            message = attempt.error
        else:
            message = f"exit status {attempt.exit_status}"
        if state == "succeeded":
            break
        if attempt.exit_status is None and not attempt.timed_out:
            break  # could not start: another attempt would fail the same way
    outcome = RunOutcome(
        run_id=spec.run_id,
        key=spec.key,
        state=state,  # type: ignore[arg-type]
        attempts=tuple(attempts),
        run_dir=run_dir,
        output_hashes=hashes,
        message=message,
    )
    if journal:
        outcome = _journal(outcome)
    return outcome


def _journal(outcome: RunOutcome) -> RunOutcome:
    """Write the journal; a folder that vanished is recorded in the message, not raised."""
    try:
        write_outcome(outcome)
    except OSError as exc:
        note = f"outcome could not be journalled in {outcome.run_dir}: {exc}"
        state = outcome.state
        if state == "succeeded":
            state = "output_missing"
        return RunOutcome(
            run_id=outcome.run_id,
            key=outcome.key,
            state=state,
            attempts=outcome.attempts,
            run_dir=outcome.run_dir,
            output_hashes=outcome.output_hashes,
            message="; ".join(m for m in (outcome.message, note) if m),
            reused_from=outcome.reused_from,
        )
    return outcome


def failed_outcome(spec: RunSpec, message: str, state: str = "failed") -> RunOutcome:
    """Outcome of a run the machinery could not carry out (runner error, lost job)."""
    return RunOutcome(
        run_id=spec.run_id,
        key=spec.key,
        state=state,  # type: ignore[arg-type]
        attempts=(),
        run_dir=Path(spec.run_dir),
        message=message,
    )


def execute_run(spec: RunSpec, options: RunOptions) -> RunOutcome:
    """Run one spec with ``options``; never raises for a run's own failure.

    This is the one per-run function every runner ships (threads, Dask workers, Prefect
    tasks). Errors of the machinery itself become a ``failed`` outcome with the reason.
    """
    if not isinstance(spec, RunSpec):
        raise TypeError(f"spec must be a RunSpec, got {type(spec).__name__}")
    try:
        return _run_with_options(spec, options)
    except (DeckError, OSError, ValueError, TypeError) as exc:
        return _journal(failed_outcome(spec, f"dispatcher error: {type(exc).__name__}: {exc}"))
