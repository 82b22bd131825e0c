"""The thin stage driven by a study config."""

from __future__ import annotations

from winnow.tasks.config import StudyConfig
from winnow.tasks.records import (
    Chain,
    Progress,
    Selection,
)


def thin_stage(config: StudyConfig, chain: Chain, *, progress: Progress | None = None) -> Selection:
    """Choose ``config.budget`` weighted points of the chain by MMD; ``progress(done,
    total, step)`` hears of every long step (see :func:`~winnow.tasks.thin.thin`)."""
    from ._engine import thin

    t = config.thin
    return thin(
        chain.samples,
        config.budget,
        kernel=t.kernel,
        bandwidth=t.bandwidth,
        method=t.method,
        weights=t.weights,
        feature_map=t.feature_map,
        n_features=t.features,
        replace_unweighted=t.replace_unweighted,
        exact_max_rows=t.exact_max_rows,
        rng=config.study.seed,
        progress=progress,
    )


# --------------------------------------------------------------------------------------------
