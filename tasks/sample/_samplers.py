"""The registry of samplers: one name per :class:`~._move.Move` subclass.

``MOVES`` is the single list of samplers: :data:`SAMPLERS`, the ``sampler`` argument of
:func:`winnow.tasks.sample.sample` and the ``sampler`` field of the sample settings come from
it (the settings' ``Literal`` is checked against it by ``tests/test_sample_registry.py``, as
the config package imports no stage). To add a sampler, see :mod:`._move`.
"""

from __future__ import annotations

from typing import Literal

from ._ensemble import DifferentialEvolution, StretchMove
from ._metropolis import AdaptiveMetropolis
from ._move import Move

__all__ = ["MOVES", "SAMPLERS", "SamplerName"]

MOVES: dict[str, type[Move]] = {
    cls.name: cls for cls in (AdaptiveMetropolis, StretchMove, DifferentialEvolution)
}
SAMPLERS: tuple[str, ...] = tuple(MOVES)
#: The names of ``MOVES`` for type checkers (a test holds the two equal).
SamplerName = Literal["adaptive_metropolis", "ensemble", "de_mcmc"]
