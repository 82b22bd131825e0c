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
_SQRT_HALF = math.sqrt(0.5)


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
        self._plan()

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

    def _plan(self) -> None:
        """Precompute, once, what the map and the density need: the columns of each kind
        (basic slices where contiguous, so that indexing gives views) with their constants,
        and the constant parts of the log density and of the log-Jacobian."""
        one = np.flatnonzero(self._lower_only | self._upper_only)
        both = np.flatnonzero(self._both)
        gauss = np.flatnonzero(self._is_normal)
        logn = np.flatnonzero(self._is_lognormal)
        self._one = _columns(one)
        self._one_base = np.where(self._lower_only, self.low, self.high)[one]
        self._one_sign = np.where(self._lower_only, 1.0, -1.0)[one]
        self._two = _columns(both)
        self._two_low, self._two_high = self.low[both], self.high[both]
        self._two_width = self._width[both]
        self._gauss = _columns(gauss)
        # z / sqrt(2) = (x - mu) / (sigma sqrt(2)): its square is the density's z^2 / 2.
        self._gauss_mu, self._gauss_inv = self.mu[gauss], _SQRT_HALF / self.sigma[gauss]
        self._logn = _columns(logn)
        self._logn_mu, self._logn_inv = self.mu[logn], _SQRT_HALF / self.sigma[logn]
        # log|dx/du| of the logistic map holds log(high - low) for each such column.
        self._log_width_sum = float(np.log(self._width[both]).sum())
        # Normalising constants of every marginal (uniform: 1 / width; normal and
        # log-normal: 1 / (sigma sqrt(2 pi)) over the truncation's probability).
        non_uniform = ~self._is_uniform
        self._log_const = float(
            -self.log_norm.sum() - (np.log(self.sigma[non_uniform]) + _LOG_SQRT_2PI).sum()
        )

    # ---------------------------------------------------------------- the one pass
    def transform_rows(self, u: np.ndarray, *, density: bool = True) -> np.ndarray:
        """The map to the user's units, its log-Jacobian and the log prior in one pass,
        laid out as the samplers keep their chains.

        Each kind of map and density is applied once, to all its columns of all rows (a
        handful of numpy calls whatever ``k`` and ``d``); the map and density are those of
        :meth:`to_user`, :meth:`log_jacobian` and :meth:`logpdf`, which call the same code.
        Extreme rows may raise numpy's floating-point warnings (the sampler calls this
        under ``np.errstate(all="ignore")``).

        Parameters
        ----------
        u : ndarray, shape (k, d)
            Rows in the unconstrained space (float64).
        density : bool
            False: leave the log prior column unset (for a caller that fills it with a
            log posterior of its own).

        Returns
        -------
        rows : ndarray, shape (k, 2 d + 2)
            ``[u | x | log_jac | log_prior]``: ``x = to_user(u)``, ``log_jac =
            log_jacobian(u)``, ``log_prior = logpdf(x)`` (``-inf`` where ``u`` is NaN, so
            that no model is run there).
        """
        d = self.d
        rows = np.empty((u.shape[0], 2 * d + 2))
        rows[:, :d] = u
        x, log_jac, log_prior = rows[:, d : 2 * d], rows[:, 2 * d], rows[:, 2 * d + 1]
        self._map(u, x, log_jac)
        if not density:
            return rows
        self._density(x, log_prior)
        if not math.isfinite(np.add.reduce(rows[:, 2 * d :], axis=None)):
            # NaN u gives NaN x: no density there (outside the support, as in logpdf). The
            # density of a log-normal is 0 at x = 0 (u below about -745 when low = 0).
            log_prior[np.isnan(log_jac) | np.isnan(log_prior)] = -np.inf
        return rows

    def transform(self, u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """:meth:`transform_rows` as ``(x, log_prior, log_jac)``, shapes (k, d), (k,), (k,)."""
        rows = self.transform_rows(u)
        d = self.d
        return rows[:, d : 2 * d], rows[:, 2 * d + 1], rows[:, 2 * d]

    def _map(self, u: np.ndarray, x: np.ndarray, log_jac: np.ndarray) -> None:
        """Write ``x = to_user(u)`` (k, d) and ``log|det dx/du|`` (k,) into ``x`` and
        ``log_jac``; ``u`` has shape (k, d)."""
        x[:] = u
        log_jac.fill(self._log_width_sum)
        one = self._one
        if one is not None:  # x = base +- exp(u); log|dx/du| = u
            # exp(700) is finite: beyond it x (and with it the Jacobian) is held, so that
            # a huge u gives a finite, very unlikely point rather than inf.
            v = np.minimum(u[:, one], 700.0)
            log_jac += _row_sums(v)
            np.exp(v, out=v)
            v *= self._one_sign
            v += self._one_base
            x[:, one] = v
        two = self._two
        if two is not None:  # x = low + width s(u); log|dx/du| = log width + log s(u) + log s(-u)
            ub = u[:, two]
            log_s = special.log_expit(ub)
            log_s += special.log_expit(-ub)
            log_jac += _row_sums(log_s)
            v = special.expit(ub)
            v *= self._two_width
            v += self._two_low  # >= low: adding a number >= 0 rounds to no less
            # Rounding may put the logistic image a hair above high; keep it on the support.
            x[:, two] = np.minimum(v, self._two_high, out=v)

    def _density(self, x: np.ndarray, out: np.ndarray) -> None:
        """Write the normalised log prior density of rows ``x`` (k, d), taken to be on the
        support, into ``out`` (k,)."""
        out.fill(self._log_const)
        g = self._gauss
        if g is not None:  # -z^2 / 2, z = (x - mu) / sigma
            z = x[:, g] - self._gauss_mu
            z *= self._gauss_inv  # z / sqrt(2)
            z *= z
            out -= _row_sums(z)
        ln = self._logn
        if ln is not None:  # -z^2 / 2 - log x, z = (log x - mu) / sigma (d log x / dx = 1/x)
            lx = np.log(x[:, ln])
            z = lx - self._logn_mu
            z *= self._logn_inv  # z / sqrt(2)
            z *= z
            z += lx
            out -= _row_sums(z)

    # ---------------------------------------------------------------- the parts
    def logpdf(self, x: npt.ArrayLike) -> np.ndarray:
        """Normalised log prior density of rows ``x``, shape (k, d) -> (k,); -inf outside
        the support (NaN rows included)."""
        x = np.atleast_2d(np.asarray(x, dtype=np.float64))
        out = np.empty(x.shape[0])
        with np.errstate(invalid="ignore", divide="ignore"):  # log x <= 0: outside anyway
            self._density(x, out)
        inside = ((x >= self.low) & (x <= self.high)).all(axis=1)
        return np.where(inside & ~np.isnan(out), out, -np.inf)

    def to_user(self, u: npt.ArrayLike) -> np.ndarray:
        """Map unconstrained rows ``u`` (k, d) (or one row (d,)) to the user's units."""
        u = np.asarray(u, dtype=np.float64)
        u2 = np.atleast_2d(u)
        x = np.empty_like(u2)
        self._map(u2, x, np.empty(u2.shape[0]))
        return x.reshape(u.shape)

    def log_jacobian(self, u: npt.ArrayLike) -> np.ndarray:
        """``log|det dx/du|`` of :meth:`to_user` at rows ``u`` (k, d) -> (k,)."""
        u = np.atleast_2d(np.asarray(u, dtype=np.float64))
        log_jac = np.empty(u.shape[0])
        self._map(u, np.empty_like(u), log_jac)
        return log_jac

    def to_unconstrained(self, x: npt.ArrayLike) -> np.ndarray:
        """Inverse of :meth:`to_user`; rows on the boundary map to +-inf."""
        x = np.asarray(x, dtype=np.float64)
        with np.errstate(divide="ignore", invalid="ignore"):
            u = np.where(self._lower_only, np.log(x - self.low), x)
            u = np.where(self._upper_only, np.log(self.high - x), u)
            u = np.where(self._both, np.log(x - self.low) - np.log(self.high - x), u)
        return u

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


def _columns(idx: np.ndarray) -> int | slice | np.ndarray | None:
    """Columns ``idx`` as one integer (indexing gives a 1-D view: its row sums are itself),
    a basic slice when contiguous (a 2-D view), else the index array; None when empty."""
    if idx.size == 0:
        return None
    if idx.size == 1:
        return int(idx[0])
    if idx[-1] - idx[0] == idx.size - 1:
        return slice(int(idx[0]), int(idx[-1]) + 1)
    return idx


def _row_sums(v: np.ndarray) -> np.ndarray:
    """Sums over the columns of ``v`` (k, m) taken by :func:`_columns`; (k,) is one column."""
    return v if v.ndim == 1 else np.add.reduce(v, axis=1)


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
