"""An error model for the weighted, optimised points of the thin stage.

The chosen points are optimised, not random, so i.i.d. formulas (bootstrap of pairs,
textbook control-variate variances) do not describe their error: for smooth quantities they
overstate it by orders of magnitude, and for a sharp feature they can understate it. This
module states the error of a weighted rule from the structure the method already has.

Model
-----
Write the costly QoI at a point as ``f(x) = mu + beta c(x) + h(x)`` where ``c`` is the cheap
prediction (known on every chain row; ``beta = 0`` without one) and ``h`` is a zero-mean
Gaussian process with covariance ``sigma^2 (k_l(x, x') + eta [x = x'])`` over the
standardised parameters (``k_l`` a stationary kernel of length scale ``l``, ``eta`` a nugget
that absorbs roughness the kernel cannot follow). The estimate of the chain mean of ``f`` is

    E_b = sum_i w_i (y_i - b c_i) + b cbar,          (1)

the plain weighted mean for ``b = 0``, the discrepancy (multi-fidelity) form for ``b = 1``,
and the regression (control-variate) form for ``b = beta_hat``, the generalised least-squares
coefficient under the same process. Its error against the chain mean is

    E_b - P_n f = e(h) - (b - beta) gap,   gap = sum_i w_i c_i - cbar,          (2)

with ``e(h) = sum_i w_i h(x_i) - P_n h`` the quadrature error of the rule. Under the process,
``Var e(h) = sigma^2 MMD^2_k(Q_w, P_n)`` -- the worst-case error of the rule over the unit ball
of the kernel's RKHS is the MMD, and its average-case (Gaussian-process) error is the MMD
times ``sigma`` [1]_ [2]_ [3]_ -- and, for ``b = beta_hat = beta + a^T h(x)``,

    Var(E - P_n f) = sigma^2 [MMD^2 - 2 gap a^T u + gap^2 a^T K a],
    u = K w - z,   z_i = P_n k(x_i, .),          (3)

all in closed form. ``sigma``, ``l`` and ``eta`` are fitted to the run values by restricted
maximum likelihood (REML, [4]_ ch. 5) over a grid; the interval uses Student's t with the
residual degrees of freedom, because ``sigma`` is estimated from the same few values.

Checks that flag the model
--------------------------
* leave-one-out: the closed-form leave-one-out residuals of the fit ([4]_ eq. 5.12), scaled by
  their predictive sd, must stay within a Bonferroni bound (a sharp feature that one point
  hit shows here);
* the cheap model: its thinning gap is a known error of a similar function. The same model,
  fitted to the cheap values at the same points, states an error for it; a gap far outside
  that error means the model understates errors of functions like this one;
* too few points: with fewer than ``MIN_POINTS`` points carrying weight the fit is not
  trusted; with fewer than two the error is not estimable (never reported as zero).

The coefficient ``b`` is chosen among ``0``, ``1`` and ``beta_hat``: the plain mean unless
another form states less than :func:`margin` of its error (a margin against the noise of
stated errors fitted to few values), then the one stating the least;
the stated errors of all three are returned so that the choice can be seen.

References
----------
.. [1] Huszar, F. and Duvenaud, D. (2012). Optimally-weighted herding is Bayesian
   quadrature. UAI.
.. [2] Briol, F.-X., Oates, C. J., Girolami, M., Osborne, M. A. and Sejdinovic, D. (2019).
   Probabilistic integration: a role in statistical computation? Statistical Science 34(1),
   1-22.
.. [3] Gretton, A., Borgwardt, K. M., Rasch, M. J., Schoelkopf, B. and Smola, A. (2012). A
   kernel two-sample test. JMLR 13, 723-773 (MMD as a supremum over the RKHS unit ball).
.. [4] Rasmussen, C. E. and Williams, C. K. I. (2006). Gaussian Processes for Machine
   Learning. MIT Press.
.. [5] Woodruff, R. S. (1952). Confidence intervals for medians and other position
   measures. JASA 47(260), 635-646 (quantile intervals by inverting the CDF's interval).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import linalg, stats

from ._geometry import (
    ERROR_KERNELS,
    ChainGeometry,
    ErrorKernelName,
    _sqdist,
    _validate_kernel,
    kernel_mean_gaussian,
)

__all__ = [
    "ERROR_KERNELS",
    "ChainGeometry",
    "ErrorFit",
    "margin",
    "MIN_POINTS",
    "fit_error_model",
    "forecast_errors",
    "kernel_mean_gaussian",
]

MIN_POINTS = 5  # fewer weighted points than this: the fit is flagged (common practice: a
# covariance model fitted to fewer than ~5 values says more about the prior than the data)


_LENGTH_FACTORS = np.geomspace(0.03, 30.0, 19)  # times the median pairwise distance
_NUGGETS = np.array([1e-8, 1e-5, 1e-3, 1e-2, 0.05, 0.2])  # times sigma^2


@dataclass(frozen=True)
class ErrorFit:
    """The fitted error model of one scalar estimate.

    Attributes
    ----------
    estimate : float
        The chosen estimate (1) of the chain mean.
    se : float
        Stated standard error of ``estimate`` against the chain mean (eq. 3); NaN when not
        estimable.
    dof : int
        Degrees of freedom of the t interval (points carrying weight minus fitted mean terms).
    coefficient : float
        The chosen ``b`` of (1).
    rule : str
        ``"weighted mean"`` (``b = 0``), ``"discrepancy"`` (``b = 1``) or ``"regression"``.
    candidates : dict
        For each rule considered: ``estimate``, ``se``, ``coefficient``, ``dof``.
    length, sigma, nugget : float
        Fitted length scale (standardised units), process sd (QoI units), nugget ratio.
    mmd : float
        MMD of the effective rule to the chain under the fitted kernel (with nugget).
    loo_max_z, loo_bound : float
        Largest leave-one-out standardised residual and its Bonferroni bound.
    flags : tuple of str
        Why the model may be unreliable (empty when none).
    extra : dict
        ``cheap_check``: the cheap model's known gap against the error the model states
        for it.
    """

    estimate: float
    se: float
    dof: int
    coefficient: float
    rule: str
    candidates: dict[str, dict[str, float]]
    length: float
    sigma: float
    nugget: float
    mmd: float
    loo_max_z: float
    loo_bound: float
    flags: tuple[str, ...] = ()
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def reliable(self) -> bool:
        return not self.flags and bool(np.isfinite(self.se))

    def interval(self, level: float = 0.95, extra_sd: float = 0.0) -> tuple[float, float]:
        """Central t interval at ``level``, ``extra_sd`` added in quadrature to ``se``."""
        if not np.isfinite(self.se) or self.dof < 1:
            return (float("nan"), float("nan"))
        t = float(stats.t.ppf(0.5 + level / 2.0, self.dof))
        half = t * float(np.hypot(self.se, extra_sd))
        return (self.estimate - half, self.estimate + half)


@dataclass
class _Fit:
    length: float
    nugget: float
    sigma2: float
    beta: np.ndarray  # GLS coefficients of the design columns
    A: np.ndarray  # (p, m) GLS operator: beta_hat = A y
    Kinv_r: np.ndarray
    Kinv_diag: np.ndarray


def _reml_fit(
    y: np.ndarray,
    X: np.ndarray,
    kern: Callable[[np.ndarray], np.ndarray],
    xs: np.ndarray,
    lengths: np.ndarray,
    nuggets: np.ndarray,
) -> _Fit | None:
    """REML fit of ``y = X beta + h`` over the (length, nugget) grid ([4] sec. 2.7, 5.4).

    ``sigma^2`` and ``beta`` are profiled out in closed form; the grid is searched with one
    batched Cholesky factorisation.
    """
    m, p = X.shape
    if m - p < 1:
        return None
    d2 = _sqdist(xs, xs)
    scale = float(np.std(y)) or 1.0
    yn = (y - float(np.mean(y))) / scale  # conditioning only; sigma is refitted at the end
    eye = np.eye(m)
    K0 = kern(d2[None, :, :] / (lengths[:, None, None] ** 2))  # (L, m, m)
    Kn = (K0[:, None] + (nuggets[None, :, None, None] + 1e-10) * eye).reshape(-1, m, m)
    ok = np.ones(Kn.shape[0], dtype=bool)
    try:
        L = np.linalg.cholesky(Kn)
    except np.linalg.LinAlgError:  # some grid point is not numerically positive definite
        L = np.empty_like(Kn)
        for i in range(Kn.shape[0]):
            try:
                L[i] = np.linalg.cholesky(Kn[i])
            except np.linalg.LinAlgError:
                L[i], ok[i] = eye, False
    rhs = np.concatenate([X, yn[:, None]], axis=1)
    V = np.linalg.solve(L, np.broadcast_to(rhs, (L.shape[0],) + rhs.shape))  # L^-1 [X y]
    VX, Vy = V[:, :, :p], V[:, :, p]
    XtKiX = np.einsum("gmi,gmj->gij", VX, VX)
    sign, logdet_x = np.linalg.slogdet(XtKiX)
    good = ok & (sign > 0)
    XtKiX[~good] = np.eye(p)
    beta = np.linalg.solve(XtKiX, np.einsum("gmi,gm->gi", VX, Vy)[..., None])[..., 0]
    resid = Vy - np.einsum("gmi,gi->gm", VX, beta)
    s2 = np.maximum(np.einsum("gm,gm->g", resid, resid) / (m - p), 1e-300)
    logdet = 2.0 * np.sum(np.log(np.abs(np.diagonal(L, axis1=1, axis2=2))), axis=1)
    reml = -0.5 * (m - p) * np.log(s2) - 0.5 * logdet - 0.5 * logdet_x  # profiled REML
    reml = np.where(good & np.isfinite(reml), reml, -np.inf)
    g = int(np.argmax(reml))
    if not np.isfinite(reml[g]):
        return None
    length = float(lengths[g // nuggets.size])
    eta = float(nuggets[g % nuggets.size])
    cf = linalg.cho_factor(Kn[g], lower=True, check_finite=False)
    KiX = linalg.cho_solve(cf, X, check_finite=False)
    A = np.linalg.solve(X.T @ KiX, KiX.T)  # (p, m): beta_hat = A y
    b = A @ y
    r = y - X @ b
    Kinv_r = linalg.cho_solve(cf, r, check_finite=False)
    sigma2 = float(r @ Kinv_r) / (m - p)
    Kinv_diag = np.diag(linalg.cho_solve(cf, eye, check_finite=False)).copy()
    return _Fit(length, eta + 1e-10, sigma2, b, A, Kinv_r, Kinv_diag)


def _loo(fit: _Fit, dof: int) -> tuple[float, float]:
    """Largest closed-form leave-one-out residual ([4] eq. 5.12) and its Bonferroni bound."""
    m = fit.Kinv_r.size
    z = fit.Kinv_r / np.sqrt(np.maximum(fit.Kinv_diag, 1e-300) * max(fit.sigma2, 1e-300))
    bound = float(stats.t.ppf(1.0 - 0.01 / (2 * m), max(dof, 1)))  # familywise 1 %
    return float(np.max(np.abs(z))), bound


def _rule_sd(
    fit: _Fit, geo: ChainGeometry, kernel: str, xs: np.ndarray, v: np.ndarray
) -> tuple[float, float]:
    """Eq. (3): ``(sd, mmd)`` of the effective rule ``v`` under the fitted process."""
    mmd2 = geo.mmd2(kernel, fit.length, fit.nugget, xs, v)
    return float(np.sqrt(fit.sigma2 * mmd2)), float(np.sqrt(mmd2))


def margin(dof: int) -> float:
    """Fraction of the plain mean's stated error an alternative must stay below.

    A stated sd fitted to ``dof`` residual degrees of freedom has a relative noise of about
    ``1 / sqrt(2 dof)`` (the chi distribution; common practice), so the log-ratio of two has
    about ``1 / sqrt(dof)``; an alternative is taken only when it states less error by two of
    those: ``exp(-2 / sqrt(dof))`` (0.51 at 9, 0.69 at 29, 0.82 at 99 degrees of freedom).
    A fixed margin of 0.7 let the regression form win on noise at budget 10 when the cheap
    model was poorly correlated (benchmarks/bench_coverage.py).
    """
    return float(np.exp(-2.0 / np.sqrt(max(int(dof), 1))))


def _choose(candidates: dict[str, dict[str, float]]) -> str:
    """The rule of (1): the plain mean unless another states clearly less error."""
    if "weighted mean" not in candidates:
        return min(candidates, key=lambda k: candidates[k]["se"])
    base = candidates["weighted mean"]
    alt = {k: v for k, v in candidates.items() if k != "weighted mean"}
    if alt:
        best = min(alt, key=lambda k: alt[k]["se"])
        if alt[best]["se"] < margin(int(alt[best]["dof"])) * base["se"]:
            return best
    return "weighted mean"


def _not_estimable(plain: float, why: str) -> ErrorFit:
    nan = float("nan")
    return ErrorFit(plain, nan, 0, 0.0, "weighted mean", {}, nan, nan, nan, nan, nan, nan, (why,))


def fit_error_model(
    points: npt.ArrayLike,
    values: npt.ArrayLike,
    weights: npt.ArrayLike,
    geo: ChainGeometry,
    *,
    cheap_points: npt.ArrayLike | None = None,
    cheap_chain_mean: float | None = None,
    kernel: ErrorKernelName = "matern52",
) -> ErrorFit:
    """Fit the error model to one scalar QoI and choose the estimate (1).

    Parameters
    ----------
    points : array_like, shape (m, d)
        The points carrying the values, in the chain's own units.
    values : array_like, shape (m,)
        Costly values (finite).
    weights : array_like, shape (m,)
        Non-negative, summing to one.
    geo : ChainGeometry
        The chain.
    cheap_points : array_like, shape (m,), optional
        Cheap prediction at the points; with ``cheap_chain_mean`` it enables ``b != 0``.
    cheap_chain_mean : float, optional
        Mean of the cheap prediction over the chain rows.
    kernel : {"matern52", "gaussian"}
        Covariance family of the process ``h``.

    Returns
    -------
    ErrorFit
    """
    kern = _validate_kernel(kernel)
    x = geo.standardise(points)
    y = np.asarray(values, dtype=np.float64).ravel()
    w = np.asarray(weights, dtype=np.float64).ravel()
    if x.shape[0] != y.size or w.size != y.size:
        raise ValueError(
            f"points, values, weights: expected {y.size} rows each, got "
            f"{x.shape[0]}, {y.size}, {w.size}"
        )
    keep = w > 0
    x, y, w = x[keep], y[keep], w[keep] / w[keep].sum()
    m = y.size
    plain = float(w @ y)
    if m < 2:
        return _not_estimable(
            plain, f"{m} point carries weight: the error is not estimable (needs two or more)"
        )
    lengths = _LENGTH_FACTORS * geo.median_distance
    candidates, fits, gap, c = _candidate_rules(
        x, y, w, keep, geo, kernel, kern, lengths, cheap_points, cheap_chain_mean
    )
    if not candidates:
        return _not_estimable(plain, "the error model could not be fitted to the run values")
    rule = _choose(candidates)
    ch = candidates[rule]
    fit, _, mmd = fits[rule]
    dof = int(ch["dof"])
    loo_z, loo_b = _loo(fit, dof)
    flags: list[str] = []
    if m < MIN_POINTS:
        flags.append(f"only {m} points carry weight (fewer than {MIN_POINTS})")
    if loo_z > loo_b:
        flags.append(
            f"leave-one-out check failed: a run value lies {loo_z:.1f} predictive sd from what "
            f"the other runs predict (bound {loo_b:.1f}); a sharp local feature is likely"
        )
    extra: dict[str, Any] = {}
    if gap is not None and c is not None:
        extra["cheap_check"] = _cheap_model_check(c, gap, w, x, geo, kernel, kern, lengths)
        zc, bound_c = extra["cheap_check"]["z"], extra["cheap_check"]["bound"]
        if np.isfinite(extra["cheap_check"]["stated_sd"]) and abs(zc) > bound_c:
            flags.append(
                f"cheap-model check failed: its known thinning gap is {abs(zc):.1f} times the "
                f"error the model states for it (bound {bound_c:.1f}); errors of functions "
                "like this one are understated"
            )
    return ErrorFit(
        estimate=float(ch["estimate"]),
        se=float(ch["se"]),
        dof=dof,
        coefficient=float(ch["coefficient"]),
        rule=rule,
        candidates=candidates,
        length=fit.length,
        sigma=float(np.sqrt(fit.sigma2)),
        nugget=fit.nugget,
        mmd=mmd,
        loo_max_z=loo_z,
        loo_bound=loo_b,
        flags=tuple(flags),
        extra=extra,
    )


def _candidate_rules(
    x: np.ndarray,
    y: np.ndarray,
    w: np.ndarray,
    keep: np.ndarray,
    geo: ChainGeometry,
    kernel: ErrorKernelName,
    kern: Callable[[np.ndarray], np.ndarray],
    lengths: np.ndarray,
    cheap_points: npt.ArrayLike | None,
    cheap_chain_mean: float | None,
) -> tuple[
    dict[str, dict[str, float]],
    dict[str, tuple[_Fit, np.ndarray, float]],
    float | None,
    np.ndarray | None,
]:
    """Fit the process of each candidate rule (weighted mean, and with a usable cheap model
    the discrepancy and regression forms); return their estimates and standard errors, the
    fits, the cheap model's thinning gap and its values at the kept points."""
    m = y.size
    plain = float(w @ y)
    candidates: dict[str, dict[str, float]] = {}
    fits: dict[str, tuple[_Fit, np.ndarray, float]] = {}
    one = np.ones((m, 1))

    def add(rule: str, fit: _Fit | None, v: np.ndarray, est: float, coef: float, dof: int):
        if fit is None:
            return
        sd, mmd = _rule_sd(fit, geo, kernel, x, v)
        candidates[rule] = {"estimate": est, "se": sd, "coefficient": coef, "dof": dof}
        fits[rule] = (fit, v, mmd)

    add("weighted mean", _reml_fit(y, one, kern, x, lengths, _NUGGETS), w, plain, 0.0, m - 1)
    if cheap_points is None or cheap_chain_mean is None:
        return candidates, fits, None, None
    c = np.asarray(cheap_points, dtype=np.float64).ravel()[keep]
    if not (np.all(np.isfinite(c)) and np.isfinite(cheap_chain_mean)):
        return candidates, fits, None, None
    gap = float(w @ c) - float(cheap_chain_mean)
    f1 = _reml_fit(y - c, one, kern, x, lengths, _NUGGETS)
    add("discrepancy", f1, w, plain - gap, 1.0, m - 1)
    if m >= 4 and float(np.ptp(c)) > 0:
        f2 = _reml_fit(y, np.column_stack([one, c]), kern, x, lengths, _NUGGETS)
        if f2 is not None:
            b = float(f2.beta[1])
            # the coefficient is estimated: the rule's effective weights (eq. 3)
            add("regression", f2, w - gap * f2.A[1], plain - b * gap, b, m - 2)
    return candidates, fits, gap, c


def _cheap_model_check(
    c: np.ndarray,
    gap: float,
    w: np.ndarray,
    x: np.ndarray,
    geo: ChainGeometry,
    kernel: ErrorKernelName,
    kern: Callable[[np.ndarray], np.ndarray],
    lengths: np.ndarray,
) -> dict[str, float]:
    """The error the model states for the cheap model's own known thinning gap: the gap, that
    sd, their ratio ``z`` and the bound it is held to (the 99.5 % t quantile)."""
    m = c.size
    fc = _reml_fit(c, np.ones((m, 1)), kern, x, lengths, _NUGGETS)
    sd_c = _rule_sd(fc, geo, kernel, x, w)[0] if fc is not None else float("nan")
    bound_c = float(stats.t.ppf(0.995, m - 1))
    zc = gap / sd_c if sd_c > 0 else (0.0 if gap == 0 else float("inf"))
    return {"gap": gap, "stated_sd": sd_c, "z": zc, "bound": bound_c}


def forecast_errors(
    fit: ErrorFit,
    points: npt.ArrayLike,
    weights: npt.ArrayLike,
    geo: ChainGeometry,
    extra: tuple[int, ...] = (5, 10, 20, 50),
    *,
    kernel: ErrorKernelName = "matern52",
    pool_size: int = 500,
    rng: int | np.random.Generator | None = None,
) -> dict[int, float]:
    """Expected stated sd with ``k`` more points, for each ``k`` in ``extra``.

    The extra points are chosen greedily from a random pool of chain rows, each the row that
    shrinks the Bayesian-quadrature variance ``C - z^T (K + eta I)^-1 z`` of the fitted
    kernel most with the earlier points kept (sequential Bayesian quadrature, [1]_); the
    variance with optimal (Bayesian-quadrature) weights is a slightly optimistic stand-in
    for what re-solved simplex weights reach. ``sigma`` is the current fit's.

    Returns
    -------
    dict of int to float
        ``{k: sd}``; NaN for every ``k`` when the fit is not estimable.
    """
    if not np.isfinite(fit.se) or not np.isfinite(fit.length):
        return {int(k): float("nan") for k in extra}
    _validate_kernel(kernel)
    gen = np.random.default_rng(rng)
    w = np.asarray(weights, dtype=np.float64).ravel()
    cur = geo.standardise(points)[w > 0]
    pool = geo.rows(gen.choice(geo.n, min(pool_size, geo.n), replace=False))
    ell, eta = fit.length, fit.nugget
    both = np.vstack([cur, pool])
    G, mean, c = geo.sums(kernel, ell, both)
    G = G + eta * np.eye(both.shape[0])
    idx = list(range(cur.shape[0]))
    free = np.arange(cur.shape[0], both.shape[0])
    out: dict[int, float] = {}
    kmax = max(extra, default=0)
    if 0 in extra:
        K = G[np.ix_(idx, idx)]
        out[0] = float(
            fit.sigma * np.sqrt(max(c - float(mean[idx] @ np.linalg.solve(K, mean[idx])), 0.0))
        )
    for step in range(1, kmax + 1):
        K = G[np.ix_(idx, idx)]
        cf = linalg.cho_factor(K, lower=True, check_finite=False)
        Ki_z = linalg.cho_solve(cf, mean[idx], check_finite=False)
        Kp = G[np.ix_(free, idx)]
        Ki_Kp = linalg.cho_solve(cf, Kp.T, check_finite=False)
        schur = G[free, free] - np.einsum("pm,mp->p", Kp, Ki_Kp)
        gain = (Kp @ Ki_z - mean[free]) ** 2 / np.maximum(schur, 1e-12)
        j = int(np.argmax(gain))
        idx.append(int(free[j]))
        free = np.delete(free, j)
        if step in extra:
            K = G[np.ix_(idx, idx)]
            var = c - float(mean[idx] @ np.linalg.solve(K, mean[idx]))
            out[step] = float(fit.sigma * np.sqrt(max(var, 0.0)))
    return {int(k): out.get(int(k), float("nan")) for k in extra}
