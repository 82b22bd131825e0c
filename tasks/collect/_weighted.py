"""Weighted summaries of run values and effective sample sizes: the weighted mean, sd,
quantiles and exceedance probabilities of ``m`` values ``y_i`` with weights ``w_i``, the Kish
effective number of the weights, the split-chain ESS of a chain and the i.i.d. pairs bootstrap
of the weighted mean.

References
----------
.. [1] Hyndman, R. J. and Fan, Y. (1996). Sample quantiles in statistical packages.
   The American Statistician 50(4), 361-365.
.. [2] Kish, L. (1965). Survey Sampling. Wiley, New York.
.. [3] Efron, B. (1979). Bootstrap methods: another look at the jackknife. Ann. Statist.
   7(1), 1-26; Efron, B. and Tibshirani, R. J. (1993). An Introduction to the Bootstrap.
   Chapman & Hall, ch. 6 and 9 (bootstrapping pairs).
.. [4] Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. and Buerkner, P.-C. (2021).
   Rank-normalization, folding, and localization: an improved R-hat for assessing
   convergence of MCMC. Bayesian Analysis 16(2), 667-718.
.. [5] Geyer, C. J. (1992). Practical Markov chain Monte Carlo. Statistical Science 7(4),
   473-483.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

__all__ = [
    "bootstrap_mean_se",
    "chain_ess",
    "kish_ess",
    "weighted_mean_sd",
    "weighted_quantile",
]


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
