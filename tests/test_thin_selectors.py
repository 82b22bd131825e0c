"""Selectors, the thin() pipeline and its incremental forms.

Oracles: full recomputation of the feature-space MMD for every candidate (numpy), the
closed-form line search of the conditional-gradient step (Bach et al. 2012, Section 3),
exact-kernel MMD by direct Gram matrices, and invariants checked with hypothesis.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from winnow.tasks.records import Chain, Selection
from winnow.tasks.thin import KERNELS, SELECTORS, disjoint, extend, replace, thin
from winnow.tasks.thin._greedy import GreedyState, corrective_scores
from winnow.tasks.thin._selector import Problem

FAST = {"n_features": 128, "exact_max_rows": 5000}
GENETIC_FAST = {"population": 8, "generations": 6}


def _banana(n: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    z = rng.standard_normal((n, 2))
    return np.c_[z[:, 0], z[:, 1] + 0.5 * z[:, 0] ** 2 - 0.5]


def _problem(rule: str, seed: int = 0, p: int = 60, f: int = 40) -> Problem:
    rng = np.random.default_rng(seed)
    phi = rng.standard_normal((p, f)) / np.sqrt(f)
    mu = phi.mean(axis=0) + 0.05 * rng.standard_normal(f) / np.sqrt(f)
    ids = np.arange(p)
    return Problem(
        phi=phi, mu=mu, pool=ids, counts=np.ones(p, np.int64), inverse=ids,
        allowed=np.ones(p, bool), fixed=np.zeros(0, np.int64), weights_rule=rule,
        features_of=phi.__getitem__,
    )  # fmt: skip


def test_greedy_incremental_costs_match_full_recomputation():
    # cost(x) (O(P F) update) must order candidates exactly as the full MMD of the enlarged
    # equally weighted set, and satisfy (t+1)^2 MMD^2 = |(t+1) mu - s|^2 + cost(x)
    prob = _problem("uniform")
    state = GreedyState(prob, np.zeros(0, np.int64), prob.pool_free)
    for t in range(8):
        cost = state.costs()
        s = prob.phi[state.chosen].sum(axis=0) if state.chosen else np.zeros(prob.mu.size)
        full = np.full(prob.n_pool, np.inf)
        for x in np.flatnonzero(state.available):
            r = prob.mu - (s + prob.phi[x]) / (t + 1)
            full[x] = r @ r
        ok = np.isfinite(full)
        base = np.sum(((t + 1) * prob.mu - s) ** 2)
        np.testing.assert_allclose((t + 1) ** 2 * full[ok], base + cost[ok], rtol=1e-9)
        assert int(np.argmin(cost)) == int(np.argmin(full))
        state.add(int(np.argmin(cost)))


def test_corrective_scores_match_direct_line_search():
    prob = _problem("simplex", seed=1)
    chosen = np.array([3, 7, 11])
    w = np.array([0.5, 0.3, 0.2])
    s = w @ prob.phi[chosen]
    r0 = np.sum((prob.mu - s) ** 2)
    gammas = np.linspace(0, 1, 2001)[:, None]
    scores = corrective_scores(prob, chosen, w)
    for x in (0, 5, 20, 41):
        direct = np.sum((prob.mu - ((1 - gammas) * s + gammas * prob.phi[x])) ** 2, axis=1)
        # the grid minimum is within (step/2)^2 |phi - s|^2 ~ 2.5e-7 of the exact minimum
        assert r0 - direct.min() == pytest.approx(scores[x], abs=1e-6)


@pytest.fixture(scope="module")
def chain() -> np.ndarray:
    return _banana(1500, seed=11)


@pytest.mark.parametrize("method", sorted(SELECTORS))
@pytest.mark.parametrize("rule", ["simplex", "uniform"])
def test_selector_contract(chain, method, rule):
    opts = GENETIC_FAST if method == "genetic" else {}
    sel = thin(chain, 12, method=method, weights=rule, rng=5, **FAST, **opts)
    assert isinstance(sel, Selection) and sel.m == 12
    assert np.unique(sel.indices).size == 12
    assert sel.indices.min() >= 0 and sel.indices.max() < chain.shape[0]
    assert np.all(sel.weights >= 0) and sel.weights.sum() == pytest.approx(1.0, abs=1e-12)
    if rule == "uniform":
        np.testing.assert_allclose(sel.weights, 1 / 12)
    np.testing.assert_array_equal(sel.points, chain[sel.indices])
    assert sel.method == method and sel.weights_rule == rule and sel.n_features == 128
    # exact MMD recomputed by a direct Gram matrix (chain of 1500 <= exact_max_rows rows)
    from scipy.spatial.distance import cdist

    z = (chain - chain.mean(0)) / chain.std(0)
    zs = z[sel.indices]
    k = lambda a, b: np.exp(-cdist(a, b, "sqeuclidean") / (2 * sel.bandwidth**2))  # noqa: E731
    direct = np.sqrt(
        k(z, z).mean() - 2 * np.mean(k(z, zs) @ sel.weights) + sel.weights @ k(zs, zs) @ sel.weights
    )
    # single-precision exp in the exact MMD (float64 sums): ~1e-9 absolute in MMD^2
    assert sel.mmd_exact == pytest.approx(direct, rel=1e-4)
    assert sel.mmd_exact_rows == 1500
    # the feature estimate agrees with the exact value to within the feature noise (D=128)
    assert 0.3 * sel.mmd_exact < sel.mmd_features < 3 * sel.mmd_exact
    again = thin(chain, 12, method=method, weights=rule, rng=5, **FAST, **opts)
    np.testing.assert_array_equal(again.indices, sel.indices)
    np.testing.assert_array_equal(again.weights, sel.weights)


def test_optimised_selectors_beat_baselines_and_keep_their_start(chain):
    # the selectors themselves: no replacement of unweighted points afterwards (that step is
    # tested in test_thin_weighted.py)
    res = {
        m: thin(chain, 20, method=m, rng=3, replace_unweighted=False, **FAST,
                **(GENETIC_FAST if m == "genetic" else {}))
        for m in SELECTORS
    }  # fmt: skip
    for base in ("random", "stride"):
        assert res["greedy"].mmd_features < res[base].mmd_features
    g = res["greedy"].mmd_features
    # swap and genetic start from the greedy set and never return something worse
    assert res["swap"].mmd_features <= g * (1 + 1e-9)
    assert res["genetic"].mmd_features <= g * (1 + 1e-9)
    gen = res["genetic"]
    assert gen.population is not None and len(gen.population) >= 2
    sets = {tuple(sorted(ids.tolist())) for ids, _ in gen.population}
    assert len(sets) == len(gen.population)  # distinct members
    assert gen.population[0][1] == pytest.approx(gen.mmd_features, rel=1e-9)
    overlap = np.asarray(gen.report["selector"]["population_overlap"])
    np.testing.assert_allclose(np.diag(overlap), 1.0)


def test_dedup_counts_multiplicity():
    # one row repeated 1000 times among 200 distinct others: the target puts mass 1000/1200 on
    # it, so its optimal weight must be close to 5/6 (exactly the mass when the other points
    # match the rest; here within 0.1) and no point is chosen twice
    rng = np.random.default_rng(8)
    others = rng.standard_normal((200, 2))
    heavy = np.array([[3.0, -3.0]])
    x = np.concatenate([others[:100], np.repeat(heavy, 1000, axis=0), others[100:]])
    sel = thin(x, 20, rng=1, **FAST)
    assert sel.report["n_distinct"] == 201 and sel.report["n_rows"] == 1200
    heavy_pos = [i for i, row in enumerate(sel.points) if np.array_equal(row, heavy[0])]
    assert len(heavy_pos) == 1
    assert sel.weights[heavy_pos[0]] == pytest.approx(1000 / 1200, abs=0.1)
    assert sel.report["multiplicity"][heavy_pos[0]] == 1000
    assert 100 <= sel.indices[heavy_pos[0]] < 1100  # an index of a repeated row as given


def test_nonfinite_rows_dropped_or_refused_and_indices_as_given():
    x = _banana(500, seed=2)
    x[[3, 10, 11]] = np.nan
    x[20, 1] = np.inf
    sel = thin(x, 10, rng=0, **FAST)
    assert sel.report["n_nonfinite_dropped"] == 4
    assert not set(sel.indices.tolist()) & {3, 10, 11, 20}
    np.testing.assert_array_equal(sel.points, x[sel.indices])
    with pytest.raises(ValueError, match="nonfinite"):
        thin(x, 10, nonfinite="raise", **FAST)


def test_mixed_units_are_standardised():
    # the same chain in units differing by 1e15 gives the same selection
    x = _banana(800, seed=3)
    scaled = x * np.array([1e-6, 1e9])
    a = thin(x, 15, rng=2, **FAST)
    b = thin(scaled, 15, rng=2, **FAST)
    np.testing.assert_array_equal(a.indices, b.indices)
    np.testing.assert_allclose(b.report["standardisation_scale"] / np.array([1e-6, 1e9]),
                               a.report["standardisation_scale"], rtol=1e-9)  # fmt: skip


def test_chain_record_accepted():
    x = _banana(300, seed=4)
    ch = Chain(x, ("a", "b"), ("", ""), np.zeros(300, np.int64), np.arange(300))
    np.testing.assert_array_equal(
        thin(ch, 5, rng=1, **FAST).indices, thin(x, 5, rng=1, **FAST).indices
    )


@pytest.mark.parametrize(
    ("kwargs", "exc", "pattern"),
    [
        ({"samples": np.zeros((0, 2))}, ValueError, "samples is empty"),
        ({"samples": np.ones(10)}, ValueError, "samples must be a 2-D"),
        ({"samples": [[1.0, 2.0], [3.0]]}, ValueError, "samples must be a rectangular"),
        ({"budget": 0}, ValueError, "budget must be >= 1, got 0"),
        ({"budget": 2.5}, TypeError, "budget must be an integer"),
        ({"budget": 10_000}, ValueError, "budget must be <= the number of distinct"),
        ({"kernel": "cosine"}, ValueError, "kernel must be one of"),
        ({"bandwidth": float("inf")}, ValueError, "bandwidth must be finite"),
        ({"bandwidth": -1.0}, ValueError, r"bandwidth must be > 0.0, got -1.0"),
        ({"method": "annealing"}, ValueError, "method must be one of"),
        ({"weights": "equal"}, ValueError, "weights must be one of"),
        ({"feature_map": "fastfood"}, ValueError, "feature_map must be one of"),
        ({"n_features": 0}, ValueError, "n_features must be a positive integer or 'auto', got 0"),
        ({"features": 0}, ValueError, "features must be a positive integer or 'auto', got 0"),
        ({"n_features": "many"}, ValueError, "n_features must be an integer or 'auto', got 'many'"),
        ({"n_features": 64.0}, TypeError, "n_features must be an integer or 'auto', got 64.0"),
        ({"precision": "half"}, ValueError, "precision must be one of 'single' or 'double'"),
        ({"features_tol": 1.5}, ValueError, "features_tol must be < 1.0, got 1.5"),
        ({"nonfinite": "zero"}, ValueError, "nonfinite must be one of"),
        ({"generations": 3}, TypeError, "unknown option"),
    ],
)
def test_bad_input_names_the_argument(kwargs, exc, pattern):
    args = {"samples": _banana(50, seed=1), "budget": 5, **kwargs}
    with pytest.raises(exc, match=pattern):
        thin(args.pop("samples"), args.pop("budget"), **args)


def test_budget_larger_than_distinct_rows():
    x = np.repeat(_banana(8, seed=1), 10, axis=0)  # 80 rows, 8 distinct
    assert thin(x, 8, rng=0, **FAST).m == 8
    with pytest.raises(ValueError, match=r"budget must be <= .*\(8\), got 9"):
        thin(x, 9, **FAST)


def test_extend_replace_disjoint(chain):
    base = thin(chain, 10, rng=9, **FAST)
    more = extend(chain, base, 5)
    np.testing.assert_array_equal(more.indices[:10], base.indices)
    assert more.m == 15 and np.unique(more.indices).size == 15
    # the greedy continuation is the same as asking for 15 at once (same seed and features)
    direct = thin(chain, 15, rng=9, **FAST)
    np.testing.assert_array_equal(more.indices, direct.indices)
    failed = base.indices[[2, 5]]
    rep = replace(chain, base, failed)
    assert rep.m == 10 and not set(failed.tolist()) & set(rep.indices.tolist())
    np.testing.assert_array_equal(rep.indices[:8], np.delete(base.indices, [2, 5]))
    rep_pos = replace(chain, base, [2, 5], by="position")
    np.testing.assert_array_equal(rep_pos.indices, rep.indices)
    dis = disjoint(chain, base)
    assert dis.m == 10 and not set(dis.indices.tolist()) & set(base.indices.tolist())
    with pytest.raises(ValueError, match="failed has indices not in the selection"):
        replace(chain, base, [int(np.setdiff1d(np.arange(50), base.indices)[0])])
    with pytest.raises(ValueError, match="selection does not belong"):
        extend(chain[::-1], base, 2)


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    n=st.integers(5, 60),
    d=st.integers(1, 4),
    reps=st.integers(1, 3),
    m_frac=st.floats(0.05, 1.0),
    method=st.sampled_from(sorted(SELECTORS)),
    rule=st.sampled_from(["simplex", "uniform"]),
    kernel=st.sampled_from(list(KERNELS)),
    seed=st.integers(0, 2**16),
)
def test_invariants_on_random_chains(n, d, reps, m_frac, method, rule, kernel, seed):
    rng = np.random.default_rng(seed)
    x = np.repeat(rng.standard_normal((n, d)) * rng.lognormal(0, 3, d), reps, axis=0)
    x = x[rng.permutation(x.shape[0])]
    m = max(1, int(m_frac * n))
    opts = {"population": 4, "generations": 2} if method == "genetic" else {}
    sel = thin(x, m, method=method, weights=rule, kernel=kernel, rng=seed, n_features=32,
               exact_max_rows=500, **opts)  # fmt: skip
    wp = sel.report["weighted_points"]
    # points without weight that could not be replaced are left out, and counted
    assert sel.m == m - wp["saved_budget"] == wp["n_returned"]
    assert np.unique(sel.indices).size == sel.m
    if rule == "simplex" and method in ("greedy", "swap", "genetic"):
        assert np.all(sel.weights > 1e-6 / m) and wp["n_weighted"] == sel.m
    else:
        assert sel.m == m
    assert np.unique(sel.points, axis=0).shape[0] == sel.m  # distinct values, not only rows
    assert np.all(sel.weights >= 0) and abs(sel.weights.sum() - 1) < 1e-9
    np.testing.assert_array_equal(sel.points, x[sel.indices])
    assert sel.report["n_distinct"] == n and sum(sel.report["multiplicity"]) == sel.m * reps
    assert np.isfinite(sel.mmd_exact) and sel.mmd_exact >= 0 and sel.mmd_features >= 0
    if m == n:  # every distinct row chosen: simplex weights reproduce the chain exactly
        if rule == "simplex":
            assert sel.mmd_features < 1e-6


def test_inherited_gram_equals_direct_product():
    # oracle: the Gram matrix computed directly, phi_s phi_s^T (numpy)
    from winnow.tasks.thin._genetic import _inherited_gram

    rng = np.random.default_rng(12)
    phi = rng.standard_normal((40, 16))
    fixed = np.array([3, 7])
    parent = np.sort(rng.choice(np.setdiff1d(np.arange(40), fixed), 10, replace=False))
    child = np.sort(np.r_[parent[:6], np.setdiff1d(np.arange(40), np.r_[fixed, parent])[:4]])
    full_p, full_c = np.r_[fixed, parent], np.r_[fixed, child]
    grams = {parent.tobytes(): phi[full_p] @ phi[full_p].T}
    got = _inherited_gram(full_c, phi[full_c], fixed, parent, grams)
    np.testing.assert_allclose(got, phi[full_c] @ phi[full_c].T, rtol=1e-13, atol=1e-13)
    # no stored parent matrix: computed in full
    alone = _inherited_gram(full_c, phi[full_c], fixed, None, grams)
    np.testing.assert_allclose(alone, phi[full_c] @ phi[full_c].T, rtol=1e-13, atol=1e-13)


def test_genetic_stops_after_patience_and_reports_generations(chain):
    sel = thin(chain, 12, method="genetic", rng=2, **FAST, population=6, generations=400,
               patience=3)  # fmt: skip
    info = sel.report["selector"]
    ran = info["generations_run"]
    assert ran < 400 and len(info["best_mmd_history"]) == ran + 1
    hist = info["best_mmd_history"]
    # stopped because the last `patience` generations brought nothing better (common practice)
    assert hist[-1] >= hist[-4]
    assert np.all(np.diff(hist) <= 1e-15)  # elitism: the best never gets worse


def test_neighbours_match_brute_force():
    # oracle: nearest rows by sorting all Euclidean distances (numpy)
    from winnow.tasks.thin._genetic import _Neighbours

    rng = np.random.default_rng(4)
    coords = rng.standard_normal((300, 3))
    near = _Neighbours(coords, 5)
    for pos in (0, 17, 299):
        dist = np.linalg.norm(coords - coords[pos], axis=1)
        want = [int(i) for i in np.argsort(dist) if i != pos][:5]
        assert near[pos].tolist() == want
    assert not _Neighbours(None, 5).ok and not _Neighbours(coords[:4], 5).ok


def test_matvec_split_across_threads_equals_one_product():
    # oracle: numpy's single product phi @ v; the split is by rows, each row's dot product
    # is computed the same way, so the values agree to float32 rounding
    rng = np.random.default_rng(6)
    p, f = 5000, 64
    phi = (rng.standard_normal((p, f)) / 8).astype(np.float32)
    ids = np.arange(p)
    base = {"phi": phi, "mu": phi.mean(axis=0).astype(np.float64), "pool": ids,
            "counts": np.ones(p, np.int64), "inverse": ids, "allowed": np.ones(p, bool),
            "fixed": np.zeros(0, np.int64), "weights_rule": "simplex",
            "features_of": phi.__getitem__}  # fmt: skip
    v = rng.standard_normal(f)
    one = Problem(**base).matvec(v)
    two = Problem(**base, workers=2).matvec(v)
    assert two.dtype == np.float32 and two.shape == (p,)
    np.testing.assert_allclose(two, phi @ v.astype(np.float32), rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(two, one, rtol=1e-5, atol=1e-6)
