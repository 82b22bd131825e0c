"""Thinning a random-walk Metropolis chain with many repeated rows to a small budget
(issue 13, item 9).

Reference: plain kernel herding without repeats with the exact Gaussian kernel (Chen, Welling
& Smola 2010; Riabiz et al. 2022, Algorithm 1), equal weights, over a random pool of distinct
chain rows, written here with direct scipy/numpy Gram matrices. Exact MMD as the weighted
V-statistic of Gretton et al. (2012, Lemma 6), computed directly.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from winnow.tasks.thin import thin


def _rwm_chain(n: int, rng: np.random.Generator) -> tuple[np.ndarray, float]:
    """Random-walk Metropolis (Metropolis et al. 1953) on a 4-D banana-shaped density, step
    1.45: about 25 % acceptance, so each value is repeated about four times."""

    def logp(x: np.ndarray) -> float:
        return -0.5 * (x[0] ** 2 + (x[1] + 0.5 * x[0] ** 2 - 0.5) ** 2 + x[2] ** 2 / 4 + x[3] ** 2)

    x = np.zeros(4)
    lp = logp(x)
    out = np.empty((n, 4))
    steps = rng.standard_normal((n, 4)) * 1.45
    log_u = np.log(rng.random(n))
    accepted = 0
    for i in range(n):
        prop = x + steps[i]
        lq = logp(prop)
        if log_u[i] < lq - lp:
            x, lp = prop, lq
            accepted += 1
        out[i] = x
    return out, accepted / n


class _ExactTarget:
    """Exact Gaussian-kernel MMD to the chain's distinct rows weighted by multiplicity."""

    def __init__(self, u: np.ndarray, v: np.ndarray, bw: float) -> None:
        self.u, self.v, self.bw = u, v, bw
        self.self_term = sum(
            float(v[a : a + 1000] @ self.k(u[a : a + 1000], u) @ v) for a in range(0, len(u), 1000)
        )

    def k(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        return np.exp(-cdist(a, b, "sqeuclidean") / (2 * self.bw**2))

    def embedding(self, pts: np.ndarray) -> np.ndarray:
        return self.v @ self.k(self.u, pts)

    def __call__(self, pts: np.ndarray, w: np.ndarray) -> float:
        sq = self.self_term - 2 * self.embedding(pts) @ w + w @ self.k(pts, pts) @ w
        return float(np.sqrt(max(sq, 0.0)))


def _herding(k_pp: np.ndarray, a: np.ndarray, m: int) -> np.ndarray:
    c = np.zeros(a.size)
    avail = np.ones(a.size, bool)
    chosen = []
    for t in range(m):
        cost = np.where(avail, 2 * c - 2 * (t + 1) * a + np.diag(k_pp), np.inf)
        j = int(np.argmin(cost))
        chosen.append(j)
        avail[j] = False
        c += k_pp[:, j]
    return np.asarray(chosen)


@pytest.mark.slow
def test_budget_10_on_repeated_rows_not_worse_than_exact_herding():
    m, ratios = 10, []
    for seed in range(3):
        rng = np.random.default_rng(40 + seed)
        x, acceptance = _rwm_chain(20_000, rng)
        assert 0.2 < acceptance < 0.3
        sel = thin(x, m, rng=seed, exact_max_rows=0)
        z = (x - x.mean(0)) / x.std(0)
        u, cnt = np.unique(z, axis=0, return_counts=True)
        assert cnt.mean() > 3  # many repeated rows
        target = _ExactTarget(u, cnt / cnt.sum(), sel.bandwidth)
        ours = target((sel.points - x.mean(0)) / x.std(0), sel.weights)
        refs = []
        for _ in range(3):  # pools of 3000 distinct rows, in proportion to multiplicity
            pool = np.argsort(-np.log(rng.random(len(u))) / cnt)[:3000]
            ids = pool[_herding(target.k(u[pool], u[pool]), target.embedding(u[pool]), m)]
            refs.append(target(u[ids], np.full(m, 1.0 / m)))
        ratios.append(ours / np.mean(refs))
    # statistical bound (fixed seeds): the per-chain ratio has sd about 0.12 (6 other chains:
    # mean 0.77, 0.69 to 1.02), so the mean of 3 has sd about 0.07; these seeds give 0.84
    # (0.69, 0.76, 1.06), 2 sd below the bound 1.0. Before the fix (the corrective greedy
    # set alone) the same seeds gave 1.26 (1.36, 1.19, 1.22): the bound separates the two
    assert np.mean(ratios) <= 1.0, ratios


def test_greedy_keeps_the_better_of_corrective_and_herding_sets():
    # oracle: kernel herding written directly on the feature Gram matrix (Chen, Welling &
    # Smola 2010, Eq. 4) and the feature-space MMD |w Phi - mu| of each set with its optimal
    # simplex weights; the greedy selector must return the better of the two greedy sets
    from winnow.tasks.thin._greedy import GreedySelector, _corrective_positions
    from winnow.tasks.thin._selector import Problem
    from winnow.tasks.thin._weights import optimal_weights

    kept = set()
    for seed in range(6):
        rng = np.random.default_rng(seed)
        p, f, m = 80, 24, 8
        phi = rng.standard_normal((p, f)) / np.sqrt(f)
        mu = phi[: p // 2].mean(axis=0)
        ids = np.arange(p)
        prob = Problem(
            phi=phi, mu=mu, pool=ids, counts=np.ones(p, np.int64), inverse=ids,
            allowed=np.ones(p, bool), fixed=np.zeros(0, np.int64), weights_rule="simplex",
            features_of=phi.__getitem__,
        )  # fmt: skip

        def mmd(pos, phi=phi, mu=mu):
            w = optimal_weights(phi[pos], mu)
            return float(np.linalg.norm(w @ phi[pos] - mu))

        herd = _herding(phi @ phi.T, phi @ mu, m)
        corr = _corrective_positions(prob, m, None)
        res = GreedySelector().select(prob, m, rng)
        best = min(mmd(herd), mmd(corr))
        assert mmd(res.ids) == pytest.approx(best, rel=1e-9)
        assert res.info["greedy_mmd"]["herding"] == pytest.approx(mmd(herd), rel=1e-9)
        kept.add(res.info["greedy_rule"])
    assert kept == {"herding", "corrective"}  # both rules win on some of these problems
