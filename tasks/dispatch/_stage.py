"""The dispatch stage driven by a study config: deck rendering (running is the dispatch flow's job)."""

from __future__ import annotations

import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from winnow.tasks.config import StudyConfig, resolve
from winnow.tasks.records import (
    Chain,
    RunSpec,
    Selection,
)


def solver_command(command: Sequence[str]) -> list[str]:
    """The configured argv with ``{python}`` replaced by the interpreter running winnow.

    Solvers written in Python then run in the same environment as winnow, whatever
    ``python`` on PATH happens to be.
    """

    return [sys.executable if a == "{python}" else a for a in command]


def render_selection(
    selection: Selection,
    names: Sequence[str],
    *,
    run_root: Path,
    decks: Any,
    command: Sequence[str],
    template_root: Path,
    positions: Sequence[int] | None = None,
) -> list[RunSpec]:
    """Render one run folder per chosen point (or per listed position); return the specs.

    ``names`` are the parameter names of the selection's columns, ``decks`` a
    :class:`~winnow.tasks.dispatch.DeckSpec`; ``command`` may use ``{python}``.
    """
    from ._decks import render_run, setup_digest
    from ._runids import run_id_for

    argv = solver_command(command)
    # one digest for the whole selection: each run id ends in it (issue 18 item 5)
    setup = setup_digest(decks, argv, template_root)
    Path(run_root).mkdir(parents=True, exist_ok=True)
    specs = []
    for k in range(selection.m) if positions is None else positions:
        params = {n: float(v) for n, v in zip(names, selection.points[k], strict=True)}
        idx = int(selection.indices[k])
        specs.append(
            render_run(
                params,
                run_id=run_id_for(idx, params, setup),
                point_index=idx,
                weight=float(selection.weights[k]),
                run_root=run_root,
                decks=decks,
                command=argv,
                template_root=template_root,
            )
        )
    return specs


def prepare_runs(
    config: StudyConfig,
    base_dir: Path,
    chain: Chain,
    selection: Selection,
    *,
    positions: Sequence[int] | None = None,
) -> list[RunSpec]:
    """Render the run folders of a study's chosen points (or of the listed positions)."""
    decks, template_root = deck_spec(config, base_dir)
    return render_selection(
        selection,
        chain.names,
        run_root=resolve(base_dir / "x", config.run_root),
        decks=decks,
        command=config.dispatch.command,
        template_root=template_root,
        positions=positions,
    )


def deck_spec(config: StudyConfig, base_dir: Path):
    """The dispatch stage's deck specification and template folder for a study."""
    from ._dispatch import DeckSpec

    d = config.dispatch
    decks = DeckSpec(
        templates=list(d.templates),
        copies=list(d.copy_files),
        links=list(d.link_files),
        constants=dict(d.constants),
        formats=dict(d.formats),
    )
    return decks, resolve(base_dir / "x", d.template_dir)


# --------------------------------------------------------------------------------------------
