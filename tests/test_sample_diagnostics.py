"""Convergence diagnostics (tasks/sample/_diagnostics.py).

Outside references:
* arviz 0.23 (general-purpose reference library): ``arviz.rhat(..., method="rank")``,
  ``arviz.ess(..., method="bulk"/"tail"/"mean")``, ``arviz.mcse(..., method="mean"/"quantile")``
  implement the same definitions (Vehtari et al. 2021, Bayesian Analysis 16(2)), so the
  values must agree to rounding (relative 1e-9).
* AR(1) chains: the integrated autocorrelation time of x_t = phi x_{t-1} + e_t is
  (1 + phi) / (1 - phi) (closed form; e.g. Geyer 1992, Statistical Science 7(4), Sec. 3),
  so ESS = N (1 - phi) / (1 + phi).
* iid normal draws: MCSE of the mean is sd / sqrt(N) (closed form).
* arviz's example posteriors ``centered_eight`` and ``non_centered_eight`` (the eight schools
  model of Gelman et al., Bayesian Data Analysis, sampled by PyMC 4.2; shipped inside the
  arviz package, loaded offline by ``arviz.load_arviz_data``): the same arviz functions on
  published draws; arviz describes the centred one as "a model that NUTS has trouble
  fitting".
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from winnow.tasks import sample as D
from winnow.tasks.records import Chain

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # arviz prints a FutureWarning about its refactor
    import arviz as az


def _one(value) -> float:
    # arviz returns a scalar, or a one-element array when numba is installed
    return float(np.asarray(value).item())


def _ar1(phi: float, m: int, n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    e = rng.normal(size=(m, n)) * np.sqrt(1.0 - phi**2)
    x = np.empty((m, n))
    x[:, 0] = rng.normal(size=m)  # stationary start
    for t in range(1, n):
        x[:, t] = phi * x[:, t - 1] + e[:, t]
    return x


def _draw_sets():
    rng = np.random.default_rng(11)
    yield "iid-normal", rng.normal(size=(4, 500))
    yield "ar1-0.8-odd", _ar1(0.8, 4, 301, 3)
    shifted = rng.standard_t(3, size=(4, 400))
    shifted[2] += 0.4
    yield "t3-shifted", shifted
    yield "one-chain", _ar1(0.5, 1, 1000, 4)
    yield "skewed", rng.lognormal(size=(3, 250))


@pytest.mark.parametrize(("label", "x"), list(_draw_sets()))
def test_against_arviz(label, x):
    # arviz 0.23: same definitions, so agreement to rounding.
    rel = 1e-9
    if x.shape[0] > 1:  # arviz returns NaN for one chain; split R-hat is defined there too
        assert D.rhat(x) == pytest.approx(_one(az.rhat(x, method="rank")), rel=rel)
    assert D.ess_bulk(x) == pytest.approx(_one(az.ess(x, method="bulk")), rel=rel)
    assert D.ess_tail(x) == pytest.approx(_one(az.ess(x, method="tail")), rel=rel)
    assert D.ess_mean(x) == pytest.approx(_one(az.ess(x, method="mean")), rel=rel)
    assert D.mcse_mean(x) == pytest.approx(_one(az.mcse(x, method="mean")), rel=rel)
    for p in (0.05, 0.95):
        ref = _one(az.mcse(x, method="quantile", prob=p))
        assert D.mcse_quantile(x, p) == pytest.approx(ref, rel=rel)


def test_vectorised_over_parameters_matches_per_parameter():
    x = np.stack([_ar1(0.3, 4, 200, 1), _ar1(0.9, 4, 200, 2)], axis=-1)
    for f in (D.rhat, D.ess_bulk, D.ess_tail, D.mcse_mean):
        both = f(x)
        assert both.shape == (2,)
        assert both[1] == pytest.approx(f(x[..., 1]), rel=1e-12)


@pytest.mark.parametrize(("phi", "bound"), [(0.5, 0.15), (0.9, 0.30)])
def test_ar1_ess_against_integrated_autocorrelation_time(phi, bound):
    # ESS = N (1 - phi) / (1 + phi) for AR(1) (closed form). Over 20 seeds the estimate's
    # relative spread was 3 % (phi 0.5) and 7 % (phi 0.9), so the bounds are > 4 sd.
    x = _ar1(phi, 4, 5000, seed=7)
    exact = x.size * (1.0 - phi) / (1.0 + phi)
    assert abs(D.ess_mean(x) / exact - 1.0) < bound
    assert abs(D.ess_bulk(x) / exact - 1.0) < bound  # Gaussian: rank-normalising changes little


def test_mcse_mean_iid_closed_form():
    x = np.random.default_rng(2).normal(3.0, 2.0, size=(4, 2500))
    # sd / sqrt(N) for independent draws; the ESS estimate is within ~5 % of N here.
    assert D.mcse_mean(x) == pytest.approx(2.0 / np.sqrt(x.size), rel=0.06)


def test_rhat_flags_disagreeing_chains():
    rng = np.random.default_rng(5)
    good = rng.normal(size=(4, 1000))
    assert D.rhat(good) < 1.01
    bad = good.copy()
    bad[0] += 1.0  # one chain elsewhere: between-chain variance dominates
    assert D.rhat(bad) > 1.05  # about 1.09 here
    trend = good + np.linspace(0, 3, 1000)  # all chains drift: only splitting shows it
    assert D.rhat(trend) > 1.1
    wide = good.copy()
    wide[1] *= 3.0  # same location, different scale: the folded (tail) R-hat catches it
    assert D.rhat(wide) > 1.05


def test_constant_parameter_gives_undefined_rhat_and_fails():
    x = np.zeros((2, 100, 2))
    x[..., 1] = np.random.default_rng(1).normal(size=(2, 100))
    diag = D.diagnose(x, ["flat", "ok"], burn_in="none", thresholds={"ess_bulk_min": 10})
    assert np.isnan(diag.parameters["flat"].rhat)
    assert not diag.passed
    assert any(m.startswith("flat: R-hat is undefined") for m in diag.messages)


def test_burn_in_rules():
    assert D.burn_in_count(1001) == (500, "first half of each chain discarded (500 draws)")
    assert D.burn_in_count(100, "none") == (
        0,
        "no burn-in removed: all 100 draws of each chain kept",
    )
    assert D.burn_in_count(100, 0) == D.burn_in_count(100, "none")
    assert D.burn_in_count(100, 30)[0] == 30
    with pytest.raises(ValueError, match="between 0 and"):
        D.burn_in_count(100, 100)
    with pytest.raises(ValueError, match="'half', 'none' or an int"):
        D.burn_in_count(100, "quarter")


def test_diagnose_thresholds_and_messages():
    x = _ar1(0.95, 4, 1200, seed=9)[..., None]
    diag = D.diagnose(x, ["logT"], thresholds={"rhat_max": 1.01, "ess_bulk_min": 400})
    assert diag.burn_in == 600 and diag.n_draws == 600 and diag.n_chains == 4
    assert "first half" in diag.burn_in_rule
    p = diag.parameters["logT"]
    assert p.ess_bulk < 400  # tau = 39 for phi = 0.95: about 2400 / 39 = 62
    assert not diag.passed
    msg = [m for m in diag.messages if "bulk ESS" in m][0]
    assert msg.startswith("logT: bulk ESS ") and "threshold 400" in msg
    assert np.all(np.isnan(diag.acceptance)) and diag.acceptance.shape == (4,)
    ok = D.diagnose(
        x, ["logT"], thresholds={"ess_bulk_min": 20, "ess_tail_min": 20, "rhat_max": 1.2}
    )
    assert ok.passed and ok.messages == ()
    with pytest.raises(ValueError, match="unknown key 'rhat'"):
        D.diagnose(x, ["logT"], thresholds={"rhat": 1.1})


def test_diagnose_rejects_bad_input():
    with pytest.raises(ValueError, match="shape"):
        D.diagnose(np.zeros((10, 2)))
    x = np.random.default_rng(0).normal(size=(2, 50, 1))
    x[1, 40, 0] = np.nan
    with pytest.raises(ValueError, match="'x0' hold 1 non-finite"):
        D.diagnose(x)
    with pytest.raises(ValueError, match="at least 4"):
        D.diagnose(x[:, :6], burn_in=4)


def test_diagnose_chain_splits_and_removes_burn_in():
    rng = np.random.default_rng(4)
    rows = rng.normal(size=(400, 2))
    chain = Chain(
        samples=rows,
        names=("a", "b"),
        units=("m", "s"),
        chain_index=np.zeros(400, dtype=np.int64),
        draw_index=np.arange(400, dtype=np.int64),
        source="imported:x",
    )
    # an imported chain keeps every draw unless told otherwise (issue 13)
    whole = D.diagnose_chain(chain, chains=4)
    assert whole.diagnostics.burn_in == 0 and whole.diagnostics.n_draws == 100
    np.testing.assert_array_equal(whole.samples, rows)  # chain k: rows 100k .. 100k+99
    out = D.diagnose_chain(chain, chains=4, burn_in=10)
    assert out.diagnostics.n_chains == 4 and out.diagnostics.n_draws == 90
    # chain k holds rows 100k .. 100k+99; after burn-in rows 100k+10 .. 100k+99
    np.testing.assert_array_equal(out.samples[:90], rows[10:100])
    np.testing.assert_array_equal(out.samples[90:180], rows[110:200])
    np.testing.assert_array_equal(out.chain_index, np.repeat(np.arange(4), 90))
    ref = D.diagnose(rows.reshape(4, 100, 2), ["a", "b"], burn_in=10)
    assert out.diagnostics.parameters == ref.parameters
    assert out.units == ("m", "s")


# --------------------------------------------------------------------------------------------
# published example posteriors shipped with arviz
# --------------------------------------------------------------------------------------------
def eight_schools(name: str) -> tuple[np.ndarray, list[str]]:
    """(4, 500, 10) draws of mu, tau and theta[school] of an arviz example posterior."""
    post = az.load_arviz_data(name).posterior  # a file inside the arviz package: offline
    schools = [str(s) for s in post["school"].values]
    cols = [post["mu"].values, post["tau"].values]
    cols += [post["theta"].values[..., k] for k in range(len(schools))]
    return np.stack(cols, axis=-1), ["mu", "tau", *[f"theta[{s}]" for s in schools]]


@pytest.mark.parametrize("name", ["centered_eight", "non_centered_eight"])
def test_eight_schools_against_arviz(name):
    # arviz: az.rhat(method="rank") (max of bulk and folded split R-hat, Vehtari et al. 2021
    # Sec. 4.1-4.2), az.ess(method="bulk"/"tail") (Sec. 4.3), az.mcse(method="mean"); all
    # draws, as the chain files are post-warm-up. The same formulas in a different order of
    # summation: relative 1e-9 (1e-13 seen) leaves room for the autocorrelation sums.
    x, names = eight_schools(name)
    rel = 1e-9
    r, eb, et, mm = D.rhat(x), D.ess_bulk(x), D.ess_tail(x), D.mcse_mean(x)
    for j, label in enumerate(names):
        xj = x[..., j]
        assert r[j] == pytest.approx(_one(az.rhat(xj, method="rank")), rel=rel), label
        assert eb[j] == pytest.approx(_one(az.ess(xj, method="bulk")), rel=rel), label
        assert et[j] == pytest.approx(_one(az.ess(xj, method="tail")), rel=rel), label
        assert mm[j] == pytest.approx(_one(az.mcse(xj, method="mean")), rel=rel), label


def test_eight_schools_verdicts():
    # The centred parameterisation is arviz's example of a hard posterior: tau fails the
    # default thresholds (arviz: R-hat 1.06, bulk ESS 67, tail ESS 38 on these draws); the
    # non-centred one passes them all.
    x, names = eight_schools("centered_eight")
    bad = D.diagnose(x, names, burn_in="none")
    assert not bad.passed
    tau = [m for m in bad.messages if m.startswith("tau: ")]
    assert any("R-hat" in m and "threshold 1.01" in m for m in tau), bad.messages
    assert any("bulk ESS" in m and "threshold 400" in m for m in tau), bad.messages
    x, names = eight_schools("non_centered_eight")
    good = D.diagnose(x, names, burn_in="none")
    assert good.passed, good.messages
    assert good.burn_in == 0 and good.n_draws == 500
