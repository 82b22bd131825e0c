"""Costly model of the aquifer demo: 2-D transient finite-difference flow in a confined aquifer.

A standalone program, the stand-in for an expensive simulation code: it runs as a separate
process, reads only its input deck and writes only into its run folder::

    python -m winnow.examples.aquifer.solver DECK [--out DIR]
    python examples/aquifer/solver.py DECK [--out DIR]

``DIR`` defaults to the folder holding ``DECK``.  On success it writes ``DIR/result.json``::

    {"qoi": {"drawdown_spring": <m>},
     "time_series": {"t_s": [...], "drawdown_spring_m": [...], "drawdown_well_node_m": [...],
                     "river_inflow_m3s": [...], "far_field_inflow_m3s": [...]},
     "meta": {...grid, time steps, mass balance, echo of the deck...}}

prints ``drawdown_spring = <value>`` on stdout and exits with status 0.  A bad deck (syntax
error, unknown / duplicated / missing key, non-finite or out-of-range number) is reported on
stderr as ``<deck>:<line>: key '<key>': <reason>`` and the program exits with status 2
without writing anything; a numerical failure exits with status 1.

Model
-----
Confined aquifer, homogeneous and isotropic, transmissivity ``T`` [m²/s] and storativity ``S``
[-]; the head ``h`` [m] obeys ``S dh/dt = T (d²h/dx² + d²h/dy²) - Q delta(x) delta(y)``.  The
supply well pumps ``Q`` [m³/s] (positive = extraction) from t = 0 at the origin.  Initially the
head is ``initial_head`` everywhere.  Boundaries: optionally a fully penetrating straight river
along ``x = river_distance`` held at the initial head (fixed-head / Dirichlet line; the aquifer
is the side ``x < river_distance``), and fixed-head far-field edges placed where the Theis
cone cannot reach within ``t_end`` (at least 10 sqrt(T t_end / S), where ``u >= 25`` and
``W(u) < 1e-12``).  Drawdown is ``s = initial_head - h`` [m], POSITIVE DOWN.

Discretisation: node-centred finite volumes on a tensor-product grid graded geometrically
away from anchor lines (the well, the river and the spring), 5-point stencil, backward-Euler
time stepping.  The time step grows fourfold every ``steps_per_stage`` steps (a geometric
series that ends exactly at ``t_end``); the sparse system matrix is factorised with ``splu`` once per
time-step size and reused for every step of that size.  The pumping well is a sink in its
node; the well-node drawdown corresponds to the Theis drawdown at Peaceman's equivalent
radius ``r_e = 0.14 sqrt(dx² + dy²)`` (Peaceman 1983), which the solver uses to report the
drawdown at the well radius as well.  Mass balance (pumped volume = storage release + river
inflow + far-field inflow) is reported in ``meta``.

Deck format (our own): ``key = value`` lines, ``#`` starts a comment, blank lines ignored,
each key at most once.  Keys (units):

=================  ========  =======================================================
key                required  meaning
=================  ========  =======================================================
transmissivity     yes       T [m²/s], > 0
storativity        yes       S [-], 0 < S <= 1
pumping_rate       yes       Q [m³/s], positive = extraction
t_end              yes       time of the prediction since pumping started [s], > 0
spring_x           yes       spring position relative to the well [m]
spring_y           yes       spring position relative to the well [m]
river              yes       ``on`` or ``off`` (off: far-field edge instead)
river_distance     yes       distance from the well to the river line [m], > 0
                             (ignored when ``river = off``)
well_radius        no        well radius [m], > 0 (default 0.1)
initial_head       no        initial head = river stage = far-field head [m] (100.0)
grid               no        ``coarse``, ``standard`` (default) or ``fine``
=================  ========  =======================================================

Caution
-------
Demonstration model with invented data.  Predictions for water supply, spring protection or
any other safety-relevant decision need review under the local regulations and by a licensed
professional (hydrogeologist / engineer).

References
----------
.. [1] Theis, C. V. (1935). Transactions, American Geophysical Union, 16(2), 519-524.
.. [2] Ferris, J. G., et al. (1962). Theory of aquifer tests. USGS Water-Supply Paper 1536-E.
.. [3] Peaceman, D. W. (1983). Interpretation of well-block pressures in numerical reservoir
   simulation with nonsquare grid blocks and anisotropic permeability. SPE Journal 23(3),
   531-543.
.. [4] Glover, R. E., Balmer, G. G. (1954). River depletion resulting from pumping a well
   near a river. Transactions, American Geophysical Union, 35(3), 468-470.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import tempfile
import time
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, Literal

if __name__ == "__main__":
    # One solver process uses one core (the dispatcher runs several at once); threaded BLAS
    # inside the sparse LU only adds contention.  Set before numpy loads; user values win.
    for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(_var, "1")

import numpy as np
import numpy.typing as npt
import scipy.sparse as sps
import scipy.sparse.linalg as spla

__all__ = [
    "GRID_PRESETS",
    "RESULT_FILE",
    "DeckError",
    "GridPreset",
    "ModelConfig",
    "SimulationResult",
    "build_grid",
    "main",
    "parse_deck",
    "simulate",
]

RESULT_FILE = "result.json"
EXIT_OK = 0
EXIT_FAILURE = 1
EXIT_DECK = 2
SOLVER_NAME = "winnow-aquifer-fd"
SOLVER_VERSION = "1"


# --------------------------------------------------------------------------------------------
# configuration
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class GridPreset:
    """Resolution settings of one ``grid`` choice.

    Attributes
    ----------
    h_well, h_river, h_spring : float
        Cell size [m] at the well, along the river line and at the spring.
    growth : float
        Growth ratio of neighbouring cell sizes away from those anchors (> 1).
    steps_per_stage : int
        Backward-Euler steps taken with each time-step size before it grows.
    first_step_fraction : float
        Length of the first time step as a fraction of ``t_end`` (approximately).
    step_growth : float
        Factor by which the time step grows from one stage to the next (> 1).
    """

    h_well: float
    h_river: float
    h_spring: float
    growth: float
    steps_per_stage: int
    first_step_fraction: float
    step_growth: float = 2.0


GRID_PRESETS: dict[str, GridPreset] = {
    # h_well, h_river, h_spring, growth, steps per stage, first step / t_end, step growth
    "coarse": GridPreset(4.0, 10.0, 10.0, 1.25, 30, 1e-5, 4.0),
    "standard": GridPreset(2.0, 5.0, 5.0, 1.15, 80, 1e-5, 4.0),
    "fine": GridPreset(1.0, 2.5, 2.5, 1.08, 160, 1e-6, 4.0),
}


@dataclass(frozen=True)
class ModelConfig:
    """A validated deck (all quantities in SI units, see the module docstring)."""

    transmissivity: float
    storativity: float
    pumping_rate: float
    t_end: float
    spring_x: float
    spring_y: float
    river: bool
    river_distance: float
    well_radius: float = 0.1
    initial_head: float = 100.0
    grid: Literal["coarse", "standard", "fine"] = "standard"


class DeckError(ValueError):
    """A bad input deck; the message names the file, the line (when known) and the key."""

    def __init__(
        self, path: str | os.PathLike[str], line: int | None, key: str | None, reason: str
    ):
        self.path = str(path)
        self.line = line
        self.key = key
        self.reason = reason
        where = self.path if line is None else f"{self.path}:{line}"
        what = "" if key is None else f" key '{key}':"
        super().__init__(f"{where}:{what} {reason}")


_KeyKind = Literal["number", "choice"]
# key -> (kind, required, choices or None)
_SCHEMA: dict[str, tuple[_KeyKind, bool, tuple[str, ...] | None]] = {
    "transmissivity": ("number", True, None),
    "storativity": ("number", True, None),
    "pumping_rate": ("number", True, None),
    "t_end": ("number", True, None),
    "spring_x": ("number", True, None),
    "spring_y": ("number", True, None),
    "river": ("choice", True, ("on", "off")),
    "river_distance": ("number", True, None),
    "well_radius": ("number", False, None),
    "initial_head": ("number", False, None),
    "grid": ("choice", False, tuple(GRID_PRESETS)),
}


def _check_range(values: dict[str, Any], lines: dict[str, int], path: str) -> None:
    def bad(key: str, reason: str) -> DeckError:
        return DeckError(path, lines.get(key), key, f"{reason}, got {values[key]!r}")

    for key in ("transmissivity", "t_end", "river_distance", "well_radius"):
        if key in values and values[key] <= 0:
            raise bad(key, "expected a positive number")
    if not 0 < values["storativity"] <= 1:
        raise bad("storativity", "expected a number in (0, 1]")
    r_spring = math.hypot(values["spring_x"], values["spring_y"])
    if r_spring <= values.get("well_radius", 0.1):
        raise bad("spring_x", f"expected the spring outside the well (distance {r_spring} m)")
    if values["river"] == "on" and values["spring_x"] >= values["river_distance"]:
        raise bad(
            "spring_x",
            f"expected the spring on the aquifer side of the river "
            f"(spring_x < river_distance = {values['river_distance']})",
        )


def parse_deck(path: str | os.PathLike[str]) -> ModelConfig:
    """Read and strictly validate an input deck.

    Parameters
    ----------
    path : path-like
        The deck file (``key = value`` lines, ``#`` comments).

    Returns
    -------
    ModelConfig

    Raises
    ------
    DeckError
        On a missing or unreadable file, a line that is not ``key = value``, an unknown,
        duplicated or missing key, a number that does not parse or is not finite, a choice
        outside its list, or a value out of range.  The message names the file, the line and
        the key.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        reason = f"cannot read the deck ({exc.__class__.__name__}: {exc})"
        raise DeckError(p, None, None, reason) from None
    values: dict[str, Any] = {}
    lines: dict[str, int] = {}
    for lineno, raw in enumerate(text.splitlines(), start=1):
        body = raw.split("#", 1)[0].strip()
        if not body:
            continue
        if "=" not in body:
            raise DeckError(p, lineno, None, f"expected 'key = value', got {body!r}")
        key, _, value = (part.strip() for part in body.partition("="))
        if key not in _SCHEMA:
            raise DeckError(p, lineno, key, f"unknown key; valid keys are {sorted(_SCHEMA)}")
        if key in values:
            raise DeckError(p, lineno, key, f"duplicated key (first set on line {lines[key]})")
        if not value:
            raise DeckError(p, lineno, key, "missing value")
        kind, _, choices = _SCHEMA[key]
        if kind == "number":
            try:
                number = float(value)
            except ValueError:
                raise DeckError(p, lineno, key, f"expected a number, got {value!r}") from None
            if not math.isfinite(number):
                raise DeckError(p, lineno, key, f"expected a finite number, got {value!r}")
            values[key] = number
        else:
            if value not in (choices or ()):
                raise DeckError(
                    p, lineno, key, f"expected one of {list(choices or ())}, got {value!r}"
                )
            values[key] = value
        lines[key] = lineno
    missing = [k for k, (_, required, _) in _SCHEMA.items() if required and k not in values]
    if missing:
        raise DeckError(p, None, missing[0], f"missing required key (all missing: {missing})")
    _check_range(values, lines, str(p))
    values["river"] = values["river"] == "on"
    return ModelConfig(**values)


# --------------------------------------------------------------------------------------------
# grid
# --------------------------------------------------------------------------------------------
def _segment_nodes(
    a: float, b: float, h_a: float | None, h_b: float | None, k: float
) -> np.ndarray:
    """Nodes in ``[a, b]`` (both ends included) with cell size growing by at most ``exp(k)``
    per cell away from the anchored end(s): ``h(x) = min(h_a + k (x - a), h_b + k (b - x))``.

    The node positions are the inverse of ``xi(x) = int_a^x dx'/h(x')`` at evenly spaced xi,
    with the number of cells ``ceil(xi(b))`` so no cell exceeds its nominal size.
    """
    length = b - a
    if h_a is None and h_b is None:
        raise ValueError("a segment needs at least one anchored end")
    if h_b is None:
        xi_tot = math.log1p(k * length / h_a) / k
        n = max(1, math.ceil(xi_tot - 1e-9))
        xi = np.linspace(0.0, xi_tot, n + 1)
        x = a + h_a * np.expm1(k * xi) / k
    elif h_a is None:
        xi_tot = math.log1p(k * length / h_b) / k
        n = max(1, math.ceil(xi_tot - 1e-9))
        xi = np.linspace(0.0, xi_tot, n + 1)
        x = (b - h_b * np.expm1(k * xi) / k)[::-1]
    else:
        xc = min(max((h_b - h_a + k * (a + b)) / (2.0 * k), a), b)  # where both sizes meet
        xi_a = math.log1p(k * (xc - a) / h_a) / k
        xi_b = math.log1p(k * (b - xc) / h_b) / k
        xi_tot = xi_a + xi_b
        n = max(1, math.ceil(xi_tot - 1e-9))
        xi = np.linspace(0.0, xi_tot, n + 1)
        left = a + h_a * np.expm1(k * xi) / k
        right = b - h_b * np.expm1(k * (xi_tot - xi)) / k
        x = np.where(xi <= xi_a, left, right)
    x[0], x[-1] = a, b
    return x


def _graded_axis(
    lo: float, hi: float, anchors: list[tuple[float, float]], growth: float
) -> np.ndarray:
    """Node coordinates on ``[lo, hi]``: every anchor ``(position, size)`` is a node with that
    local cell size; sizes grow geometrically (ratio ``growth``) away from the anchors.
    Anchors are given in priority order; one closer than its size to an earlier one is
    dropped.  A boundary at ``lo``/``hi`` may itself be an anchor."""
    kept: list[tuple[float, float]] = []
    for pos, h in anchors:
        if all(abs(pos - q) >= max(h, hq) for q, hq in kept) or not kept:
            kept.append((pos, h))
    kept.sort()
    points: list[tuple[float, float | None]] = [(p, h) for p, h in kept]
    if points[0][0] > lo:
        points.insert(0, (lo, None))
    if points[-1][0] < hi:
        points.append((hi, None))
    # h(x) = h0 + k d grows by exp(k * dxi) <= exp(k) from one cell to the next (dxi <= 1).
    k = math.log(growth)
    pieces = [
        _segment_nodes(p0, p1, h0, h1, k)
        for (p0, h0), (p1, h1) in zip(points[:-1], points[1:], strict=True)
    ]
    return np.concatenate([pieces[0]] + [p[1:] for p in pieces[1:]])


@dataclass(frozen=True)
class Grid:
    """Tensor-product grid: node coordinates and their finite-volume widths [m]."""

    x: np.ndarray  # (nx,)
    y: np.ndarray  # (ny,)
    well_ix: int
    well_iy: int
    far_extent: float  # distance from the well to the far-field edges [m]

    @staticmethod
    def widths(c: np.ndarray) -> np.ndarray:
        w = np.empty_like(c)
        w[1:-1] = 0.5 * (c[2:] - c[:-2])
        w[0] = 0.5 * (c[1] - c[0])
        w[-1] = 0.5 * (c[-1] - c[-2])
        return w


def build_grid(config: ModelConfig) -> Grid:
    """Graded grid of ``config``: fine at the well, the river line and the spring.

    The far-field edges sit at ``L = max(5000, 2 * max(|spring|, river_distance),
    10 sqrt(T t_end / S))`` m from the well, where the Theis drawdown is below 1e-12 of its
    scale ``Q / (4 pi T)`` at ``t_end`` (u >= 25).
    """
    g = GRID_PRESETS[config.grid]
    reach = 10.0 * math.sqrt(config.transmissivity * config.t_end / config.storativity)
    near = max(abs(config.spring_x), abs(config.spring_y))
    if config.river:
        near = max(near, config.river_distance)
    far = max(5000.0, 2.0 * near, reach)
    x_anchors = [(0.0, g.h_well)]
    if config.river:
        x_anchors.append((config.river_distance, g.h_river))
    x_anchors.append((config.spring_x, g.h_spring))
    x_hi = config.river_distance if config.river else far
    x = _graded_axis(-far, x_hi, x_anchors, g.growth)
    y = _graded_axis(-far, far, [(0.0, g.h_well), (config.spring_y, g.h_spring)], g.growth)
    return Grid(
        x=x,
        y=y,
        well_ix=int(np.flatnonzero(x == 0.0)[0]),
        well_iy=int(np.flatnonzero(y == 0.0)[0]),
        far_extent=far,
    )


def _bilinear(
    x: np.ndarray, y: np.ndarray, px: np.ndarray, py: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Flat indices (m, 4) into the (nx, ny) node array and bilinear weights (m, 4)."""
    if np.any((px < x[0]) | (px > x[-1]) | (py < y[0]) | (py > y[-1])):
        raise ValueError("probe points: expected points inside the model domain")
    i = np.clip(np.searchsorted(x, px, side="right") - 1, 0, x.size - 2)
    j = np.clip(np.searchsorted(y, py, side="right") - 1, 0, y.size - 2)
    fx = (px - x[i]) / (x[i + 1] - x[i])
    fy = (py - y[j]) / (y[j + 1] - y[j])
    ny = y.size
    idx = np.stack([i * ny + j, (i + 1) * ny + j, i * ny + j + 1, (i + 1) * ny + j + 1], axis=1)
    w = np.stack([(1 - fx) * (1 - fy), fx * (1 - fy), (1 - fx) * fy, fx * fy], axis=1)
    return idx, w


# --------------------------------------------------------------------------------------------
# simulation
# --------------------------------------------------------------------------------------------
@dataclass
class SimulationResult:
    """Everything a run produces (in-process form of ``result.json``).

    Attributes
    ----------
    drawdown_spring : float
        Drawdown at the spring at ``t_end`` [m], positive down (the quantity of interest).
    t : ndarray, shape (n_steps,)
        End time of every time step [s]; ``t[-1] == t_end``.
    spring : ndarray, shape (n_steps,)
        Drawdown at the spring after each step [m].
    well_node : ndarray, shape (n_steps,)
        Drawdown of the well node after each step [m].
    probes : ndarray, shape (n_steps, n_probes)
        Drawdown at the requested probe points after each step [m].
    river_inflow, far_field_inflow : ndarray, shape (n_steps,)
        Water entering the aquifer from the river line / the far-field edges during each
        step [m³/s] (positive into the aquifer).
    drawdown : ndarray, shape (nx, ny)
        Drawdown on the grid nodes at ``t_end`` [m].
    grid : Grid
    meta : dict
        Grid size, steps, factorisations, mass balance, Peaceman well drawdown, timings.
    """

    drawdown_spring: float
    t: np.ndarray
    spring: np.ndarray
    well_node: np.ndarray
    probes: np.ndarray
    river_inflow: np.ndarray
    far_field_inflow: np.ndarray
    drawdown: np.ndarray
    grid: Grid
    meta: dict[str, Any]


def _validate_config(config: ModelConfig) -> None:
    """The deck checks, for a ModelConfig built in code rather than read from a deck."""
    values = asdict(config)
    for key, (kind, _, choices) in _SCHEMA.items():
        value = values[key]
        if key == "river":
            if not isinstance(value, bool):
                raise TypeError(f"config.river: expected a bool, got {value!r}")
            values[key] = "on" if value else "off"
        elif kind == "number":
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise TypeError(f"config.{key}: expected a number, got {value!r}")
            if not math.isfinite(value):
                raise ValueError(f"config.{key}: expected a finite number, got {value!r}")
        elif value not in (choices or ()):
            raise ValueError(f"config.{key}: expected one of {list(choices or ())}, got {value!r}")
    _check_range(values, {}, "<config>")


def _time_steps(t_end: float, preset: GridPreset) -> np.ndarray:
    """Step sizes [s]: ``n`` steps of ``dt0``, ``n`` of ``g dt0``, ``n`` of ``g² dt0``, ...

    ``g = preset.step_growth`` and ``n = preset.steps_per_stage``; ``dt0`` is chosen close
    to ``first_step_fraction * t_end`` so that the steps sum exactly to ``t_end``
    (``n dt0 (g^J - 1) / (g - 1) = t_end``).
    """
    n, g = preset.steps_per_stage, preset.step_growth
    ratio = 1.0 / (n * preset.first_step_fraction)
    stages = max(1, math.ceil(math.log(ratio * (g - 1.0) + 1.0, g) - 1e-9))
    dt0 = t_end * (g - 1.0) / (n * (g**stages - 1.0))
    return np.repeat(dt0 * g ** np.arange(stages), n)


def simulate(config: ModelConfig, probes: npt.ArrayLike | None = None) -> SimulationResult:
    """Run the finite-difference model.

    Parameters
    ----------
    config : ModelConfig
        A validated deck.
    probes : array_like, shape (m, 2), optional
        Extra points ``(x, y)`` [m] (well at the origin) where the drawdown is recorded after
        every step (bilinear interpolation between nodes; exact at nodes).

    Returns
    -------
    SimulationResult
    """
    started = time.perf_counter()
    _validate_config(config)
    preset = GRID_PRESETS[config.grid]
    grid = build_grid(config)
    x, y = grid.x, grid.y
    nx, ny = x.size, y.size
    wx, wy = Grid.widths(x), Grid.widths(y)
    tr, st, q, h0 = (
        config.transmissivity,
        config.storativity,
        config.pumping_rate,
        config.initial_head,
    )

    # Node classes: fixed-head edges; the river is the x = x[-1] column when it is on.
    ix, iy = np.meshgrid(np.arange(nx), np.arange(ny), indexing="ij")
    edge = (ix == 0) | (iy == 0) | (ix == nx - 1) | (iy == ny - 1)
    river_node = (ix == nx - 1) if config.river else np.zeros_like(edge)
    active = ~edge
    n_act = int(active.sum())
    act_id = -np.ones((nx, ny), dtype=np.int64)
    act_id[active] = np.arange(n_act)

    # Conductances [m²/s] of the x- and y-links: T * (face width) / (node distance).
    cx = tr * wy[None, :] / np.diff(x)[:, None]  # (nx-1, ny) link (i,j)-(i+1,j)
    cy = tr * wx[:, None] / np.diff(y)[None, :]  # (nx, ny-1) link (i,j)-(i,j+1)
    rows: list[np.ndarray] = []
    cols: list[np.ndarray] = []
    vals: list[np.ndarray] = []
    diag = np.zeros(n_act)
    c_river = np.zeros(n_act)  # sum of conductances from each active node to river nodes
    c_far = np.zeros(n_act)
    for c, a_sl, b_sl in (
        (cx, (slice(0, nx - 1), slice(None)), (slice(1, nx), slice(None))),
        (cy, (slice(None), slice(0, ny - 1)), (slice(None), slice(1, ny))),
    ):
        ia, ib = act_id[a_sl].ravel(), act_id[b_sl].ravel()
        cc = c.ravel()
        for p, other, other_sl in ((ia, ib, b_sl), (ib, ia, a_sl)):
            m = p >= 0
            np.add.at(diag, p[m], cc[m])
            both = m & (other >= 0)
            rows.append(p[both])
            cols.append(other[both])
            vals.append(-cc[both])
            to_fixed = m & (other < 0)
            riv = river_node[other_sl].ravel()
            np.add.at(c_river, p[to_fixed & riv], cc[to_fixed & riv])
            np.add.at(c_far, p[to_fixed & ~riv], cc[to_fixed & ~riv])
    conduct = sps.csc_matrix(
        (np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(n_act, n_act)
    ) + sps.diags(diag)
    storage = st * (wx[:, None] * wy[None, :])[active]  # S * cell area [m²]
    b_fixed = (c_river + c_far) * h0  # inflow terms from the fixed-head nodes
    sink = np.zeros(n_act)
    well = int(act_id[grid.well_ix, grid.well_iy])
    sink[well] = q

    spring_idx, spring_w = _bilinear(x, y, np.array([config.spring_x]), np.array([config.spring_y]))
    pr = np.zeros((0, 2)) if probes is None else np.asarray(probes, dtype=np.float64).reshape(-1, 2)
    probe_idx, probe_w = _bilinear(x, y, pr[:, 0], pr[:, 1])

    dts = _time_steps(config.t_end, preset)
    n_steps = dts.size
    t = np.cumsum(dts)
    t[-1] = config.t_end
    h = np.full(n_act, h0)
    full = np.full(nx * ny, h0)
    act_flat = np.flatnonzero(active.ravel())
    spring = np.empty(n_steps)
    well_s = np.empty(n_steps)
    river_in = np.empty(n_steps)
    far_in = np.empty(n_steps)
    probe_s = np.empty((n_steps, pr.shape[0]))
    v_storage = 0.0
    v_river = 0.0
    v_far = 0.0
    n_fact = 0
    lu = None
    dt_lu = None
    for k, dt in enumerate(dts):
        if dt != dt_lu:  # one factorisation per time-step size
            # The matrix is symmetric positive definite: a symmetric fill-reducing ordering
            # and no pivoting keep the factors small (about half the fill of COLAMD).
            lu = spla.splu(
                (conduct + sps.diags(storage / dt)).tocsc(),
                permc_spec="MMD_AT_PLUS_A",
                diag_pivot_thresh=0.0,
                options={"SymmetricMode": True},
            )
            dt_lu = dt
            n_fact += 1
        h_new = lu.solve(storage / dt * h + b_fixed - sink)  # backward Euler
        # Plain sums rather than `@`: a BLAS dot may start threads that stall on a busy host.
        v_storage += float(np.sum(storage * (h - h_new)))
        h = h_new
        q_river = float(np.sum(c_river * (h0 - h)))
        q_far = float(np.sum(c_far * (h0 - h)))
        river_in[k] = q_river
        far_in[k] = q_far
        v_river += q_river * float(dt)
        v_far += q_far * float(dt)
        full[act_flat] = h
        s_full = h0 - full
        spring[k] = float(np.sum(s_full[spring_idx] * spring_w))
        well_s[k] = h0 - h[well]
        probe_s[k] = np.sum(s_full[probe_idx] * probe_w, axis=1)
    if not np.all(np.isfinite(h)):
        raise FloatingPointError("the head field contains non-finite values")

    v_pumped = q * config.t_end
    imbalance = v_pumped - (v_storage + v_river + v_far)
    dx_w = float(wx[grid.well_ix])
    dy_w = float(wy[grid.well_iy])
    r_e = 0.14 * math.hypot(dx_w, dy_w)  # Peaceman (1983) equivalent radius
    s_well = well_s[-1] + q / (2.0 * math.pi * tr) * math.log(r_e / config.well_radius)
    meta = {
        "solver": SOLVER_NAME,
        "version": SOLVER_VERSION,
        "deck": {k: v for k, v in asdict(config).items()},
        "grid": {
            "preset": config.grid,
            "nx": int(nx),
            "ny": int(ny),
            "unknowns": n_act,
            "x_range_m": [float(x[0]), float(x[-1])],
            "y_range_m": [float(y[0]), float(y[-1])],
            "far_field_extent_m": grid.far_extent,
            "well_cell_m": [dx_w, dy_w],
        },
        "time": {
            "n_steps": int(n_steps),
            "n_factorisations": n_fact,
            "first_step_s": float(dts[0]),
            "last_step_s": float(dts[-1]),
        },
        "mass_balance_m3": {
            "pumped": v_pumped,
            "storage_release": v_storage,
            "river_inflow": v_river,
            "far_field_inflow": v_far,
            "imbalance": imbalance,
            "relative_imbalance": imbalance / v_pumped if v_pumped != 0 else 0.0,
        },
        "well": {
            "drawdown_well_node_m": float(well_s[-1]),
            "peaceman_radius_m": r_e,
            "drawdown_at_well_radius_m": float(s_well),
        },
        "wall_seconds": time.perf_counter() - started,
    }
    drawdown = (h0 - full).reshape(nx, ny)
    return SimulationResult(
        drawdown_spring=float(spring[-1]),
        t=t,
        spring=spring,
        well_node=well_s,
        probes=probe_s,
        river_inflow=river_in,
        far_field_inflow=far_in,
        drawdown=drawdown,
        grid=grid,
        meta=meta,
    )


# --------------------------------------------------------------------------------------------
# command line
# --------------------------------------------------------------------------------------------
def _result_document(result: SimulationResult, deck: Path) -> dict[str, Any]:
    meta = dict(result.meta)
    meta["deck_file"] = str(deck)
    return {
        "qoi": {"drawdown_spring": result.drawdown_spring},
        "time_series": {
            "t_s": result.t.tolist(),
            "drawdown_spring_m": result.spring.tolist(),
            "drawdown_well_node_m": result.well_node.tolist(),
            "river_inflow_m3s": result.river_inflow.tolist(),
            "far_field_inflow_m3s": result.far_field_inflow.tolist(),
        },
        "meta": meta,
    }


def _write_atomic(path: Path, text: str) -> None:
    """Write through a temporary file and rename, so a reader never sees half a result."""
    fd, tmp = tempfile.mkstemp(prefix=".result-", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.chmod(tmp, 0o644)  # mkstemp creates 0600; a result file is meant to be read
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def main(argv: list[str] | None = None) -> int:
    """Command-line entry point; returns the exit status (0 ok, 1 failure, 2 bad input)."""
    parser = argparse.ArgumentParser(
        prog="winnow-aquifer-solver",
        description="2-D transient finite-difference model of a confined aquifer pumped by a "
        "well near a fixed-head river (winnow demo; invented data).",
    )
    parser.add_argument("deck", type=Path, help="input deck (key = value lines)")
    parser.add_argument(
        "--out",
        type=Path,
        default=None,
        help="run folder for result.json (default: the deck's folder)",
    )
    args = parser.parse_args(argv)
    deck: Path = args.deck
    out: Path = args.out if args.out is not None else deck.resolve().parent
    try:
        config = parse_deck(deck)
        if not out.is_dir():
            raise DeckError(deck, None, None, f"run folder {str(out)!r} does not exist")
    except DeckError as exc:
        print(f"aquifer solver: error: {exc}", file=sys.stderr)
        return EXIT_DECK
    print(
        f"aquifer solver: deck {deck}: T = {config.transmissivity:.6g} m2/s, "
        f"S = {config.storativity:.6g}, Q = {config.pumping_rate:.6g} m3/s, "
        f"t_end = {config.t_end:.6g} s, river = {'on' if config.river else 'off'}, "
        f"grid = {config.grid}",
        flush=True,
    )
    try:
        result = simulate(config)
    except (FloatingPointError, RuntimeError, MemoryError) as exc:
        print(f"aquifer solver: numerical failure: {exc}", file=sys.stderr)
        return EXIT_FAILURE
    if not math.isfinite(result.drawdown_spring):
        print("aquifer solver: numerical failure: non-finite spring drawdown", file=sys.stderr)
        return EXIT_FAILURE
    doc = _result_document(result, deck)
    _write_atomic(out / RESULT_FILE, json.dumps(doc, indent=1) + "\n")
    mb = result.meta["mass_balance_m3"]
    g = result.meta["grid"]
    print(
        f"aquifer solver: grid {g['nx']} x {g['ny']}, {result.meta['time']['n_steps']} steps, "
        f"{result.meta['time']['n_factorisations']} factorisations, "
        f"mass balance error {mb['relative_imbalance']:.2e}, "
        f"{result.meta['wall_seconds']:.2f} s"
    )
    print(f"drawdown_spring = {result.drawdown_spring:.10g}")
    return EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
