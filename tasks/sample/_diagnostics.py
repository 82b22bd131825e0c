"""Convergence diagnostics of Markov chains: rank-normalised split R-hat, bulk and tail
effective sample size, Monte Carlo standard errors, and the burn-in rule.

All functions take draws shaped ``(chains, draws)`` for one parameter or
``(chains, draws, d)`` for several and return a float or an array of shape ``(d,)``.
A single chain may be given as shape ``(draws,)``.

Definitions follow Vehtari et al. (2021):

* chains are split in halves (with an odd count the middle draw is dropped), so that a
  trend within a chain shows as disagreement between its halves;
* rank normalisation: ``z = Phi^-1((r - 3/8) / (S + 1/4))`` with ``r`` the average rank of a
  draw among all ``S`` draws (Eq. 14);
* R-hat is the larger of the bulk R-hat (rank-normalised split draws) and the tail R-hat
  (the same on the draws folded about their median, ``|x - median|``) (Sec. 4.1-4.2);
* ESS uses the autocorrelations of all chains together (Eq. 10) with Geyer's initial
  monotone sequence truncation (Sec. 3.2); bulk ESS on rank-normalised split draws, tail ESS
  the smaller ESS of the indicators ``x <= q05`` and ``x <= q95`` (Sec. 4.3);
* MCSE of the mean is ``sd / sqrt(ESS of the raw split draws)``; MCSE of a quantile uses the
  ESS of its indicator and the 16 %/84 % quantiles of a Beta distribution mapped back
  through the sorted draws (Sec. 4.4), ranks rounded outwards.

References
----------
.. [1] Vehtari, A., Gelman, A., Simpson, D., Carpenter, B., Bürkner, P.-C. (2021).
   Rank-normalization, folding, and localization: an improved R-hat for assessing
   convergence of MCMC. Bayesian Analysis 16(2), 667-718.
.. [2] Geyer, C. J. (1992). Practical Markov chain Monte Carlo. Statistical Science 7(4),
   473-483 (initial positive / monotone sequence estimators).
.. [3] Gelman, A., Rubin, D. B. (1992). Inference from iterative simulation using multiple
   sequences. Statistical Science 7(4), 457-472.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import replace
from typing import Literal

import numpy as np
import numpy.typing as npt
from scipy import special

from winnow.tasks.errors import InputError
from winnow.tasks.records import Chain, Diagnostics, ParameterDiagnostics

__all__ = [
    "DEFAULT_THRESHOLDS",
    "burn_in_count",
    "chain_to_array",
    "diagnose",
    "diagnose_chain",
    "ess_bulk",
    "ess_mean",
    "ess_tail",
    "mcse_mean",
    "mcse_quantile",
    "rhat",
]

#: Default thresholds: R-hat below 1.01 and bulk/tail ESS above 400 (Vehtari et al. 2021,
#: Sec. 4.5 recommend R-hat < 1.01 and ESS > 400 for four chains).
DEFAULT_THRESHOLDS: dict[str, float] = {
    "rhat_max": 1.01,
    "ess_bulk_min": 400.0,
    "ess_tail_min": 400.0,
}

BurnIn = int | Literal["half", "none"]


# --------------------------------------------------------------------------------------------
# array helpers
# --------------------------------------------------------------------------------------------
def _as_draws(draws: npt.ArrayLike) -> tuple[np.ndarray, bool]:
    """Return (array of shape (chains, draws, d), True when the input had no d axis)."""
    a = np.asarray(draws, dtype=np.float64)
    if a.ndim == 1:
        return a[None, :, None], True
    if a.ndim == 2:
        return a[:, :, None], True
    if a.ndim == 3:
        return a, False
    raise ValueError(
        f"draws must have shape (draws,), (chains, draws) or (chains, draws, d); got {a.shape}"
    )


def _out(values: np.ndarray, scalar: bool) -> float | np.ndarray:
    return float(values[0]) if scalar else values


def _split(a: np.ndarray) -> np.ndarray:
    """Split each chain in two halves: (m, n, d) -> (2m, n // 2, d)."""
    m, n, d = a.shape
    half = n // 2
    if half < 2:
        raise ValueError(f"need at least 4 draws per chain for split diagnostics, got {n}")
    return np.concatenate([a[:, :half], a[:, n - half :]], axis=0)


def _rank_normalise(a: np.ndarray) -> np.ndarray:
    """Eq. (14) of Vehtari et al. (2021), over all chains and draws of each parameter."""
    m, n, d = a.shape
    flat = a.reshape(m * n, d)
    from scipy.stats import rankdata  # imported here: scipy.stats is slow to import

    r = rankdata(flat, method="average", axis=0)
    z = special.ndtri((r - 0.375) / (m * n + 0.25))
    return z.reshape(m, n, d)


def _rhat_basic(a: np.ndarray) -> np.ndarray:
    """Potential scale reduction of (split) chains a, shape (m, n, d) -> (d,)."""
    m, n, _ = a.shape
    chain_mean = a.mean(axis=1)
    w = a.var(axis=1, ddof=1).mean(axis=0)  # within-chain variance
    b_over_n = chain_mean.var(axis=0, ddof=1)  # between-chain variance / n
    var_plus = (n - 1) / n * w + b_over_n
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.sqrt(var_plus / w)


def _autocov(a: np.ndarray) -> np.ndarray:
    """Autocovariance of each chain at lags 0..n-1 (divisor n), by FFT: (m, n, d) -> same."""
    m, n, d = a.shape
    x = a - a.mean(axis=1, keepdims=True)
    size = 1 << int(math.ceil(math.log2(2 * n)))
    f = np.fft.rfft(x, n=size, axis=1)
    return np.fft.irfft(f * np.conj(f), n=size, axis=1)[:, :n] / n


def _ess(a: np.ndarray) -> np.ndarray:
    """Effective sample size of chains a (already split/normalised as wanted) -> (d,)."""
    m, n, d = a.shape
    out = np.empty(d)
    acov = _autocov(a)
    chain_var = acov[:, 0] * n / (n - 1.0)  # (m, d)
    mean_var = chain_var.mean(axis=0)
    var_plus = mean_var * (n - 1.0) / n
    if m > 1:
        var_plus = var_plus + a.mean(axis=1).var(axis=0, ddof=1)
    total = m * n
    for j in range(d):
        span = np.ptp(a[:, :, j])
        if not np.isfinite(span):
            out[j] = np.nan
            continue
        if span < np.finfo(float).resolution:
            out[j] = total  # constant draws: no autocorrelation to speak of
            continue
        # Eq. (10): combined autocorrelation estimate rho_t for every lag t.
        rho = 1.0 - (mean_var[j] - acov[:, :, j].mean(axis=0)) / var_plus[j]
        rho[0] = 1.0  # by definition (the estimate above is not exactly 1 at lag 0)
        # Geyer (1992): sums of adjacent pairs P_k = rho_2k + rho_2k+1 are positive and
        # decreasing for a reversible chain; truncate at the first non-positive pair and
        # enforce monotonicity on the rest.
        n_pairs = (n - 1) // 2  # pairs (rho_2k, rho_2k+1) with 2k + 1 <= n - 2
        pairs = rho[0 : 2 * n_pairs : 2] + rho[1 : 2 * n_pairs : 2]
        nonpos = np.flatnonzero(pairs[1:] <= 0)
        k = int(nonpos[0]) + 1 if nonpos.size else n_pairs - 1
        k = max(k, 1)
        kept = np.minimum.accumulate(pairs[:k])
        tail = rho[2 * k] if 2 * k < n else 0.0
        tau = -1.0 + 2.0 * kept.sum() + max(tail, 0.0)
        tau = max(tau, 1.0 / math.log10(total))  # cap for antithetic chains
        out[j] = total / tau
    return out


# --------------------------------------------------------------------------------------------
# public estimators
# --------------------------------------------------------------------------------------------
def rhat(draws: npt.ArrayLike) -> float | np.ndarray:
    """Rank-normalised split R-hat: max of bulk and folded (tail) R-hat.

    Parameters
    ----------
    draws : array_like, shape (chains, draws) or (chains, draws, d)

    Returns
    -------
    float or ndarray, shape (d,)
        NaN for a parameter whose draws are all equal.

    References
    ----------
    Vehtari et al. (2021), Sec. 4.1-4.2.
    """
    a, scalar = _as_draws(draws)
    split = _split(a)
    bulk = _rhat_basic(_rank_normalise(split))
    folded = np.abs(a - np.median(a.reshape(-1, a.shape[2]), axis=0))
    tail = _rhat_basic(_rank_normalise(_split(folded)))
    return _out(np.fmax(bulk, tail), scalar)


def ess_bulk(draws: npt.ArrayLike) -> float | np.ndarray:
    """Bulk effective sample size (ESS of rank-normalised split chains).

    Parameters
    ----------
    draws : array_like, shape (chains, draws) or (chains, draws, d)

    References
    ----------
    Vehtari et al. (2021), Sec. 4.3.
    """
    a, scalar = _as_draws(draws)
    return _out(_ess(_rank_normalise(_split(a))), scalar)


def ess_mean(draws: npt.ArrayLike) -> float | np.ndarray:
    """Effective sample size for the mean (ESS of the raw split chains)."""
    a, scalar = _as_draws(draws)
    return _out(_ess(_split(a)), scalar)


def _quantile_indicator_ess(a: np.ndarray, prob: float) -> np.ndarray:
    q = np.quantile(a.reshape(-1, a.shape[2]), prob, axis=0)
    return _ess(_split((a <= q).astype(np.float64)))


def ess_tail(draws: npt.ArrayLike) -> float | np.ndarray:
    """Tail effective sample size: min of the ESS of ``x <= q05`` and ``x <= q95``.

    References
    ----------
    Vehtari et al. (2021), Sec. 4.3.
    """
    a, scalar = _as_draws(draws)
    low = _quantile_indicator_ess(a, 0.05)
    high = _quantile_indicator_ess(a, 0.95)
    return _out(np.fmin(low, high), scalar)


def mcse_mean(draws: npt.ArrayLike) -> float | np.ndarray:
    """Monte Carlo standard error of the posterior mean, ``sd / sqrt(ESS_mean)``."""
    a, scalar = _as_draws(draws)
    sd = a.reshape(-1, a.shape[2]).std(axis=0, ddof=1)
    return _out(sd / np.sqrt(_ess(_split(a))), scalar)


def mcse_quantile(draws: npt.ArrayLike, prob: float) -> float | np.ndarray:
    """Monte Carlo standard error of the ``prob`` quantile.

    Parameters
    ----------
    draws : array_like, shape (chains, draws) or (chains, draws, d)
    prob : float in (0, 1)

    References
    ----------
    Vehtari et al. (2021), Sec. 4.4: with ``S`` the ESS of the indicator ``x <= q``, the
    16 % and 84 % quantiles ``a1, a2`` of Beta(S p + 1, S (1 - p) + 1) give the draws of
    rank ``a1 N`` and ``a2 N``; the MCSE is half their distance.
    """
    if not 0.0 < float(prob) < 1.0:
        raise ValueError(f"prob must be in (0, 1), got {prob}")
    a, scalar = _as_draws(draws)
    s = _quantile_indicator_ess(a, prob)
    flat = np.sort(a.reshape(-1, a.shape[2]), axis=0)
    size = flat.shape[0]
    out = np.empty(a.shape[2])
    for j in range(a.shape[2]):
        # Quantiles of Beta(a, b): the inverse of the regularised incomplete beta function.
        lo_p, hi_p = special.betaincinv(
            s[j] * prob + 1.0, s[j] * (1.0 - prob) + 1.0, np.array([0.1586553, 0.8413447])
        )
        # 1-based ranks floor(a1 N) and ceil(a2 N), kept inside 1..N (rounding outwards
        # so that the interval is not understated).
        i1 = max(math.floor(lo_p * size), 1) - 1
        i2 = min(math.ceil(hi_p * size), size) - 1
        out[j] = 0.5 * (flat[i2, j] - flat[i1, j])
    return _out(out, scalar)


# --------------------------------------------------------------------------------------------
# burn-in and the full summary
# --------------------------------------------------------------------------------------------
def burn_in_count(n_draws: int, burn_in: BurnIn = "half") -> tuple[int, str]:
    """Draws to drop from the start of every chain, and the rule stated in words.

    Parameters
    ----------
    n_draws : int
        Draws per chain before burn-in removal.
    burn_in : "half", "none" or int
        ``"half"`` (default) drops the first ``n_draws // 2`` draws of each chain (Gelman et
        al., Bayesian Data Analysis 3rd ed., Sec. 11.5: "discard the first half"); ``"none"``
        or 0 keeps everything (for chains already cleaned of their warm-up, as chain files
        from other samplers nearly always are); an int drops that many.
    """
    if isinstance(burn_in, bool):
        raise TypeError(f"burn_in must be 'half', 'none' or an int, got {burn_in!r}")
    if isinstance(burn_in, str):
        rules = {
            "half": (n_draws // 2, f"first half of each chain discarded ({n_draws // 2} draws)"),
            "none": (0, f"no burn-in removed: all {n_draws} draws of each chain kept"),
        }
        if burn_in not in rules:
            raise InputError(f"burn_in must be 'half', 'none' or an int, got {burn_in!r}")
        return rules[burn_in]
    if isinstance(burn_in, (int, np.integer)):
        n = int(burn_in)
        if n < 0 or n >= n_draws:
            raise InputError(
                f"burn_in must be between 0 and the draws per chain minus one "
                f"({n_draws - 1}), got {n}"
            )
        if n == 0:
            return 0, f"no burn-in removed: all {n_draws} draws of each chain kept"
        return n, f"first {n} draws of each chain discarded (stated burn-in)"
    raise TypeError(f"burn_in must be 'half', 'none' or an int, got {burn_in!r}")


def _validate_thresholds(thresholds: Mapping[str, float] | None) -> dict[str, float]:
    out = dict(DEFAULT_THRESHOLDS)
    if thresholds is None:
        return out
    for key, value in thresholds.items():
        if key not in DEFAULT_THRESHOLDS:
            raise ValueError(
                f"thresholds: unknown key {key!r}; valid keys are {', '.join(DEFAULT_THRESHOLDS)}"
            )
        if value is None:
            continue
        v = float(value)
        if not math.isfinite(v) or (key == "rhat_max" and v <= 1.0) or v <= 0:
            raise ValueError(f"thresholds[{key!r}] = {value!r} is not a usable threshold")
        out[key] = v
    return out


def _summarise(
    kept: np.ndarray,
    names: Sequence[str],
    *,
    burn_in: int,
    rule: str,
    acceptance: np.ndarray | None,
    thresholds: dict[str, float],
) -> Diagnostics:
    m, n, d = kept.shape
    r = np.atleast_1d(rhat(kept))
    eb = np.atleast_1d(ess_bulk(kept))
    et = np.atleast_1d(ess_tail(kept))
    mm = np.atleast_1d(mcse_mean(kept))
    q05 = np.atleast_1d(mcse_quantile(kept, 0.05))
    q95 = np.atleast_1d(mcse_quantile(kept, 0.95))
    flat = kept.reshape(-1, d)
    mean, sd = flat.mean(axis=0), flat.std(axis=0, ddof=1)
    params: dict[str, ParameterDiagnostics] = {}
    messages: list[str] = []
    for j, name in enumerate(names):
        params[name] = ParameterDiagnostics(
            rhat=float(r[j]),
            ess_bulk=float(eb[j]),
            ess_tail=float(et[j]),
            mcse_mean=float(mm[j]),
            mcse_q05=float(q05[j]),
            mcse_q95=float(q95[j]),
            mean=float(mean[j]),
            sd=float(sd[j]),
        )
        if not np.isfinite(r[j]):
            messages.append(
                f"{name}: R-hat is undefined (all draws equal or non-finite); "
                f"threshold R-hat < {thresholds['rhat_max']:g}"
            )
        elif r[j] >= thresholds["rhat_max"]:
            messages.append(
                f"{name}: R-hat {r[j]:.4f} is not below the threshold {thresholds['rhat_max']:g}"
            )
        if not eb[j] > thresholds["ess_bulk_min"]:
            messages.append(
                f"{name}: bulk ESS {eb[j]:.1f} is not above the threshold "
                f"{thresholds['ess_bulk_min']:g}"
            )
        if not et[j] > thresholds["ess_tail_min"]:
            messages.append(
                f"{name}: tail ESS {et[j]:.1f} is not above the threshold "
                f"{thresholds['ess_tail_min']:g}"
            )
    acc = np.full(m, np.nan) if acceptance is None else np.asarray(acceptance, dtype=float)
    if acc.shape != (m,):
        raise ValueError(f"acceptance must have shape ({m},), got {acc.shape}")
    return Diagnostics(
        parameters=params,
        n_chains=m,
        n_draws=n,
        burn_in=burn_in,
        burn_in_rule=rule,
        acceptance=acc,
        thresholds=dict(thresholds),
        passed=not messages,
        messages=tuple(messages),
    )


def diagnose(
    draws: npt.ArrayLike,
    names: Sequence[str] | None = None,
    *,
    burn_in: BurnIn = "half",
    thresholds: Mapping[str, float] | None = None,
    acceptance: npt.ArrayLike | None = None,
) -> Diagnostics:
    """Remove burn-in and compute every diagnostic of every parameter.

    Parameters
    ----------
    draws : array_like, shape (chains, draws, d)
        Draws in the user's units, burn-in still included.
    names : sequence of str, length d, optional
        Parameter names (default ``x0, x1, ...``).
    burn_in : "half", "none" or int
        See :func:`burn_in_count` (default: the first half of each chain).
    thresholds : dict, optional
        ``rhat_max`` (default 1.01), ``ess_bulk_min`` (400), ``ess_tail_min`` (400).
    acceptance : array_like, shape (chains,), optional
        Acceptance rate of each chain (NaN when unknown).

    Returns
    -------
    Diagnostics
        ``passed`` is False, with one message per failed check, when a threshold fails.
    """
    a, _ = _as_draws(draws)
    if np.asarray(draws).ndim != 3:
        raise ValueError(f"draws must have shape (chains, draws, d), got {np.shape(draws)}")
    m, n, d = a.shape
    names_t = tuple(f"x{j}" for j in range(d)) if names is None else tuple(names)
    if len(names_t) != d:
        raise ValueError(f"names has {len(names_t)} entries for {d} parameters")
    n_burn, rule = burn_in_count(n, burn_in)
    kept = a[:, n_burn:]
    if kept.shape[1] < 4:
        raise ValueError(
            f"only {kept.shape[1]} draws per chain remain after burn-in ({rule}); "
            "at least 4 are needed"
        )
    bad = ~np.isfinite(kept)
    if bad.any():
        j = int(np.flatnonzero(bad.any(axis=(0, 1)))[0])
        raise ValueError(
            f"draws of {names_t[j]!r} hold {int(bad[..., j].sum())} non-finite value(s); "
            "diagnostics need finite draws"
        )
    acc = None if acceptance is None else np.asarray(acceptance, dtype=float)
    return _summarise(
        kept,
        names_t,
        burn_in=n_burn,
        rule=rule,
        acceptance=acc,
        thresholds=_validate_thresholds(thresholds),
    )


def chain_to_array(chain: Chain, *, chains: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Arrange a chain's rows as (chains, draws, d) in draw order.

    Parameters
    ----------
    chain : Chain
    chains : int, optional
        Split a chain whose rows all belong to one chain into this many consecutive chains
        of equal length (trailing rows that do not fill a chain are dropped).

    Returns
    -------
    draws : ndarray, shape (chains, draws, d)
    rows : ndarray of int64, shape (chains, draws)
        Row of ``chain.samples`` each draw came from. Chains of unequal length are cut to
        the shortest (the rows dropped are the last ones of the longer chains).
    """
    labels = np.unique(chain.chain_index)
    if chains is not None:
        if isinstance(chains, bool) or not isinstance(chains, (int, np.integer)) or chains < 1:
            raise InputError(f"chains must be a positive integer, got {chains!r}")
        if labels.size > 1 and chains != labels.size:
            raise InputError(
                f"the chain already names {labels.size} chains; cannot split it into {chains}"
            )
        order = np.lexsort((chain.draw_index, chain.chain_index))
        per = chain.n // int(chains)
        if per < 4:
            raise InputError(
                f"{chain.n} rows cannot be split into {chains} chains of at least 4 draws"
            )
        rows = order[: per * int(chains)].reshape(int(chains), per)
        return chain.samples[rows], rows
    groups = []
    for lab in labels:
        idx = np.flatnonzero(chain.chain_index == lab)
        groups.append(idx[np.argsort(chain.draw_index[idx], kind="stable")])
    per = min(len(g) for g in groups)
    rows = np.stack([g[:per] for g in groups])
    return chain.samples[rows], rows


def diagnose_chain(
    chain: Chain,
    *,
    chains: int | None = None,
    burn_in: BurnIn = "none",
    thresholds: Mapping[str, float] | None = None,
    acceptance: npt.ArrayLike | None = None,
) -> Chain:
    """Diagnose an (imported) chain and return it without its burn-in, diagnostics attached.

    Parameters
    ----------
    chain : Chain
    chains : int, optional
        Split a single-chain sample into this many consecutive chains first.
    burn_in : "half", "none" or int
        See :func:`burn_in_count`. Default ``"none"``, every draw kept: an imported chain
        has normally had its warm-up removed by the sampler that wrote it.
    thresholds, acceptance
        As in :func:`diagnose`.

    Returns
    -------
    Chain
        Rows after burn-in (in chain, draw order); ``chain_index`` as arranged,
        ``draw_index`` counted from the end of the burn-in.
    """
    draws, rows = chain_to_array(chain, chains=chains)
    diag = diagnose(
        draws, chain.names, burn_in=burn_in, thresholds=thresholds, acceptance=acceptance
    )
    kept_rows = rows[:, diag.burn_in :]
    m, n = kept_rows.shape
    flat = kept_rows.reshape(-1)
    return replace(
        chain,
        samples=np.ascontiguousarray(chain.samples[flat]),
        chain_index=np.repeat(np.arange(m, dtype=np.int64), n),
        draw_index=np.tile(np.arange(n, dtype=np.int64), m),
        log_density=None if chain.log_density is None else chain.log_density[flat],
        diagnostics=diag,
    )
