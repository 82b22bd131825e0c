"""Stage code of winnow: sample, thin, dispatch, collect and the run store.

Every core module here is importable without Prefect:

* :mod:`winnow.tasks.config` -- the study config models and loader;
* :mod:`winnow.tasks.records` -- the plain data objects the stages pass on;
* :mod:`winnow.tasks.sample` -- the sample stage (sampler, diagnostics, chain files);
* :mod:`winnow.tasks.thin` -- the thin stage;
* :mod:`winnow.tasks.dispatch` -- the dispatch stage;
* :mod:`winnow.tasks.collect` -- the collect stage and report;
* :mod:`winnow.tasks.store` -- the HDF5 run store;
* :mod:`winnow.tasks.preflight` -- the checks of a study config run before anything is written.

Each stage package's ``_stage.py`` drives that stage from a validated study config.

The Prefect task wrappers live in :mod:`winnow.tasks.prefect_tasks`; reading one of their
names from this package imports that module (and Prefect) on first use, so
``import winnow.tasks.thin`` stays fast.
"""

from __future__ import annotations

import importlib
from typing import Any

_PREFECT_TASKS = (
    "collect_task",
    "prepare_runs_task",
    "render_runs_task",
    "sample_task",
    "thin_stage_task",
    "thin_task",
)

__all__ = list(_PREFECT_TASKS)


def __getattr__(name: str) -> Any:
    if name in _PREFECT_TASKS:
        return getattr(importlib.import_module(".prefect_tasks", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
