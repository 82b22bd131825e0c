"""Burn-in of an imported chain in a study (``sample.import_chain``, issue 13).

A chain file written by another sampler is nearly always post-warm-up already, so a study
that imports one keeps every draw unless ``sample.burn_in`` says otherwise; the study's own
sampler keeps its default of dropping the first half (Gelman et al., Bayesian Data Analysis
3rd ed., Sec. 11.5).

Outside references:
* arviz's example posterior ``centered_eight`` (PyMC 4.2, 4 chains x 500 draws after 1000
  tuning steps; shipped inside the arviz package, loaded offline): the imported chain.
* arviz (general-purpose reference library): ``az.rhat(method="rank")`` and
  ``az.ess(method="bulk")`` on the draws the stage should have kept (Vehtari et al. 2021);
  the same formulas as tasks/sample/_diagnostics.py summed in another order, so relative 1e-9.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pytest
from fault_solvers.kit import make_study

from winnow.tasks.config import SampleSettings, config_schema, load_config
from winnow.tasks.sample import sample_stage

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # arviz prints a FutureWarning about its refactor
    import arviz as az


def _one(value) -> float:
    return float(np.asarray(value).item())


@pytest.fixture(scope="module")
def eight() -> np.ndarray:
    post = az.load_arviz_data("centered_eight").posterior
    return np.stack([post["mu"].values, post["tau"].values], axis=-1)  # (4, 500, 2)


def _study(folder: Path, draws: np.ndarray, **sample) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    np.save(folder / "chain.npy", draws.reshape(-1, 2))  # chain after chain
    sample = {
        "import_chain": {"file": "chain.npy", "chains": 4},
        "checks": {"on_failure": "warn"},  # centered_eight's tau fails the thresholds
        **sample,
    }
    return make_study(folder, sample=sample)


def test_defaults_of_the_setting():
    assert SampleSettings.model_validate({"import_chain": {"file": "c.npy"}}).burn_in == 0
    assert SampleSettings.model_validate({"model": {"log_density": "m:f"}}).burn_in == "half"
    for given in ("half", 25):
        s = SampleSettings.model_validate({"import_chain": {"file": "c.npy"}, "burn_in": given})
        assert s.burn_in == given
    doc = config_schema()["$defs"]["SampleSettings"]["properties"]["burn_in"]["description"]
    assert "imported chain" in doc and "'half' for the study's own sampler" in doc


@pytest.mark.parametrize(("burn_in", "kept"), [(None, 500), ("half", 250), (100, 400)])
def test_imported_chain_keeps_every_draw_unless_told(tmp_path, eight, burn_in, kept):
    extra = {} if burn_in is None else {"burn_in": burn_in}
    cfg, _ = load_config(_study(tmp_path, eight, **extra))
    chain = sample_stage(cfg, tmp_path)
    d = chain.diagnostics
    assert d.n_chains == 4 and d.n_draws == kept and d.burn_in == 500 - kept
    assert chain.n == 4 * kept
    if burn_in is None:
        assert d.burn_in_rule == "no burn-in removed: all 500 draws of each chain kept"
    tail = eight[:, 500 - kept :]
    np.testing.assert_array_equal(chain.samples, tail.reshape(-1, 2))  # rows, not arithmetic
    for j, name in enumerate(("x", "y")):  # the kit names the parameters x and y
        p = d.parameters[name]
        assert p.rhat == pytest.approx(_one(az.rhat(tail[..., j], method="rank")), rel=1e-9)
        assert p.ess_bulk == pytest.approx(_one(az.ess(tail[..., j], method="bulk")), rel=1e-9)
