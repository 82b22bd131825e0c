"""Log posterior of a user's model (tasks/sample/_posterior.py via tasks/sample/_sampling.py).

Outside references: scipy.stats ``norm.logpdf`` and ``t.logpdf`` (general-purpose reference
library) for the Gaussian and Student t likelihoods; the prior terms against scipy.stats too.
"""

from __future__ import annotations

import textwrap

import numpy as np
import pytest
from scipy import stats

from winnow.tasks.sample import build_log_posterior, load_callable, sample

T_OBS = np.array([1.0, 2.0, 4.0, 8.0])
Y_OBS = np.array([2.1, 2.9, 5.2, 8.8])
PRIORS = [
    {"name": "a", "dist": "normal", "mu": 0.0, "sigma": 10.0},
    {"name": "b", "dist": "uniform", "low": -5.0, "high": 5.0},
]


def line_single(theta, inputs):
    return theta[0] + theta[1] * inputs["t"]


def line_batch(theta, inputs):
    theta = np.atleast_2d(theta)
    return theta[:, :1] + theta[:, 1:2] * inputs["t"][None, :]


def _prior_ref(x):
    return stats.norm(0, 10).logpdf(x[:, 0]) + stats.uniform(-5, 10).logpdf(x[:, 1])


ROWS = np.array([[1.0, 0.9], [0.5, 1.1], [-2.0, 3.0]])


@pytest.mark.parametrize("model", [line_single, line_batch])
def test_gaussian_likelihood_against_scipy(model):
    sig = np.array([0.1, 0.2, 0.3, 0.4])
    lp = build_log_posterior(
        PRIORS, forward=model, inputs={"t": T_OBS}, observations=Y_OBS, sigma=sig
    )
    assert lp.vectorised is (model is line_batch)
    pred = ROWS[:, :1] + ROWS[:, 1:2] * T_OBS
    ref = stats.norm(pred, sig).logpdf(Y_OBS).sum(axis=1) + _prior_ref(ROWS)
    np.testing.assert_allclose(lp(ROWS), ref, rtol=1e-12)


def test_student_t_and_estimated_sigma_against_scipy():
    lp = build_log_posterior(
        PRIORS,
        forward=line_batch,
        inputs={"t": T_OBS},
        observations=Y_OBS,
        sigma={"estimate": {"dist": "lognormal", "mu": -1.0, "sigma": 1.0, "low": None}},
        likelihood="student_t",
        nu=3.0,
    )
    assert lp.names == ("a", "b", "sigma")
    rows = np.c_[ROWS, [0.2, 0.5, 1.5]]
    pred = rows[:, :1] + rows[:, 1:2] * T_OBS
    ll = stats.t(3.0, loc=pred, scale=rows[:, 2:3]).logpdf(Y_OBS).sum(axis=1)
    prior = _prior_ref(rows) + stats.lognorm(s=1.0, scale=np.exp(-1.0)).logpdf(rows[:, 2])
    np.testing.assert_allclose(lp(rows), ll + prior, rtol=1e-12)


def test_noise_scale_named_parameter_and_param_names():
    priors = [*PRIORS, {"name": "noise", "dist": "uniform", "low": 0.01, "high": 2.0}]
    lp = build_log_posterior(
        priors, forward=line_batch, inputs={"t": T_OBS}, observations=Y_OBS, sigma="noise"
    )
    rows = np.c_[ROWS, [0.3, 0.3, 0.3]]
    pred = rows[:, :1] + rows[:, 1:2] * T_OBS
    ref = stats.norm(pred, 0.3).logpdf(Y_OBS).sum(axis=1) + _prior_ref(rows) - np.log(1.99)
    np.testing.assert_allclose(lp(rows), ref, rtol=1e-12)
    # only the slope passed to a model that takes one parameter
    lp1 = build_log_posterior(
        PRIORS,
        forward=lambda th, inp: th[..., :1] * inp["t"],
        inputs={"t": T_OBS},
        observations=Y_OBS,
        sigma=0.5,
        param_names=["b"],
    )
    ref1 = stats.norm(ROWS[:, 1:2] * T_OBS, 0.5).logpdf(Y_OBS).sum(axis=1) + _prior_ref(ROWS)
    np.testing.assert_allclose(lp1(ROWS), ref1, rtol=1e-12)


def test_log_density_mode_keeps_user_density_and_prior_support():
    def logd(theta):
        return -0.5 * np.sum(np.asarray(theta) ** 2)

    lp = build_log_posterior(PRIORS, log_density=logd)
    assert not lp.vectorised
    np.testing.assert_allclose(lp(ROWS[:2]), -0.5 * (ROWS[:2] ** 2).sum(axis=1), rtol=1e-12)
    assert lp(np.array([[0.0, 7.0]]))[0] == -np.inf  # outside the uniform prior on b


def test_nan_output_is_minus_inf_and_counted():
    def partial(theta, inputs):
        return np.full(4, np.nan) if theta[0] < 0 else theta[0] + theta[1] * inputs["t"]

    lp = build_log_posterior(
        PRIORS, forward=partial, inputs={"t": T_OBS}, observations=Y_OBS, sigma=0.5
    )
    out = lp(ROWS)
    assert np.isfinite(out[:2]).all() and out[2] == -np.inf
    assert lp.n_nonfinite == 1 and lp.n_evals == 3


def test_all_nan_model_is_an_error_naming_the_model():
    def broken(theta, inputs):
        return np.full(4, np.nan)

    lp = build_log_posterior(
        PRIORS, forward=broken, inputs={"t": T_OBS}, observations=Y_OBS, sigma=0.5
    )
    with pytest.raises(ValueError, match=r"broken.*-inf or NaN at all"):
        sample(lp, n_chains=2, n_draws=20, rng=0)


@pytest.mark.parametrize(
    ("kwargs", "exc", "pattern"),
    [
        ({"observations": [1.0, np.nan, 2.0, 3.0]}, ValueError, r"missing.*position\(s\) \[1\]"),
        (
            {"observations": [1.0, 2.0]},
            ValueError,
            r"shape \(2,\) at theta.*expected \(2,\)|"
            r"returned predictions of shape \(4,\)",
        ),
        ({"sigma": [0.1, 0.2]}, ValueError, r"sigma: expected a scalar or 4 values"),
        ({"sigma": -1.0}, ValueError, "finite and > 0"),
        ({"sigma": None}, ValueError, "needs a noise scale"),
        ({"sigma": "nope"}, ValueError, "'nope' names no parameter"),
        ({"likelihood": "cauchy"}, ValueError, "gaussian, student_t"),
        (
            {"sigma": {"estimate": {"dist": "normal", "mu": 0, "sigma": 1}}},
            ValueError,
            "must have a prior on positive values",
        ),
        ({"vectorised": "maybe"}, ValueError, "'auto', 'yes' or 'no'"),
    ],
)
def test_bad_input_is_reported(kwargs, exc, pattern):
    args = {"forward": line_single, "inputs": {"t": T_OBS}, "observations": Y_OBS, "sigma": 0.5}
    args.update(kwargs)
    with pytest.raises(exc, match=pattern):
        build_log_posterior(PRIORS, **args)


def test_wrong_signature_and_wrong_shape():
    with pytest.raises(TypeError, match=r"cannot be called as f\(theta, inputs\)"):
        build_log_posterior(
            PRIORS, forward=lambda th: th, inputs={"t": T_OBS}, observations=Y_OBS, sigma=1.0
        )

    def three(theta, inputs):
        return np.zeros(3)

    with pytest.raises(ValueError, match=r"three.*shape \(3,\).*expected \(4,\)"):
        build_log_posterior(
            PRIORS, forward=three, inputs={"t": T_OBS}, observations=Y_OBS, sigma=1.0
        )
    with pytest.raises(ValueError, match=r"vectorised model .*line_single.*shape"):
        build_log_posterior(
            PRIORS,
            forward=line_single,
            inputs={"t": T_OBS},
            observations=Y_OBS,
            sigma=1.0,
            vectorised="yes",
        )


def test_model_exception_names_model_and_theta():
    def fails(theta, inputs):
        raise ZeroDivisionError("boom")

    with pytest.raises(ValueError, match=r"fails failed at theta=\[.*ZeroDivisionError: boom"):
        build_log_posterior(
            PRIORS, forward=fails, inputs={"t": T_OBS}, observations=Y_OBS, sigma=1.0
        )


def test_load_callable(tmp_path):
    (tmp_path / "usermodel_sample_test.py").write_text(
        textwrap.dedent(
            """
            import numpy as np
            K = 3
            def f(theta, inputs):
                return theta[0] * np.ones(4)
            """
        )
    )
    f = load_callable("usermodel_sample_test:f", search_path=tmp_path)
    assert f(np.array([2.0, 0.0]), None).tolist() == [2.0] * 4
    with pytest.raises(ValueError, match="'usermodel_sample_test:g'.*no attribute 'g'"):
        load_callable("usermodel_sample_test:g", search_path=tmp_path)
    with pytest.raises(ValueError, match="'usermodel_sample_test:K'.*not a function"):
        load_callable("usermodel_sample_test:K", search_path=tmp_path)
    with pytest.raises(ValueError, match="'no_such_mod_xyz:f'.*module 'no_such_mod_xyz' not"):
        load_callable("no_such_mod_xyz:f", search_path=tmp_path)
    with pytest.raises(ValueError, match="expected 'module:function'"):
        load_callable("justaname")
    (tmp_path / "badsyntax_sample_test.py").write_text("def f(:\n")
    with pytest.raises(ValueError, match="importing 'badsyntax_sample_test' failed: Syntax"):
        load_callable("badsyntax_sample_test:f", search_path=tmp_path)
    assert load_callable("numpy:sum") is np.sum


def test_partial_nan_model_samples_the_domain_and_counts():
    # NaN where a < 0 acts as a bound: the posterior is the half-normal part (a >= 0).
    def half(theta, inputs):
        th = np.atleast_2d(theta)
        out = np.where(th[:, :1] < 0, np.nan, th[:, :1] + 0.0 * inputs["t"])
        return out[0] if np.ndim(theta) == 1 else out

    lp = build_log_posterior(
        PRIORS[:1], forward=half, inputs={"t": np.zeros(1)}, observations=[0.0], sigma=1.0
    )
    chain = sample(lp, n_chains=4, n_draws=2000, rng=4)
    assert chain.samples.min() >= 0.0
    details = chain.diagnostics.details
    assert 0 < details["nonfinite_evaluations"] < details["model_evaluations"]
    # half-normal mean sqrt(2/pi) (closed form; prior N(0, 10^2) changes it by < 1 %)
    p = chain.diagnostics.parameters["a"]
    assert abs(p.mean - np.sqrt(2 / np.pi)) < 5 * p.mcse_mean + 0.01


# ------------------------------------------------------------------ the model loop
T_LOOP = np.array([0.5, 1.0, 2.0])
Y_LOOP = np.array([1.0, 1.5, 2.5])
PRIORS_LOOP = [
    {"name": "a", "dist": "normal", "mu": 0.0, "sigma": 2.0},
    {"name": "b", "dist": "uniform", "low": -3.0, "high": 3.0},
]


def _reference(x):
    # Gaussian likelihood reference: scipy.stats.norm.logpdf summed over observations;
    # priors: scipy.stats.norm and uniform.
    pred = x[:, :1] + x[:, 1:2] * T_LOOP
    return (
        stats.norm(pred, 0.3).logpdf(Y_LOOP).sum(axis=1)
        + stats.norm(0, 2).logpdf(x[:, 0])
        + stats.uniform(-3, 6).logpdf(x[:, 1])
    )


ROWS_LOOP = np.array([[0.1, 0.2], [0.5, -1.0], [-1.0, 2.5], [2.0, 0.0], [0.0, 0.0]])


def test_model_that_overwrites_one_output_array_is_copied_per_call():
    buf = np.empty(3)
    calls = []

    def reuse(theta, inputs):
        calls.append(1)
        buf[:] = theta[0] + theta[1] * T_LOOP  # the same array returned at every call
        return buf

    lp = build_log_posterior(
        PRIORS_LOOP, forward=reuse, observations=Y_LOOP, sigma=0.3, vectorised="no"
    )
    np.testing.assert_allclose(lp(ROWS_LOOP), _reference(ROWS_LOOP), rtol=1e-12)
    np.testing.assert_allclose(lp(ROWS_LOOP[::-1]), _reference(ROWS_LOOP[::-1]), rtol=1e-12)


@pytest.mark.parametrize("kind", ["array", "list", "view-of-theta"])
def test_model_results_of_any_kind_give_the_reference(kind):
    def model(theta, inputs):
        pred = theta[0] + theta[1] * T_LOOP
        if kind == "list":
            return pred.tolist()
        if kind == "view-of-theta":  # a view of the input row (counts as shared)
            return np.concatenate([theta, theta])[:3] * 0.0 + pred
        return pred

    lp = build_log_posterior(
        PRIORS_LOOP, forward=model, observations=Y_LOOP, sigma=0.3, vectorised="no"
    )
    np.testing.assert_allclose(lp(ROWS_LOOP), _reference(ROWS_LOOP), rtol=1e-12)


def test_model_failing_inside_a_batch_is_reported_with_its_theta():
    def model(theta, inputs):
        if theta[0] > 1.5:
            raise ZeroDivisionError("boom")
        return theta[0] + theta[1] * T_LOOP

    lp = build_log_posterior(
        PRIORS_LOOP, forward=model, observations=Y_LOOP, sigma=0.3, vectorised="no"
    )
    with pytest.raises(ValueError, match=r"failed at theta=\[2\.0, 0\.0\].*ZeroDivisionError"):
        lp(ROWS_LOOP)


def test_scalar_log_density_of_floats_and_one_element_arrays():
    # Reference: scipy.stats.norm.logpdf (the density includes its prior: the result is
    # the user's density restricted to the priors' support).
    def make(wrap):
        def density(theta):
            return wrap(stats.norm(1.0, 0.5).logpdf(theta[0]) + stats.norm(0, 1).logpdf(theta[1]))

        return density

    for wrap in (float, lambda v: np.array([v])):
        lp = build_log_posterior(PRIORS_LOOP, log_density=make(wrap), vectorised="no")
        ref = stats.norm(1.0, 0.5).logpdf(ROWS_LOOP[:, 0]) + stats.norm(0, 1).logpdf(
            ROWS_LOOP[:, 1]
        )
        np.testing.assert_allclose(lp(ROWS_LOOP), ref, rtol=1e-12)
