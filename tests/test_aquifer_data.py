"""Synthetic pumping-test data of the aquifer demo (invented data, regenerated exactly)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from winnow.examples.aquifer import make_data
from winnow.examples.aquifer.make_data import (
    DATA_FILE,
    SIGMA_M,
    TRUE_THETA,
    load_observations,
    render_csv,
    synthetic_observations,
)
from winnow.examples.aquifer.theis import forward


def test_committed_csv_is_regenerated_byte_for_byte(tmp_path) -> None:
    out = tmp_path / "obs.csv"
    assert make_data.main(["--out", str(out)]) == 0
    assert out.read_bytes() == DATA_FILE.read_bytes()
    assert render_csv(synthetic_observations()).encode() == DATA_FILE.read_bytes()


def test_stated_true_values() -> None:
    # The stated truth: T = 5e-3 m2/s, S = 2e-4.
    assert TRUE_THETA[0] == pytest.approx(-2.30103, abs=1e-5)
    assert TRUE_THETA[1] == pytest.approx(-3.69897, abs=1e-5)


def test_observations_table_and_noise_level() -> None:
    obs = load_observations()
    t = obs["t_s"]
    assert t.shape == (20,) and t[0] == 60 and t[-1] == 86400 and np.all(np.diff(t) > 0)
    np.testing.assert_array_equal(obs["sigma_m"], SIGMA_M)
    resid = (obs["drawdown_m"] - forward(np.array(TRUE_THETA), obs)) / SIGMA_M
    # Statistical check of the fixed-seed noise: the sum of squared standardised residuals is
    # chi-square with 20 degrees of freedom; the 0.5 % and 99.5 % quantiles bound it
    # (scipy.stats.chi2).  Rounding to 0.1 mm adds at most 0.005 sigma per residual.
    chi2 = float(np.sum(resid**2))
    assert scipy.stats.chi2.ppf(0.005, 20) < chi2 < scipy.stats.chi2.ppf(0.995, 20)
    assert abs(resid.mean()) < 3.0 / np.sqrt(20)  # mean of 20 N(0,1): 3-sigma bound


def test_other_seed_gives_other_noise_same_clean_signal() -> None:
    a = synthetic_observations(rng=1)
    b = synthetic_observations(rng=np.random.default_rng(2))
    assert not np.array_equal(a["drawdown_m"], b["drawdown_m"])
    np.testing.assert_array_equal(a["t_s"], b["t_s"])
    # Both scatter about the same Theis curve by a few sigma at most.
    clean = forward(np.array(TRUE_THETA), a)
    assert np.max(np.abs(a["drawdown_m"] - clean)) < 5 * SIGMA_M


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("t,drawdown,sigma\n60,0.1,0.01\n", "expected the header"),
        ("t_s,drawdown_m,sigma_m\n60,abc,0.01\n", ":2: expected 3 numbers"),
        ("t_s,drawdown_m,sigma_m\n60,0.1,0.01\n88,nan,0.01\n", ":3: expected 3 finite"),
        ("t_s,drawdown_m,sigma_m\n60,0.1\n", ":2: expected 3 finite"),
    ],
)
def test_load_observations_rejects_bad_files(tmp_path, text, match) -> None:
    p = tmp_path / "bad.csv"
    p.write_text(text)
    with pytest.raises(ValueError, match=match):
        load_observations(p)
