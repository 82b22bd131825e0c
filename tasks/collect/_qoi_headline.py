"""The headline of a whole QoI: one error-model headline per component (each value of a
vector QoI), with the intervals of its quantiles and exceedance probabilities, combined into
arrays of the QoI's shape.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from ._headline import (
    clustering_flag,
    component_headline,
    forecast,
    probability_interval,
    quantile_interval,
)
from ._uncertainty import ChainGeometry

__all__ = ["ASSUMPTIONS", "CheapPredictions", "UsableRuns", "finish_headline", "qoi_headline"]

ASSUMPTIONS = (
    "The QoI (or its difference from the cheap model) behaves like a draw from a Gaussian "
    "process with a Matern 5/2 covariance whose scale, length and nugget are fitted to the run "
    "values (REML); the thinning error of a weighted rule is then Gaussian with sd sigma x MMD "
    "of the points to the chain under that covariance. A feature narrower than the spacing of "
    "the points, that no run touched and the cheap model does not share, cannot be seen by any "
    "error model built from these runs: the leave-one-out and cheap-model checks flag the "
    "features they can see. The chain's Monte Carlo error is sd / sqrt(ESS)."
)


@dataclass(frozen=True)
class UsableRuns:
    """The usable runs of one QoI."""

    y: np.ndarray  # (m_ok, *shape) values
    w: np.ndarray  # (m_ok,) weights, summing to one
    pos: np.ndarray  # (m_ok,) positions in the selection
    shape: tuple[int, ...]  # shape of one value
    ess_points: float  # Kish effective number of the weights


@dataclass(frozen=True)
class CheapPredictions:
    """The cheap model's predictions, the non-finite chain rows dropped."""

    points: np.ndarray  # (m, *shape) at every chosen point
    chain: np.ndarray  # (n, *shape) at the chain rows kept
    chain_weights: np.ndarray  # (n,)
    ok: np.ndarray  # (prod(shape),) whether usable at every survivor, per component


# --------------------------------------------------------------------------------------------
# the error model: one headline per component
# --------------------------------------------------------------------------------------------
def qoi_headline(
    runs: UsableRuns,
    points: npt.ArrayLike | None,
    geometry: ChainGeometry | None,
    cheap: CheapPredictions | None,
    uncertainty: dict[str, np.ndarray],
    ess_c: np.ndarray | None,
    qs: np.ndarray,
    quant: dict[float, np.ndarray],
    th: np.ndarray,
    level: float,
    want_forecast: bool,
    gen: np.random.Generator,
) -> dict[str, Any] | None:
    """Error model, headline estimate and intervals of every component; None without chain."""
    if points is None or geometry is None:
        return None
    pts_all = np.asarray(points, dtype=np.float64)
    if pts_all.ndim == 1:
        pts_all = pts_all[:, None]
    pts = pts_all[runs.pos]
    shape, w = runs.shape, runs.w
    k = int(np.prod(shape)) if shape else 1
    yf = runs.y.reshape(runs.y.shape[0], k)
    cpf = None if cheap is None else cheap.points[runs.pos].reshape(len(runs.pos), k)
    ccf = None if cheap is None else cheap.chain.reshape(cheap.chain.shape[0], k)
    mcse = uncertainty.get("chain_mcse")
    mcf = np.zeros(k) if mcse is None else np.asarray(mcse, dtype=np.float64).reshape(k)
    essf = None if ess_c is None else np.asarray(ess_c, dtype=np.float64).reshape(k)
    comps: list[dict[str, Any]] = []
    fits = []
    for j in range(k):
        usable = cheap is not None and bool(np.ravel(cheap.ok)[j])
        fit, h = component_headline(
            pts,
            yf[:, j],
            w,
            geometry,
            cheap_points=cpf[:, j] if usable else None,
            cheap_chain_mean=float(cheap.chain_weights @ ccf[:, j]) if usable else None,
            chain_mcse=float(mcf[j]),
            level=level,
        )
        quant_j = {float(q): float(np.ravel(quant[float(q)])[j]) for q in qs}
        ess_j = None if essf is None else float(essf[j])
        h.update(_distribution_intervals(yf[:, j], w, runs.ess_points, ess_j, quant_j, th, level))
        comps.append(h)
        fits.append(fit)
    out = _combine(comps, shape, level)
    if want_forecast:
        j = (
            int(
                np.nanargmax(
                    [c["thinning_se"] if np.isfinite(c["thinning_se"]) else -1 for c in comps]
                )
            )
            if comps
            else 0
        )
        out["forecast"] = {"component": j, "extra_points": forecast(fits[j], pts, w, geometry, gen)}
        out["forecast"]["now"] = comps[j]["thinning_se"]
    return out


def _distribution_intervals(
    y: np.ndarray,
    w: np.ndarray,
    ess_points: float,
    ess_chain: float | None,
    quant: dict[float, float],
    th: np.ndarray,
    level: float,
) -> dict[str, dict[float, Any]]:
    """Intervals of the exceedance probabilities and the quantiles of one component."""
    probs = {
        float(t): probability_interval(
            (y > t).astype(float), w, ess_points=ess_points, chain_ess=ess_chain, level=level
        )
        for t in th
    }
    qint = {}
    for q, est_q in quant.items():
        cdf = probability_interval(
            (y <= est_q).astype(float), w, ess_points=ess_points, chain_ess=ess_chain, level=level
        )
        qint[q] = quantile_interval(y, w, q, est_q, cdf, level)
    return {
        "exceedance_intervals": {t: v["interval"] for t, v in probs.items()},
        "exceedance_estimates": {t: v["estimate"] for t, v in probs.items()},
        "quantile_intervals": qint,
    }


def _combine(comps: list[dict[str, Any]], shape: tuple[int, ...], level: float) -> dict[str, Any]:
    """The headlines of the components as one record of arrays of the QoI's shape."""

    def arr(key: str) -> np.ndarray:
        return np.asarray([c[key] for c in comps], dtype=np.float64).reshape(shape)

    def ends(key: str, end: int) -> np.ndarray:
        return np.asarray([c[key][end] for c in comps]).reshape(shape)

    flags = sorted({f for c in comps for f in c["flags"]})
    rules = sorted({c["rule"] for c in comps})
    return {
        "level": level,
        "estimate": arr("estimate"),
        "interval_low": ends("interval", 0),
        "interval_high": ends("interval", 1),
        "chain_mean_low": ends("chain_mean_interval", 0),
        "chain_mean_high": ends("chain_mean_interval", 1),
        "interval_for": "the posterior expectation of the QoI (thinning error and the chain's "
        "Monte Carlo error); chain_mean_low/high: the mean over the chain rows (thinning only)",
        "rule": rules[0] if len(rules) == 1 else "per component: " + ", ".join(rules),
        "flags": flags,
        "reliable": not flags and all(np.isfinite(c["thinning_se"]) for c in comps),
        "components": comps,
        "_thinning_se": arr("thinning_se"),
        "_total_se": arr("total_se"),
        "_discrepancy_se": np.asarray(
            [c["candidates"].get("discrepancy", {}).get("se", np.nan) for c in comps]
        ).reshape(shape),
        "assumptions": ASSUMPTIONS,
    }


def finish_headline(
    headline: dict[str, Any],
    runs: UsableRuns,
    m: int,
    points: npt.ArrayLike | None,
    geometry: ChainGeometry | None,
    control: dict[str, Any] | None,
    uncertainty: dict[str, np.ndarray],
    gen: np.random.Generator,
) -> None:
    """Flag failed runs that cluster, and move the headline's standard errors into
    ``uncertainty`` (and the discrepancy form's into ``control``)."""
    if runs.pos.size < m and geometry is not None:
        failed = np.ones(m, dtype=bool)
        failed[runs.pos] = False
        rep = clustering_flag(geometry.standardise(points), failed, gen)
        if rep is not None:
            headline["flags"] = sorted([*headline["flags"], rep])
            headline["reliable"] = False
    uncertainty["thinning_se"] = np.asarray(headline.pop("_thinning_se"))
    uncertainty["total_se"] = np.asarray(headline.pop("_total_se"))
    discrepancy_se = headline.pop("_discrepancy_se")
    if control is not None:
        control["se"] = np.asarray(discrepancy_se)
