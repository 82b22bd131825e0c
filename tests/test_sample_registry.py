"""The sample stage's registries: one list of samplers (``MOVES``), and the settings'
``Literal`` choices held equal to the stage's lists (the config package imports no stage,
so a test checks them instead of an import; issue 15)."""

from __future__ import annotations

from typing import get_args

import numpy as np
import pytest

from winnow.tasks.config import ObservationSettings, Prior, SampleSettings
from winnow.tasks.sample import DISTS, LIKELIHOODS, SAMPLERS, Move, sample
from winnow.tasks.sample._samplers import MOVES
from winnow.tasks.sample._sampling import SamplerName


def _choices(model, field):
    return get_args(model.model_fields[field].annotation)


def test_samplers_come_from_one_registry():
    assert SAMPLERS == tuple(MOVES)
    assert get_args(SamplerName) == SAMPLERS
    assert _choices(SampleSettings, "sampler") == SAMPLERS
    for name, cls in MOVES.items():
        assert issubclass(cls, Move) and cls.name == name


def test_settings_literals_equal_the_stage_lists():
    assert _choices(Prior, "dist") == DISTS
    assert _choices(ObservationSettings, "likelihood") == LIKELIHOODS


def test_unknown_sampler_lists_the_registry():
    with pytest.raises(ValueError, match="sampler must be one of " + ", ".join(SAMPLERS)):
        sample(lambda x: -0.5 * (x**2).sum(axis=1), [{"name": "a", "dist": "normal", "mu": 0,
               "sigma": 1}], sampler="gibbs", rng=np.random.default_rng(0))  # fmt: skip
