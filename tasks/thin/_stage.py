"""The thin stage driven by a study config."""

from __future__ import annotations

from winnow.tasks.config import StudyConfig
from winnow.tasks.records import (
    Chain,
    Progress,
    Selection,
)


def thin_stage(config: StudyConfig, chain: Chain, *, progress: Progress | None = None) -> Selection:
    """Choose ``config.budget`` weighted points of the chain by MMD with the study's thin
    settings (``config.thin``, passed whole); ``progress(done, total, step)`` hears of every
    long step (see :func:`~winnow.tasks.thin.thin`)."""
    from ._thin import thin

    return thin(
        chain.samples, config.budget, settings=config.thin, rng=config.study.seed, progress=progress
    )
