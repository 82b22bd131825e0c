"""Prior distributions and the change of variables to an unconstrained space.

Every prior has a support ``[low, high]`` (either end may be infinite). Samplers work on
``u`` in R^d; each parameter is mapped to its support by a smooth bijection chosen from the
support alone, and the log-Jacobian of that map is added to the target so that the draws,
mapped back, follow the posterior in the user's units:

* ``(-inf, inf)``:  ``x = u``                       log|dx/du| = 0
* ``(low, inf)``:   ``x = low + exp(u)``            log|dx/du| = u
* ``(-inf, high)``: ``x = high - exp(u)``           log|dx/du| = u
* ``(low, high)``:  ``x = low + (high-low) s(u)``   log|dx/du| = log(high-low) + log s(u)
  + log s(-u), with ``s`` the logistic function.

References
----------
.. [1] Gelman, A., Carlin, J. B., Stern, H. S., Dunson, D. B., Vehtari, A., Rubin, D. B.
   (2013). Bayesian Data Analysis, 3rd ed., CRC Press, Sec. 2.8 (transformations and
   Jacobians).
.. [2] Stan Development Team. Stan Reference Manual, "Constraint transforms" (lower, upper
   and lower-upper bounded scalars), common practice in probabilistic programming.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
from scipy import special

__all__ = ["DISTS", "Prior", "PriorSet", "as_prior_set"]

PriorDist = Literal["uniform", "normal", "lognormal", "truncnormal"]
DISTS: tuple[str, ...] = ("uniform", "normal", "lognormal", "truncnormal")
_ALIASES = {"truncated_normal": "truncnormal", "log_normal": "lognormal", "gaussian": "normal"}
_KEY_ALIASES = {"mean": "mu", "sd": "sigma", "std": "sigma", "distribution": "dist"}
_KEYS = ("name", "dist", "low", "high", "mu", "sigma", "units")
_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)
_SMALL = 48  # batches of up to this many values take the scalar path of transform()


@dataclass(frozen=True)
class Prior:
    """Prior of one parameter, in the parameter's own units.

    Parameters
    ----------
    name : str
        Parameter name.
    dist : {"uniform", "normal", "lognormal", "truncnormal"}
        ``uniform`` on ``[low, high]``; ``normal(mu, sigma)``; ``lognormal`` with ``mu`` and
        ``sigma`` of ``log(x)``; ``truncnormal(mu, sigma)`` restricted to ``[low, high]``
        (at least one bound). ``low``/``high`` given with ``normal`` or ``lognormal``
        truncate those too.
    low, high : float, optional
        Bounds of the support, in the parameter's units.
    mu, sigma : float, optional
        Location and scale (see ``dist``).
    units : str
        Units label, carried to the results.
    """

    name: str
    dist: PriorDist
    low: float | None = None
    high: float | None = None
    mu: float | None = None
    sigma: float | None = None
    units: str = ""

    @classmethod
    def from_dict(cls, spec: Mapping[str, Any], *, where: str = "prior") -> Prior:
        """Build a prior from a plain dict (keys as the fields; ``None`` values ignored)."""
        clean: dict[str, Any] = {}
        for key, value in spec.items():
            k = _KEY_ALIASES.get(key, key)
            if k not in _KEYS:
                raise ValueError(f"{where}: unknown key {key!r}; valid keys are {', '.join(_KEYS)}")
            if value is not None:
                clean[k] = value
        if "name" not in clean:
            raise ValueError(f"{where}: missing 'name'")
        if "dist" not in clean:
            raise ValueError(f"{where} {clean['name']!r}: missing 'dist' (one of {DISTS})")
        return cls(**clean)


class PriorSet:
    """Independent priors of ``d`` parameters, vectorised over rows of parameter values.

    Parameters
    ----------
    priors : sequence of Prior, length d
    """

    def __init__(self, priors: Sequence[Prior]) -> None:
        if len(priors) == 0:
            raise ValueError("priors: at least one parameter is needed")
        self.priors = tuple(priors)
        names = [p.name for p in self.priors]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise ValueError(f"priors: parameter names repeat: {dup}")
        d = len(self.priors)
        self.names: tuple[str, ...] = tuple(names)
        self.units: tuple[str, ...] = tuple(p.units for p in self.priors)
        self.kind = np.empty(d, dtype=object)
        self.low = np.full(d, -np.inf)
        self.high = np.full(d, np.inf)
        self.mu = np.zeros(d)
        self.sigma = np.ones(d)
        self.log_norm = np.zeros(d)  # log of the normalising constant of the truncation
        for j, p in enumerate(self.priors):
            self._set(j, _validate_prior(p))
        self._is_uniform = self.kind == "uniform"
        self._is_normal = (self.kind == "normal") | (self.kind == "truncnormal")
        self._is_lognormal = self.kind == "lognormal"
        self._lower_only = np.isfinite(self.low) & ~np.isfinite(self.high)
        self._upper_only = ~np.isfinite(self.low) & np.isfinite(self.high)
        self._both = np.isfinite(self.low) & np.isfinite(self.high)
        self._width = np.where(self._both, self.high - self.low, 1.0)
        self._idx_lower = np.flatnonzero(self._lower_only)
        self._idx_upper = np.flatnonzero(self._upper_only)
        self._idx_both = np.flatnonzero(self._both)
        self._idx_one = np.flatnonzero(self._lower_only | self._upper_only)
        self._log_width_sum = float(np.log(self._width[self._idx_both]).sum())
        self._idx_gauss = np.flatnonzero(self._is_normal)
        self._idx_lognormal = np.flatnonzero(self._is_lognormal)
        # Constant part of the log density: normalising constants of every marginal.
        non_uniform = ~self._is_uniform
        self._log_const = float(
            -self.log_norm.sum() - (np.log(self.sigma[non_uniform]) + _LOG_SQRT_2PI).sum()
        )
        self._build_fused()

    @property
    def d(self) -> int:
        return len(self.priors)

    def _set(self, j: int, p: Prior) -> None:
        dist = p.dist
        self.kind[j] = dist
        lo = -np.inf if p.low is None else float(p.low)
        hi = np.inf if p.high is None else float(p.high)
        if dist == "lognormal":
            lo = max(lo, 0.0)
        self.low[j], self.high[j] = lo, hi
        if dist == "uniform":
            self.log_norm[j] = math.log(hi - lo)
            return
        self.mu[j], self.sigma[j] = float(p.mu), float(p.sigma)  # type: ignore[arg-type]
        if dist == "lognormal":
            a = (math.log(lo) - p.mu) / p.sigma if lo > 0 else -np.inf  # type: ignore[operator]
            b = (math.log(hi) - p.mu) / p.sigma if np.isfinite(hi) else np.inf  # type: ignore[operator]
        else:
            a, b = (lo - p.mu) / p.sigma, (hi - p.mu) / p.sigma  # type: ignore[operator]
        self.log_norm[j] = _log_ndtr_diff(b, a)
        if not np.isfinite(self.log_norm[j]):
            raise ValueError(
                f"prior {p.name!r}: the bounds [{lo}, {hi}] hold no probability under "
                f"{dist}(mu={p.mu}, sigma={p.sigma})"
            )

    # ---------------------------------------------------------------- densities
    def logpdf(self, x: npt.ArrayLike) -> np.ndarray:
        """Normalised log prior density of rows ``x``, shape (k, d) -> (k,); -inf outside."""
        x = np.atleast_2d(np.asarray(x, dtype=np.float64))
        inside = ((x >= self.low) & (x <= self.high)).all(axis=1)
        out = np.full(x.shape[0], self._log_const)
        g = self._idx_gauss
        if g.size:
            z = (x[:, g] - self.mu[g]) / self.sigma[g]
            out -= 0.5 * np.einsum("ij,ij->i", z, z)
        ln = self._idx_lognormal
        if ln.size:
            xl = x[:, ln]
            lx = np.log(np.where(xl > 0, xl, 1.0))
            z = (lx - self.mu[ln]) / self.sigma[ln]
            out -= 0.5 * np.einsum("ij,ij->i", z, z) + lx.sum(axis=1)  # d log(x)/dx = 1/x
        out[~inside] = -np.inf
        return out

    # ---------------------------------------------------------------- transforms
    def to_user(self, u: npt.ArrayLike) -> np.ndarray:
        """Map unconstrained rows ``u`` (k, d) to the user's units (k, d)."""
        u = np.asarray(u, dtype=np.float64)
        x = u.copy()
        lo, up, both = self._idx_lower, self._idx_upper, self._idx_both
        if lo.size:
            x[..., lo] = self.low[lo] + np.exp(np.minimum(u[..., lo], 700.0))
        if up.size:
            x[..., up] = self.high[up] - np.exp(np.minimum(u[..., up], 700.0))
        if both.size:
            # Rounding may put the logistic image a hair outside; keep it on the support.
            v = self.low[both] + self._width[both] * special.expit(u[..., both])
            x[..., both] = np.minimum(np.maximum(v, self.low[both]), self.high[both])
        return x

    def to_unconstrained(self, x: npt.ArrayLike) -> np.ndarray:
        """Inverse of :meth:`to_user`; rows on the boundary map to +-inf."""
        x = np.asarray(x, dtype=np.float64)
        with np.errstate(divide="ignore", invalid="ignore"):
            u = np.where(self._lower_only, np.log(x - self.low), x)
            u = np.where(self._upper_only, np.log(self.high - x), u)
            u = np.where(self._both, np.log(x - self.low) - np.log(self.high - x), u)
        return u

    def log_jacobian(self, u: npt.ArrayLike) -> np.ndarray:
        """``log|det dx/du|`` of :meth:`to_user` at rows ``u`` (k, d) -> (k,)."""
        u = np.atleast_2d(np.asarray(u, dtype=np.float64))
        out = np.zeros(u.shape[0])
        if self._idx_one.size:
            out += u[:, self._idx_one].sum(axis=1)
        both = self._idx_both
        if both.size:
            ub = u[:, both]
            logistic = special.log_expit(ub) + special.log_expit(-ub)
            out += logistic.sum(axis=1) + self._log_width_sum
        return out

    def _build_fused(self) -> None:
        """Precompute what :meth:`transform` needs: the columns of each kind of map and
        density (basic slices where they are contiguous: views, not copies) and the weights
        that sum the per-column terms into the log prior and the log-Jacobian."""
        d = self.d
        one = np.flatnonzero(self._lower_only | self._upper_only)
        both, gauss, logn = self._idx_both, self._idx_gauss, self._idx_lognormal
        self._f_one = _columns(one)
        self._f_one_base = np.where(self._lower_only, self.low, self.high)[one]
        self._f_one_sign = np.where(self._lower_only, 1.0, -1.0)[one]
        self._f_both = _columns(both)
        self._f_both_low, self._f_both_high = self.low[both], self.high[both]
        self._f_both_width = self._width[both]
        self._f_gauss = _columns(gauss)
        self._f_gauss_mu, self._f_gauss_inv = self.mu[gauss], 1.0 / self.sigma[gauss]
        self._f_logn = _columns(logn)
        self._f_logn_mu, self._f_logn_inv = self.mu[logn], 1.0 / self.sigma[logn]
        # Term matrix, one row per parameter row: [u | 2 log s(u_both) | z_gauss^2 |
        # z_lognormal^2 | log x_lognormal]; its product with `weights` gives the two sums.
        sizes = (d, both.size, gauss.size, logn.size, logn.size)
        ends = np.cumsum(sizes)
        starts = ends - np.asarray(sizes)
        self._t_both, self._t_gauss, self._t_lnz, self._t_lnx = (
            slice(int(a), int(b)) for a, b in zip(starts[1:], ends[1:], strict=True)
        )
        w = np.zeros((int(ends[-1]), 2))  # column 0: log prior, column 1: log-Jacobian
        w[one, 1] = 1.0  # log|dx/du| = u on a one-sided support
        w[both, 1] = -1.0  # log s(u) + log s(-u) = 2 log s(u) - u
        w[self._t_both, 1] = 2.0
        w[self._t_gauss, 0] = -0.5
        w[self._t_lnz, 0] = -0.5
        w[self._t_lnx, 0] = -1.0  # the 1/x of the log-normal density
        self._t_weights = w
        self._t_const = np.array([self._log_const, self._log_width_sum])
        # The same, column by column, for the scalar path of small batches:
        # (map, offset, factor, upper bound, density, mu, 1 / sigma) with map 0 identity,
        # 1 one-sided (x = offset + factor exp(u), factor +-1), 2 logistic; density 0
        # uniform, 1 normal in x, 2 normal in log x.
        cols = []
        for j in range(d):
            if self._lower_only[j]:
                m, a, f = 1, float(self.low[j]), 1.0
            elif self._upper_only[j]:
                m, a, f = 1, float(self.high[j]), -1.0
            elif self._both[j]:
                m, a, f = 2, float(self.low[j]), float(self._width[j])
            else:
                m, a, f = 0, 0.0, 1.0
            dens = 1 if self._is_normal[j] else 2 if self._is_lognormal[j] else 0
            mu, inv = float(self.mu[j]), 1.0 / float(self.sigma[j])
            cols.append((m, a, f, float(self.high[j]), dens, mu, inv))
        self._s_cols = tuple(cols)

    def transform(self, u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """:meth:`to_user`, :meth:`logpdf` of the result and :meth:`log_jacobian` in one pass.

        The samplers' inner loop: each kind of map and density is applied once to its
        columns and one matrix product sums the per-column terms. Rows where a term is not
        finite (extreme ``u``, NaN) are recomputed by the three separate methods, so the
        result is theirs up to rounding. Extreme rows may raise numpy's floating-point
        warnings (the sampler calls this under ``np.errstate(all="ignore")``).

        Parameters
        ----------
        u : ndarray, shape (k, d)
            Rows in the unconstrained space (float64).

        Returns
        -------
        x : ndarray, shape (k, d)
            ``to_user(u)``.
        log_prior : ndarray, shape (k,)
            ``logpdf(x)``.
        log_jac : ndarray, shape (k,)
            ``log_jacobian(u)``.
        """
        rows = self.transform_rows(u)
        d = self.d
        return rows[:, d : 2 * d], rows[:, 2 * d + 1], rows[:, 2 * d]

    def transform_rows(self, u: np.ndarray) -> np.ndarray:
        """:meth:`transform` laid out as the samplers keep their chains: one array of
        shape (k, 2 d + 2) with rows ``[u | x | log_jac | log_prior]``."""
        d = self.d
        if u.size <= _SMALL:
            lists = self.rows_small(u)
            if lists is not None:
                return np.array(lists)
        x, log_prior, log_jac = self._fused(u)
        rows = np.empty((len(u), 2 * d + 2))
        rows[:, :d] = u
        rows[:, d : 2 * d] = x
        rows[:, 2 * d] = log_jac
        rows[:, 2 * d + 1] = log_prior
        return rows

    def _fused(self, u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The numpy path of :meth:`transform`."""
        t = np.empty((u.shape[0], self._t_weights.shape[0]))
        t[:, : self.d] = u
        x = u.copy()
        one = self._f_one
        if one is not None:
            e = np.exp(np.minimum(u[:, one], 700.0))
            x[:, one] = self._f_one_base + self._f_one_sign * e
        both = self._f_both
        if both is not None:
            ub = u[:, both]
            v = self._f_both_width * special.expit(ub)
            v += self._f_both_low  # >= low: adding a number >= 0 rounds to no less
            # Rounding may put the logistic image a hair above high; keep it on the support.
            x[:, both] = np.minimum(v, self._f_both_high, out=v)
            special.log_expit(ub, out=t[:, self._t_both])
        g = self._f_gauss
        if g is not None:
            z = (x[:, g] - self._f_gauss_mu) * self._f_gauss_inv
            np.multiply(z, z, out=t[:, self._t_gauss])
        ln = self._f_logn
        if ln is not None:
            lx = np.log(x[:, ln], out=t[:, self._t_lnx])
            z = (lx - self._f_logn_mu) * self._f_logn_inv
            np.multiply(z, z, out=t[:, self._t_lnz])
        if not math.isfinite(t.sum()):  # extreme u or NaN: the exact, separate path
            x = self.to_user(u)
            return x, self.logpdf(x), self.log_jacobian(u)
        r = np.dot(t, self._t_weights)
        r += self._t_const
        return x, r[:, 0], r[:, 1]

    def rows_small(self, u: np.ndarray) -> list[list[float]] | None:
        """:meth:`transform_rows` of a few rows in Python floats, as lists (None: leave it
        to numpy). Meant for batches of up to ``_SMALL`` values.

        For a handful of values a numpy call costs far more than the arithmetic, and more
        again when a slow model has pushed numpy's code out of the CPU caches between
        steps; here each value takes a few float operations. The formulas are the numpy
        path's (scipy's ``expit`` is ``1 / (1 + exp(-u))``; ``log_expit`` is computed
        the way scipy does for either sign), so the results agree to rounding.
        """
        exp, log1p, log = math.exp, math.log1p, math.log
        cols = self._s_cols
        c_prior, c_jac = self._log_const, self._log_width_sum
        rows = []
        total = 0.0
        for row in u.tolist():
            xr = []
            lp, lj = c_prior, c_jac
            for v, (m, a, f, hi, dens, mu, inv) in zip(row, cols, strict=True):
                if m == 2:
                    if not v > -700.0:  # exp(-v) would overflow (or NaN): numpy path
                        return None
                    e = exp(-v)
                    xv = a + f * (1.0 / (1.0 + e))
                    if xv > hi:  # rounding a hair above the upper bound
                        xv = hi
                    lj += 2.0 * (-log1p(e) if v >= 0.0 else v - log1p(exp(v))) - v
                elif m == 1:
                    xv = a + f * exp(v if v < 700.0 else 700.0)
                    lj += v
                else:
                    xv = v
                if dens == 1:
                    z = (xv - mu) * inv
                    lp -= 0.5 * z * z
                elif dens == 2:
                    if not xv > 0.0:  # log 0: numpy path
                        return None
                    lx = log(xv)
                    z = (lx - mu) * inv
                    lp -= 0.5 * z * z + lx
                xr.append(xv)
            total += lp + lj
            row += xr
            row.append(lj)
            row.append(lp)
            rows.append(row)
        if not math.isfinite(total):
            return None
        return rows

    # ---------------------------------------------------------------- draws
    def ppf(self, q: npt.ArrayLike) -> np.ndarray:
        """Quantiles of each marginal: ``q`` shape (k, d) in (0, 1) -> (k, d) user units."""
        q = np.atleast_2d(np.asarray(q, dtype=np.float64))
        out = np.empty_like(q)
        for j in range(self.d):
            if self._is_uniform[j]:
                out[:, j] = self.low[j] + (self.high[j] - self.low[j]) * q[:, j]
                continue
            if self._is_lognormal[j]:
                lo = math.log(self.low[j]) if self.low[j] > 0 else -np.inf
                hi = math.log(self.high[j]) if np.isfinite(self.high[j]) else np.inf
            else:
                lo, hi = self.low[j], self.high[j]
            a, b = (lo - self.mu[j]) / self.sigma[j], (hi - self.mu[j]) / self.sigma[j]
            pa, pb = special.ndtr(a), special.ndtr(b)
            if pa > 0.5:  # upper tail: work with survival probabilities for accuracy
                sa, sb = special.ndtr(-a), special.ndtr(-b)
                z = -special.ndtri(sa - q[:, j] * (sa - sb))
            else:
                z = special.ndtri(pa + q[:, j] * (pb - pa))
            z = np.clip(z, a, b)
            v = self.mu[j] + self.sigma[j] * z
            out[:, j] = np.exp(v) if self._is_lognormal[j] else v
        return np.clip(out, self.low, self.high)

    def draw(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """``n`` independent draws from the prior, shape (n, d), user units."""
        q = rng.uniform(size=(n, self.d))
        return self.ppf(q)

    def unconstrained_scale(self) -> np.ndarray:
        """Half the central 68 % range of each prior in the unconstrained space, shape (d,)."""
        x = self.ppf(np.array([[0.15865525393145707] * self.d, [0.8413447460685429] * self.d]))
        u = self.to_unconstrained(x)
        s = 0.5 * np.abs(u[1] - u[0])
        return np.where(np.isfinite(s) & (s > 0), s, 1.0)


def _columns(idx: np.ndarray) -> slice | np.ndarray | None:
    """Columns ``idx`` as a basic slice when contiguous (indexing gives a view), else the
    index array; None when empty."""
    if idx.size == 0:
        return None
    if idx[-1] - idx[0] == idx.size - 1:
        return slice(int(idx[0]), int(idx[-1]) + 1)
    return idx


def _log_ndtr_diff(b: float, a: float) -> float:
    """``log(Phi(b) - Phi(a))`` for ``a < b``, accurate in either tail."""
    if a > 0:  # Phi(b) - Phi(a) = Phi(-a) - Phi(-b)
        a, b = -b, -a
    lb, la = special.log_ndtr(b), special.log_ndtr(a)
    with np.errstate(divide="ignore"):
        return float(lb + np.log1p(-np.exp(la - lb)))


def _validate_prior(p: Prior) -> Prior:
    where = f"prior {p.name!r}"
    dist = _ALIASES.get(p.dist, p.dist)
    if dist not in DISTS:
        raise ValueError(f"{where}: unknown dist {p.dist!r}; valid choices are {', '.join(DISTS)}")
    for field in ("low", "high", "mu", "sigma"):
        v = getattr(p, field)
        if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float, np.number))):
            raise TypeError(f"{where}: {field} must be a number, got {v!r}")
        if v is not None and field in ("mu", "sigma") and not math.isfinite(v):
            raise ValueError(f"{where}: {field} must be finite, got {v}")
    need = {"uniform": ("low", "high"), "normal": ("mu", "sigma"), "lognormal": ("mu", "sigma")}
    need["truncnormal"] = ("mu", "sigma")
    missing = [f for f in need[dist] if getattr(p, f) is None]
    if missing:
        raise ValueError(f"{where}: dist {dist!r} needs {', '.join(missing)}")
    if dist == "uniform" and not (math.isfinite(p.low) and math.isfinite(p.high)):  # type: ignore[arg-type]
        raise ValueError(f"{where}: uniform bounds must be finite, got [{p.low}, {p.high}]")
    if dist == "truncnormal" and p.low is None and p.high is None:
        raise ValueError(f"{where}: truncnormal needs low and/or high")
    if p.sigma is not None and p.sigma <= 0:
        raise ValueError(f"{where}: sigma must be > 0, got {p.sigma}")
    if p.low is not None and p.high is not None and not p.low < p.high:
        raise ValueError(f"{where}: low must be < high, got low={p.low}, high={p.high}")
    if dist == "lognormal" and p.high is not None and p.high <= 0:
        raise ValueError(f"{where}: lognormal needs high > 0, got {p.high}")
    if dist == "lognormal" and p.low is not None and p.low < 0:
        raise ValueError(f"{where}: lognormal support is x > 0; low must be >= 0, got {p.low}")
    if p.dist != dist:
        p = Prior(p.name, dist, p.low, p.high, p.mu, p.sigma, p.units)  # type: ignore[arg-type]
    return p


def as_prior_set(priors: PriorSet | Sequence[Prior | Mapping[str, Any]]) -> PriorSet:
    """Accept a :class:`PriorSet`, or a sequence of :class:`Prior` objects or plain dicts."""
    if isinstance(priors, PriorSet):
        return priors
    if isinstance(priors, (str, bytes, Mapping)) or not isinstance(priors, Sequence):
        raise TypeError(
            f"priors must be a sequence of Prior objects or dicts, got {type(priors).__name__}"
        )
    out = []
    for i, p in enumerate(priors):
        if isinstance(p, Prior):
            out.append(p)
        elif isinstance(p, Mapping):
            out.append(Prior.from_dict(p, where=f"priors[{i}]"))
        else:
            raise TypeError(f"priors[{i}] must be a Prior or a dict, got {type(p).__name__}")
    return PriorSet(out)
