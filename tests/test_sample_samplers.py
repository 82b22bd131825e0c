"""Samplers (tasks/sample/_metropolis.py, _ensemble.py, _sampling.py): one shared contract
for every move, and posterior moments against closed forms.

Outside references:
* 2-D correlated Gaussian target: the exact mean and covariance are the target's own
  parameters (closed form).
* Conjugate normal-normal model: Gelman et al., Bayesian Data Analysis, 3rd ed. (2013),
  Sec. 2.5, Eqs. (2.11)-(2.12): posterior precision 1/tau0^2 + n/sigma^2 and mean
  (mu0/tau0^2 + n ybar/sigma^2) / precision.
* Linear-Gaussian regression with a Gaussian prior: Gelman et al. (2013), Sec. 14.2 (and
  Sec. 14.8 for an informative Gaussian prior as extra data): posterior
  N(V (X'y/sigma^2 + m0/s0^2), V), V = (X'X/sigma^2 + I/s0^2)^-1.
Tolerances are derived from the reported Monte Carlo standard errors.
"""

from __future__ import annotations

import numpy as np
import pytest

from winnow.tasks.sample import SAMPLERS, build_log_posterior, sample

MU = np.array([1.0, -2.0])
SD = np.array([1.0, 2.0])
RHO = 0.8
COV = np.array([[1.0, RHO], [RHO, 1.0]]) * np.outer(SD, SD)
PREC = np.linalg.inv(COV)
PRIORS = [
    {"name": "a", "dist": "normal", "mu": 0.0, "sigma": 10.0, "units": "m"},
    {"name": "b", "dist": "uniform", "low": -20.0, "high": 20.0, "units": "s"},
]
N_CHAINS = {"adaptive_metropolis": 4, "ensemble": 8, "de_mcmc": 8}


def gauss_logp(x):
    z = x - MU
    return -0.5 * np.einsum("ki,ij,kj->k", z, PREC, z)


def _run(sampler, **kw):
    args = dict(sampler=sampler, n_chains=N_CHAINS[sampler], n_draws=3000, rng=2024)
    args.update(kw)
    return sample(gauss_logp, PRIORS, **args)


@pytest.fixture(scope="module", params=SAMPLERS)
def contract_run(request):
    return request.param, _run(request.param)


def _short(sampler, **kw):
    """A short run with checkpoints every 50 iterations (burn-in ends at 150)."""
    states = {}

    def keep(state):
        states[int(state["iteration"])] = state

    args = dict(n_draws=300, checkpoint=keep, checkpoint_every=50)
    args.update(kw)
    return _run(sampler, **args), states


def test_contract_moments_within_mcse(contract_run):
    sampler, chain = contract_run
    diag = chain.diagnostics
    assert chain.source == f"sampled:{sampler}"
    assert chain.names == ("a", "b") and chain.units == ("m", "s")
    assert chain.samples.shape == (N_CHAINS[sampler] * 1500, 2)
    assert diag.burn_in == 1500 and diag.n_draws == 1500
    for j, name in enumerate(chain.names):
        p = diag.parameters[name]
        # |mean - exact| < 5 MCSE (fixed seed; 5 leaves room for the MCSE's own error)
        assert abs(p.mean - MU[j]) < 5 * p.mcse_mean, (sampler, name, p.mean, p.mcse_mean)
        # sd: the MCSE of a variance is about var * sqrt(2 / ESS) for a Gaussian
        # (common practice); 5 of those on the sd scale.
        tol = 5 * SD[j] * np.sqrt(0.5 / p.ess_bulk)
        assert abs(p.sd - SD[j]) < tol, (sampler, name, p.sd, tol)
        assert p.rhat < 1.05
    corr = np.corrcoef(chain.samples.T)[0, 1]
    ess = min(p.ess_bulk for p in diag.parameters.values())
    # sd of a sample correlation is (1 - rho^2) / sqrt(n) (common practice); 5 of those
    assert abs(corr - RHO) < 5 * (1 - RHO**2) / np.sqrt(ess)
    assert np.all((diag.acceptance > 0.05) & (diag.acceptance < 0.95))
    np.testing.assert_allclose(chain.log_density, gauss_logp(chain.samples), rtol=1e-12)


@pytest.mark.parametrize("sampler", SAMPLERS)
def test_contract_deterministic_by_seed_and_resume_equals_uninterrupted(sampler):
    chain, states = _short(sampler)
    assert sorted(states) == [50, 100, 150, 200, 250]
    again = _run(sampler, n_draws=300)
    np.testing.assert_array_equal(again.samples, chain.samples)
    other = _run(sampler, n_draws=300, rng=7)
    assert not np.array_equal(other.samples, chain.samples)
    for it in (100, 200):  # one checkpoint in the burn-in, one after it
        resumed = _run(sampler, n_draws=300, resume=states[it], rng=999)  # rng ignored
        np.testing.assert_array_equal(resumed.samples, chain.samples)
        np.testing.assert_array_equal(resumed.log_density, chain.log_density)
        np.testing.assert_array_equal(resumed.diagnostics.acceptance, chain.diagnostics.acceptance)
        assert resumed.diagnostics.details["resumed_at"] == it
    st = states[50]
    for key, value in st.items():
        assert isinstance(value, (np.ndarray, int, float, str)), key
    with pytest.raises(ValueError, match="other settings: n_draws: checkpoint 300 vs now 400"):
        _run(sampler, n_draws=400, resume=st)
    with pytest.raises(ValueError, match="not a sample checkpoint"):
        _run(sampler, resume={"iteration": 3})


def test_conjugate_normal_normal():
    # BDA3 Sec. 2.5, Eqs. (2.11)-(2.12)
    rng = np.random.default_rng(1)
    sigma, mu0, tau0, n = 2.0, 0.0, 1.5, 25
    y = rng.normal(0.7, sigma, size=n)
    prec = 1 / tau0**2 + n / sigma**2
    mean_exact = (mu0 / tau0**2 + y.sum() / sigma**2) / prec
    lp = build_log_posterior(
        [{"name": "theta", "dist": "normal", "mu": mu0, "sigma": tau0}],
        forward=lambda th, inp: np.repeat(th[..., :1], n, axis=-1),
        inputs={},
        observations=y,
        sigma=sigma,
    )
    chain = sample(lp, n_chains=4, n_draws=4000, rng=3)
    p = chain.diagnostics.parameters["theta"]
    assert abs(p.mean - mean_exact) < 4 * p.mcse_mean
    sd_exact = prec**-0.5
    assert abs(p.sd - sd_exact) < 4 * sd_exact * np.sqrt(0.5 / p.ess_bulk)
    assert chain.diagnostics.passed, chain.diagnostics.messages


@pytest.mark.slow
def test_linear_gaussian_regression():
    # BDA3 Sec. 14.2 with a Gaussian prior N(0, s0^2 I) (Sec. 14.8): closed-form posterior.
    rng = np.random.default_rng(8)
    n, sigma, s0 = 30, 0.5, 10.0
    t = np.linspace(0, 3, n)
    X = np.c_[np.ones(n), t, t**2]
    y = X @ np.array([1.0, -0.5, 0.3]) + sigma * rng.normal(size=n)
    V = np.linalg.inv(X.T @ X / sigma**2 + np.eye(3) / s0**2)
    m = V @ (X.T @ y / sigma**2)
    names = ["b0", "b1", "b2"]
    lp = build_log_posterior(
        [{"name": k, "dist": "normal", "mu": 0.0, "sigma": s0} for k in names],
        forward=lambda th, inp: np.atleast_2d(th) @ inp["X"].T,
        inputs={"X": X},
        observations=y,
        sigma=sigma,
    )
    assert lp.vectorised
    chain = sample(lp, n_chains=4, n_draws=6000, rng=11)
    diag = chain.diagnostics
    for j, k in enumerate(names):
        p = diag.parameters[k]
        assert abs(p.mean - m[j]) < 4 * p.mcse_mean, (k, p.mean, m[j], p.mcse_mean)
        sd = np.sqrt(V[j, j])
        assert abs(p.sd - sd) < 4 * sd * np.sqrt(0.5 / p.ess_bulk)
    c = np.corrcoef(chain.samples.T)[0, 2]
    c_exact = V[0, 2] / np.sqrt(V[0, 0] * V[2, 2])
    ess = min(p.ess_bulk for p in diag.parameters.values())
    assert abs(c - c_exact) < 5 * (1 - c_exact**2) / np.sqrt(ess)


def test_progress_and_thin():
    calls = []
    chain = sample(
        gauss_logp,
        PRIORS,
        n_chains=2,
        n_draws=400,
        thin=4,
        rng=1,
        progress=lambda done, total, what: calls.append((done, total, what)),
        thresholds={"ess_bulk_min": 1, "ess_tail_min": 1, "rhat_max": 2.0},
    )
    assert calls[-1] == (400, 400, "sampling (adaptive_metropolis)")
    # at most once per 1 % (and per 0.5 s): a quick run reports a few times, always at the end
    dones = [c[0] for c in calls]
    assert 2 <= len(calls) <= 100 and dones == sorted(set(dones)) and dones[0] == 4
    assert chain.diagnostics.n_draws == 50  # (400 - 200) / 4
    assert "every 4th draw" in chain.diagnostics.burn_in_rule
    np.testing.assert_array_equal(chain.draw_index[:50], np.arange(50))


@pytest.mark.parametrize(
    ("kwargs", "pattern"),
    [
        ({"sampler": "hmc"}, "adaptive_metropolis, ensemble, de_mcmc"),
        ({"sampler": "ensemble", "n_chains": 3}, r"n_chains >= max\(4, 2 d\) = 4"),
        ({"n_draws": 9, "thin": 3}, "at least 4 are needed"),
        ({"burn_in": 5000}, "between 0 and"),
        ({"thresholds": {"ess": 3}}, "unknown key 'ess'"),
    ],
)
def test_bad_settings(kwargs, pattern):
    with pytest.raises(ValueError, match=pattern):
        sample(gauss_logp, PRIORS, **{"n_draws": 100, **kwargs})


def test_default_walkers_follow_dimension():
    # Left out, n_chains is 2 d + 2 ensemble walkers (>= max(4, 2 d), the minimum checked
    # above; Goodman & Weare 2010 need more walkers than dimensions) and 4 AM chains.
    priors5 = [{"name": f"p{j}", "dist": "normal", "mu": 0.0, "sigma": 1.0} for j in range(5)]
    chain = sample(
        lambda x: -0.5 * (x * x).sum(axis=1),
        priors5,
        sampler="ensemble",
        n_draws=40,
        rng=0,
        thresholds={"rhat_max": 10.0, "ess_bulk_min": 1.0, "ess_tail_min": 1.0},
    )
    assert chain.diagnostics.n_chains == 12
    assert "max(4, 2 d + 2) = 12" in chain.diagnostics.details["n_chains_rule"]
    am = _run("adaptive_metropolis", n_chains=None, n_draws=40)
    assert am.diagnostics.n_chains == 4
    with pytest.raises(ValueError, match=r"sample.chains to at least 10 \(12 recommended\)"):
        sample(lambda x: -0.5 * (x * x).sum(axis=1), priors5, sampler="ensemble", n_chains=4)


def test_plain_callable_wrong_shape_is_reported():
    with pytest.raises(ValueError, match=r"returned shape \(\) for 4 rows"):
        sample(lambda x: 0.0, PRIORS, n_chains=4, n_draws=50, rng=0)


# Conjugate normal-normal model per coordinate (BDA3 Sec. 2.5, Eqs. (2.11)-(2.12)) with
# prior scales from 1e-9 to 1e10 (a length in m next to a modulus in Pa, issue 17 item 2).
# Each parameter j has prior N(mu0_j, tau0_j^2) and n observations y_jk ~ N(theta_j,
# sigma_j^2), all scaled by S_j, so the posterior in units of S_j is the same for every j.
SCALE_SETS = {
    "1e-9": (1e-9,),
    "1": (1.0,),
    "1e10": (1e10,),
    "1e-9,1,1e10": (1e-9, 1.0, 1e10),  # all three in one model
}
# R-hat bounds: 1.01 is the recommendation of Vehtari et al. (2021, Bayesian Analysis 16(2),
# Sec. 4). The stretch move with 8 walkers mixes more slowly: on the 3-D model with every
# scale 1 (no scale problem at all) it gave R-hat 1.014-1.022 over seeds 5-10 at this
# length (measured), so 1.03 for it; it is affine invariant, hence scale-free by design.
RHAT_MAX = {"adaptive_metropolis": 1.01, "ensemble": 1.03, "de_mcmc": 1.01}


def _scaled_conjugate(scales):
    s = np.asarray(scales)
    n = 25
    mu0, tau0, sigma = 2.0 * s, 1.5 * s, 2.0 * s
    rng = np.random.default_rng(17)
    y = (2.7 * s[:, None] + sigma[:, None] * rng.normal(size=(s.size, n))).reshape(-1)
    prec = 1 / tau0**2 + n / sigma**2  # Eq. (2.12)
    mean = (mu0 / tau0**2 + y.reshape(s.size, n).sum(axis=1) / sigma**2) / prec  # Eq. (2.11)
    lp = build_log_posterior(
        [
            {"name": f"theta{j}", "dist": "normal", "mu": mu0[j], "sigma": tau0[j]}
            for j in range(s.size)
        ],
        forward=lambda th, inp: np.repeat(th, n, axis=-1),
        inputs=None,
        observations=y,
        sigma=np.repeat(sigma, n),
    )
    return lp, mean, prec**-0.5


@pytest.mark.parametrize("scales", list(SCALE_SETS.values()), ids=list(SCALE_SETS))
@pytest.mark.parametrize("sampler", SAMPLERS)
def test_contract_scale_free_conjugate_normal(sampler, scales):
    lp, mean_exact, sd_exact = _scaled_conjugate(scales)
    chain = sample(lp, sampler=sampler, n_chains=N_CHAINS[sampler], n_draws=8000, rng=5)
    diag = chain.diagnostics
    for j in range(len(scales)):
        p = diag.parameters[f"theta{j}"]
        # Before the fix the adaptive Metropolis chains of the mixed-scale model gave R-hat
        # 2.9-7.6 and bulk ESS 4-5 (the regularisation of C was relative to the mean
        # variance, swamping the small-scale parameters).
        assert p.rhat < RHAT_MAX[sampler], (sampler, scales, j, p.rhat)
        # 400 = 100 per chain for 4 chains, the bulk-ESS floor of Vehtari et al. (2021),
        # Sec. 4; measured minima over seeds 5-10: AM 1314, ensemble 275 (so 200 for it),
        # DE 2174.
        assert p.ess_bulk > (200 if sampler == "ensemble" else 400), (sampler, scales, j)
        # mean within 5 MCSE of the closed form; sd within 5 sd of its estimate, the sd of
        # a Gaussian sd estimate being sd sqrt(1 / (2 ESS)) (common practice); measured
        # worst over seeds 5-10: 2.4 MCSE, 2.3 sd.
        assert abs(p.mean - mean_exact[j]) < 5 * p.mcse_mean, (sampler, scales, j)
        tol = 5 * sd_exact[j] * np.sqrt(0.5 / p.ess_bulk)
        assert abs(p.sd - sd_exact[j]) < tol, (sampler, scales, j, p.sd / sd_exact[j])
    # Acceptance as at scale 1 (AM ~0.23 tuned, ensemble ~0.7, DE ~0.35 here): a proposal
    # out of scale in one coordinate drives it towards 0.
    assert np.all((diag.acceptance > 0.15) & (diag.acceptance < 0.9)), diag.acceptance
