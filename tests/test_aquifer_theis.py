"""Cheap aquifer model: well function, Theis drawdown, image well, calibration interface."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.special
import scipy.stats

from winnow.examples.aquifer import theis
from winnow.examples.aquifer.theis import (
    cheap_qoi,
    forward,
    log_likelihood,
    theis_drawdown,
    theis_with_river,
    well_function,
)

# --------------------------------------------------------------------------------------------
# exponential integral E1 = Theis well function W
# --------------------------------------------------------------------------------------------
# Abramowitz & Stegun (1964), Handbook of Mathematical Functions, Table 5.1: E1(x) for
# 0.5 <= x <= 2 and x e^x E1(x) for x >= 2, printed to 10 significant digits.  The values
# below are quoted from memory of that table (and were checked to agree with scipy when this
# test was written); the tolerance is half a unit in the 10th printed digit.
AS_TABLE_5_1_E1 = [
    (0.5, 0.5597735948),
    (1.0, 0.2193839344),
    (1.5, 0.1000195824),
    (2.0, 0.04890051071),
]
AS_TABLE_5_1_XEXE1 = [  # x e^x E1(x)
    (5.0, 0.8521108814),
    (10.0, 0.9156333394),
]


@pytest.mark.parametrize(("x", "printed"), AS_TABLE_5_1_E1)
def test_e1_matches_abramowitz_stegun_table_5_1(x: float, printed: float) -> None:
    # A&S Table 5.1 (from memory); 10 significant digits -> half a unit of the last digit.
    half_ulp = 0.5 * 10.0 ** (np.floor(np.log10(printed)) - 9)
    assert abs(well_function(x) - printed) <= half_ulp


@pytest.mark.parametrize(("x", "printed"), AS_TABLE_5_1_XEXE1)
def test_x_exp_x_e1_matches_abramowitz_stegun_table_5_1(x: float, printed: float) -> None:
    # A&S Table 5.1 (from memory), the x e^x E1(x) column for large x.
    assert abs(x * np.exp(x) * well_function(x) - printed) <= 0.5e-10


def test_e1_matches_scipy_over_a_wide_range() -> None:
    # Reference library: scipy.special.exp1 (Cephes).  Both sides are double precision;
    # 1e-12 relative leaves room for the cancellation of the series near u = 1.
    u = np.geomspace(1e-14, 700.0, 4001)
    np.testing.assert_allclose(well_function(u), scipy.special.exp1(u), rtol=1e-12, atol=0)


def test_e1_series_and_continued_fraction_agree_at_the_switch() -> None:
    # Both branches of our implementation evaluated at the same points near u = 1.
    u = np.linspace(0.9, 1.1, 21)
    series = theis._e1_series(u)
    cf = theis._e1_continued_fraction(u)
    np.testing.assert_allclose(series, cf, rtol=1e-13)


# Theis well-function table as printed in hydrogeology texts (e.g. Wenzel 1942; reproduced in
# Freeze & Cherry 1979 and Todd 1980), four decimals; values quoted from memory of those tables.
THEIS_TABLE = [
    (1e-4, 8.6332),
    (1e-3, 6.3315),
    (1e-2, 4.0379),
    (1e-1, 1.8229),
    (1.0, 0.2194),
]


@pytest.mark.parametrize(("u", "w"), THEIS_TABLE)
def test_well_function_matches_theis_tables(u: float, w: float) -> None:
    assert abs(well_function(u) - w) <= 0.5e-4  # half a unit in the fourth decimal


def test_well_function_shapes_and_edges() -> None:
    assert well_function(0.0) == np.inf
    assert well_function(800.0) == 0.0  # exp(-800) underflows
    u = np.array([[1e-3, 0.5], [2.0, 30.0]])
    assert well_function(u).shape == (2, 2)
    with pytest.raises(ValueError, match="u: expected non-negative"):
        well_function([-1.0, 0.1])
    with pytest.raises(ValueError, match="u: expected non-negative"):
        well_function([np.nan])


# --------------------------------------------------------------------------------------------
# Theis drawdown and the image well
# --------------------------------------------------------------------------------------------
def test_theis_matches_cooper_jacob_for_small_u() -> None:
    # Cooper & Jacob (1946): s ~ Q/(4 pi T) (-gamma - ln u) for small u; the neglected terms
    # are O(u), so at u = 1e-6 the two agree to about 1e-6 relative.
    tr, st, q = 5e-3, 2e-4, 0.01
    r = 2.0
    t = r * r * st / (4 * tr * 1e-6)
    cj = q / (4 * np.pi * tr) * (-np.euler_gamma - np.log(1e-6))
    assert theis_drawdown(r, t, tr, st, q) == pytest.approx(cj, rel=2e-6)


def test_theis_drawdown_scales_with_rate_and_broadcasts() -> None:
    r = np.array([10.0, 60.0, 200.0])
    s1 = theis_drawdown(r, 3600.0, 5e-3, 2e-4, 0.01)
    s2 = theis_drawdown(r, 3600.0, 5e-3, 2e-4, 0.02)
    np.testing.assert_allclose(s2, 2 * s1, rtol=1e-14)
    assert np.all(np.diff(s1) < 0)  # drawdown falls with distance
    with pytest.raises(ValueError, match="transmissivity"):
        theis_drawdown(10.0, 60.0, -1.0, 2e-4, 0.01)


def test_image_well_vanishes_on_the_river_and_reaches_the_steady_state() -> None:
    tr, st, q, d = 5e-3, 2e-4, 0.01, 300.0
    y = np.array([-500.0, 0.0, 120.0])
    np.testing.assert_allclose(theis_with_river(d, y, 86400.0, tr, st, q, d), 0.0, atol=1e-15)
    # Late time: the well-plus-image pair reaches the steady state
    # s = Q/(2 pi T) ln(r_image / r) (Ferris et al. 1962, USGS WSP 1536-E, image wells; the
    # Theis terms differ by ln(r_i^2/r^2)/2 once u is small).
    x, yy = np.array([-100.0, 150.0]), np.array([50.0, -40.0])
    r = np.hypot(x, yy)
    ri = np.hypot(x - 2 * d, yy)
    steady = q / (2 * np.pi * tr) * np.log(ri / r)
    late = theis_with_river(x, yy, 1e12, tr, st, q, d)
    np.testing.assert_allclose(late, steady, rtol=1e-5)
    # Early time near the well the river is not felt yet: plain Theis.
    early = theis_with_river(5.0, 0.0, 60.0, tr, st, q, d)
    assert early == pytest.approx(theis_drawdown(5.0, 60.0, tr, st, q), rel=1e-12)
    with pytest.raises(ValueError, match="aquifer side"):
        theis_with_river(d + 1.0, 0.0, 60.0, tr, st, q, d)


# --------------------------------------------------------------------------------------------
# calibration interface
# --------------------------------------------------------------------------------------------
def test_forward_shapes_and_values() -> None:
    t = np.geomspace(60, 86400, 7)
    inputs = {"t_s": t, "r_m": 60.0, "q_m3s": 0.01}
    theta = np.array([np.log10(5e-3), np.log10(2e-4)])
    one = forward(theta, inputs)
    assert one.shape == (7,)
    np.testing.assert_allclose(one, theis_drawdown(60.0, t, 5e-3, 2e-4, 0.01), rtol=1e-12)
    many = forward(np.array([theta, theta + [0.1, -0.2], theta - 0.3]), inputs)
    assert many.shape == (3, 7)
    np.testing.assert_allclose(many[0], one, rtol=0)
    np.testing.assert_allclose(
        many[1], theis_drawdown(60.0, t, 10 ** (theta[0] + 0.1), 10 ** (theta[1] - 0.2), 0.01)
    )
    # Without r and Q the pumping-test constants are used; aliases are accepted.
    np.testing.assert_allclose(forward(theta, {"t": t}), one, rtol=0)
    assert theis.OBS_RADIUS_M == 60.0 and theis.TEST_PUMPING_RATE_M3S == 0.01
    # Late in the test (small u) a higher transmissivity gives a smaller drawdown; early at
    # a distance it gives a larger one (the cone spreads faster).
    higher_t = forward(theta + [0.2, 0.0], inputs)
    assert higher_t[-1] < one[-1] and higher_t[0] > one[0]


@pytest.mark.parametrize(
    ("theta", "inputs", "match"),
    [
        (np.zeros(3), {"t_s": [60.0]}, "theta: expected shape"),
        (np.zeros((2, 2, 2)), {"t_s": [60.0]}, "theta: expected shape"),
        (np.array([np.nan, -3.0]), {"t_s": [60.0]}, "theta: expected finite"),
        (np.array([-2.0, -3.0]), {"time": [60.0]}, "'t_s'"),
        (np.array([-2.0, -3.0]), {"t_s": [0.0]}, "t_s"),
        (np.array([-2.0, -3.0]), {"t_s": [60.0], "r_m": -1.0}, "r_m"),
    ],
)
def test_forward_rejects_bad_input(theta, inputs, match) -> None:
    with pytest.raises(ValueError, match=match):
        forward(theta, inputs)


def test_log_likelihood_matches_scipy_normal() -> None:
    # Reference library: scipy.stats.norm.logpdf summed over observations.
    t = np.geomspace(60, 86400, 9)
    theta = np.array([[-2.3, -3.7], [-2.1, -3.9]])
    obs = {"t_s": t, "drawdown_m": forward([-2.25, -3.6], {"t_s": t}) + 0.003, "sigma_m": 0.01}
    ll = log_likelihood(theta, obs)
    pred = forward(theta, obs)
    ref = scipy.stats.norm.logpdf(obs["drawdown_m"], loc=pred, scale=0.01).sum(axis=1)
    np.testing.assert_allclose(ll, ref, rtol=1e-12)
    assert isinstance(log_likelihood(theta[0], obs), float)


def test_cheap_qoi_is_theis_at_the_spring_ignoring_the_river() -> None:
    theta = np.array([[np.log10(5e-3), np.log10(2e-4)], [-2.0, -4.0]])
    r_spring = np.hypot(theis.SPRING_X_M, theis.SPRING_Y_M)
    ref = theis_drawdown(
        r_spring, theis.PREDICTION_TIME_S, 10 ** theta[:, 0], 10 ** theta[:, 1],
        theis.SUPPLY_PUMPING_RATE_M3S,
    )  # fmt: skip
    np.testing.assert_allclose(cheap_qoi(theta), ref, rtol=1e-13)
    assert isinstance(cheap_qoi(theta[0]), float)
    # The river only supplies water: with it the spring drawdown is smaller.
    with_river = theis_with_river(
        theis.SPRING_X_M, theis.SPRING_Y_M, theis.PREDICTION_TIME_S, 10 ** theta[:, 0],
        10 ** theta[:, 1], theis.SUPPLY_PUMPING_RATE_M3S, theis.RIVER_DISTANCE_M,
    )  # fmt: skip
    assert np.all(with_river < cheap_qoi(theta))
