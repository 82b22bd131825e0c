"""The thin stage: ``budget`` distinct weighted points of the chain chosen to minimise a
random-Fourier-feature estimate of the MMD to the whole chain.

Registries (one per kind of name): ``KERNELS`` (kernel name -> :class:`Kernel`),
``SELECTORS`` (method name -> :class:`Selector` subclass), ``FEATURE_MAPS`` (feature-map name
-> its frequency draws). The settings are :class:`~winnow.tasks.config.ThinSettings` (a
study's ``thin:`` section) and :class:`~winnow.tasks.config.ThinOptions` (plus the library
call's tuning options). The lower-level pieces (feature maps, the streamed mean embedding,
the exact MMD, the simplex QP) are public for the benchmarks and for reuse.
"""

from __future__ import annotations

from ._edit import (
    disjoint,
    extend,
    replace,
    reweight,
)
from ._features import (
    FEATURE_MAPS,
    PHASE_ROWS,
    FeatureMap,
    draw_feature_map,
    features_of_rows,
    mean_embedding,
    one_blas_thread,
)
from ._kernels import (
    KERNELS,
    Kernel,
    get_kernel,
    median_heuristic,
)
from ._mmd import (
    ExactMMD,
    mmd_exact,
)
from ._selector import (
    Problem,
    Selector,
    SelectorResult,
)
from ._selectors import (
    SELECTORS,
    get_selector,
)
from ._stage import (
    thin_stage,
)
from ._thin import (
    thin,
)
from ._weights import (
    feature_mmd,
    optimal_weights,
    solve_simplex_qp,
)

__all__ = [
    "FEATURE_MAPS",
    "KERNELS",
    "PHASE_ROWS",
    "SELECTORS",
    "ExactMMD",
    "FeatureMap",
    "Kernel",
    "Problem",
    "Selector",
    "SelectorResult",
    "disjoint",
    "draw_feature_map",
    "extend",
    "feature_mmd",
    "features_of_rows",
    "get_kernel",
    "get_selector",
    "mean_embedding",
    "median_heuristic",
    "mmd_exact",
    "one_blas_thread",
    "optimal_weights",
    "replace",
    "reweight",
    "solve_simplex_qp",
    "thin",
    "thin_stage",
]
