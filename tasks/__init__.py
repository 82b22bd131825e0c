"""Stage code of winnow: sample, thin, dispatch, collect and the run store.

Every core module here is importable without Prefect. The Prefect task wrappers live in
:mod:`winnow.tasks.prefect_tasks`; they are imported lazily when one of their names is read
from this package, so ``import winnow.tasks.thinning`` stays fast.
"""
