"""Weighted estimates of a quantity of interest and the uncertainty of those estimates.

The collect stage holds ``m`` costly-run values ``y_i`` of a QoI at the chosen points, with
weights ``w_i`` (non-negative, summing to one) that make the weighted points stand in for the
whole posterior chain. From them it reports the weighted posterior-predictive summaries (mean,
sd, quantiles, exceedance probabilities), and, given the chain's coordinates, one headline
answer per QoI from the error model of :mod:`winnow.tasks.collect._uncertainty` with labelled
standard errors:

``thinning_se``
    The error model's standard error of the headline estimate against the chain mean
    (``sigma x MMD`` under a process fitted to the run values).
``chain_mcse``
    Monte Carlo error of the chain itself, ``sd / sqrt(ESS)``.
``total_se``
    Both in quadrature: the standard error for the posterior expectation.

The cheap model's gap ``sum_i w_i c(x_i) - mean_chain c`` is reported as a check of the
selection (``details["cheap_gap"]``), not as an error term: the multi-fidelity estimate
applies it as its correction.

References
----------
.. [1] Peherstorfer, B., Willcox, K. and Gunzburger, M. (2016). Optimal model management
   for multifidelity Monte Carlo estimation. SIAM J. Sci. Comput. 38(5), A3163-A3194.
.. [2] Hyndman, R. J. and Fan, Y. (1996). Sample quantiles in statistical packages.
   The American Statistician 50(4), 361-365.
.. [3] Kish, L. (1965). Survey Sampling. Wiley, New York.
.. [4] Efron, B. (1979). Bootstrap methods: another look at the jackknife. Ann. Statist.
   7(1), 1-26; Efron, B. and Tibshirani, R. J. (1993). An Introduction to the Bootstrap.
   Chapman & Hall, ch. 6 and 9 (bootstrapping pairs).
.. [5] Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. and Buerkner, P.-C. (2021).
   Rank-normalization, folding, and localization: an improved R-hat for assessing
   convergence of MCMC. Bayesian Analysis 16(2), 667-718.
.. [6] Geyer, C. J. (1992). Practical Markov chain Monte Carlo. Statistical Science 7(4),
   473-483.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from winnow.tasks.records import QoIEstimate, QoIValue

from ._headline import (
    LEVEL,
)
from ._qoi_headline import CheapPredictions, UsableRuns, finish_headline, qoi_headline
from ._uncertainty import ChainGeometry
from ._weighted import (
    _exceedance,
    _validate_probabilities,
    _validate_weights,
    bootstrap_mean_se,
    chain_ess,
    kish_ess,
    weighted_mean_sd,
    weighted_quantile,
)

__all__ = [
    "UNCERTAINTY_LABELS",
    "bootstrap_mean_se",
    "chain_ess",
    "estimate_qoi",
    "kish_ess",
    "weighted_mean_sd",
    "weighted_quantile",
]

ResolveWeights = Callable[[np.ndarray], tuple[npt.ArrayLike, float, float]]

ResolveWeights = Callable[[np.ndarray], tuple[npt.ArrayLike, float, float]]

UNCERTAINTY_LABELS: dict[str, str] = {
    "thinning_se": "Standard error of thinning (error model: sigma x MMD, against the chain mean)",
    "chain_mcse": "Monte Carlo standard error of the chain (sd / sqrt(ESS))",
    "total_se": "Total standard error for the posterior expectation (both, in quadrature)",
}


# --------------------------------------------------------------------------------------------
# the estimate
# --------------------------------------------------------------------------------------------
def _split_values(
    values: Sequence[QoIValue] | npt.ArrayLike, m: int, name: str
) -> tuple[np.ndarray, np.ndarray, dict[str, str], tuple[int, ...]]:
    """Return (values of usable rows, their positions, reasons left out, value shape)."""
    left_out: dict[str, str] = {}
    if isinstance(values, Sequence) and values and isinstance(values[0], QoIValue):
        if len(values) != m:
            raise ValueError(
                f"values: expected {m} QoIValue records (one per weight), got {len(values)}"
            )
        ok_pos, rows = [], []
        for k, v in enumerate(values):
            if not isinstance(v, QoIValue):
                raise TypeError(f"values[{k}]: expected QoIValue, got {type(v).__name__}")
            if v.name != name:
                raise ValueError(f"values[{k}]: record is for QoI {v.name!r}, expected {name!r}")
            arr = np.asarray(v.value, dtype=np.float64)
            if v.status == "ok" and np.all(np.isfinite(arr)):
                ok_pos.append(k)
                rows.append(arr)
            else:
                status = v.status if v.status != "ok" else "nonfinite"
                left_out[v.run_id] = f"{status}: {v.reason}" if v.reason else status
        shapes = {r.shape for r in rows}
        if len(shapes) > 1:
            raise ValueError(
                f"values: runs of {name!r} disagree on the QoI shape: {sorted(shapes)}"
            )
        shape = rows[0].shape if rows else np.shape(values[0].value)
        y = np.stack(rows) if rows else np.empty((0,) + shape)
        return y, np.asarray(ok_pos, dtype=np.int64), left_out, shape
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim < 1 or arr.shape[0] != m:
        raise ValueError(f"values: expected shape ({m}, ...), got {arr.shape}")
    finite = np.all(np.isfinite(arr.reshape(m, -1)), axis=1)
    for k in np.flatnonzero(~finite):
        left_out[f"row {k}"] = "nonfinite"
    pos = np.flatnonzero(finite).astype(np.int64)
    return arr[pos], pos, left_out, arr.shape[1:]


def _nan_estimate(
    name: str,
    units: str,
    shape: tuple[int, ...],
    quantiles: np.ndarray,
    thresholds: np.ndarray,
    m: int,
    left_out: dict[str, str],
) -> QoIEstimate:
    nan = np.full(shape, np.nan)
    return QoIEstimate(
        name=name,
        units=units,
        mean=nan,
        sd=nan.copy(),
        quantiles={float(q): nan.copy() for q in quantiles},
        exceedance={float(t): nan.copy() for t in thresholds},
        uncertainty={},
        control_variate=None,
        n_used=0,
        n_missing=m,
        details={"note": "no run gave a usable value; nothing to estimate", "left_out": left_out},
    )


# long: 90 lines of signature and docstring (17 parameters); the body is its steps
def estimate_qoi(
    values: Sequence[QoIValue] | npt.ArrayLike,
    weights: npt.ArrayLike,
    *,
    name: str,
    units: str = "",
    quantiles: Sequence[float] = (0.05, 0.5, 0.95),
    thresholds: Sequence[float] = (),
    cheap_on_points: npt.ArrayLike | None = None,
    cheap_on_chain: npt.ArrayLike | None = None,
    chain_ess: float | npt.ArrayLike | None = None,
    chain_weights: npt.ArrayLike | None = None,
    chain_index: npt.ArrayLike | None = None,
    resolve_weights: ResolveWeights | None = None,
    bootstrap: int = 0,
    points: npt.ArrayLike | None = None,
    geometry: ChainGeometry | None = None,
    level: float = LEVEL,
    forecast: bool = True,
    rng: int | np.random.Generator | None = None,
) -> QoIEstimate:
    """Weighted estimate of one QoI with its uncertainty broken down by source.

    Parameters
    ----------
    values : list of QoIValue, length m, or array_like, shape (m, ...)
        Costly-run values at the chosen points, in selection order. Records whose status is
        not ``ok`` (or arrays rows with non-finite entries) are left out, never read as zero.
    weights : array_like, shape (m,)
        Selection weights (non-negative).
    name, units : str
        QoI name and units (copied into the estimate).
    quantiles : sequence of float
        Probabilities of the weighted quantiles (see :func:`weighted_quantile`).
    thresholds : sequence of float
        Exceedance probabilities ``P(Q > t)`` are reported for these (QoI units).
    cheap_on_points : array_like, shape (m, ...), optional
        Cheap prediction of the QoI at the chosen points (all m, in selection order).
    cheap_on_chain : array_like, shape (n, ...), optional
        Cheap prediction at every chain row. Together with ``cheap_on_points`` it enables
        ``thinning_gap`` and the control-variate estimate.
    chain_ess : float or array_like, optional
        Effective sample size of the chain (e.g. the smallest bulk ESS of the parameters).
        With ``cheap_on_chain`` the smaller of it and the cheap prediction's own ESS is used;
        when omitted and ``cheap_on_chain`` is given the latter is computed by
        :func:`chain_ess` (Kish ESS of ``chain_weights`` for a weighted chain).
    chain_weights : array_like, shape (n,), optional
        Weights of the chain rows (uniform when omitted).
    chain_index : array_like of int, shape (n,), optional
        Chain of each row, for the ESS computation.
    resolve_weights : callable, optional
        ``resolve_weights(surviving_positions) -> (new_weights, mmd_before, mmd_after)``;
        called when some runs are left out, to re-solve the weights of the survivors.
        Without it the surviving weights are renormalised (said in ``details``).
    bootstrap : int
        Resamples of the i.i.d. pairs bootstrap, kept in ``details`` for comparison only (it
        overstates the error of optimised points by orders of magnitude); 0 switches it off.
    points : array_like, shape (m, d), optional
        The chosen points in the chain's coordinates (selection order). With ``geometry``
        (or built from ``chain_samples`` by the caller) it enables the error model.
    geometry : ChainGeometry, optional
        The chain as the error model sees it (:class:`winnow.tasks.collect._uncertainty.ChainGeometry`).
    level : float
        Level of every stated interval (default 0.95).
    forecast : bool
        Also state the expected thinning error with 5, 10, 20 and 50 more points.
    rng : int or numpy.random.Generator, optional
        Seed or generator of the bootstrap.

    Returns
    -------
    QoIEstimate
        ``uncertainty`` holds, when computable: ``thinning_gap``, ``control_variate_se``,
        ``bootstrap_se``, ``chain_mcse``; ``control_variate`` holds the multi-fidelity
        estimate (discrepancy form, coefficient one) with its optimal-coefficient variant.
        ``details`` says how each was obtained.

    References
    ----------
    See the module docstring: Peherstorfer et al. (2016) for the control variate, Kish
    (1965) for the effective sample size of the weights, Efron & Tibshirani (1993) for the
    bootstrap and Vehtari et al. (2021) for the chain ESS.
    """
    cheap_missing = (cheap_on_points is None, cheap_on_chain is None)
    m, w_all, qs, th, level = _check_arguments(
        name, weights, quantiles, thresholds, bootstrap, level, cheap_missing
    )
    gen = np.random.default_rng(rng)
    y, pos, left_out, shape = _split_values(values, m, name)
    run_ids = (
        [v.run_id for v in values]
        if isinstance(values, Sequence) and values and isinstance(values[0], QoIValue)
        else None
    )
    cp, cc = _cheap_arrays(cheap_on_points, cheap_on_chain, m, shape)
    details: dict[str, Any] = {
        "quantile_definition": "weighted Hazen: linear interpolation between midpoints of the "
        "weighted empirical CDF steps (Hyndman & Fan 1996 definition 5 for equal weights)",
        "sd_definition": "sd of the weighted empirical distribution (no small-sample factor)",
        "left_out": left_out,
        "level": level,
    }
    cp, cc, chain_weights, chain_index = _drop_nonfinite_cheap(
        cp, cc, chain_weights, chain_index, details
    )
    if y.shape[0] == 0:
        return _nan_estimate(name, units, shape, qs, th, m, left_out)

    w, weights_resolved, mmd_growth = _survivor_weights(w_all, pos, resolve_weights, details)
    runs = UsableRuns(y=y, w=w, pos=pos, shape=shape, ess_points=kish_ess(w))
    details["ess_points"] = runs.ess_points
    details["positions_used"] = pos
    details["weights_used"] = w
    if run_ids is not None:
        details["run_ids_used"] = [run_ids[k] for k in pos]

    mean, sd = weighted_mean_sd(y, w)
    qv = weighted_quantile(y, w, qs) if qs.size else np.empty((0,) + shape)
    quant = {float(q): np.asarray(qv[k]) for k, q in enumerate(qs)}
    exceed = {float(t): _exceedance(y, w, float(t)) for t in th}
    uncertainty: dict[str, np.ndarray] = {}
    if bootstrap:
        se, low, high = bootstrap_mean_se(y, w, n_boot=bootstrap, rng=gen)
        details["iid_bootstrap"] = {
            "se": se,
            "interval_95": (low, high),
            "note": "i.i.d. pairs bootstrap, for comparison only: the points are optimised, "
            "not random, and this overstates their error (Efron & Tibshirani 1993)",
        }
    cw, chain_mean, ess_c = _chain_error(
        cc, chain_weights, chain_index, chain_ess, sd, shape, details, uncertainty
    )
    control, cheap_ok = _cheap_check(runs, cp, mean, sd, chain_mean, details)
    cheap = (
        None if cp is None else CheapPredictions(points=cp, chain=cc, chain_weights=cw, ok=cheap_ok)
    )
    headline = qoi_headline(
        runs, points, geometry, cheap, uncertainty, ess_c, qs, quant, th, level, forecast, gen
    )
    if headline is not None:
        finish_headline(headline, runs, m, points, geometry, control, uncertainty, gen)
    return QoIEstimate(
        name=name,
        units=units,
        mean=mean,
        sd=sd,
        quantiles=quant,
        exceedance=exceed,
        uncertainty={k: np.asarray(v, dtype=np.float64) for k, v in uncertainty.items()},
        control_variate=control,
        n_used=int(pos.size),
        n_missing=int(m - pos.size),
        weights_resolved=weights_resolved,
        mmd_growth=mmd_growth,
        details=details,
        headline=headline,
    )


# --------------------------------------------------------------------------------------------
# the steps of estimate_qoi
# --------------------------------------------------------------------------------------------
def _check_arguments(
    name: Any,
    weights: npt.ArrayLike,
    quantiles: Sequence[float],
    thresholds: Sequence[float],
    bootstrap: Any,
    level: Any,
    cheap_missing: tuple[bool, bool],
) -> tuple[int, np.ndarray, np.ndarray, np.ndarray, float]:
    """Validate the arguments; return (m, weights, quantile probabilities, thresholds, level)."""
    if not isinstance(name, str) or not name:
        raise ValueError(f"name: expected a non-empty str, got {name!r}")
    w_all = np.asarray(weights, dtype=np.float64)
    if w_all.ndim != 1 or w_all.size == 0:
        raise ValueError(f"weights: expected shape (m,) with m >= 1, got {w_all.shape}")
    m = w_all.size
    w_all = _validate_weights(w_all, m)
    qs = _validate_probabilities(list(quantiles), "quantiles")
    th = np.asarray(list(thresholds), dtype=np.float64)
    if th.ndim != 1 or not np.all(np.isfinite(th)):
        raise ValueError(f"thresholds: expected finite numbers, got {thresholds!r}")
    if (
        isinstance(bootstrap, bool)
        or not isinstance(bootstrap, int)
        or bootstrap < 0
        or bootstrap == 1
    ):
        raise ValueError(f"bootstrap: expected 0 (off) or an int >= 2, got {bootstrap!r}")
    if cheap_missing[0] != cheap_missing[1]:
        raise ValueError("cheap_on_points and cheap_on_chain: give both or neither")
    if not isinstance(level, float | int) or not 0.5 <= float(level) < 1.0:
        raise ValueError(f"level: expected a probability in [0.5, 1), got {level!r}")
    return m, w_all, qs, th, float(level)


def _cheap_arrays(
    cheap_on_points: npt.ArrayLike | None,
    cheap_on_chain: npt.ArrayLike | None,
    m: int,
    shape: tuple[int, ...],
) -> tuple[np.ndarray | None, np.ndarray | None]:
    """The cheap predictions at the points (m, *shape) and the chain (n, *shape), or None."""
    if cheap_on_points is None:
        return None, None
    cp = np.asarray(cheap_on_points, dtype=np.float64)
    cc = np.asarray(cheap_on_chain, dtype=np.float64)
    if cp.shape != (m,) + shape:
        raise ValueError(f"cheap_on_points: expected shape {(m,) + shape}, got {cp.shape}")
    if cc.ndim < 1 or cc.shape[1:] != shape or cc.shape[0] < 1:
        raise ValueError(f"cheap_on_chain: expected shape (n,) + {shape}, got {cc.shape}")
    return cp, cc


def _drop_nonfinite_cheap(
    cp: np.ndarray | None,
    cc: np.ndarray | None,
    chain_weights: npt.ArrayLike | None,
    chain_index: npt.ArrayLike | None,
    details: dict[str, Any],
) -> tuple[np.ndarray | None, np.ndarray | None, Any, Any]:
    """Chain rows with a non-finite cheap prediction are dropped and counted, never a crash;
    with none left the cheap model is unused."""
    if cc is None:
        return cp, cc, chain_weights, chain_index
    finite_rows = np.all(np.isfinite(cc.reshape(cc.shape[0], -1)), axis=1)
    n_bad = int((~finite_rows).sum())
    if n_bad:
        details["cheap_nonfinite_chain_rows"] = n_bad
        details["cheap_note"] = (
            f"{n_bad} of {cc.shape[0]} chain rows gave a non-finite cheap prediction; "
            "they are left out of the cheap model's chain mean and its checks"
        )
    if n_bad == cc.shape[0]:
        details["cheap_note"] = "every cheap prediction is non-finite; the cheap model is unused"
        return None, None, chain_weights, chain_index
    if chain_weights is not None:
        chain_weights = np.asarray(chain_weights, dtype=np.float64)[finite_rows]
    if chain_index is not None:
        chain_index = np.asarray(chain_index)[finite_rows]
    return cp, cc[finite_rows], chain_weights, chain_index


def _survivor_weights(
    w_all: np.ndarray,
    pos: np.ndarray,
    resolve_weights: ResolveWeights | None,
    details: dict[str, Any],
) -> tuple[np.ndarray, bool, float]:
    """Weights of the surviving runs: (weights, re-solved?, growth of the MMD)."""
    if pos.size == w_all.size:
        details["weights_rule"] = "selection weights"
        return w_all, False, 0.0
    if resolve_weights is not None:
        new_w, mmd_before, mmd_after = resolve_weights(pos.copy())
        w = _validate_weights(new_w, pos.size, "resolve_weights result")
        details["weights_rule"] = "re-solved for the surviving points"
        details["mmd_before"] = float(mmd_before)
        details["mmd_after"] = float(mmd_after)
        return w, True, float(mmd_after) - float(mmd_before)
    details["weights_rule"] = (
        "surviving selection weights renormalised to sum to one "
        "(no re-solve available; the discrepancy growth is unknown)"
    )
    return _validate_weights(w_all[pos], pos.size, "surviving weights"), False, 0.0


def _chain_error(
    cc: np.ndarray | None,
    chain_weights: npt.ArrayLike | None,
    chain_index: npt.ArrayLike | None,
    given_ess: float | npt.ArrayLike | None,
    sd: np.ndarray,
    shape: tuple[int, ...],
    details: dict[str, Any],
    uncertainty: dict[str, np.ndarray],
) -> tuple[np.ndarray | None, np.ndarray | None, np.ndarray | None]:
    """The chain's Monte Carlo error ``sd / sqrt(ESS)`` (into ``uncertainty["chain_mcse"]``).

    Returns the chain weights, the cheap model's chain mean (None without it) and the ESS.
    """
    cw = chain_mean = None
    if cc is not None:
        n = cc.shape[0]
        cw = (
            _validate_weights(chain_weights, n, "chain_weights")
            if chain_weights is not None
            else np.full(n, 1.0 / n)
        )
        chain_mean, _ = weighted_mean_sd(cc, cw)
        details["chain_rows"] = int(n)
    ess_c, ess_basis = _chain_ess_of(cc, cw, chain_weights, chain_index, given_ess, shape)
    if ess_c is not None:
        # the QoI's own spread over the chain, at the ESS of the chain
        uncertainty["chain_mcse"] = np.asarray(sd / np.sqrt(ess_c), dtype=np.float64)
        details["chain_mcse"] = (
            f"weighted sd of the QoI / sqrt(chain ESS); ESS {ess_basis}: the chain's own "
            "Monte Carlo error of the posterior expectation"
        )
        details["chain_ess"] = np.asarray(ess_c, dtype=np.float64)
    return cw, chain_mean, ess_c


def _chain_ess_of(
    cc: np.ndarray | None,
    cw: np.ndarray | None,
    chain_weights: npt.ArrayLike | None,
    chain_index: npt.ArrayLike | None,
    given_ess: float | npt.ArrayLike | None,
    shape: tuple[int, ...],
) -> tuple[np.ndarray | None, str]:
    """The chain's ESS for the QoI and how it was obtained."""
    if given_ess is not None:
        ess_c = np.broadcast_to(np.asarray(given_ess, dtype=np.float64), shape)
        if not np.all(ess_c > 0):
            raise ValueError(f"chain_ess: expected positive values, got {given_ess!r}")
        if cc is not None and chain_weights is None and cc.shape[0] >= 8:
            # the QoI's own autocorrelation is unknown: take the smaller of the given ESS
            # (e.g. the parameters') and the cheap prediction's, not the more optimistic
            return (
                np.minimum(ess_c, chain_ess(cc, chain_index)),
                "smaller of the given ESS and the cheap prediction's split-chain ESS",
            )
        return ess_c, "given"
    if cc is not None and chain_weights is not None:
        return np.full(shape, kish_ess(cw)), "Kish ESS of the chain weights"
    if cc is not None and cc.shape[0] >= 4:
        return (
            chain_ess(cc, chain_index),
            "split-chain ESS of the cheap prediction (Vehtari et al. 2021)",
        )
    return None, ""


def _cheap_check(
    runs: UsableRuns,
    cp: np.ndarray | None,
    mean: np.ndarray,
    sd: np.ndarray,
    chain_mean: np.ndarray | None,
    details: dict[str, Any],
) -> tuple[dict[str, Any] | None, np.ndarray | None]:
    """The cheap model's check of the selection and the discrepancy-form multi-fidelity
    estimate (Peherstorfer et al. 2016); the gap is not an error term, that estimate applies
    it as its correction.

    Returns the control-variate record and, per component, whether the cheap model is usable
    at every survivor (None without a cheap model).
    """
    if cp is None or chain_mean is None:
        return None, None
    y, w, shape = runs.y, runs.w, runs.shape
    c = cp[runs.pos]
    wb = w.reshape((-1,) + (1,) * len(shape))
    c_points = np.sum(wb * c, axis=0)
    with np.errstate(invalid="ignore"):
        gap = c_points - chain_mean
    details["cheap_gap"] = np.asarray(gap)
    d_mean, d_sd = weighted_mean_sd(np.where(np.isfinite(c), y - c, 0.0), w)
    _, c_sd = weighted_mean_sd(np.where(np.isfinite(c), c, 0.0), w)
    cov = np.sum(wb * (y - mean) * (np.nan_to_num(c) - c_points), axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.where((sd > 0) & (c_sd > 0), cov / (sd * c_sd), np.nan)
    cheap_ok = np.all(np.isfinite(c.reshape(c.shape[0], -1)), axis=0)
    control = {
        "mean": np.asarray(chain_mean + d_mean),
        "correlation": np.asarray(rho),
        "form": "discrepancy (coefficient 1): chain mean of cheap + weighted mean of "
        "(costly - cheap) at the points",
        "cheap_chain_mean": np.asarray(chain_mean),
        "cheap_points_mean": np.asarray(c_points),
        "discrepancy_mean": np.asarray(d_mean),
        "discrepancy_sd": np.asarray(d_sd),
        "ess_points": runs.ess_points,
    }
    return control, cheap_ok
