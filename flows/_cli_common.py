"""Shared pieces of the ``winnow`` command line: error reporting, exit codes, interrupts.

Every command reports bad input the same way: one message on stderr naming the file, field or
argument and what was expected, and exit status 2 (nothing written). Commands raise
:class:`UsageError`, the validated core raises :class:`winnow.tasks.errors.InputError` (or
another dedicated type, see :func:`is_usage_error`), and :func:`guarded` turns them into that
exit. Any other exception is a bug: it is reported as an internal error, exit status 1, with
its traceback saved to a file whose path is printed.

Commands that run a study stop on Ctrl-C or SIGTERM through :func:`interruptible`: the first
signal starts no new solver run, terminates the running solvers' process groups (their runs
are journalled as interrupted), commits nothing half-done, prints what happened and how to
resume, and exits with 128 + the signal number (130, 143) within a few seconds; a second
signal exits at once.
"""

from __future__ import annotations

import contextlib
import functools
import os
import signal
import sys
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from typing import Any, NoReturn, ParamSpec, TypeVar

__all__ = [
    "EXIT_INTERNAL",
    "EXIT_USAGE",
    "HARD_EXIT_AFTER",
    "UsageError",
    "fail",
    "guarded",
    "internal_error",
    "interruptible",
    "is_usage_error",
    "note_progress",
    "reassert_interrupt_handlers",
]

EXIT_USAGE = 2
EXIT_INTERNAL = 1

P = ParamSpec("P")
R = TypeVar("R")


class UsageError(Exception):
    """Bad input from the user: reported as one message and exit status 2."""


def fail(message: str) -> NoReturn:
    """Print ``message`` to stderr as an error and exit with status 2."""
    print(f"winnow: error: {message}", file=sys.stderr)
    raise SystemExit(EXIT_USAGE)


def _raised_by_validator(exc: BaseException) -> bool:
    """Whether ``exc`` was raised (its last traceback frame) by one of winnow's validators."""
    tb = exc.__traceback__
    if tb is None:
        return False
    while tb.tb_next is not None:
        tb = tb.tb_next
    module = str(tb.tb_frame.f_globals.get("__name__", ""))
    name = tb.tb_frame.f_code.co_name
    if not module.startswith("winnow."):
        return False
    return name.startswith("_validate")


def is_usage_error(exc: BaseException) -> bool:
    """Whether ``exc`` reports bad user input (exit 2) rather than a bug (exit 1).

    Bad input is what the code that validates input raises on purpose: :class:`UsageError`,
    :class:`~winnow.tasks.errors.InputError` (config and chain files among others), pydantic's
    ``ValidationError``, the dedicated errors of decks, run stores and the writer lock, a file
    the user named that is missing or is a folder, an existing file a command refuses to
    overwrite, and a ``ValueError``/``TypeError`` raised inside one of winnow's ``_validate_*``
    helpers (DEVELOPERS.md, "Validation at the boundary"). Any other ``ValueError`` or
    ``TypeError`` is a bug.
    """
    from winnow.tasks.errors import InputError

    if isinstance(exc, UsageError | InputError | FileNotFoundError | IsADirectoryError):
        return True
    if isinstance(exc, FileExistsError | NotADirectoryError):
        return True
    # by name, so that a command that never loaded these modules does not import them here
    ours = {"DeckError", "StoreBusyError", "StoreFormatError", "SchemaVersionError"}
    for k in type(exc).__mro__:
        if k.__module__.startswith("pydantic") and k.__name__ == "ValidationError":
            return True
        if k.__module__.startswith("winnow.") and k.__name__ in ours:
            return True
    return isinstance(exc, ValueError | TypeError) and _raised_by_validator(exc)


def internal_error(exc: BaseException) -> NoReturn:
    """Report a bug: the exception's one-line summary, its traceback saved to a file, exit 1."""
    import tempfile
    import traceback

    summary = traceback.format_exception_only(type(exc), exc)[-1].strip()
    text = "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
    where = ""
    try:
        fd, name = tempfile.mkstemp(prefix="winnow-internal-error-", suffix=".txt")
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(f"winnow {' '.join(sys.argv[1:])}\n\n{text}")
        where = f"; the traceback is in {name}"
    except OSError as err:  # no temp dir: show the traceback instead of losing it
        print(text, file=sys.stderr, end="")
        where = f" (could not save the traceback: {err})"
    print(
        f"winnow: internal error: {summary}{where}\n"
        "This is a bug in winnow, not a problem with your input; please report it with the "
        "traceback.",
        file=sys.stderr,
    )
    raise SystemExit(EXIT_INTERNAL)


def guarded(func: Callable[P, R]) -> Callable[P, R]:
    """Decorate a command: bad input ends in :func:`fail` (exit 2), a bug in
    :func:`internal_error` (exit 1)."""

    @functools.wraps(func)
    def wrapper(*args: P.args, **kwargs: P.kwargs) -> R:
        try:
            return func(*args, **kwargs)
        except Exception as exc:
            import click
            import typer

            if isinstance(exc, typer.Exit | typer.Abort | click.exceptions.Exit | click.Abort):
                raise  # the command line's own way out (typer.Exit(1) of `winnow check`)
            if isinstance(exc, click.ClickException):
                raise
            if is_usage_error(exc):
                fail(str(exc))
            internal_error(exc)

    return wrapper


# --------------------------------------------------------------------------------------------
# Ctrl-C and SIGTERM
# --------------------------------------------------------------------------------------------
#: Seconds after the first signal by which an interrupted command has exited, even when the
#: Prefect engine is still waiting for its API (the temporary server gets Ctrl-C too, as it
#: runs in the same process group, and the client would retry for about a minute).
HARD_EXIT_AFTER = 6.0

_SIGNALS = (signal.SIGINT, signal.SIGTERM)
_LOCK = threading.RLock()
_STATE: dict[str, Any] = {}


def _fresh_state(resume: str) -> dict[str, Any]:
    return {
        "active": True,
        "resume": resume,
        "stage": "",
        "store": "",
        "specs": None,
        "started": time.time(),
        "reported": False,
    }


def note_progress(
    *, stage: str | None = None, store: Any = None, specs: Sequence[Any] | None | bool = False
) -> None:
    """Tell the interrupt report where the study is (a no-op outside :func:`interruptible`).

    ``stage`` is a phrase ("sampling", "dispatch"); ``specs`` the run specs being dispatched
    (``None`` when that dispatch is over); ``store`` the run store's path.
    """
    with _LOCK:
        if not _STATE.get("active"):
            return
        if stage is not None:
            _STATE["stage"] = stage
        if store is not None:
            _STATE["store"] = str(store)
        if specs is not False:
            _STATE["specs"] = None if specs is None else list(specs)


def _on_signal(signum: int, frame: Any) -> None:
    from winnow.tasks.dispatch import (
        Interrupted,
        kill_all_now,
        kill_descendant_solvers,
        request_stop,
        stop_requested,
        terminate_descendant_solvers,
    )

    if stop_requested():  # the second signal: no more waiting
        kill_all_now()
        kill_descendant_solvers()
        _report(signum, second=True)
        _hard_exit(128 + signum)
    request_stop(signum)
    terminate_descendant_solvers()  # also those of local Dask workers
    threading.Thread(
        target=_watchdog, args=(signum,), name="winnow-exit-watchdog", daemon=True
    ).start()
    raise Interrupted(signum)


def _watchdog(signum: int) -> None:
    """Exit the process HARD_EXIT_AFTER seconds after the first signal, whatever still waits."""
    from winnow.tasks.dispatch import (
        kill_all_now,
        kill_descendant_solvers,
        wait_idle,
    )

    time.sleep(HARD_EXIT_AFTER)
    kill_all_now()
    kill_descendant_solvers()
    wait_idle(1.0)
    _report(signum)
    _hard_exit(128 + signum)


def _hard_exit(code: int) -> NoReturn:
    """Flush, stop the temporary Prefect server if this process started one, and exit now."""
    server = sys.modules.get("prefect.server.api.server")
    try:
        if server is not None:
            for inst in list(server.SubprocessASGIServer._instances.values()):
                proc = getattr(inst, "server_process", None)
                if proc is not None and proc.poll() is None:
                    proc.terminate()
    except Exception:  # noqa: BLE001 - best effort: the server also got the signal
        pass
    for stream in (sys.stdout, sys.stderr):
        with contextlib.suppress(Exception):
            stream.flush()
    os._exit(code)


def _run_counts(specs: Sequence[Any], since: float) -> dict[str, int]:
    """How the dispatched runs stand, from their journals (the only record written so far)."""
    from winnow.tasks.dispatch import (
        INTERRUPTED,
        OUTCOME_NAME,
        read_outcome,
    )

    counts = {"stopped": 0, "kept": 0, "unsuccessful": 0, "not started": 0}
    for spec in specs:
        o = read_outcome(spec.run_dir)
        try:  # journalled by this command (not left by an earlier one)
            written = os.stat(os.path.join(spec.run_dir, OUTCOME_NAME)).st_mtime >= since
        except OSError:
            written = False
        fresh = o is not None and o.key == spec.key and written
        if o is not None and o.key == spec.key and o.state == "succeeded":
            counts["kept"] += 1
        elif fresh and o.state == "not_run" and o.message.startswith(INTERRUPTED):
            counts["stopped"] += 1
        elif fresh and o.state != "not_run":
            counts["unsuccessful"] += 1
        else:
            counts["not started"] += 1
    return counts


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" + ("" if n == 1 else "s")


def _report(signum: int, *, second: bool = False) -> None:
    """Print once what the interrupt stopped and how to resume."""
    from winnow.tasks.dispatch import (
        signal_name,
    )

    with _LOCK:
        if _STATE.get("reported") or not _STATE:
            return
        _STATE["reported"] = True
        state = dict(_STATE)
    name = signal_name(signum)
    resume = f"run `{state['resume']}` again to resume" if state["resume"] else "run again"
    store = f" {state['store']}" if state["store"] else ""
    lines = []
    if second:
        lines.append(f"second {name}: exiting at once; running solvers were killed")
    if state["specs"] is not None:
        c = _run_counts(state["specs"], state["started"])
        parts = [_plural(c["stopped"], "run") + " stopped", f"{c['kept']} finished and kept"]
        if c["unsuccessful"]:
            parts.append(f"{c['unsuccessful']} ended without success")
        parts.append(f"{c['not started']} not started")
        lines.append(
            f"interrupted by {name} during dispatch: {', '.join(parts)}; the outcomes are "
            f"journalled in the run folders and nothing of this dispatch was committed to the "
            f"run store{store}; {resume} (finished runs are not repeated)"
        )
    else:
        during = f" during {state['stage']}" if state["stage"] else ""
        kept = (
            f"; the stages committed before it are kept in the run store{store}"
            if state["stage"]
            else ""
        )
        lines.append(f"interrupted by {name}{during}{kept}; {resume}")
    for line in lines:
        print(f"winnow: {line}", file=sys.stderr)


def _signal_of(exc: BaseException) -> int | None:
    """The signal behind an exception that ends an interrupted command, or None."""
    from winnow.tasks.dispatch import (
        Interrupted,
        stop_signal,
    )

    sig = stop_signal()
    if sig is not None:
        return sig
    if isinstance(exc, Interrupted):
        return exc.signum
    if type(exc).__name__ == "TerminationSignal":  # Prefect's SIGTERM bridge
        return int(getattr(exc, "signal", signal.SIGTERM))
    if isinstance(exc, KeyboardInterrupt):
        return int(signal.SIGINT)
    return None


@contextlib.contextmanager
def interruptible(resume: str) -> Iterator[None]:
    """Run a study command under winnow's SIGINT/SIGTERM handlers (see the module docstring).

    ``resume`` is the command that resumes the study (printed in the report). The previous
    handlers are restored afterwards. Outside the main thread this does nothing.
    """
    from winnow.tasks.dispatch import (
        reset_stop,
    )

    if threading.current_thread() is not threading.main_thread():
        yield
        return
    with _LOCK:
        _STATE.clear()
        _STATE.update(_fresh_state(resume))
    reset_stop()
    previous = {sig: signal.signal(sig, _on_signal) for sig in _SIGNALS}

    def restore() -> None:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
        with _LOCK:
            _STATE.clear()
        reset_stop()

    try:
        yield
    except BaseException as exc:
        sig = _signal_of(exc)
        if sig is None:
            restore()
            raise
        # The process is ending: the handlers stay, so that a second signal exits at once.
        _finish_interrupted(sig)
    restore()


def _finish_interrupted(signum: int) -> NoReturn:
    """The orderly end of an interrupted command: solvers gone, report, exit 128 + signum."""
    from winnow.tasks.dispatch import (
        INTERRUPT_GRACE,
        request_stop,
        terminate_descendant_solvers,
        wait_idle,
    )

    request_stop(signum)  # also when the interrupt did not come through _on_signal
    terminate_descendant_solvers()
    wait_idle(INTERRUPT_GRACE + 1.0)  # each stopped run has its journal
    _report(signum)
    if not any(t.name == "winnow-exit-watchdog" for t in threading.enumerate()):
        threading.Thread(
            target=_watchdog, args=(signum,), name="winnow-exit-watchdog", daemon=True
        ).start()
    # An orderly exit lets Prefect flush its logs and events and stop its temporary server;
    # the watchdog cuts it short if the server is gone and the client keeps retrying.
    raise SystemExit(128 + signum)


def reassert_interrupt_handlers() -> None:
    """Put winnow's handlers back in force inside a flow run, if a command installed them.

    Prefect's engine swaps in its own SIGTERM handler for each flow run (it raises inside the
    flow and reports the run crashed, over the API, before anything else happens); the
    study's flows call this first so that SIGTERM stops them as Ctrl-C does. Prefect restores
    the command's handler when the flow run ends.
    """
    if not _STATE.get("active") or threading.current_thread() is not threading.main_thread():
        return
    for sig in _SIGNALS:
        if signal.getsignal(sig) is not _on_signal:
            signal.signal(sig, _on_signal)
