"""Running one solver process: process group, timeout, bounded output tails, retries, journal.

The solver is started without a shell, in a new session (``start_new_session=True``) so that
it leads its own process group: on timeout the whole group (the solver and anything it spawned)
is sent SIGTERM, then SIGKILL after a grace period. Standard output and error are streamed to
files in the run folder and only their last bytes are read back, so a solver that prints
megabytes never fills the dispatcher's memory.

Every finished run writes ``winnow-outcome.json`` into its run folder atomically (temporary
file + ``os.replace``): this journal lets a killed dispatch resume without repeating a
finished run.
"""

from __future__ import annotations

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

from winnow.tasks._decks import (
    MANIFEST_NAME,
    OUTCOME_NAME,
    STDERR_NAME,
    STDOUT_NAME,
    DeckError,
    _validate_relative,
    write_json_atomic,
)
from winnow.tasks.records import RUN_STATES, Attempt, RunOutcome, RunSpec

__all__ = [
    "DEFAULT_TAIL_BYTES",
    "RunOptions",
    "check_outputs",
    "execute_run",
    "outcome_from_dict",
    "outcome_to_dict",
    "read_outcome",
    "read_tail",
    "run_one",
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


# Solver processes running now, by the thread waiting on them (see kill_running).
_LIVE: dict[int, subprocess.Popen] = {}
_LIVE_LOCK = threading.Lock()


def kill_running(thread_idents: Iterable[int]) -> int:
    """Kill the process groups of solvers waited on by the given threads; return how many.

    Used by a runner whose dispatch is interrupted (Ctrl-C, cancelled flow), so no solver
    keeps running behind it. The interrupted runs journal a failure and are run again later.
    """
    with _LIVE_LOCK:
        procs = [_LIVE[i] for i in thread_idents if i in _LIVE]
    for proc in procs:
        try:
            os.killpg(proc.pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass
    return len(procs)


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
    _reap_strays(proc.pid)
    ended = time.time()
    attempt = Attempt(
        number=number,
        argv=spec.argv,
        started=started,
        ended=ended,
        exit_status=status,
        timed_out=timed_out,
        stdout_tail=read_tail(out_path, options.tail_bytes),
        stderr_tail=read_tail(err_path, options.tail_bytes),
        error="" if not timed_out else f"killed after {options.timeout:g} s timeout",
    )
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
    run_dir = Path(spec.run_dir)
    attempts: list[Attempt] = []
    hashes: dict[str, str] = {}
    state, message = "failed", ""
    manifest_before = _manifest_digest(run_dir)
    for number in range(1, options.retries + 2):
        if number > 1 and options.retry_delay > 0:
            time.sleep(options.retry_delay)
        attempt, state = _one_attempt(spec, number, options)
        attempts.append(attempt)
        hashes = {}
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
