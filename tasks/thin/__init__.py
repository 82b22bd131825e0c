"""The thin stage: ``budget`` distinct weighted points of the chain chosen to minimise a
random-Fourier-feature estimate of the MMD to the whole chain.
"""

from __future__ import annotations

from ._engine import (
    FEATURE_MAPS,
    KERNELS,
    SELECTORS,
    Selector,
    disjoint,
    extend,
    median_heuristic,
    mmd_exact,
    optimal_weights,
    replace,
    reweight,
    thin,
)
from ._stage import (
    thin_stage,
)

__all__ = [
    "FEATURE_MAPS",
    "KERNELS",
    "SELECTORS",
    "Selector",
    "disjoint",
    "extend",
    "median_heuristic",
    "mmd_exact",
    "optimal_weights",
    "replace",
    "reweight",
    "thin",
    "thin_stage",
]
