"""Kernels, spectral samplers and random-feature maps of the thin stage.

Oracles: closed-form kernels (Rasmussen & Williams 2006, Eqs. 4.9, 4.14, 4.17), the general
Matérn formula with scipy.special.kv (R&W Eq. 4.14), scipy.stats distributions for the
spectral densities (R&W Eq. 4.15: Matérn <-> Student t with 2 nu dof; Laplace <-> Cauchy;
Gaussian <-> normal, Rahimi & Recht 2007), Monte Carlo bounds with fixed seeds.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats

from winnow.tasks.thin._features import (
    FEATURE_MAPS,
    draw_feature_map,
    draw_unit_frequencies,
    features_of_rows,
)
from winnow.tasks.thin._kernels import KERNELS, get_kernel, median_heuristic

KERNEL_NAMES = sorted(KERNELS)


def _closed_form(name: str, diff: np.ndarray, ell: float) -> np.ndarray:
    """Kernels written out independently of tasks/thin/_kernels.py."""
    r = np.sqrt(np.sum(diff**2, axis=-1))
    if name == "gaussian":  # R&W Eq. 4.9
        return np.exp(-(r**2) / (2 * ell**2))
    if name == "laplace":  # product of 1-D exponential kernels (Rahimi & Recht 2007, Fig. 1)
        return np.exp(-np.sum(np.abs(diff), axis=-1) / ell)
    nu = {"matern32": 1.5, "matern52": 2.5}[name]
    # general Matérn, R&W Eq. 4.14, with the modified Bessel function K_nu (scipy.special.kv)
    s = np.sqrt(2 * nu) * r / ell
    with np.errstate(invalid="ignore"):
        k = 2 ** (1 - nu) / special.gamma(nu) * s**nu * special.kv(nu, s)
    return np.where(s == 0, 1.0, k)


@pytest.mark.parametrize("name", KERNEL_NAMES)
def test_gram_matches_closed_form(name):
    rng = np.random.default_rng(0)
    x = rng.standard_normal((7, 3))
    y = rng.standard_normal((5, 3)) * 2
    ell = 1.7
    expected = _closed_form(name, x[:, None, :] - y[None, :, :], ell)
    got = get_kernel(name).gram(x, y, ell)
    np.testing.assert_allclose(got, expected, rtol=1e-10, atol=1e-14)
    got32 = get_kernel(name).gram(x, y, ell, dtype=np.float32)
    np.testing.assert_allclose(got32, expected, rtol=1e-6, atol=1e-7)  # single-precision exp
    np.testing.assert_allclose(np.diag(get_kernel(name).gram(x, x, ell)), 1.0)


@pytest.mark.parametrize("name", KERNEL_NAMES)
@pytest.mark.parametrize("kind", list(FEATURE_MAPS))
def test_random_features_approximate_the_kernel(name, kind):
    # Rahimi & Recht 2007, Eq. 2: phi(x).phi(y) -> k(x - y). With D = 8192 frequencies each
    # estimate is a mean of D bounded terms cos(.) in [-1, 1], so its sd is <= 1/sqrt(2 D) =
    # 0.0078; 0.04 is > 5 sd for any single entry (fixed seed).
    rng = np.random.default_rng(1)
    d, ell = 3, 1.3
    x = rng.standard_normal((6, d))
    fmap = draw_feature_map(
        get_kernel(name), d, 8192, kind, ell, np.zeros(d), np.ones(d), rng, np.float64
    )
    phi = features_of_rows(fmap, x, None, chunk_size=4)
    approx = phi @ phi.T
    exact = _closed_form(name, x[:, None, :] - x[None, :, :], ell)
    np.testing.assert_allclose(np.diag(approx), 1.0, atol=1e-12)  # |phi(x)| = 1 exactly
    assert np.max(np.abs(approx - exact)) < 0.04


@pytest.mark.parametrize(
    ("name", "marginal"),
    [
        ("gaussian", stats.norm()),  # Gaussian <-> N(0, 1/l^2)  (R&W Eq. 4.9 transform)
        ("laplace", stats.cauchy()),  # Laplace <-> product Cauchy (Rahimi & Recht 2007)
        ("matern32", stats.t(df=3)),  # Matérn nu <-> Student t, 2 nu dof (R&W Eq. 4.15)
        ("matern52", stats.t(df=5)),
    ],
)
@pytest.mark.parametrize("kind", list(FEATURE_MAPS))
def test_spectral_marginals(name, marginal, kind):
    # Each coordinate of w (bandwidth 1) follows the stated 1-D marginal; Kolmogorov-Smirnov
    # (scipy.stats.kstest) at 4000 draws, p > 1e-3 with a fixed seed.
    rng = np.random.default_rng(2)
    w = draw_unit_frequencies(get_kernel(name), 4, 4000, kind, rng)
    for j in range(4):
        assert stats.kstest(w[:, j], marginal.cdf).pvalue > 1e-3


def test_orthogonal_blocks_are_orthogonal():
    # Yu et al. 2016, Eq. 3: rows within a block of d are mutually orthogonal
    rng = np.random.default_rng(3)
    w = draw_unit_frequencies(get_kernel("gaussian"), 5, 10, "orf", rng)
    block = w[:5]
    gram = block @ block.T
    np.testing.assert_allclose(gram - np.diag(np.diag(gram)), 0.0, atol=1e-10)


def test_orf_lowers_variance_for_gaussian():
    # Yu et al. 2016, Theorem 1: ORF has lower kernel-estimate variance than RFF for the
    # Gaussian kernel. Spread over 200 independent maps (D = d = 8) at |r| = 1.
    rng = np.random.default_rng(4)
    d = 8
    r = np.zeros(d)
    r[0] = 1.0
    est = {}
    for kind in ("rff", "orf"):
        vals = []
        for _ in range(200):
            w = draw_unit_frequencies(get_kernel("gaussian"), d, d, kind, rng)
            vals.append(np.mean(np.cos(w @ r)))
        est[kind] = np.var(vals)
    assert est["orf"] < est["rff"]


def test_median_heuristic_against_scipy_pdist():
    from scipy.spatial.distance import pdist

    rng = np.random.default_rng(5)
    z = rng.standard_normal((300, 4))
    bw, rows = median_heuristic(z)
    assert rows == 300
    assert bw == pytest.approx(np.median(pdist(z)), rel=1e-12)  # oracle: scipy pdist
    bw1, _ = median_heuristic(z, norm="l1")
    assert bw1 == pytest.approx(np.median(pdist(z, "cityblock")), rel=1e-12)
    bw_sub, used = median_heuristic(z, max_rows=100, rng=1)
    assert used == 100 and 0.5 * bw < bw_sub < 2 * bw


def test_unknown_kernel_names_value():
    with pytest.raises(ValueError, match="kernel.*'cosine'"):
        get_kernel("cosine")


def test_streamed_mean_embedding_matches_direct_mean_and_thread_count():
    # oracle: the plain numpy weighted mean of the full feature matrix
    from winnow.tasks.thin._features import mean_embedding

    rng = np.random.default_rng(6)
    x = rng.standard_normal((1003, 3)) * [1e-6, 1.0, 1e9]
    counts = rng.integers(1, 5, size=1003)
    fmap = draw_feature_map(
        get_kernel("matern52"), 3, 64, "rff", 0.9, x.mean(0), x.std(0), rng, np.float64
    )
    direct = counts @ features_of_rows(fmap, x, None, chunk_size=5000) / counts.sum()
    one = mean_embedding(fmap, x, None, counts, chunk_size=100)
    three = mean_embedding(fmap, x, None, counts, chunk_size=100, workers=3)
    np.testing.assert_allclose(one, direct, rtol=1e-12, atol=1e-14)
    np.testing.assert_array_equal(one, three)  # bit-identical whatever the thread count
    rows = np.arange(0, 1003, 2)
    sub = mean_embedding(fmap, x, rows, counts[rows], chunk_size=64, workers=2)
    want = counts[rows] @ features_of_rows(fmap, x, rows, chunk_size=5000) / counts[rows].sum()
    np.testing.assert_allclose(sub, want, rtol=1e-12, atol=1e-14)
