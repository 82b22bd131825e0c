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
    clustering_flag,
    component_headline,
    forecast,
    probability_interval,
    quantile_interval,
)
from ._uncertainty import ChainGeometry

__all__ = [
    "bootstrap_mean_se",
    "chain_ess",
    "estimate_qoi",
    "kish_ess",
    "weighted_mean_sd",
    "weighted_quantile",
]

ResolveWeights = Callable[[np.ndarray], tuple[npt.ArrayLike, float, float]]

UNCERTAINTY_LABELS: dict[str, str] = {
    "thinning_se": "Standard error of thinning (error model: sigma x MMD, against the chain mean)",
    "chain_mcse": "Monte Carlo standard error of the chain (sd / sqrt(ESS))",
    "total_se": "Total standard error for the posterior expectation (both, in quadrature)",
}


# --------------------------------------------------------------------------------------------
# validation helpers
# --------------------------------------------------------------------------------------------
def _validate_weights(weights: npt.ArrayLike, m: int, name: str = "weights") -> np.ndarray:
    w = np.asarray(weights, dtype=np.float64)
    if w.shape != (m,):
        raise ValueError(f"{name}: expected shape ({m},), got {w.shape}")
    if not np.all(np.isfinite(w)) or np.any(w < 0):
        raise ValueError(f"{name}: expected finite non-negative values, got min {np.min(w)!r}")
    total = float(w.sum())
    if total <= 0.0:
        raise ValueError(f"{name}: expected a positive sum, got {total!r}")
    return w / total


def _validate_values(values: npt.ArrayLike, name: str = "values") -> np.ndarray:
    y = np.asarray(values, dtype=np.float64)
    if y.ndim < 1 or y.shape[0] == 0:
        raise ValueError(f"{name}: expected shape (m, ...) with m >= 1, got {y.shape}")
    if not np.all(np.isfinite(y)):
        raise ValueError(f"{name}: expected finite values")
    return y


def _validate_probabilities(q: npt.ArrayLike, name: str) -> np.ndarray:
    qa = np.asarray(q, dtype=np.float64)
    if qa.ndim > 1 or not np.all((qa >= 0.0) & (qa <= 1.0)):
        raise ValueError(f"{name}: expected probabilities in [0, 1], got {q!r}")
    return qa


# --------------------------------------------------------------------------------------------
# weighted summaries
# --------------------------------------------------------------------------------------------
def kish_ess(weights: npt.ArrayLike) -> float:
    """Kish's effective sample size ``(sum w)^2 / sum w^2`` of non-negative weights.

    Equals ``m`` for ``m`` equal weights and 1 when one weight carries everything [3]_.
    """
    w = np.asarray(weights, dtype=np.float64)
    if w.ndim != 1 or w.size == 0 or np.any(w < 0) or not np.all(np.isfinite(w)):
        raise ValueError(
            f"weights: expected a non-empty 1-D array of non-negative values, got shape {w.shape}"
        )
    s2 = float(np.sum(w * w))
    if s2 == 0.0:
        raise ValueError("weights: all zero")
    return float(np.sum(w)) ** 2 / s2  # Kish (1965), eq. for n_eff of a weighted sample


def weighted_mean_sd(
    values: npt.ArrayLike, weights: npt.ArrayLike
) -> tuple[np.ndarray, np.ndarray]:
    """Mean and standard deviation of the weighted empirical distribution.

    Parameters
    ----------
    values : array_like, shape (m, ...)
    weights : array_like, shape (m,)
        Non-negative; normalised to sum to one.

    Returns
    -------
    mean, sd : ndarray, shape (...)
        ``mean = sum_i w_i y_i`` and ``sd = sqrt(sum_i w_i (y_i - mean)^2)`` (the moments of
        the distribution putting mass ``w_i`` on ``y_i``; no small-sample correction, because
        the weighted points stand for the chain, not for an i.i.d. sample).
    """
    y = _validate_values(values)
    w = _validate_weights(weights, y.shape[0])
    wb = w.reshape((-1,) + (1,) * (y.ndim - 1))
    mean = np.sum(wb * y, axis=0)
    var = np.sum(wb * (y - mean) ** 2, axis=0)
    return np.asarray(mean), np.asarray(np.sqrt(np.maximum(var, 0.0)))


def weighted_quantile(
    values: npt.ArrayLike, weights: npt.ArrayLike, q: npt.ArrayLike
) -> np.ndarray:
    """Weighted quantiles, the weighted form of Hyndman & Fan's definition 5 (Hazen).

    Definition: drop zero weights, sort the values ``y_(1) <= ... <= y_(m)`` with their
    normalised weights ``w_(k)``, give each value the plotting position at the midpoint of
    its step of the weighted empirical CDF, ``p_k = sum_{j<=k} w_(j) - w_(k) / 2``, and
    interpolate linearly between the points ``(p_k, y_(k))``; below ``p_1`` the quantile is
    ``y_(1)`` and above ``p_m`` it is ``y_(m)``. With equal weights ``p_k = (k - 1/2) / m``,
    which is definition 5 of [2]_ and ``numpy.quantile(..., method="hazen")``. Tied values
    share their total weight equally before the positions are computed, so the result does
    not depend on the order of the points (and equal weights are left as they are).

    Parameters
    ----------
    values : array_like, shape (m, ...)
        Each trailing component (e.g. each time of a vector QoI) is treated separately.
    weights : array_like, shape (m,)
        Non-negative, positive sum.
    q : float or array_like, shape (p,)
        Probabilities in [0, 1].

    Returns
    -------
    ndarray, shape (...) for a scalar ``q`` or (p, ...) for an array ``q``.
    """
    y = _validate_values(values)
    w = _validate_weights(weights, y.shape[0])
    qa = _validate_probabilities(q, "q")
    keep = w > 0
    y, w = y[keep], w[keep]
    flat = y.reshape(y.shape[0], -1)
    order = np.argsort(flat, axis=0, kind="stable")
    ys = np.take_along_axis(flat, order, axis=0)
    qf = np.atleast_1d(qa)
    out = np.empty((qf.size, flat.shape[1]))
    for j in range(flat.shape[1]):
        ws = w[order[:, j]]
        _, run, count = np.unique(ys[:, j], return_inverse=True, return_counts=True)
        ws = (np.bincount(run, weights=ws) / count)[run]  # ties share their weight equally
        positions = np.cumsum(ws) - 0.5 * ws  # midpoint of each CDF step
        out[:, j] = np.interp(qf, positions, ys[:, j])  # clamps outside [p_1, p_m]
    out = out.reshape((qf.size,) + y.shape[1:])
    return np.asarray(out[0]) if qa.ndim == 0 else out


def _exceedance(y: np.ndarray, w: np.ndarray, threshold: float) -> np.ndarray:
    wb = w.reshape((-1,) + (1,) * (y.ndim - 1))
    return np.asarray(np.sum(wb * (y > threshold), axis=0))  # P(Q > t), weighted


# --------------------------------------------------------------------------------------------
# chain effective sample size (Vehtari et al. 2021 split-chain estimator, Geyer truncation)
# --------------------------------------------------------------------------------------------
def _ess_chains(x: np.ndarray) -> np.ndarray:
    """ESS of the mean for draws ``x`` of shape (c, n, k), chains already split; shape (k,).

    The loops of Geyer's initial positive and initial monotone sequences are written as
    array operations (first non-positive pair sum, running minimum of the pair sums), with
    the same result as the sequential form of Vehtari et al. (2021), appendix.
    """
    c, n, k = x.shape
    total = c * n
    xt = np.ascontiguousarray(np.moveaxis(x, 1, 2))  # (c, k, n): lags along the last axis
    xc = xt - xt.mean(axis=2, keepdims=True)
    size = 1 << int(np.ceil(np.log2(2 * n)))  # zero padding >= 2n avoids circular wrap
    f = np.fft.rfft(xc, n=size, axis=2)
    acov = np.fft.irfft(f * np.conjugate(f), n=size, axis=2)[:, :, :n] / n  # biased
    mean_acov = acov.mean(axis=0)  # (k, n), averaged over chains
    w_var = mean_acov[:, 0] * n / (n - 1.0)  # within-chain variance W, (k,)
    var_plus = w_var * (n - 1.0) / n  # Vehtari et al. (2021) eq. (3)
    if c > 1:
        var_plus = var_plus + np.var(x.mean(axis=1), axis=0, ddof=1)  # + B/n
    out = np.empty(k)
    j_max = max((n - 2 + 1) // 2 - 1, 0)  # last pair the sequential loop may reach
    for j in range(k):
        if np.ptp(xt[:, j]) < np.finfo(float).resolution:
            out[j] = float(total)  # a constant has no Monte Carlo error
            continue
        rho = 1.0 - (w_var[j] - mean_acov[j]) / var_plus[j]  # eq. (10)
        rho[0] = 1.0
        n_pairs = j_max + 1
        pair = rho[0 : 2 * n_pairs : 2] + rho[1 : 2 * n_pairs + 1 : 2]  # P_0 .. P_jmax
        stop = np.flatnonzero(pair[: j_max + 1] <= 0.0)
        n_iter = int(min(j_max, stop[0])) if stop.size else j_max  # pairs computed after P_0
        kept = np.minimum.accumulate(pair[:n_iter])  # initial monotone sequence
        if n_iter == 0:
            extra = 1.0
        else:
            even = rho[2 * n_iter]
            extra = even if (even > 0.0 or pair[n_iter] >= 0.0) else 0.0
        tau = -1.0 + 2.0 * float(np.sum(kept)) + extra  # eq. (11)
        tau = max(tau, 1.0 / np.log10(total))  # caps ESS at n log10(n) for antithetic chains
        out[j] = total / tau
    return out


def chain_ess(x: npt.ArrayLike, chain_index: npt.ArrayLike | None = None) -> np.ndarray:
    """Effective sample size of the mean of a chain quantity, per component.

    Split-chain estimator of Vehtari et al. (2021) [5]_ (without rank normalisation) with
    Geyer's initial monotone sequence [6]_: each chain is split in halves, the
    autocorrelations are combined across chains and summed until pairs of lags turn
    negative. Rows are taken in order within each chain; chains of unequal length are cut to
    the shortest.

    Parameters
    ----------
    x : array_like, shape (n, ...)
    chain_index : array_like of int, shape (n,), optional
        Chain of each row; all rows form one chain when omitted.

    Returns
    -------
    ndarray, shape (...)
    """
    xa = np.asarray(x, dtype=np.float64)
    if xa.ndim < 1 or xa.shape[0] < 4:
        raise ValueError(f"x: expected at least 4 rows, got shape {xa.shape}")
    flat = xa.reshape(xa.shape[0], -1)
    if chain_index is None:
        groups = [flat]
    else:
        ci = np.asarray(chain_index)
        if ci.shape != (xa.shape[0],):
            raise ValueError(f"chain_index: expected shape ({xa.shape[0]},), got {ci.shape}")
        groups = [flat[ci == c] for c in np.unique(ci)]
    n = min(g.shape[0] for g in groups)
    half = n // 2
    if half < 2:
        raise ValueError(f"x: every chain needs at least 4 rows, shortest has {n}")
    parts = [g[:n] for g in groups]
    split = np.stack([p[:half] for p in parts] + [p[n - half :] for p in parts])  # (2c, n/2, k)
    return _ess_chains(split).reshape(xa.shape[1:])


_chain_ess = chain_ess  # estimate_qoi has a keyword argument of the same name


# --------------------------------------------------------------------------------------------
# bootstrap
# --------------------------------------------------------------------------------------------
def bootstrap_mean_se(
    values: npt.ArrayLike,
    weights: npt.ArrayLike,
    *,
    n_boot: int = 1000,
    rng: int | np.random.Generator | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Bootstrap standard error of the weighted mean, resampling (value, weight) pairs.

    Method: draw ``m`` of the points with positive weight uniformly with replacement,
    keeping each point's weight, and recompute the weighted mean
    ``sum_j w_j y_j / sum_j w_j`` of the resample (the pairs bootstrap of a ratio estimator,
    Efron & Tibshirani 1993 ch. 9 [4]_). A point carrying a large weight then moves the
    resampled means a lot, so uneven weights widen the error as they should; its
    linearised variance is ``sum_i w_i^2 (y_i - mean)^2``, i.e. ``sd^2 / m`` for equal
    weights.

    Returns
    -------
    se : ndarray, shape (...)
        Standard deviation (ddof=1) of the ``n_boot`` resampled means.
    low, high : ndarray, shape (...)
        2.5 % and 97.5 % percentiles of the resampled means.
    """
    y = _validate_values(values)
    w = _validate_weights(weights, y.shape[0])
    if isinstance(n_boot, bool) or not isinstance(n_boot, int | np.integer) or n_boot < 2:
        raise ValueError(f"n_boot: expected an int >= 2, got {n_boot!r}")
    gen = np.random.default_rng(rng)
    keep = w > 0
    y, w = y[keep], w[keep]
    m = y.shape[0]
    flat = y.reshape(m, -1)
    idx = gen.integers(0, m, size=(int(n_boot), m))
    wb = w[idx]  # (B, m)
    means = np.einsum("bm,bmk->bk", wb, flat[idx]) / wb.sum(axis=1, keepdims=True)
    se = means.std(axis=0, ddof=1) if m > 1 else np.zeros(flat.shape[1])
    low, high = np.percentile(means, [2.5, 97.5], axis=0)
    shape = y.shape[1:]
    return se.reshape(shape), low.reshape(shape), high.reshape(shape)


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
    if (cheap_on_points is None) != (cheap_on_chain is None):
        raise ValueError("cheap_on_points and cheap_on_chain: give both or neither")
    gen = np.random.default_rng(rng)

    y, pos, left_out, shape = _split_values(values, m, name)
    run_ids = (
        [v.run_id for v in values]
        if isinstance(values, Sequence) and values and isinstance(values[0], QoIValue)
        else None
    )
    cp = cc = None
    if cheap_on_points is not None:
        cp = np.asarray(cheap_on_points, dtype=np.float64)
        cc = np.asarray(cheap_on_chain, dtype=np.float64)
        if cp.shape != (m,) + shape:
            raise ValueError(f"cheap_on_points: expected shape {(m,) + shape}, got {cp.shape}")
        if cc.ndim < 1 or cc.shape[1:] != shape or cc.shape[0] < 1:
            raise ValueError(f"cheap_on_chain: expected shape (n,) + {shape}, got {cc.shape}")
    if not isinstance(level, float | int) or not 0.5 <= float(level) < 1.0:
        raise ValueError(f"level: expected a probability in [0.5, 1), got {level!r}")
    level = float(level)

    details: dict[str, Any] = {
        "quantile_definition": "weighted Hazen: linear interpolation between midpoints of the "
        "weighted empirical CDF steps (Hyndman & Fan 1996 definition 5 for equal weights)",
        "sd_definition": "sd of the weighted empirical distribution (no small-sample factor)",
        "left_out": left_out,
        "level": level,
    }
    # -- non-finite cheap predictions: dropped and counted, never a crash ----------------------
    cheap_ok = None  # per component: whether the cheap model is usable at every survivor
    if cc is not None:
        cc_flat = cc.reshape(cc.shape[0], -1)
        finite_rows = np.all(np.isfinite(cc_flat), axis=1)
        n_bad = int((~finite_rows).sum())
        if n_bad:
            details["cheap_nonfinite_chain_rows"] = n_bad
            details["cheap_note"] = (
                f"{n_bad} of {cc.shape[0]} chain rows gave a non-finite cheap prediction; "
                "they are left out of the cheap model's chain mean and its checks"
            )
        if n_bad == cc.shape[0]:
            cp = cc = None
            details["cheap_note"] = (
                "every cheap prediction is non-finite; the cheap model is unused"
            )
        else:
            cc = cc[finite_rows]
            if chain_weights is not None:
                chain_weights = np.asarray(chain_weights, dtype=np.float64)[finite_rows]
            if chain_index is not None:
                chain_index = np.asarray(chain_index)[finite_rows]
    if y.shape[0] == 0:
        return _nan_estimate(name, units, shape, qs, th, m, left_out)

    # -- weights of the survivors ------------------------------------------------------------
    weights_resolved, mmd_growth = False, 0.0
    if pos.size == m:
        w = w_all
        details["weights_rule"] = "selection weights"
    elif resolve_weights is not None:
        new_w, mmd_before, mmd_after = resolve_weights(pos.copy())
        w = _validate_weights(new_w, pos.size, "resolve_weights result")
        weights_resolved = True
        mmd_growth = float(mmd_after) - float(mmd_before)
        details["weights_rule"] = "re-solved for the surviving points"
        details["mmd_before"] = float(mmd_before)
        details["mmd_after"] = float(mmd_after)
    else:
        w = _validate_weights(w_all[pos], pos.size, "surviving weights")
        details["weights_rule"] = (
            "surviving selection weights renormalised to sum to one "
            "(no re-solve available; the discrepancy growth is unknown)"
        )
    ess_points = kish_ess(w)
    details["ess_points"] = ess_points
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

    # -- chain Monte Carlo error ---------------------------------------------------------------
    chain_sd = None
    cw = None
    chain_mean = None
    if cc is not None:
        n = cc.shape[0]
        cw = (
            _validate_weights(chain_weights, n, "chain_weights")
            if chain_weights is not None
            else np.full(n, 1.0 / n)
        )
        chain_mean, chain_sd = weighted_mean_sd(cc, cw)
        details["chain_rows"] = int(n)
    if chain_ess is not None:
        ess_c = np.broadcast_to(np.asarray(chain_ess, dtype=np.float64), shape)
        if not np.all(ess_c > 0):
            raise ValueError(f"chain_ess: expected positive values, got {chain_ess!r}")
        ess_basis = "given"
        if cc is not None and chain_weights is None and cc.shape[0] >= 8:
            # the QoI's own autocorrelation is unknown: take the smaller of the given ESS
            # (e.g. the parameters') and the cheap prediction's, not the more optimistic
            ess_c = np.minimum(ess_c, _chain_ess(cc, chain_index))
            ess_basis = "smaller of the given ESS and the cheap prediction's split-chain ESS"
    elif cc is not None and chain_weights is not None:
        ess_c = np.full(shape, kish_ess(cw))
        ess_basis = "Kish ESS of the chain weights"
    elif cc is not None and cc.shape[0] >= 4:
        ess_c = _chain_ess(cc, chain_index)
        ess_basis = "split-chain ESS of the cheap prediction (Vehtari et al. 2021)"
    else:
        ess_c = None
        ess_basis = ""
    if ess_c is not None:
        # the QoI's own spread over the chain, at the ESS of the chain
        uncertainty["chain_mcse"] = np.asarray(sd / np.sqrt(ess_c), dtype=np.float64)
        details["chain_mcse"] = (
            f"weighted sd of the QoI / sqrt(chain ESS); ESS {ess_basis}: the chain's own "
            "Monte Carlo error of the posterior expectation"
        )
        details["chain_ess"] = np.asarray(ess_c, dtype=np.float64)

    # -- the cheap model's check of the selection (not an error term: the multi-fidelity
    # estimate applies it as its correction) --------------------------------------------------
    control = None
    if cp is not None and chain_mean is not None:
        c = cp[pos]
        c_points = np.sum(w.reshape((-1,) + (1,) * len(shape)) * c, axis=0)
        with np.errstate(invalid="ignore"):
            gap = c_points - chain_mean
        details["cheap_gap"] = np.asarray(gap)
        d_mean, d_sd = weighted_mean_sd(np.where(np.isfinite(c), y - c, 0.0), w)
        _, c_sd = weighted_mean_sd(np.where(np.isfinite(c), c, 0.0), w)
        cov = np.sum(
            w.reshape((-1,) + (1,) * len(shape)) * (y - mean) * (np.nan_to_num(c) - c_points),
            axis=0,
        )
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
            "ess_points": ess_points,
        }

    # -- the error model: one headline per component ------------------------------------------
    headline = _headlines(
        y,
        w,
        pos,
        shape,
        points,
        geometry,
        cp,
        cc,
        cw,
        cheap_ok,
        uncertainty,
        ess_c,
        ess_points,
        qs,
        quant,
        th,
        level,
        forecast,
        gen,
    )
    if headline is not None:
        rep = None
        if pos.size < m and geometry is not None:
            failed = np.ones(m, dtype=bool)
            failed[pos] = False
            rep = clustering_flag(geometry.standardise(points), failed, gen)
        if rep is not None:
            headline["flags"] = sorted([*headline["flags"], rep])
            headline["reliable"] = False
        uncertainty["thinning_se"] = np.asarray(headline.pop("_thinning_se"))
        uncertainty["total_se"] = np.asarray(headline.pop("_total_se"))
        if control is not None:
            control["se"] = np.asarray(headline.pop("_discrepancy_se"))
        else:
            headline.pop("_discrepancy_se")
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


def _headlines(
    y,
    w,
    pos,
    shape,
    points,
    geometry,
    cp,
    cc,
    cw,
    cheap_ok,
    uncertainty,
    ess_c,
    ess_points,
    qs,
    quant,
    th,
    level,
    want_forecast,
    gen,
) -> dict[str, Any] | None:
    """Error model, headline estimate and intervals of every component; None without chain."""
    if points is None or geometry is None:
        return None
    pts_all = np.asarray(points, dtype=np.float64)
    if pts_all.ndim == 1:
        pts_all = pts_all[:, None]
    pts = pts_all[pos]
    k = int(np.prod(shape)) if shape else 1
    yf = y.reshape(y.shape[0], k)
    cpf = None if cp is None else cp[pos].reshape(len(pos), k)
    ccf = None if cc is None else cc.reshape(cc.shape[0], k)
    mcse = uncertainty.get("chain_mcse")
    mcf = np.zeros(k) if mcse is None else np.asarray(mcse, dtype=np.float64).reshape(k)
    essf = None if ess_c is None else np.asarray(ess_c, dtype=np.float64).reshape(k)
    comps: list[dict[str, Any]] = []
    fits = []
    for j in range(k):
        usable = cpf is not None and (cheap_ok is None or bool(np.ravel(cheap_ok)[j]))
        cmean = float(cw @ ccf[:, j]) if usable else None
        fit, h = component_headline(
            pts,
            yf[:, j],
            w,
            geometry,
            cheap_points=cpf[:, j] if usable else None,
            cheap_chain_mean=cmean,
            chain_mcse=float(mcf[j]),
            level=level,
        )
        ess_j = None if essf is None else float(essf[j])
        probs = {
            float(t): probability_interval(
                (yf[:, j] > t).astype(float),
                w,
                ess_points=ess_points,
                chain_ess=ess_j,
                level=level,
            )
            for t in th
        }
        qint = {}
        for q in qs:
            est_q = float(np.ravel(quant[float(q)])[j])
            cdf = probability_interval(
                (yf[:, j] <= est_q).astype(float),
                w,
                ess_points=ess_points,
                chain_ess=ess_j,
                level=level,
            )
            qint[float(q)] = quantile_interval(yf[:, j], w, float(q), est_q, cdf, level)
        h["exceedance_intervals"] = {t: v["interval"] for t, v in probs.items()}
        h["exceedance_estimates"] = {t: v["estimate"] for t, v in probs.items()}
        h["quantile_intervals"] = qint
        comps.append(h)
        fits.append(fit)

    def arr(key: str) -> np.ndarray:
        return np.asarray([c[key] for c in comps], dtype=np.float64).reshape(shape)

    flags = sorted({f for c in comps for f in c["flags"]})
    rules = sorted({c["rule"] for c in comps})
    out: dict[str, Any] = {
        "level": level,
        "estimate": arr("estimate"),
        "interval_low": np.asarray([c["interval"][0] for c in comps]).reshape(shape),
        "interval_high": np.asarray([c["interval"][1] for c in comps]).reshape(shape),
        "chain_mean_low": np.asarray([c["chain_mean_interval"][0] for c in comps]).reshape(shape),
        "chain_mean_high": np.asarray([c["chain_mean_interval"][1] for c in comps]).reshape(shape),
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


ASSUMPTIONS = (
    "The QoI (or its difference from the cheap model) behaves like a draw from a Gaussian "
    "process with a Matern 5/2 covariance whose scale, length and nugget are fitted to the run "
    "values (REML); the thinning error of a weighted rule is then Gaussian with sd sigma x MMD "
    "of the points to the chain under that covariance. A feature narrower than the spacing of "
    "the points, that no run touched and the cheap model does not share, cannot be seen by any "
    "error model built from these runs: the leave-one-out and cheap-model checks flag the "
    "features they can see. The chain's Monte Carlo error is sd / sqrt(ESS)."
)
