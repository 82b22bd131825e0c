"""winnow: thin a calibrated cheap model's posterior to a few weighted points for a costly solver.

The package maps its folders into one namespace:

* :mod:`winnow.tasks` -- stage code (sample, thin, dispatch, collect, store), Prefect-free,
  with thin Prefect task wrappers loaded on demand;
* :mod:`winnow.flows` -- flows composing the stages, Prefect blocks and the ``winnow`` command;
* :mod:`winnow.examples` -- the aquifer pumping-test demo (cheap model, solver, templates).
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("winnow")
except PackageNotFoundError:  # pragma: no cover - running from a source tree without install
    __version__ = "0.0.0+unknown"

__all__ = ["__version__"]
