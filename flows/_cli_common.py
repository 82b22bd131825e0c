"""Shared pieces of the ``winnow`` command line: error reporting and exit codes.

Every command reports bad input the same way: one message on stderr naming the file, field or
argument and what was expected, and exit status 2 (nothing written). Commands raise
:class:`UsageError` (or let ``ValueError``/``TypeError``/``FileNotFoundError`` from the
validated core escape) and :func:`guarded` turns them into that exit.
"""

from __future__ import annotations

import functools
import sys
from collections.abc import Callable
from typing import NoReturn, ParamSpec, TypeVar

__all__ = ["EXIT_USAGE", "UsageError", "fail", "guarded"]

EXIT_USAGE = 2

P = ParamSpec("P")
R = TypeVar("R")


class UsageError(Exception):
    """Bad input from the user: reported as one message and exit status 2."""


def fail(message: str) -> NoReturn:
    """Print ``message`` to stderr as an error and exit with status 2."""
    print(f"winnow: error: {message}", file=sys.stderr)
    raise SystemExit(EXIT_USAGE)


def guarded(func: Callable[P, R]) -> Callable[P, R]:
    """Decorate a command so that bad-input exceptions end in :func:`fail`."""

    @functools.wraps(func)
    def wrapper(*args: P.args, **kwargs: P.kwargs) -> R:
        try:
            return func(*args, **kwargs)
        except (UsageError, ValueError, TypeError, FileNotFoundError, IsADirectoryError) as exc:
            fail(str(exc))
        except (RuntimeError, FileExistsError) as exc:
            # a store held by another writer, or one that would be overwritten: refused
            from winnow.tasks.store import StoreBusyError

            if isinstance(exc, StoreBusyError | FileExistsError):
                fail(str(exc))
            raise

    return wrapper
