"""Cheap model of the aquifer demo: the Theis (1935) solution and its image-well extension.

The demo scenario is INVENTED: a pumping test at a test well (far from any river) gives
calibration data for the transmissivity ``T`` and storativity ``S`` of a confined aquifer;
the calibrated aquifer then feeds a prediction: will pumping a new supply well draw down a
protected spring beyond a limit?  The costly model (:mod:`winnow.examples.aquifer.solver`)
includes a fixed-head river near the supply well; the cheap prediction here ignores it.

Units and conventions
---------------------
* lengths and distances in m, times in s, pumping rates in m³/s (positive = extraction),
  transmissivity ``T`` in m²/s, storativity ``S`` dimensionless;
* the calibrated parameters are ``theta = (log10_T, log10_S)`` with ``log10_T`` the base-10
  logarithm of T in m²/s and ``log10_S`` the base-10 logarithm of S;
* drawdown ``s = h0 - h`` in m is POSITIVE DOWN (a falling water level has positive drawdown).

Caution
-------
This is a demonstration with invented numbers.  Predictions for water supply, spring
protection or any other safety-relevant decision need review under the local regulations and
by a licensed professional (hydrogeologist / engineer).

References
----------
.. [1] Theis, C. V. (1935). The relation between the lowering of the piezometric surface and
   the rate and duration of discharge of a well using ground-water storage. Transactions,
   American Geophysical Union, 16(2), 519-524.
.. [2] Ferris, J. G., Knowles, D. B., Brown, R. H., Stallman, R. W. (1962). Theory of aquifer
   tests. U.S. Geological Survey Water-Supply Paper 1536-E (method of images, pp. 144-166).
.. [3] Abramowitz, M., Stegun, I. A. (1964). Handbook of Mathematical Functions, Eqs. 5.1.11
   (power series of E1) and 5.1.22 (continued fraction), Table 5.1.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import numpy.typing as npt

__all__ = [
    "OBS_RADIUS_M",
    "PARAM_NAMES",
    "PARAM_UNITS",
    "PREDICTION_TIME_S",
    "RIVER_DISTANCE_M",
    "SPRING_DRAWDOWN_LIMIT_M",
    "SPRING_X_M",
    "SPRING_Y_M",
    "SUPPLY_PUMPING_RATE_M3S",
    "TEST_PUMPING_RATE_M3S",
    "cheap_qoi",
    "forward",
    "log_likelihood",
    "theis_drawdown",
    "theis_with_river",
    "well_function",
]

#: Parameter names and units of ``theta`` (in this order).
PARAM_NAMES: tuple[str, str] = ("log10_T", "log10_S")
PARAM_UNITS: tuple[str, str] = ("log10(m2/s)", "log10(-)")

# --- pumping test (calibration data; invented) ---------------------------------------------
#: Constant pumping rate of the test well during the pumping test [m³/s].
TEST_PUMPING_RATE_M3S: float = 0.01
#: Distance from the test well to the observation well [m].
OBS_RADIUS_M: float = 60.0

# --- prediction (invented) -----------------------------------------------------------------
# Coordinates have the new supply well at the origin; the river is the straight line
# x = RIVER_DISTANCE_M (fixed head), the aquifer lies at x < RIVER_DISTANCE_M.
#: Constant pumping rate of the new supply well [m³/s] (20 L/s).
SUPPLY_PUMPING_RATE_M3S: float = 0.02
#: Protected spring position [m] relative to the supply well.
SPRING_X_M: float = 400.0
SPRING_Y_M: float = 300.0
#: Distance from the supply well to the river [m].
RIVER_DISTANCE_M: float = 800.0
#: Time after the start of pumping at which the spring drawdown is predicted [s] (30 days).
PREDICTION_TIME_S: float = 30.0 * 86400.0
#: Drawdown at the spring that the (invented) permit does not allow to exceed [m].
SPRING_DRAWDOWN_LIMIT_M: float = 1.0

_EULER_GAMMA = 0.57721566490153286061
_SERIES_TERMS = 40  # (-u)^k / (k k!) < 1e-17 relative for u <= 1 well before k = 40
_CF_MAX_ITER = 500
_CF_TOL = 1e-16
_TINY = 1e-300


# --------------------------------------------------------------------------------------------
# exponential integral
# --------------------------------------------------------------------------------------------
def _e1_series(u: np.ndarray) -> np.ndarray:
    """E1 by its power series, accurate for 0 < u <= 1 (A&S Eq. 5.1.11)."""
    # E1(u) = -gamma - ln u - sum_{k>=1} (-u)^k / (k k!)                       # Eq. (5.1.11)
    total = np.zeros_like(u)
    term = np.ones_like(u)  # (-u)^k / k!
    for k in range(1, _SERIES_TERMS + 1):
        term = term * (-u) / k
        total += term / k
    return -_EULER_GAMMA - np.log(u) - total


def _e1_continued_fraction(u: np.ndarray) -> np.ndarray:
    """E1 by its continued fraction (modified Lentz), accurate for u > 1 (A&S Eq. 5.1.22).

    The even form ``E1(u) = exp(-u) / (u + 1 - 1^2/(u + 3 - 2^2/(u + 5 - ...)))`` converges
    fast for u > 1; it is evaluated with the modified Lentz algorithm (Lentz 1976; Thompson
    & Barnett 1986) on all elements at once and stops when every element has converged.
    """
    b = u + 1.0
    c = np.full_like(u, 1.0 / _TINY)
    d = 1.0 / b
    h = d.copy()
    for i in range(1, _CF_MAX_ITER + 1):
        a = -float(i * i)
        b = b + 2.0
        d = 1.0 / (a * d + b)
        c = b + a / c
        delta = c * d
        h *= delta
        if np.all(np.abs(delta - 1.0) < _CF_TOL):
            break
    return h * np.exp(-u)


def well_function(u: npt.ArrayLike) -> np.ndarray:
    """Theis well function ``W(u) = E1(u)``, the exponential integral (vectorised).

    Own implementation (power series for ``u <= 1``, continued fraction for ``u > 1``) so that
    the checks against printed tables test the code that the cheap model uses.

    Parameters
    ----------
    u : array_like, any shape
        Argument, dimensionless, ``u >= 0``.  ``W(0) = inf``.

    Returns
    -------
    ndarray, same shape as ``u``
        ``E1(u) = integral_u^inf exp(-x)/x dx``; underflows to 0 for ``u`` above about 700.

    Raises
    ------
    ValueError
        If any ``u`` is negative or NaN.

    References
    ----------
    Abramowitz & Stegun (1964), Eqs. 5.1.1, 5.1.11 and 5.1.22.
    """
    arr = np.asarray(u, dtype=np.float64)
    n_nan = int(np.isnan(arr).sum())
    n_neg = int((arr < 0).sum())
    if n_nan or n_neg:
        raise ValueError(
            f"u: expected non-negative numbers, got {n_neg} negative and {n_nan} NaN value(s)"
        )
    flat = arr.ravel()
    out = np.empty_like(flat)
    zero = flat == 0.0
    small = (flat > 0.0) & (flat <= 1.0)
    large = flat > 1.0
    out[zero] = np.inf
    if np.any(small):
        out[small] = _e1_series(flat[small])
    if np.any(large):
        with np.errstate(under="ignore"):
            out[large] = _e1_continued_fraction(flat[large])
    return out.reshape(arr.shape)


# --------------------------------------------------------------------------------------------
# Theis drawdown
# --------------------------------------------------------------------------------------------
def theis_drawdown(
    r: npt.ArrayLike,
    t: npt.ArrayLike,
    transmissivity: npt.ArrayLike,
    storativity: npt.ArrayLike,
    pumping_rate: npt.ArrayLike,
) -> np.ndarray:
    """Theis (1935) drawdown around a well pumping at a constant rate in an infinite aquifer.

    Parameters
    ----------
    r : array_like
        Distance from the pumping well [m], ``r > 0``.
    t : array_like
        Time since pumping started [s], ``t > 0``.
    transmissivity : array_like
        ``T`` [m²/s], ``T > 0``.
    storativity : array_like
        ``S`` [-], ``S > 0``.
    pumping_rate : array_like
        ``Q`` [m³/s], positive for extraction.

    All arguments broadcast against each other.

    Returns
    -------
    ndarray
        Drawdown ``s`` [m], positive down.

    References
    ----------
    Theis (1935), Eq. for ``s = Q/(4 pi T) W(u)`` with ``u = r^2 S / (4 T t)``.
    """
    r, t, tr, st, q = np.broadcast_arrays(
        *(
            np.asarray(a, dtype=np.float64)
            for a in (r, t, transmissivity, storativity, pumping_rate)
        )
    )
    for name, val in (("r", r), ("t", t), ("transmissivity", tr), ("storativity", st)):
        if not np.all(np.isfinite(val)) or np.any(val <= 0):
            raise ValueError(f"{name}: expected finite positive values, got {val!r}")
    u = r * r * st / (4.0 * tr * t)  # Eq. (Theis 1935)
    return q / (4.0 * np.pi * tr) * well_function(u)


def theis_with_river(
    x: npt.ArrayLike,
    y: npt.ArrayLike,
    t: npt.ArrayLike,
    transmissivity: npt.ArrayLike,
    storativity: npt.ArrayLike,
    pumping_rate: npt.ArrayLike,
    river_distance: float,
) -> np.ndarray:
    """Drawdown near a fixed-head straight river by the method of images.

    The pumping well sits at the origin, the river is the straight line ``x = river_distance``
    held at the initial head, and the aquifer is the half-plane ``x < river_distance``.  The
    river is replaced by an image RECHARGE well at ``(2 * river_distance, 0)`` injecting at
    the pumping rate (Ferris et al. 1962, method of images), so that the drawdown vanishes on
    the river line.

    Parameters
    ----------
    x, y : array_like
        Position [m] relative to the pumping well; ``x <= river_distance``.
    t : array_like
        Time since pumping started [s], ``t > 0``.
    transmissivity, storativity, pumping_rate : array_like
        ``T`` [m²/s], ``S`` [-], ``Q`` [m³/s] (positive = extraction).
    river_distance : float
        Distance from the well to the river [m], ``> 0``.

    Returns
    -------
    ndarray
        Drawdown [m], positive down, broadcast shape of the inputs.

    References
    ----------
    Ferris, Knowles, Brown & Stallman (1962), USGS Water-Supply Paper 1536-E, pp. 144-166.
    """
    d = float(river_distance)
    if not np.isfinite(d) or d <= 0:
        raise ValueError(f"river_distance: expected a finite positive distance, got {d!r}")
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    if np.any(x > d):
        raise ValueError(
            f"x: expected points on the aquifer side of the river (x <= {d}), got max {x.max()}"
        )
    r_real = np.hypot(x, y)
    r_image = np.hypot(x - 2.0 * d, y)
    s_real = theis_drawdown(r_real, t, transmissivity, storativity, pumping_rate)
    s_image = theis_drawdown(r_image, t, transmissivity, storativity, pumping_rate)
    return s_real - s_image  # image well injects: superposition of opposite signs


# --------------------------------------------------------------------------------------------
# calibration interface
# --------------------------------------------------------------------------------------------
_INPUT_KEYS: dict[str, tuple[str, ...]] = {
    "t_s": ("t_s", "t"),
    "r_m": ("r_m", "r"),
    "q_m3s": ("q_m3s", "Q", "pumping_rate"),
}


def _validate_theta(theta: npt.ArrayLike) -> tuple[np.ndarray, bool]:
    arr = np.asarray(theta, dtype=np.float64)
    single = arr.ndim == 1
    if arr.ndim not in (1, 2) or arr.shape[-1] != 2:
        raise ValueError(
            f"theta: expected shape (2,) or (k, 2) with columns {PARAM_NAMES}, got {arr.shape}"
        )
    return np.atleast_2d(arr), single


def _lookup(inputs: Any, canonical: str) -> Any:
    for key in _INPUT_KEYS[canonical]:
        try:
            return inputs[key]
        except (KeyError, IndexError, ValueError, TypeError):
            continue
    return None


def _validate_inputs(inputs: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    if inputs is None:
        raise TypeError("inputs: expected a mapping or table with a 't_s' column, got None")
    t = _lookup(inputs, "t_s")
    if t is None:
        raise ValueError(
            f"inputs: expected a 't_s' (or 't') entry with times in s, got keys "
            f"{list(inputs.keys()) if isinstance(inputs, Mapping) else type(inputs).__name__}"
        )
    t = np.asarray(t, dtype=np.float64).ravel()
    r = _lookup(inputs, "r_m")
    q = _lookup(inputs, "q_m3s")
    # The observations table holds only times and drawdowns; radius and rate of the pumping
    # test are module constants (see data/README.md).
    r = np.broadcast_to(np.asarray(OBS_RADIUS_M if r is None else r, dtype=np.float64), t.shape)
    q = np.broadcast_to(
        np.asarray(TEST_PUMPING_RATE_M3S if q is None else q, dtype=np.float64), t.shape
    )
    if t.size == 0:
        raise ValueError("inputs: expected at least one observation time, got none")
    if not np.all(np.isfinite(t)) or np.any(t <= 0):
        raise ValueError(f"inputs['t_s']: expected finite positive times in s, got {t!r}")
    if not np.all(np.isfinite(r)) or np.any(r <= 0):
        raise ValueError(f"inputs['r_m']: expected finite positive radii in m, got {r!r}")
    if not np.all(np.isfinite(q)):
        raise ValueError(f"inputs['q_m3s']: expected finite pumping rates in m3/s, got {q!r}")
    return t, r, q


def forward(theta: npt.ArrayLike, inputs: Any) -> np.ndarray:
    """Theis drawdowns at the observation times for one or many parameter vectors.

    Parameters
    ----------
    theta : array_like, shape (2,) or (k, 2)
        ``(log10_T, log10_S)``: log10 of transmissivity [m²/s] and of storativity [-].
    inputs : mapping or table
        Anything indexable by column name (dict, the dict from
        :func:`winnow.examples.aquifer.make_data.load_observations`, a structured array):

        * ``"t_s"`` (alias ``"t"``): times since pumping started [s], shape (n_obs,);
        * ``"r_m"`` (alias ``"r"``): distance from the pumping well [m], scalar or (n_obs,);
          defaults to :data:`OBS_RADIUS_M`;
        * ``"q_m3s"`` (aliases ``"Q"``, ``"pumping_rate"``): pumping rate [m³/s], scalar or
          (n_obs,); defaults to :data:`TEST_PUMPING_RATE_M3S`.

    Returns
    -------
    ndarray, shape (n_obs,) or (k, n_obs)
        Predicted drawdown [m], positive down; shape (n_obs,) when ``theta`` is 1-D.
    """
    th, single = _validate_theta(theta)
    t, r, q = _validate_inputs(inputs)
    if not np.all(np.isfinite(th)):
        raise ValueError(f"theta: expected finite values, got {th!r}")
    tr = 10.0 ** th[:, 0:1]  # (k, 1)
    st = 10.0 ** th[:, 1:2]
    u = r * r * st / (4.0 * tr * t)  # (k, n_obs)                     # Eq. (Theis 1935)
    s = q / (4.0 * np.pi * tr) * well_function(u)
    return s[0] if single else s


def log_likelihood(theta: npt.ArrayLike, observations: Any) -> np.ndarray | float:
    """Gaussian log-likelihood of the observed drawdowns under the Theis model.

    Parameters
    ----------
    theta : array_like, shape (2,) or (k, 2)
        ``(log10_T, log10_S)``.
    observations : mapping or table
        As for :func:`forward`, plus ``"drawdown_m"`` (observed drawdown [m], shape (n_obs,))
        and ``"sigma_m"`` (standard deviation of the measurement error [m], scalar or
        (n_obs,)).

    Returns
    -------
    float or ndarray, shape (k,)
        ``sum_i log N(d_i | s_i(theta), sigma_i^2)`` including the normalising constant.
    """
    pred = forward(theta, observations)
    d = np.asarray(observations["drawdown_m"], dtype=np.float64).ravel()
    sig = np.broadcast_to(np.asarray(observations["sigma_m"], dtype=np.float64), d.shape)
    if d.shape[0] != pred.shape[-1]:
        raise ValueError(
            f"observations['drawdown_m']: expected {pred.shape[-1]} values, got {d.shape[0]}"
        )
    if not np.all(np.isfinite(sig)) or np.any(sig <= 0):
        raise ValueError(f"observations['sigma_m']: expected positive values, got {sig!r}")
    z = (d - pred) / sig
    ll = -0.5 * np.sum(z * z, axis=-1) - np.sum(np.log(sig)) - 0.5 * d.size * np.log(2 * np.pi)
    return float(ll) if np.ndim(ll) == 0 else ll


def cheap_qoi(theta: npt.ArrayLike) -> float | np.ndarray:
    """Cheap prediction of the spring drawdown: Theis at the spring, IGNORING the river.

    Uses :data:`SUPPLY_PUMPING_RATE_M3S`, the spring distance
    ``hypot(SPRING_X_M, SPRING_Y_M)`` and :data:`PREDICTION_TIME_S`.  The river in the costly
    model supplies water and so reduces the drawdown: this cheap value is larger but strongly
    correlated with the costly one, which is what the multi-fidelity correction needs.

    Parameters
    ----------
    theta : array_like, shape (2,) or (k, 2)
        ``(log10_T, log10_S)``.

    Returns
    -------
    float or ndarray, shape (k,)
        Drawdown at the spring [m], positive down.
    """
    inputs = {
        "t_s": np.array([PREDICTION_TIME_S]),
        "r_m": float(np.hypot(SPRING_X_M, SPRING_Y_M)),
        "q_m3s": SUPPLY_PUMPING_RATE_M3S,
    }
    s = forward(theta, inputs)
    return float(s[0]) if s.ndim == 1 else s[:, 0]
