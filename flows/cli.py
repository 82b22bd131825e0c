"""The ``winnow`` command line.

Each area registers its commands from its own module (``register(app)``), so that the
command line stays one thin layer over the stage code. Nothing here imports Prefect at
module import time: commands that need the engine import it when they run, which keeps
``winnow thin`` and friends fast to start.
"""

from __future__ import annotations

import importlib

import typer

__all__ = ["app", "main"]

app = typer.Typer(
    name="winnow",
    help="Thin a calibrated cheap model's posterior to a few weighted points, run a costly "
    "solver on them and collect estimates with honest error bars.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)

# Modules that add commands; each defines ``register(app: typer.Typer) -> None``.
_COMMAND_MODULES = (
    "winnow.flows._cmd_study",
    "winnow.flows._cmd_thin",
    "winnow.flows._cmd_diagnose",
    "winnow.flows._cmd_store",
    "winnow.flows._cmd_report",
)


def _register_all() -> None:
    for name in _COMMAND_MODULES:
        importlib.import_module(name).register(app)


_register_all()


def main() -> None:
    """Entry point of the ``winnow`` console script."""
    app()


if __name__ == "__main__":  # pragma: no cover
    main()
