"""Optimal simplex weights and exact MMD of the thin stage.

Oracles: scipy.optimize.minimize(method="SLSQP") on the same QP; the KKT conditions of the
simplex-constrained QP (Nocedal & Wright 2006, Theorem 16.4 / Eq. 16.37); a direct numpy
Gram-matrix computation of the (weighted, biased) MMD (Gretton et al. 2012, Lemma 6).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import minimize

from winnow.tasks.thin import mmd_exact, optimal_weights
from winnow.tasks.thin._features import draw_feature_map, features_of_rows
from winnow.tasks.thin._kernels import KERNELS, get_kernel
from winnow.tasks.thin._mmd import ExactMMD


def _slsqp(a: np.ndarray, mu: np.ndarray) -> np.ndarray:
    m = a.shape[0]
    res = minimize(
        lambda w: np.sum((w @ a - mu) ** 2),
        np.full(m, 1.0 / m),
        jac=lambda w: 2 * a @ (w @ a - mu),
        bounds=[(0, None)] * m,
        constraints=[{"type": "eq", "fun": lambda w: np.sum(w) - 1}],
        method="SLSQP",
        options={"ftol": 1e-15, "maxiter": 2000},
    )
    return res.x


@pytest.mark.parametrize(("m", "f", "seed"), [(5, 40, 0), (30, 200, 1), (50, 30, 2), (80, 400, 3)])
def test_optimal_weights_match_slsqp(m, f, seed):
    rng = np.random.default_rng(seed)
    a = rng.standard_normal((m, f)) / np.sqrt(f)
    mu = a.mean(axis=0) + 0.3 * rng.standard_normal(f) / np.sqrt(f)
    w = optimal_weights(a, mu)
    ref = _slsqp(a, mu)
    obj = lambda v: np.sum((v @ a - mu) ** 2)  # noqa: E731
    assert np.all(w >= 0) and np.sum(w) == pytest.approx(1.0, abs=1e-12)
    assert obj(w) <= obj(ref) + 1e-12  # never worse than scipy's SLSQP
    if m <= f:  # strictly convex: unique minimiser
        np.testing.assert_allclose(w, ref, atol=1e-6)
    # KKT (Nocedal & Wright 2006, Eq. 16.37): gradient g = G w - c equals nu on the support
    # and is >= nu off it
    g = a @ (w @ a - mu)
    support = w > 1e-12
    nu = np.mean(g[support])
    np.testing.assert_allclose(g[support], nu, atol=1e-9)
    assert np.all(g[~support] >= nu - 1e-9)


def test_optimal_weights_recover_a_mixture():
    # the target is exactly 0.2 phi_0 + 0.8 phi_1: weights must be (0.2, 0.8, 0)
    rng = np.random.default_rng(4)
    a = rng.standard_normal((3, 50))
    mu = 0.2 * a[0] + 0.8 * a[1]
    np.testing.assert_allclose(optimal_weights(a, mu), [0.2, 0.8, 0.0], atol=1e-9)


def test_optimal_weights_bad_shapes_name_the_argument():
    with pytest.raises(ValueError, match="mean_embedding"):
        optimal_weights(np.ones((3, 4)), np.ones(5))
    with pytest.raises(ValueError, match="phi_points"):
        optimal_weights(np.ones(4), np.ones(4))


def _direct_mmd(kname, y, v, x, w, ell):
    k = get_kernel(kname)
    kyy = k.gram(y, y, ell)  # the whole N x N matrix: fine for an oracle at N = 400
    sq = v @ kyy @ v - 2 * v @ k.gram(y, x, ell) @ w + w @ k.gram(x, x, ell) @ w
    return np.sqrt(max(sq, 0.0))


@pytest.mark.parametrize("kname", sorted(KERNELS))
def test_chunked_exact_mmd_matches_gram_oracle(kname):
    rng = np.random.default_rng(5)
    y = rng.standard_normal((400, 3))
    v = rng.integers(1, 4, size=400).astype(float)
    x = y[rng.choice(400, 12, replace=False)] + 0.1
    w = rng.dirichlet(np.ones(12))
    want = _direct_mmd(kname, y, v / v.sum(), x, w, 1.4)
    # tiny blocks force many chunks and the upper-triangle bookkeeping
    double = ExactMMD(y, v, kname, 1.4, block_elems=900, precision="double")(x, w)
    assert double == pytest.approx(want, rel=1e-9)
    single = ExactMMD(y, v, kname, 1.4, block_elems=900, precision="single")(x, w)
    assert single == pytest.approx(want, rel=1e-4)  # single-precision exp, float64 sums


def test_mmd_exact_public_subsample_and_errors():
    rng = np.random.default_rng(6)
    y = rng.standard_normal((300, 2))
    x = y[:10]
    w = np.full(10, 0.1)
    full, rows = mmd_exact(y, x, w, kernel="gaussian", bandwidth=1.0)
    assert rows == 300
    assert full == pytest.approx(_direct_mmd("gaussian", y, np.full(300, 1 / 300), x, w, 1.0))
    sub, rows = mmd_exact(y, x, w, kernel="gaussian", bandwidth=1.0, max_rows=100, rng=1)
    assert rows == 100 and sub != full
    with pytest.raises(ValueError, match="bandwidth"):
        mmd_exact(y, x, w, kernel="gaussian", bandwidth=float("nan"))
    with pytest.raises(ValueError, match="kernel"):
        mmd_exact(y, x, w, kernel="cosine", bandwidth=1.0)


def test_feature_mmd_converges_to_exact_mmd():
    # squared feature MMD is an unbiased estimate of the squared V-statistic MMD when the
    # same features embed both sides (Rahimi & Recht 2007, Eq. 2 applied term by term)
    rng = np.random.default_rng(7)
    y = rng.standard_normal((500, 2))
    x = y[:20]
    w = np.full(20, 0.05)
    exact = _direct_mmd("gaussian", y, np.full(500, 1 / 500), x, w, 1.0)
    fmap = draw_feature_map(
        get_kernel("gaussian"), 2, 20000, "qmc", 1.0, np.zeros(2), np.ones(2), rng, np.float64
    )
    phi_y = features_of_rows(fmap, y, None, chunk_size=100)
    phi_x = features_of_rows(fmap, x, None, chunk_size=100)
    est = np.linalg.norm(w @ phi_x - phi_y.mean(axis=0))
    assert est == pytest.approx(exact, rel=0.05)
