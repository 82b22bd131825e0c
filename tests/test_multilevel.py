"""Multilevel studies (issue 16): settings, the points of each level, the telescoping estimate,
its standard error and the allocation of runs, checked against closed forms, a hand-computed
Giles allocation, scipy's constrained optimiser, a binomial coverage bound and the project's
own multi-fidelity estimate.

The analytic hierarchy used throughout: ``Q_l(x) = x + 2^-l x^2`` with ``x ~ N(0, 1)``, so
(normal moments E x^2 = 1, E x^3 = 0, E x^4 = 3; e.g. Johnson, Kotz & Balakrishnan 1994,
ch. 13) ``E Q_l = 2^-l``, ``Var Q_0 = Var(x + x^2) = 1 + 2 = 3``, and the corrections
``Y_l = Q_l - Q_{l-1} = -2^-l x^2`` have ``E Y_l = -2^-l`` and ``Var Y_l = 2 * 4^-l``: they
shrink at the known rate 4^-l.
"""

from __future__ import annotations

import copy
import math
from pathlib import Path

import numpy as np
import pytest
import yaml
from scipy import optimize, stats

from winnow.tasks.collect import (
    LevelValues,
    correction_costs,
    estimate_qoi,
    extend_levels,
    more_runs,
    multilevel_estimate,
    optimal_allocation,
    select_levels,
)
from winnow.tasks.config import ConfigError, LevelsSettings, parse_config
from winnow.tasks.errors import InputError
from winnow.tasks.thin import reweight

DEMO = Path(__file__).resolve().parents[1] / "configs" / "aquifer_demo.yaml"
# small, quick thin settings (the selections' quality is not what these tests measure)
THIN = {"features": 256, "exact_max_rows": 2000}


def q(level: int, x: np.ndarray) -> np.ndarray:
    """The analytic level functions of the module docstring."""
    return x + 2.0**-level * x**2


def analytic_levels(x: np.ndarray, indices, weights, n_levels: int = 3) -> list[LevelValues]:
    """Every level on the same points (``x`` of shape (m,))."""
    return [
        LevelValues(
            f"l{k}", indices, weights, q(k, x), None if k == 0 else q(k - 1, x), cost=4.0**k
        )
        for k in range(n_levels)
    ]


# --------------------------------------------------------------------------------------------
# the telescoping estimate: closed forms
# --------------------------------------------------------------------------------------------
def test_telescoping_sum_on_gauss_hermite_nodes_is_the_closed_form():
    # Source: Gauss-Hermite quadrature with n nodes integrates polynomials of degree <= 2n - 1
    # against the normal density exactly (Abramowitz & Stegun 1964, 25.4.46;
    # numpy.polynomial.hermite_e.hermegauss for the probabilists' weight exp(-x^2/2)). With
    # 5 nodes every moment used here (degree <= 4) is exact, so the weighted means and
    # variances are the closed forms of the module docstring, to rounding: rtol 1e-12 is
    # ample for sums of 5 terms of double precision nodes and weights.
    nodes, gh = np.polynomial.hermite_e.hermegauss(5)
    w = gh / gh.sum()
    est = multilevel_estimate(analytic_levels(nodes, np.arange(5), w))
    np.testing.assert_allclose(est.mean, 0.25, rtol=1e-12)  # E Q_2 = 2^-2
    means = [c.mean for c in est.levels]
    np.testing.assert_allclose(means, [1.0, -0.5, -0.25], rtol=1e-12)  # E Q_0, E Y_1, E Y_2
    variances = [float(c.sd) ** 2 for c in est.levels]
    np.testing.assert_allclose(variances, [3.0, 2 / 4, 2 / 16], rtol=1e-12)
    # Kish's effective size of the quadrature weights, (sum w)^2 / sum w^2 (Kish 1965)
    n_eff = 1.0 / float(np.sum(w**2))
    assert all(math.isclose(c.ess, n_eff, rel_tol=1e-12) for c in est.levels)
    # independent levels: sqrt(sum V_l / N_l) (Giles 2008, Section 2)
    np.testing.assert_allclose(est.se_independent, math.sqrt((3 + 0.5 + 0.125) / n_eff), rtol=1e-12)
    # the levels share all points and weights, so the sum of their means is the weighted mean
    # of Q_2 itself and its variance that of one level of Q_2: Var Q_2 = Var(x + x^2/4)
    # = 1 + 2/16 = 1.125 (closed form), over the same effective size
    np.testing.assert_allclose(est.se, math.sqrt(1.125 / n_eff), rtol=1e-12)


def test_two_level_nested_estimate_is_the_multi_fidelity_estimate():
    # Source: the project's discrepancy-form multi-fidelity estimate (estimate_qoi's
    # control_variate["mean"]: chain mean of the cheap model + weighted mean of costly minus
    # cheap at the points; Peherstorfer et al. 2016), which is the two-level telescoping sum
    # with the cheap model as level 0 on every chain row (weights 1/n) and the costly solver
    # as level 1 on the thinned points, nested in the chain (Giles 2013, arXiv:1304.5472,
    # Section 1.1: two-level MLMC is the control variate with coefficient one). Both sides
    # add the same float64 terms, possibly in another order: the rounding of sums of
    # n = 3000 terms is a few 1e-13 relative at worst, so rtol 1e-12.
    gen = np.random.default_rng(5)
    chain = gen.normal(size=(3000, 2)) * [1.0, 0.5] + [0.2, -1.0]

    def cheap(x):
        return x[:, 0] + 0.5 * x[:, 1] ** 2

    def costly(x):
        return cheap(x) + 0.3 * np.sin(2.0 * x[:, 0]) + 0.1

    pts = select_levels(chain, [30, 30], rng=4, **THIN)  # level 1's points: a thinned set
    sel = pts.levels[1].selection
    y, c_pts, c_chain = costly(sel.points), cheap(sel.points), cheap(chain)
    mf = estimate_qoi(
        y, sel.weights, name="q", cheap_on_points=c_pts, cheap_on_chain=c_chain
    ).control_variate
    est = multilevel_estimate(
        [
            LevelValues("cheap", np.arange(chain.shape[0]), np.ones(chain.shape[0]), c_chain),
            LevelValues("solver", sel.indices, sel.weights, y, c_pts),
        ]
    )
    np.testing.assert_allclose(est.mean, mf["mean"], rtol=1e-12)
    np.testing.assert_allclose(est.levels[0].mean, mf["cheap_chain_mean"], rtol=1e-12)
    np.testing.assert_allclose(est.levels[1].mean, mf["discrepancy_mean"], rtol=1e-12)
    np.testing.assert_allclose(est.levels[1].sd, mf["discrepancy_sd"], rtol=1e-12)
    assert math.isclose(est.levels[1].ess, mf["ess_points"], rel_tol=1e-12)


def _replicate(pairing: str, sizes: list[int], seed: int) -> LevelValues:
    """Three levels on i.i.d. normal points: disjoint (fresh draws per level) or nested (each
    level the first points of the coarser level's draws, a random subset of them)."""
    gen = np.random.default_rng(seed)
    x0 = gen.normal(size=sizes[0])
    levels, offset = [], 0
    for k, n in enumerate(sizes):
        if pairing == "nested":
            x, idx = x0[:n], np.arange(n)
        else:
            x = x0 if k == 0 else gen.normal(size=n)
            idx = np.arange(offset, offset + n)
            offset += n
        levels.append(LevelValues(f"l{k}", idx, np.ones(n), q(k, x), q(k - 1, x) if k else None))
    return multilevel_estimate(levels)


@pytest.mark.parametrize("pairing", ["disjoint", "nested"])
def test_combined_interval_covers_at_its_nominal_rate(pairing):
    # Source: the closed forms of the module docstring. E[Q_2] = 0.25 is the target. The
    # estimator's variance with N = (400, 100, 40) points: disjoint (independent levels,
    # Giles 2008 Section 2) sum Var Y_l / N_l = 3/400 + 0.5/100 + 0.125/40 = 0.015625;
    # nested adds 2 sum_{k<l} Cov(Y_k, Y_l) / N_k (level l's points a random subset of level
    # k's): Cov(Q_0, Y_1) = Cov(x + x^2, -x^2/2) = -1, Cov(Q_0, Y_2) = -1/2,
    # Cov(Y_1, Y_2) = Var(x^2)/8 = 1/4, so 0.015625 + 2 (-1/400 - 0.5/400 + 0.25/100)
    # = 0.013125.
    sizes = [400, 100, 40]
    true_var = {"disjoint": 0.015625, "nested": 0.013125}[pairing]
    n_rep, nominal = 200, 0.9
    hits, se2 = 0, []
    for r in range(n_rep):  # fixed seeds: the same replicates every run
        est = _replicate(pairing, sizes, 1000 + r)
        lo, hi = est.interval(nominal)
        hits += int(lo <= 0.25 <= hi)
        se2.append(float(est.se) ** 2)
    # Binomial bound: with the true coverage 0.9 the number of covering intervals in 200
    # independent replicates is Binomial(200, 0.9); the central 99.9 % range of that law
    # (scipy.stats.binom: 168 to 192) fails a correct method once in a thousand seed sets.
    lo_hits = stats.binom.ppf(0.0005, n_rep, nominal)
    hi_hits = stats.binom.isf(0.0005, n_rep, nominal)
    assert lo_hits <= hits <= hi_hits, (pairing, hits, lo_hits, hi_hits)
    # the stated variance is the estimator's on average: mean se^2 within 4 Monte Carlo
    # standard errors (of the 200 replicates) of the closed form; the plug-in sd has no
    # small-sample factor, a bias of at most 1/40 relative, well inside that band
    mc_se = np.std(se2, ddof=1) / math.sqrt(n_rep)
    assert abs(np.mean(se2) - true_var) <= 4 * mc_se + 0.025 * true_var, (np.mean(se2), mc_se)


def test_with_level_equals_recomputing_everything():
    # Source: the estimate's definition (Eq. (2) and the variance sum): replacing one level's
    # values and reusing the others' contributions must give what a full recomputation
    # gives. Same float64 operations on the same arrays: rtol 1e-14 only allows another
    # order of summation.
    gen = np.random.default_rng(3)
    x = gen.normal(size=60)
    w = gen.uniform(0.5, 1.5, size=60)
    levels = analytic_levels(x, np.arange(60), w)
    est = multilevel_estimate(levels)
    x2 = gen.normal(size=25)
    new = LevelValues("l1", np.arange(100, 125), np.ones(25), q(1, x2), q(0, x2), cost=4.0)
    updated = est.with_level(1, new)
    full = multilevel_estimate([levels[0], new, levels[2]])
    for attr in ("mean", "se", "se_independent", "covariance"):
        np.testing.assert_allclose(getattr(updated, attr), getattr(full, attr), rtol=1e-14)
    assert [c.n_points for c in updated.levels] == [60, 25, 60]


# --------------------------------------------------------------------------------------------
# the allocation
# --------------------------------------------------------------------------------------------
def test_giles_allocation_hand_computed():
    # Source: Giles (2008), Section 2 (from memory; Giles 2015 repeats it): for variance eps^2,
    # N_l = eps^-2 sqrt(V_l / C_l) sum_k sqrt(V_k C_k). By hand for V = (4, 1, 0.25),
    # C = (1, 4, 16): sqrt(V C) = (2, 2, 2), sum 6; sqrt(V / C) = (2, 0.5, 0.125);
    # eps = 0.1: N = 100 * 6 * (2, 0.5, 0.125) = (1200, 300, 75), cost 1200 + 1200 + 1200
    # = 3600, variance 4/1200 + 1/300 + 0.25/75 = 0.01 = eps^2.
    v, c = [4.0, 1.0, 0.25], [1.0, 4.0, 16.0]
    a = optimal_allocation(v, c, target_se=0.1)
    assert a.runs == (1200, 300, 75)
    assert a.cost == pytest.approx(3600.0, rel=1e-12)
    assert a.predicted_se == pytest.approx(0.1, rel=1e-12)
    # the same cost spent as a budget: N_l = B sqrt(V_l / C_l) / sum_k sqrt(V_k C_k)
    assert optimal_allocation(v, c, cost_budget=3600.0).runs == (1200, 300, 75)
    # eps = 0.3: N = (1/0.09) * 6 * (2, 0.5, 0.125) = (133.3, 33.3, 8.3), rounded up
    b = optimal_allocation(v, c, target_se=0.3)
    np.testing.assert_allclose(b.exact, [400 / 3, 100 / 3, 25 / 3], rtol=1e-12)
    assert b.runs == (134, 34, 9)
    assert b.predicted_se <= 0.3
    # cost budget 1000: N = 1000 (2, 0.5, 0.125) / 6 = (333.3, 83.3, 20.8), rounded down
    assert optimal_allocation(v, c, cost_budget=1000.0).runs == (333, 83, 20)
    # at least two runs per level: a level without variance still gets 2; the other
    # N_0 = 0.5^-2 * sqrt(4/1) * sqrt(4*1) = 4 * 2 * 2 = 16 (variance 4/16 = 0.25 = eps^2)
    assert optimal_allocation([4.0, 0.0], [1.0, 4.0], target_se=0.5).runs == (16, 2)


def test_allocation_matches_scipy_constrained_minimum():
    # Source: scipy.optimize.minimize (SLSQP) on the same problem, minimise sum C_l N_l
    # subject to sum V_l / N_l = eps^2, as an outside check of the closed form; SLSQP stops
    # at a tolerance, so rtol 1e-4.
    v, c, eps = np.array([3.0, 0.7, 0.09, 0.02]), np.array([1.0, 3.0, 11.0, 40.0]), 0.05
    res = optimize.minimize(
        lambda n: float(c @ n),
        x0=np.full(4, 500.0),
        constraints=[{"type": "eq", "fun": lambda n: float(np.sum(v / n)) / eps**2 - 1.0}],
        bounds=[(1.0, None)] * 4,
        method="SLSQP",
        options={"ftol": 1e-12, "maxiter": 500},
    )
    assert res.success
    np.testing.assert_allclose(optimal_allocation(v, c, target_se=eps).exact, res.x, rtol=1e-4)


def test_more_runs_for_a_target_standard_error():
    # Source: scipy.optimize.minimize (SLSQP) with the runs made as lower bounds: minimise
    # sum C_l N_l subject to sum V_l / N_l <= eps^2 and N_l >= n_l. rtol 1e-4 as above.
    v, c, eps = np.array([4.0, 1.0, 0.25]), np.array([1.0, 4.0, 16.0]), 0.1
    # nothing made yet (one run each, far below the optimum): Eq. (3) itself
    fresh = more_runs([1, 1, 1], v, c, eps)
    assert fresh.runs == (1200, 300, 75) and fresh.extra == (1199, 299, 74)
    # level 2 already has more than its optimum (75): it keeps its 200, the others share
    # what is left of eps^2
    current = [100, 50, 200]
    got = more_runs(current, v, c, eps)
    res = optimize.minimize(
        lambda n: float(c @ n),
        x0=np.array([2000.0, 600.0, 300.0]),
        constraints=[{"type": "ineq", "fun": lambda n: 1.0 - float(np.sum(v / n)) / eps**2}],
        bounds=[(float(k), None) for k in current],
        method="SLSQP",
        options={"ftol": 1e-12, "maxiter": 500},
    )
    assert res.success
    np.testing.assert_allclose(got.exact, res.x, rtol=1e-4)
    assert got.extra[2] == 0 and got.runs[2] == 200
    assert got.predicted_se <= eps
    # already there: nothing more
    done = more_runs([5000, 5000, 5000], v, c, eps)
    assert done.extra == (0, 0, 0)


def test_correction_costs_and_nested_allocation():
    # Source: the pairing's definition (common practice in MLMC):
    # a nested level-l point reuses its coarser run, so one correction sample costs C_l; a
    # disjoint one needs both runs, C_l + C_{l-1}.
    np.testing.assert_allclose(correction_costs([1.0, 4.0, 16.0], "nested"), [1, 4, 16])
    np.testing.assert_allclose(correction_costs([1.0, 4.0, 16.0], "disjoint"), [1, 5, 20])
    with pytest.raises(InputError, match=r"pairing: expected one of \['disjoint', 'nested'\]"):
        correction_costs([1.0, 2.0], "both")
    # nested: a finer level never gets more points than its coarser one (raised to match)
    a = optimal_allocation([0.1, 5.0], [1.0, 2.0], target_se=0.1, nested=True)
    assert a.runs[0] >= a.runs[1] and "nested" in a.rule


# --------------------------------------------------------------------------------------------
# the points of each level
# --------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def chain():
    return np.random.default_rng(11).normal(size=(3000, 2)) * [1.0, 2.0]


def test_nested_levels_are_nested_and_beat_random_subsets(chain):
    pts = select_levels(chain, [40, 15, 6], names=["coarse", "mid", "fine"], rng=2, **THIN)
    assert pts.names == ("coarse", "mid", "fine")
    for parent, child in zip(pts.levels, pts.levels[1:], strict=False):
        assert set(child.indices.tolist()) <= set(parent.indices.tolist())
        assert child.parent == parent.name and "nested" in child.rule
    for lp in pts.levels:
        np.testing.assert_allclose(lp.weights.sum(), 1.0, rtol=1e-12)
        assert np.all(lp.weights > 0)
        np.testing.assert_array_equal(lp.selection.points, chain[lp.indices])
    assert [lp.m for lp in pts.levels[1:]] == [15, 6]
    assert len({lp.seed for lp in pts.levels}) == 3  # one stream per level
    # Baseline (common practice): random subsets of the coarse points of the same size,
    # each with its own optimal weights against the whole chain (reweight); the chosen
    # subset is closer to the chain in exact MMD than the median of 8 of them.
    coarse, mid = pts.levels[0], pts.levels[1]
    gen = np.random.default_rng(0)
    baseline = [
        reweight(
            chain, coarse.selection, gen.choice(coarse.m, mid.m, replace=False), by="position"
        ).mmd_exact
        for _ in range(8)
    ]
    assert mid.selection.mmd_exact < np.median(baseline), (mid.selection.mmd_exact, baseline)
    # the same seed gives the same points
    again = select_levels(chain, [40, 15, 6], names=["coarse", "mid", "fine"], rng=2, **THIN)
    for a, b in zip(pts.levels, again.levels, strict=True):
        np.testing.assert_array_equal(a.indices, b.indices)


def test_disjoint_levels_share_no_row(chain):
    pts = select_levels(chain, [30, 12, 5], pairing="disjoint", rng=7, **THIN)
    rows = [set(lp.indices.tolist()) for lp in pts.levels]
    assert not (rows[0] & rows[1]) and not (rows[0] & rows[2]) and not (rows[1] & rows[2])
    assert len({lp.selection.seed for lp in pts.levels}) == 3
    # the estimate then has no shared-point covariance
    x = chain[:, 0]
    levels = [
        LevelValues(lp.name, lp.indices, lp.weights, q(k, x[lp.indices]),
                    q(k - 1, x[lp.indices]) if k else None)
        for k, lp in enumerate(pts.levels)
    ]  # fmt: skip
    est = multilevel_estimate(levels)
    np.testing.assert_array_equal(est.covariance, 0.0)
    np.testing.assert_allclose(est.se, est.se_independent, rtol=1e-15)


def test_extending_nested_levels_keeps_points_and_nesting(chain):
    pts = select_levels(chain, [30, 12, 5], rng=3, **THIN)
    more = extend_levels(chain, pts, [8, 4, 0])
    for old, new in zip(pts.levels, more.levels, strict=True):
        np.testing.assert_array_equal(new.indices[: old.m], old.indices)  # kept, first
    assert more.levels[2] is pts.levels[2]  # nothing added: the level is unchanged
    assert more.levels[1].m == pts.levels[1].m + 4
    for parent, child in zip(more.levels, more.levels[1:], strict=False):
        assert set(child.indices.tolist()) <= set(parent.indices.tolist())


def test_extending_disjoint_levels_stays_disjoint(chain):
    pts = select_levels(chain, [20, 8], pairing="disjoint", rng=5, **THIN)
    more = extend_levels(chain, pts, [0, 5])
    assert more.levels[1].m == 13
    np.testing.assert_array_equal(more.levels[1].indices[:8], pts.levels[1].indices)
    assert not set(more.levels[0].indices.tolist()) & set(more.levels[1].indices.tolist())
    np.testing.assert_allclose(more.levels[1].weights.sum(), 1.0, rtol=1e-12)


# --------------------------------------------------------------------------------------------
# bad input: errors name the argument or field
# --------------------------------------------------------------------------------------------
def test_selection_and_estimate_refuse_bad_input(chain):
    with pytest.raises(InputError, match=r"budgets\[1\]: with pairing 'nested'.*at most 10"):
        select_levels(chain, [10, 20], rng=0)
    with pytest.raises(InputError, match=r"budgets\[0\]: expected an integer >= 2"):
        select_levels(chain, [1, 1], rng=0)
    with pytest.raises(InputError, match=r"pairing: expected one of \['disjoint', 'nested'\]"):
        select_levels(chain, [10, 5], pairing="overlapping", rng=0)
    with pytest.raises(InputError, match=r"levels\[fine\]\.weights: expected 3 finite"):
        LevelValues("fine", [0, 1, 2], [1.0, -1.0, 1.0], [1.0, 2.0, 3.0], [1.0, 2.0, 3.0])
    with pytest.raises(InputError, match=r"levels\[fine\]\.coarse: expected finite values"):
        LevelValues("fine", [0, 1], [1.0, 1.0], [1.0, 2.0], [np.nan, 2.0])
    x = np.zeros(3)
    with pytest.raises(InputError, match=r"levels\[l1\]\.coarse: level 1 needs coarse values"):
        multilevel_estimate([LevelValues("l0", [0, 1, 2], np.ones(3), x),
                             LevelValues("l1", [0, 1, 2], np.ones(3), x)])  # fmt: skip
    with pytest.raises(InputError, match="target_se and cost_budget: give exactly one"):
        optimal_allocation([1.0, 1.0], [1.0, 2.0])
    with pytest.raises(InputError, match=r"costs: expected shape \(2,\)"):
        optimal_allocation([1.0, 1.0], [1.0, 2.0, 3.0], target_se=0.1)
    with pytest.raises(InputError, match=r"current\[1\]: expected an integer >= 1"):
        more_runs([3, 0], [1.0, 1.0], [1.0, 2.0], 0.1)


def _demo_with_levels(levels) -> dict:
    data = yaml.safe_load(DEMO.read_text())
    data["levels"] = copy.deepcopy(levels)
    return data


LADDER = [
    {"name": "coarse", "cost": 1.0, "budget": 12, "dispatch": {"constants": {"grid": 20}}},
    {"name": "fine", "cost": 8.0, "budget": 4, "dispatch": {"constants": {"grid": 80}}},
]


def test_levels_section_loads_and_merges_dispatch():
    # Source: the project's own config contract (tasks/config/_levels.py): no outside source.
    cfg = parse_config(_demo_with_levels(LADDER), source="s.yaml")
    assert cfg.levels.names == ("coarse", "fine") and cfg.levels.pairing == "nested"
    fine = cfg.levels.dispatch_for("fine", cfg.dispatch)
    assert fine.constants == {**cfg.dispatch.constants, "grid": 80}  # merged, not replaced
    assert fine.command == cfg.dispatch.command and fine.timeout == cfg.dispatch.timeout
    timed = LevelsSettings.model_validate(
        [LADDER[0], {**LADDER[1], "dispatch": {"timeout": 900}}]
    ).dispatch_for(1, cfg.dispatch)
    assert timed.timeout == 900 and timed.constants == cfg.dispatch.constants
    # without the section a config is what it was
    assert parse_config(yaml.safe_load(DEMO.read_text()), source="s.yaml").levels is None


def _set(ladder, k, **changes):
    out = copy.deepcopy(ladder)
    out[k].update(changes)
    return out


BAD_LEVELS = [
    # (levels section, words expected in the message)
    (LADDER[:1], "levels.fidelities: List should have at least 2 items"),
    (_set(LADDER, 1, name="coarse"), "level names must be unique; repeated: ['coarse']"),
    (_set(LADDER, 1, cost=1.0), "fidelities[fine].cost: expected costs increasing"),
    (_set(LADDER, 1, budget=20), "fidelities[fine].budget: with pairing 'nested'"),
    (_set(LADDER, 1, budget=1), "levels.fidelities.1: budget: expected at least 2 runs"),
    (_set(LADDER, 1, budget="auto"), "cost_budget or target_se: levels ['fine'] have budget"),
    (_set(LADDER, 0, cost=-1), "levels.fidelities.0.cost: Input should be greater than 0"),
    (_set(LADDER, 1, dispatch={"colour": 1}), "dispatch: unknown dispatch field(s) ['colour']"),
    (
        _set(LADDER, 1, dispatch={"timeout": -5}),
        "levels.fidelities[fine].dispatch.timeout: Input should be greater than 0",
    ),
    (
        _set(LADDER, 1, dispatch={"constants": {"log10_T": 1}}),
        "levels.fidelities[fine].dispatch.constants repeat parameter names: ['log10_T']",
    ),
    (
        {"fidelities": LADDER, "cost_budget": 10.0, "target_se": 0.1},
        "cost_budget and target_se: give one",
    ),
    ({"fidelities": LADDER, "pairing": "mixed"}, "levels.pairing: Input should be 'nested'"),
]


@pytest.mark.parametrize(("levels", "words"), BAD_LEVELS)
def test_bad_levels_section_names_the_field(levels, words):
    # Source: the project's own config contract (bad input names the file and the field).
    with pytest.raises(ConfigError) as err:
        parse_config(_demo_with_levels(levels), source="study.yaml")
    msg = str(err.value)
    assert msg.startswith("study.yaml: ")
    assert words in msg, msg


def test_disjoint_budgets_may_grow_and_auto_needs_a_target():
    # the nested rule (finer budget <= coarser) does not bind disjoint levels
    ok = LevelsSettings.model_validate(
        {"pairing": "disjoint", "fidelities": _set(LADDER, 1, budget=20)}
    )
    assert ok.fidelities[1].budget == 20
    auto = LevelsSettings.model_validate(
        {"fidelities": _set(LADDER, 1, budget="auto"), "target_se": 0.01}
    )
    assert auto.fidelities[1].budget == "auto" and auto.pilot == 10
