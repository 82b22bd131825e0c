"""The headline answer of one QoI: one estimate, one interval at a stated level, and why.

Built on the error model of :mod:`winnow.tasks.collect._uncertainty`. For each component of a QoI it
states:

* the estimate (plain weighted mean, or the multi-fidelity form the error model chose);
* ``thinning_se``: the stated error of that estimate against the chain mean;
* ``chain_mcse``: the chain's own Monte Carlo error, ``sd / sqrt(ESS)``;
* two intervals at ``level``: for the chain mean (thinning error only) and for the
  posterior expectation (both, added in quadrature), t intervals on the error model's
  degrees of freedom;
* whether the model looks reliable (its flags), and the cheap model's check;
* intervals of exceedance probabilities (Wilson's score interval at the effective size of
  the weights and the chain) and of quantiles (by inverting the interval of the CDF at the
  estimated quantile, Woodruff 1952).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import stats

from ._uncertainty import ChainGeometry, ErrorFit, fit_error_model, forecast_errors
from ._weighted import weighted_quantile

__all__ = [
    "LEVEL",
    "component_headline",
    "probability_interval",
    "quantile_interval",
    "clustering_flag",
]

LEVEL = 0.95


CLUSTER_P = 0.01  # familywise false-alarm rate of the clustering check under random failures


def clustering_flag(z: np.ndarray, failed: np.ndarray, rng: Any, n_perm: int = 999) -> str | None:
    """A flag when the failed runs cluster in one region of the posterior.

    Test: the squared MMD (Gaussian kernel, median-distance bandwidth, standardised
    coordinates) between the failed points and all chosen points, against its distribution
    when the same number of failures falls on chosen points at random (a permutation test,
    Gretton et al. 2012, sec. 3.3 for the MMD; the p-value counts the observed labelling,
    common practice). Failures at random pass it in 99 % of studies; failures where the QoI is
    large, or in one corner of the parameters, do not, and the error model cannot know what
    the missing region holds (the coverage benchmark's "not at random" cells).
    """
    failed = np.asarray(failed, dtype=bool)
    k, m = int(failed.sum()), failed.size
    if k < 2 or m - k < 2:
        return None
    d2 = ((z[:, None, :] - z[None, :, :]) ** 2).sum(-1)
    iu = np.triu_indices(m, 1)
    med2 = float(np.median(d2[iu])) or 1.0
    K = np.exp(-d2 / (2 * med2))
    gen = np.random.default_rng(rng)
    masks = np.zeros((n_perm + 1, m))
    masks[0, failed] = 1.0
    for i in range(1, n_perm + 1):
        masks[i, gen.choice(m, k, replace=False)] = 1.0
    a = masks / k
    u = np.full(m, 1.0 / m)
    stat = np.einsum("pi,ij,pj->p", a, K, a) - 2 * a @ (K @ u)  # + const (u K u)
    p = float(np.mean(stat >= stat[0] - 1e-12))
    if p < CLUSTER_P:
        return (
            f"failed runs cluster in one region of the posterior ({k} of {m}; permutation "
            f"test against random failures, p = {p:.3f} < {CLUSTER_P}): the error model cannot "
            "know what the missing region holds; fix the solver and run `winnow rerun`, or "
            "`winnow rerun --replace`"
        )
    return None


def _t(level: float, dof: int) -> float:
    return float(stats.t.ppf(0.5 + level / 2.0, max(dof, 1)))


def component_headline(
    points: np.ndarray,
    y: np.ndarray,
    w: np.ndarray,
    geo: ChainGeometry,
    *,
    cheap_points: np.ndarray | None,
    cheap_chain_mean: float | None,
    chain_mcse: float,
    level: float = LEVEL,
) -> tuple[ErrorFit, dict[str, Any]]:
    """Error model and intervals of one scalar component (``y`` shape (m,))."""
    fit = fit_error_model(
        points, y, w, geo, cheap_points=cheap_points, cheap_chain_mean=cheap_chain_mean
    )
    mc = float(chain_mcse) if np.isfinite(chain_mcse) else 0.0
    lo_c, hi_c = fit.interval(level)
    lo_p, hi_p = fit.interval(level, mc)
    out = {
        "estimate": fit.estimate,
        "thinning_se": fit.se,
        "chain_mcse": mc,
        "total_se": float(np.hypot(fit.se, mc)) if np.isfinite(fit.se) else float("nan"),
        "chain_mean_interval": (lo_c, hi_c),
        "interval": (lo_p, hi_p),
        "dof": fit.dof,
        "rule": fit.rule,
        "coefficient": fit.coefficient,
        "candidates": fit.candidates,
        "length_scale": fit.length,
        "sigma": fit.sigma,
        "nugget": fit.nugget,
        "mmd": fit.mmd,
        "loo_max_z": fit.loo_max_z,
        "loo_bound": fit.loo_bound,
        "flags": list(fit.flags),
        "reliable": fit.reliable,
        "cheap_check": fit.extra.get("cheap_check"),
    }
    return fit, out


def probability_interval(
    indicator: np.ndarray,
    w: np.ndarray,
    *,
    ess_points: float,
    chain_ess: float | None,
    level: float = LEVEL,
) -> dict[str, Any]:
    """Estimate and interval of ``P(event)`` from the event's indicator at the points.

    The indicator of an event is a step function, which the smooth error model of the mean
    does not describe (the coverage benchmark saw its intervals cover 25-55 % for the
    exceedance of a smooth QoI). The interval is instead the one the weights' effective size
    allows: Wilson's score interval (Wilson 1927) for the weighted proportion with
    ``n = 1 / (1 / n_e + 1 / ESS_chain)`` draws, ``n_e`` the Kish effective size of the
    weights and ``ESS_chain`` the chain's (its Monte Carlo error of the same proportion).
    It treats the points as ``n_e`` random draws: for optimised points, conservative.
    """
    ind = np.asarray(indicator, dtype=np.float64)
    p = float(w @ ind)
    n_e = max(float(ess_points), 1.0)
    n = 1.0 / (1.0 / n_e + (1.0 / chain_ess if chain_ess else 0.0))
    z = float(stats.norm.ppf(0.5 + level / 2.0))
    denom = 1.0 + z * z / n
    centre = (p + z * z / (2 * n)) / denom  # Wilson (1927) score interval
    half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    return {
        "estimate": p,
        # ends within rounding of 0 or 1 are those bounds (Wilson's end is exactly 0 at p = 0)
        "interval": (
            0.0 if centre - half < 1e-12 else float(centre - half),
            1.0 if centre + half > 1 - 1e-12 else float(centre + half),
        ),
        "n": n,
        "basis": f"Wilson score interval at {n:.1f} effective draws (Kish size of the weights "
        "combined with the chain's ESS)",
    }


def quantile_interval(
    y: np.ndarray,
    w: np.ndarray,
    q: float,
    estimate: float,
    cdf: dict[str, Any],
    level: float = LEVEL,
) -> tuple[float, float]:
    """Woodruff (1952) interval of the ``q`` quantile from the CDF interval at the estimate.

    ``cdf`` is :func:`probability_interval`'s result for the event ``Q <= estimate``; the
    interval is ``[Q(q - h), Q(q + h)]`` with ``h`` its half-width, ``Q`` the weighted
    quantile function. An end beyond the plotting positions of the smallest or largest run
    value is not bounded by the runs and is reported as -inf or +inf.
    """
    lo_p, hi_p = cdf["interval"]
    p_hat = cdf["estimate"]
    h_lo, h_hi = p_hat - lo_p, hi_p - p_hat
    keep = w > 0
    ws = w[keep] / w[keep].sum()
    order = np.argsort(y[keep])
    pos = np.cumsum(ws[order]) - 0.5 * ws[order]
    a, b = q - h_lo, q + h_hi
    low = float(weighted_quantile(y, w, a)) if a >= pos[0] else float("-inf")
    high = float(weighted_quantile(y, w, b)) if b <= pos[-1] else float("inf")
    return (min(low, estimate), max(high, estimate))


def forecast(
    fit: ErrorFit, points: np.ndarray, w: np.ndarray, geo: ChainGeometry, rng: Any
) -> dict[int, float]:
    """Stated thinning error with more points (see :func:`forecast_errors`).

    The greedy extension's variances use Bayesian-quadrature weights; they are turned into a
    forecast of the stated error by their ratio to the same computation with no extra
    point, so that ``k = 0`` reproduces the error stated now.
    """
    raw = forecast_errors(fit, points, w, geo, (0, 5, 10, 20, 50), rng=rng)
    base = raw.pop(0)
    if not np.isfinite(base) or base <= 0 or not np.isfinite(fit.se):
        return {k: float("nan") for k in raw}
    return {k: float(fit.se * v / base) for k, v in raw.items()}
