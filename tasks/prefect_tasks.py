"""Prefect tasks wrapping winnow's stage functions, for use in users' own flows.

Each task is a thin wrapper: the work is done by a plain function of :mod:`winnow.tasks`
that can be called (and is tested) without Prefect. Retries are off for the numerical stages,
whose failures are deterministic; the per-run solver task (in :mod:`winnow.flows.dispatch`)
carries the retries configured for the solver.

Examples
--------
>>> from prefect import flow
>>> from winnow.tasks import thin_task
>>> @flow
... def my_flow(samples):
...     return thin_task(samples, 20, method="greedy", rng=1)
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
from prefect import task

from winnow.tasks.collect import collect_stage
from winnow.tasks.dispatch import prepare_runs, render_selection
from winnow.tasks.sample import sample_stage
from winnow.tasks.thin import thin_stage

from .config import StudyConfig
from .records import Chain, RunSpec, Selection

__all__ = [
    "collect_task",
    "prepare_runs_task",
    "render_runs_task",
    "sample_task",
    "thin_task",
    "thin_stage_task",
]


@task(name="thin", task_run_name="thin-{budget}-points", retries=0)
def thin_task(samples: npt.ArrayLike | Chain, budget: int, **options: Any) -> Selection:
    """Choose ``budget`` weighted points of ``samples`` by MMD (see :func:`winnow.tasks.thin.thin`)."""
    from winnow.tasks.thin import thin

    data = samples.samples if isinstance(samples, Chain) else np.asarray(samples)
    return thin(data, budget, **options)


# Task run names show the study and revision: "sample-aquifer-demo-r0002".
@task(name="sample", task_run_name="sample-{config.study.name}-{revision}")
def sample_task(config: StudyConfig, base_dir: Path, *, revision: str = "", **kwargs: Any) -> Chain:
    """Calibrate the study's cheap model or import its chain (see :func:`sample_stage`)."""
    return sample_stage(config, Path(base_dir), **kwargs)


@task(name="thin-stage", task_run_name="thin-{config.study.name}-{revision}")
def thin_stage_task(
    config: StudyConfig, chain: Chain, *, revision: str = "", **kwargs: Any
) -> Selection:
    """Thin a study's chain with the study's settings (see :func:`thin_stage`)."""
    return thin_stage(config, chain, **kwargs)


@task(name="render-decks", task_run_name="render-decks-{config.study.name}-{revision}")
def prepare_runs_task(
    config: StudyConfig,
    base_dir: Path,
    chain: Chain,
    selection: Selection,
    *,
    revision: str = "",
    **kwargs: Any,
) -> list[RunSpec]:
    """Render one run folder per chosen point (see :func:`prepare_runs`)."""
    return prepare_runs(config, Path(base_dir), chain, selection, **kwargs)


@task(name="collect", task_run_name="collect-{config.study.name}-{revision}")
def collect_task(
    config: StudyConfig,
    base_dir: Path,
    chain: Chain,
    selection: Selection,
    specs: list[RunSpec],
    outcomes: dict[str, Any],
    *,
    revision: str = "",
    **kwargs: Any,
) -> tuple[list[Any], list[Any]]:
    """Read the QoIs and make the weighted estimates (see :func:`collect_stage`)."""
    return collect_stage(config, Path(base_dir), chain, selection, specs, outcomes, **kwargs)


@task(name="render-runs", task_run_name="render-{run_root}")
def render_runs_task(
    selection: Selection,
    names: list[str],
    *,
    run_root: Path,
    decks: Any,
    command: list[str],
    template_root: Path,
) -> list[RunSpec]:
    """Render one run folder per chosen point of ``selection`` (no study config needed).

    Parameters
    ----------
    selection : Selection
        From :func:`thin_task` (or :func:`winnow.tasks.thin.thin`).
    names : list of str
        Parameter names, in the order of the selection's columns (the template variables).
    run_root, decks, command, template_root
        As for :func:`winnow.tasks.dispatch.render_run`; ``decks`` is a
        :class:`~winnow.tasks.dispatch.DeckSpec` and ``command`` may use ``{python}``.
    """
    return render_selection(
        selection,
        names,
        run_root=Path(run_root),
        decks=decks,
        command=command,
        template_root=Path(template_root),
    )
