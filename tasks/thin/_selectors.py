"""The selector registry: every selector the thin stage knows, by name.

``greedy`` (:mod:`._greedy`), ``swap`` (:mod:`._swap`), ``genetic`` (:mod:`._genetic`),
``random`` and ``stride`` (:mod:`._baselines`). To add a selector, subclass
:class:`~._selector.Selector` in a new module and register it in ``SELECTORS`` here; its name
joins ``MethodName`` in ``tasks/config/_thin.py`` (``tests/test_thin_registry.py`` holds the
settings' choices equal to this registry).
"""

from __future__ import annotations

from typing import Any

from winnow.tasks.errors import InputError

from ._baselines import RandomSelector, StrideSelector
from ._genetic import GeneticSelector
from ._greedy import GreedySelector
from ._selector import Selector
from ._swap import SwapSelector

__all__ = ["SELECTORS", "get_selector"]

SELECTORS: dict[str, type[Selector]] = {
    cls.name: cls
    for cls in (GreedySelector, SwapSelector, GeneticSelector, RandomSelector, StrideSelector)
}


def get_selector(method: str, **options: Any) -> Selector:
    """Return the selector called ``method`` configured with ``options``."""
    if not isinstance(method, str) or method not in SELECTORS:
        raise InputError(f"method must be one of {sorted(SELECTORS)}, got {method!r}")
    return SELECTORS[method](**options)
