"""Finite-difference aquifer solver against closed-form solutions (in-process runs).

All runs use the ``coarse`` grid (a fraction of a second each).  Tolerances are set by the
discretisation error of that grid: cells of 4 m at the well growing by 25 % per cell, and
backward-Euler steps with dt/t up to about 0.1; both give errors of a few per cent in the
drawdown, largest at the front of the cone (large u), which is why comparisons are restricted
to u <= 0.5 there.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.special import erfc

from winnow.examples.aquifer.solver import (
    GRID_PRESETS,
    Grid,
    ModelConfig,
    _graded_axis,
    _time_steps,
    build_grid,
    simulate,
)
from winnow.examples.aquifer.theis import theis_drawdown, theis_with_river

T, S, Q = 5e-3, 2e-4, 0.01  # m2/s, -, m3/s
DAY = 86400.0


@pytest.fixture(scope="module")
def no_river_run():
    radii = np.array([10.0, 20.0, 30.0, 60.0, 100.0, 200.0, 400.0])
    angles = np.deg2rad([0.0, 45.0, 90.0, 180.0, 225.0])
    pts = np.array([(r * np.cos(a), r * np.sin(a)) for a in angles for r in radii])
    cfg = ModelConfig(T, S, Q, DAY, 400.0, 300.0, river=False, river_distance=800.0, grid="coarse")
    return cfg, pts, simulate(cfg, probes=pts)


@pytest.fixture(scope="module")
def river_run():
    d = 200.0
    pts = np.array(
        [(-100, 0), (-30, 0), (30, 0), (100, 0), (150, 0), (190, 0), (100, 100), (0, 100),
         (-100, -150), (150, -80), (50, 300)],
        dtype=float,
    )  # fmt: skip
    cfg = ModelConfig(T, S, Q, DAY, 100.0, 100.0, river=True, river_distance=d, grid="coarse")
    return cfg, pts, simulate(cfg, probes=pts)


def test_matches_theis_far_from_boundaries(no_river_run) -> None:
    # Theis (1935) closed form.  River off; far-field edges beyond the reach of the cone.
    # Points 10-400 m away (2.5 to ~20 cells) in five directions (on and between grid axes),
    # times from 10 min to 1 day where u <= 0.5: within 3 % (coarse-grid discretisation error,
    # measured 2.4 %; the standard grid gives below 1 %).
    cfg, pts, res = no_river_run
    r = np.hypot(pts[:, 0], pts[:, 1])
    t = res.t[res.t >= 600.0]
    fd = res.probes[res.t >= 600.0]
    ref = theis_drawdown(r[None, :], t[:, None], T, S, Q)
    u = r[None, :] ** 2 * S / (4 * T * t[:, None])
    mask = u <= 0.5
    assert mask.sum() > 500
    rel = np.abs(fd[mask] / ref[mask] - 1.0)
    assert rel.max() < 0.03
    # At the end, well inside the cone, it is much closer (spatial error only).
    np.testing.assert_allclose(res.probes[-1, :6], ref[-1, :6], rtol=0.015)


def test_well_node_matches_theis_at_peaceman_radius(no_river_run) -> None:
    # Peaceman (1983): the well-block drawdown equals the radial-flow drawdown at
    # r_e = 0.14 sqrt(dx^2 + dy^2); with Theis (1935) for that radius, within 2 %.
    cfg, _, res = no_river_run
    r_e = res.meta["well"]["peaceman_radius_m"]
    dx, dy = res.meta["grid"]["well_cell_m"]
    assert r_e == pytest.approx(0.14 * math.hypot(dx, dy))
    assert res.well_node[-1] == pytest.approx(theis_drawdown(r_e, DAY, T, S, Q), rel=0.02)
    # The reported well drawdown adds the steady radial (Thiem) loss from r_e to r_w.
    s_w = res.meta["well"]["drawdown_at_well_radius_m"]
    thiem = Q / (2 * np.pi * T) * np.log(r_e / cfg.well_radius)
    assert s_w == pytest.approx(res.well_node[-1] + thiem, rel=1e-12)
    assert s_w == pytest.approx(theis_drawdown(cfg.well_radius, DAY, T, S, Q), rel=0.02)


def test_matches_image_well_solution_with_river(river_run) -> None:
    # Ferris et al. (1962), USGS Water-Supply Paper 1536-E: a fixed-head straight river is an
    # image recharge well.  Points between the well and the river, behind the well and off
    # axis; from 10 min to 1 day the error stays within 3 % of the drawdown scale Q/(4 pi T)
    # (coarse grid; measured 2.4e-2 at most, 1.3e-2 on the standard grid), and at 1 day within
    # 1 % relative.
    cfg, pts, res = river_run
    m = res.t >= 600.0
    ref = theis_with_river(
        pts[:, 0][None, :], pts[:, 1][None, :], res.t[m][:, None], T, S, Q, cfg.river_distance
    )
    scale = Q / (4 * np.pi * T)
    assert np.max(np.abs(res.probes[m] - ref)) < 0.03 * scale
    np.testing.assert_allclose(res.probes[-1], ref[-1], rtol=0.01)
    # The river line itself is held at zero drawdown.
    assert np.all(res.drawdown[-1, :] == 0.0)


def test_river_inflow_matches_glover_balmer(river_run) -> None:
    # Glover & Balmer (1954): the share of the pumping drawn from a fully penetrating river is
    # erfc(sqrt(d^2 S / (4 T t))).  From 10 min on, within 2 % (coarse grid).
    cfg, _, res = river_run
    m = res.t >= 600.0
    share = erfc(np.sqrt(cfg.river_distance**2 * S / (4 * T * res.t[m])))
    np.testing.assert_allclose(res.river_inflow[m] / Q, share, rtol=0.02)


@pytest.mark.parametrize("which", ["no_river_run", "river_run"])
def test_mass_balance(which, request) -> None:
    # Common practice for groundwater model checks: pumped volume = storage release + inflow
    # over fixed-head boundaries.  Backward Euler conserves mass exactly per step, so only
    # round-off remains (heads ~100 m, 1e-8 relative is loose for it).
    cfg, _, res = request.getfixturevalue(which)
    mb = res.meta["mass_balance_m3"]
    assert mb["pumped"] == pytest.approx(Q * DAY)
    total = mb["storage_release"] + mb["river_inflow"] + mb["far_field_inflow"]
    assert abs(total - mb["pumped"]) < 1e-8 * mb["pumped"]
    assert abs(mb["relative_imbalance"]) < 1e-8
    # Storage release recomputed from the final drawdown field: S * sum(cell area * s).
    area = Grid.widths(res.grid.x)[:, None] * Grid.widths(res.grid.y)[None, :]
    assert mb["storage_release"] == pytest.approx(S * np.sum(area * res.drawdown), rel=1e-9)
    # Far-field edges are out of reach of the cone: they supply next to nothing.
    assert abs(mb["far_field_inflow"]) < 1e-6 * mb["pumped"]
    if cfg.river:
        # Most of one day's pumping comes from the river 200 m away (Glover & Balmer 1954:
        # share erfc(0.24) = 0.73 of the volume when integrated over the day).
        assert 0.7 < mb["river_inflow"] / mb["pumped"] < 0.9
    else:
        assert mb["river_inflow"] == 0.0


@pytest.mark.slow
def test_finer_grid_is_closer_to_the_image_solution() -> None:
    # Convergence: the spring drawdown of the scenario approaches the image-well solution
    # (Ferris et al. 1962) as the grid is refined (standard errors below coarse errors).
    errors = []
    for grid in ("coarse", "standard"):
        cfg = ModelConfig(T, S, 0.02, 10 * DAY, 400.0, 300.0, True, 800.0, grid=grid)
        res = simulate(cfg)
        ref = theis_with_river(400.0, 300.0, 10 * DAY, T, S, 0.02, 800.0)
        errors.append(abs(res.drawdown_spring / ref - 1.0))
        assert res.spring[-1] == res.drawdown_spring
    assert errors[1] < errors[0] < 0.02


def test_grid_has_anchors_and_geometric_growth() -> None:
    cfg = ModelConfig(T, S, Q, DAY, 400.0, 300.0, True, 800.0, grid="standard")
    g = build_grid(cfg)
    assert g.x[g.well_ix] == 0.0 and g.y[g.well_iy] == 0.0
    assert g.x[-1] == 800.0  # the river line is the last column
    assert 400.0 in g.x and 300.0 in g.y  # the spring is a node
    assert g.x[0] == -g.far_extent and g.y[0] == -g.far_extent and g.y[-1] == g.far_extent
    # Far edges where the Theis cone cannot reach: at least 10 sqrt(T t / S).
    assert g.far_extent >= 10 * math.sqrt(T * DAY / S)
    preset = GRID_PRESETS["standard"]
    for axis in (g.x, g.y):
        h = np.diff(axis)
        assert np.all(h > 0)
        assert np.max(h[1:] / h[:-1]) <= preset.growth * (1 + 1e-9)
        assert np.max(h[:-1] / h[1:]) <= preset.growth * (1 + 1e-9)
    assert np.diff(g.x)[g.well_ix] == pytest.approx(preset.h_well, rel=0.2)


def test_graded_axis_drops_an_anchor_too_close_to_an_earlier_one() -> None:
    ax = _graded_axis(-100.0, 100.0, [(0.0, 2.0), (1.0, 5.0)], 1.2)
    assert 0.0 in ax and 1.0 not in ax


def test_time_steps_sum_to_t_end_and_grow_by_stage() -> None:
    for preset in GRID_PRESETS.values():
        dts = _time_steps(30 * DAY, preset)
        assert math.isclose(dts.sum(), 30 * DAY, rel_tol=1e-12)
        sizes = np.unique(dts)
        np.testing.assert_allclose(sizes[1:] / sizes[:-1], preset.step_growth, rtol=1e-12)
        assert dts.size == sizes.size * preset.steps_per_stage
        assert dts[0] <= 30 * DAY * preset.first_step_fraction


@pytest.mark.parametrize(
    ("changes", "error", "match"),
    [
        ({"transmissivity": -1.0}, ValueError, "key 'transmissivity': expected a positive"),
        ({"storativity": float("nan")}, ValueError, "config.storativity: expected a finite"),
        ({"river": "on"}, TypeError, "config.river: expected a bool"),
        ({"grid": "huge"}, ValueError, "config.grid: expected one of"),
        ({"spring_x": 900.0}, ValueError, "aquifer side of the river"),
    ],
)
def test_simulate_validates_a_config_built_in_code(changes, error, match) -> None:
    base = {
        "transmissivity": T, "storativity": S, "pumping_rate": Q, "t_end": DAY,
        "spring_x": 100.0, "spring_y": 0.0, "river": True, "river_distance": 800.0,
    }  # fmt: skip
    with pytest.raises(error, match=match):
        simulate(ModelConfig(**{**base, **changes}))
