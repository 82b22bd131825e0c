"""The headline answer of one QoI: one estimate, one interval at a stated level, and why.

Built on the error model of :mod:`winnow.tasks._uncertainty`. For each component of a QoI it
states:

* the estimate (plain weighted mean, or the multi-fidelity form the error model chose);
* ``thinning_se``: the stated error of that estimate against the chain mean;
* ``chain_mcse``: the chain's own Monte Carlo error, ``sd / sqrt(ESS)``;
* two intervals at ``level``: for the chain mean (thinning error only) and for the
  posterior expectation (both, added in quadrature), t intervals on the error model's
  degrees of freedom;
* whether the model looks reliable (its flags), and the cheap model's check;
* intervals of exceedance probabilities (the error model applied to the indicator
  ``1{Q > t}``, with the cheap model's indicator as the covariate) and of quantiles (by
  inverting the interval of the CDF at the estimated quantile, Woodruff 1952).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import stats

from ._uncertainty import ChainGeometry, ErrorFit, fit_error_model, forecast_errors

__all__ = ["LEVEL", "component_headline", "probability_interval", "quantile_interval"]

LEVEL = 0.95


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
    points: np.ndarray,
    indicator: np.ndarray,
    w: np.ndarray,
    geo: ChainGeometry,
    *,
    cheap_indicator_points: np.ndarray | None,
    cheap_indicator_mean: float | None,
    ess_points: float,
    chain_ess: float | None,
    level: float = LEVEL,
) -> dict[str, Any]:
    """Estimate and interval of ``P(event)`` from the event's indicator at the points.

    When every point agrees (all inside or all outside the event), the process scale fitted
    to the indicator is zero and says nothing; the interval is then the one the weights'
    effective size ``n_e`` allows: ``[0, 1 - ((1 - level) / 2)^(1 / n_e)]`` (or its mirror),
    the exact binomial bound for no event in ``n_e`` draws (Clopper & Pearson 1934).
    """
    ind = np.asarray(indicator, dtype=np.float64)
    p_plain = float(w @ ind)
    n_e = max(float(ess_points), 1.0)
    alpha = 1.0 - level
    if np.ptp(ind[w > 0]) == 0.0:
        edge = 1.0 - (alpha / 2.0) ** (1.0 / n_e)
        lo, hi = (0.0, edge) if p_plain < 0.5 else (1.0 - edge, 1.0)
        return {
            "estimate": p_plain, "interval": (lo, hi), "se": float("nan"), "rule":
            "weighted mean", "basis": f"every point agrees; exact bound for {n_e:.1f} "
            "effective draws", "flags": [],
        }
    fit = fit_error_model(
        points, ind, w, geo,
        cheap_points=cheap_indicator_points, cheap_chain_mean=cheap_indicator_mean,
    )
    p = float(np.clip(fit.estimate, 0.0, 1.0))
    mc = np.sqrt(p * (1 - p) / chain_ess) if chain_ess else 0.0
    se = float(np.hypot(fit.se, mc))
    half = _t(level, fit.dof) * se if np.isfinite(se) else float("nan")
    return {
        "estimate": p,
        "interval": (max(0.0, p - half), min(1.0, p + half)),
        "se": se,
        "rule": fit.rule,
        "basis": "error model of the indicator (with the chain's Monte Carlo error)",
        "flags": list(fit.flags),
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
    from ._estimates import weighted_quantile

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
    """Stated thinning error with more points (see :func:`forecast_errors`)."""
    return forecast_errors(fit, points, w, geo, rng=rng)
