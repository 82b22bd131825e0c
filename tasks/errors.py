"""The exception that marks bad user input.

Code that validates what a user gave (a config file, a chain file, a command-line argument)
raises :class:`InputError`; the command line reports it as one message and exit status 2. Any
other exception reaching the command line is a bug of winnow and is reported as an internal
error with a saved traceback (``winnow.flows._cli_common.guarded``).

:class:`InputError` subclasses ``ValueError``, so callers that catch ``ValueError`` keep
working. This module imports nothing, so every module can raise it.
"""

from __future__ import annotations

__all__ = ["InputError"]


class InputError(ValueError):
    """Bad input from the user; the message names the file, field or argument and what was
    expected."""
