"""The exact-MMD check on a subsample states an error that covers the whole chain's MMD,
and the thin stage reports progress for every long step (issue 17 item 9)."""

from __future__ import annotations

import numpy as np
import pytest

from winnow.tasks.thin import thin
from winnow.tasks.thin._mmd import ExactMMD


@pytest.fixture(scope="module")
def chain() -> np.ndarray:
    rng = np.random.default_rng(11)
    mix = np.array([[1.0, 0.5, 0.0], [0.0, 1.0, 0.3], [0.0, 0.0, 2.0]])
    return rng.standard_normal((6000, 3)) @ mix


@pytest.mark.parametrize("m", [10, 100, 1500])
def test_stated_error_covers_the_whole_chain_mmd(chain, m):
    """Statistical check, fixed seeds: over 40 independent subsamples of 1500 of the 6000
    rows, the subsample's unbiased MMD^2 estimate is within 3 stated standard errors of the
    whole chain's exact MMD^2 (V-statistic over all rows) at least 38 times (a normal
    estimate misses 3 sd with probability 0.003: 3 misses in 40 has probability ~3e-4), and
    the ~95 % MMD interval covers the whole chain's MMD at least 33 times (binomial(40,
    0.93) falls below 33 with probability ~0.01; in a 60-subsample run the standardised
    errors had sd 0.7-0.97). The variance is the U-statistic variance of Gretton et al.
    (2012), Corollary 16 / Hoeffding (1948); the reference is the direct whole-chain sum
    (Gretton et al. 2012, Lemma 6), computed by ExactMMD without a subsample."""
    rng = np.random.default_rng(m)
    x = chain[rng.choice(chain.shape[0], m, replace=False)] + 0.05
    w = rng.dirichlet(np.full(m, 5.0))
    whole = ExactMMD(chain, None, "gaussian", 1.3, precision="double").estimate(x, w)
    assert whole["mmd_sq_se"] == 0.0
    within, covered = 0, 0
    for rep in range(40):
        take = np.random.default_rng([m, rep]).choice(chain.shape[0], 1500, replace=False)
        sub = ExactMMD(chain[take], np.ones(take.size), "gaussian", 1.3, precision="double",
                       sample_of=chain.shape[0]).estimate(x, w)  # fmt: skip
        assert sub["mmd_sq_se"] > 0
        within += abs(sub["mmd_sq"] - whole["mmd_sq"]) <= 3.0 * sub["mmd_sq_se"]
        covered += sub["mmd_low"] <= whole["mmd"] <= sub["mmd_high"]
    assert within >= 38
    assert covered >= 33


def test_subsample_of_the_whole_chain_is_exact(chain):
    """sample_of = n (every row): the unbiased form reduces to the V-statistic (closed
    form: (1 - 1/N) U_N + k(0)/N = V_N) and the finite-population correction to 0."""
    x, w = chain[:7] * 0.9, np.full(7, 1 / 7)
    plain = ExactMMD(chain[:800], None, "gaussian", 1.0, precision="double")
    full = ExactMMD(chain[:800], np.ones(800), "gaussian", 1.0, precision="double",
                    sample_of=800)  # fmt: skip
    a, b = plain.estimate(x, w), full.estimate(x, w)
    assert b["mmd"] == pytest.approx(a["mmd"], rel=1e-10)
    assert b["mmd_sq_se"] == 0.0
    assert plain(x, w) == pytest.approx(a["mmd"], rel=1e-12)


def test_thin_reports_the_exact_error(chain):
    sel = thin(chain, 20, n_features=128, exact_max_rows=1000, rng=3)
    err = sel.report["mmd_exact_error"]
    assert err["rows"] == 1000 and err["of_rows"] == chain.shape[0]
    assert sel.mmd_exact_rows == 1000
    assert err["mmd_sq_se"] > 0 and err["mmd_low"] <= sel.mmd_exact <= err["mmd_high"]
    assert "Gretton" in err["rule"]
    assert sel.report["settings"]["exact_max_rows"] == 1000
    whole = thin(chain, 20, n_features=128, exact_max_rows=10_000, rng=3)
    assert whole.report["mmd_exact_error"]["mmd_sq_se"] == 0.0
    # the same selection judged on the whole chain lies in the stated interval
    assert np.array_equal(whole.indices, sel.indices)
    assert err["mmd_low"] <= whole.mmd_exact <= err["mmd_high"]


def test_thin_progress_names_every_step_with_increasing_counts(chain):
    calls: list[tuple[int, int, str]] = []
    thin(chain, 15, exact_max_rows=1000, rng=5, progress=lambda *a: calls.append(a))
    steps: dict[str, list[tuple[int, int]]] = {}
    for done, total, what in calls:
        steps.setdefault(what, []).append((done, total))
    for what, seen in steps.items():
        dones = [d for d, _ in seen]
        assert dones == sorted(set(dones)), what  # strictly increasing within a step
        assert seen[-1][0] == seen[-1][1], what  # each step reports its end
        assert len(seen) <= 102, what  # bounded rate: 1 % steps at most, plus first/last
    names = " | ".join(steps)
    for word in ("preparing the chain", "automatic feature count", "feature pass",
                 "candidate pool", "selection (greedy)", "weight solve",
                 "exact MMD check (target self term)", "exact MMD check (selection)",
                 "replacement rounds"):  # fmt: skip
        assert word in names, (word, names)
