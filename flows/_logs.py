"""Prefect's log output as the ``winnow`` command line shows it (issue 17 item 6).

Two things made an expected stop (a convergence gate, no run succeeded, a refused rerun)
hard to read: every failed solver task logged ``NoneType: None`` (Prefect's task engine logs
a failed *state* with ``exc_info=True`` while no exception is being handled), and the flow's
exception came with 50-120 lines of traceback before winnow's one-line message.

* :func:`drop_empty_tracebacks` (installed when ``winnow.flows`` is imported) clears an ``exc_info`` that holds no
  exception on the flow-run and task-run loggers, wherever the records go (terminal,
  Prefect server).
* :func:`command_log` is used by ``winnow run`` and ``winnow rerun``: while it is active,
  the terminal shows Prefect's log lines without tracebacks, and every record, tracebacks
  included, goes to a log file beside the run store, whose path the command prints.
"""

from __future__ import annotations

import contextlib
import logging
import time
from collections.abc import Iterator
from pathlib import Path

__all__ = ["CommandLog", "command_log", "drop_empty_tracebacks", "log_path"]

_RUN_LOGGERS = ("prefect.flow_runs", "prefect.task_runs")


class _EmptyExcInfo(logging.Filter):
    """Clear ``exc_info == (None, None, None)``, which formats as ``NoneType: None``."""

    def filter(self, record: logging.LogRecord) -> bool:
        if record.exc_info and record.exc_info[0] is None:
            record.exc_info = None
        return True


_EMPTY = _EmptyExcInfo()


def drop_empty_tracebacks() -> None:
    """Install the ``NoneType: None`` filter on Prefect's run loggers (idempotent).

    Logger filters survive Prefect's logging set-up (``logging.config.dictConfig`` adds
    filters and replaces handlers, but never removes a logger's filters).
    """
    for name in _RUN_LOGGERS:
        lg = logging.getLogger(name)
        if _EMPTY not in lg.filters:
            lg.addFilter(_EMPTY)


class _NoTraceback(logging.Formatter):
    """Format with another formatter, leaving out the traceback and stack of a record.

    The record's cached traceback text is put back afterwards, so handlers formatting the
    same record later (the log file) still show it.
    """

    def __init__(self, inner: logging.Formatter | None) -> None:
        super().__init__()
        self.inner = inner or logging.Formatter()

    def format(self, record: logging.LogRecord) -> str:
        saved = record.exc_info, record.exc_text, record.stack_info
        record.exc_info = record.exc_text = record.stack_info = None
        try:
            return self.inner.format(record)
        finally:
            record.exc_info, record.exc_text, record.stack_info = saved


class _LazyFileHandler(logging.FileHandler):
    """A file handler that creates its folder and file only when the first record comes
    (a command refused before any log line writes nothing)."""

    def __init__(self, path: Path) -> None:
        super().__init__(path, encoding="utf-8", delay=True)

    def emit(self, record: logging.LogRecord) -> None:
        if self.stream is None:
            Path(self.baseFilename).parent.mkdir(parents=True, exist_ok=True)
        super().emit(record)


def log_path(store_path: str | Path, command: str) -> Path:
    """``<store folder>/<store stem>-logs/<command>-<YYYYmmdd-HHMMSS>.log``."""
    store_path = Path(store_path).resolve()
    stamp = time.strftime("%Y%m%d-%H%M%S")
    return store_path.with_name(f"{store_path.stem}-logs") / f"{command}-{stamp}.log"


class CommandLog:
    """What :func:`command_log` yields: the log file's path and whether anything went there."""

    def __init__(self, path: Path, handler: _LazyFileHandler) -> None:
        self.path = path
        self._handler = handler

    @property
    def written(self) -> bool:
        return self.path.is_file()

    def where(self) -> str:
        """A sentence naming the log file, or "" when nothing was logged."""
        return f"the full log, with tracebacks, is in {self.path}" if self.written else ""


def _is_terminal(h: logging.Handler) -> bool:
    """Prefect's console handler, or another handler writing to the process's stdout/stderr."""
    import sys

    if type(h).__name__ == "PrefectConsoleHandler":
        return True
    if isinstance(h, logging.FileHandler) or not isinstance(h, logging.StreamHandler):
        return False
    return h.stream in (sys.stderr, sys.stdout, sys.__stderr__, sys.__stdout__)


@contextlib.contextmanager
def command_log(store_path: str | Path, command: str) -> Iterator[CommandLog]:
    """Tracebacks off the terminal and every record into a log file beside the store.

    The file gets the records of the same loggers the terminal shows (the root logger's
    handlers: Prefect's flow-run, task-run and client loggers propagate there) at INFO and
    above, formatted as on the terminal, tracebacks included.
    """
    drop_empty_tracebacks()
    root = logging.getLogger()
    consoles = [h for h in root.handlers if _is_terminal(h)]
    path = log_path(store_path, command)
    handler = _LazyFileHandler(path)
    handler.setLevel(logging.INFO)
    inner = consoles[0].formatter if consoles else None
    handler.setFormatter(inner or logging.Formatter("%(asctime)s | %(levelname)-7s | %(message)s"))
    saved = [(h, h.formatter) for h in consoles]
    for h in consoles:
        h.setFormatter(_NoTraceback(h.formatter))
    root.addHandler(handler)
    try:
        yield CommandLog(path, handler)
    finally:
        root.removeHandler(handler)
        handler.close()
        for h, f in saved:
            h.setFormatter(f)
