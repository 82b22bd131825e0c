"""Compiled float32 cos/sin kernels (tasks/thin/_trig.py) and the feature passes that use them.

Oracle throughout: numpy's float64 ``np.cos`` / ``np.sin`` evaluated at the same float32
arguments widened to float64 (numpy library; its float64 functions are accurate to about
1 ulp of float64, far below the float32 tolerances checked here).

Tolerances are absolute, in units of ``U = 2^-24`` (half an ulp of 1 in float32, ~6e-8):

* kernel values: <= 3 U (the module documents 3 U; measured <= 2 U);
* the exact path beyond the reduction limit: <= 1 U (float64 libm rounded to float32);
* sums of ``n`` weighted values: float32 accumulation error, bounded by
  ``n * sum(|w|) * 2^-23`` (common practice: the worst-case recursive-summation bound
  gamma_n ~ n eps, Higham 2002, Eq. 4.4) plus 3 U per value.
"""

from __future__ import annotations

import numpy as np
import pytest

from winnow.tasks.thin import _trig as _trig
from winnow.tasks.thin._features import draw_feature_map, features_of_rows, mean_embedding
from winnow.tasks.thin._kernels import get_kernel

U = 2.0**-24
LIMIT = _trig.REDUCTION_LIMIT


def _values(x: np.ndarray, factor: float = 1.0) -> tuple[np.ndarray, np.ndarray, int]:
    """cos and sin of a 1-D float32 array through the feature kernel (one row)."""
    x = np.asarray(x, dtype=np.float32)
    out = np.zeros((1, 2 * x.size), dtype=np.float32)
    out[0, : x.size] = x
    n_exact = _trig.cos_sin_features(out, x.size, np.float32(factor))
    return out[0, : x.size], out[0, x.size :], n_exact


def _argument_grid(rng: np.random.Generator) -> np.ndarray:
    """Small, moderate and large arguments up to the reduction limit, both signs, plus the
    points where the quadrant changes (odd multiples of pi/4) and exact multiples of pi/2."""
    parts = [
        np.array([0.0, 1e-30, 1e-8, 1e-4, 0.5, 1.0, np.pi / 4, np.pi / 2, np.pi, 2 * np.pi]),
        rng.uniform(-4, 4, 20_000),
        rng.uniform(-1e3, 1e3, 20_000),
        rng.uniform(-6.6e4, 6.6e4, 20_000),
        rng.uniform(-LIMIT, LIMIT, 20_000),
        np.arange(-4001, 4001, 2) * (np.pi / 4),  # quadrant boundaries
        np.arange(-2000, 2000) * (np.pi / 2) * 97.0,  # multiples of pi/2, up to ~3e5
        np.array([LIMIT, -LIMIT, np.nextafter(np.float32(LIMIT), np.float32(0))]),
    ]
    x = np.concatenate(parts).astype(np.float32)
    return np.concatenate([x, -x])


def test_values_match_float64_numpy_within_3_units():
    x = _argument_grid(np.random.default_rng(0))
    c, s, n_exact = _values(x)
    x64 = x.astype(np.float64)
    assert n_exact == 0  # all within the fast path's range
    assert np.max(np.abs(c - np.cos(x64))) <= 3 * U
    assert np.max(np.abs(s - np.sin(x64))) <= 3 * U
    # tiny arguments: sin x = x and cos x = 1 to float32 rounding (relative, not just absolute)
    tiny = np.array([1e-30, 1e-8, -1e-8, 1e-4], dtype=np.float32)
    c, s, _ = _values(tiny)
    np.testing.assert_allclose(s, np.sin(tiny.astype(np.float64)), rtol=2**-22, atol=0)
    np.testing.assert_array_equal(c[:3], np.float32(1.0))


@pytest.mark.parametrize("scale", [1e5, 3e6, 1e7, 1e9, 1e20])
def test_huge_arguments_take_the_exact_path(scale):
    rng = np.random.default_rng(1)
    x = (rng.uniform(0.5, 1.0, 2000) * scale).astype(np.float32)
    x[::2] *= -1
    c, s, n_exact = _values(x)
    x64 = x.astype(np.float64)
    assert n_exact == int(np.sum(np.abs(x64) > LIMIT))  # counted, never silently reduced
    tol = U if scale > LIMIT else 3 * U  # float64 libm rounded once, or the fast path
    assert np.max(np.abs(c - np.cos(x64))) <= tol
    assert np.max(np.abs(s - np.sin(x64))) <= tol


def test_mixed_row_fast_and_exact_elements_and_factor():
    # one row mixing in-range and out-of-range arguments; the factor scales both paths
    rng = np.random.default_rng(2)
    x = rng.uniform(-50, 50, 4099).astype(np.float32)
    x[rng.choice(x.size, 37, replace=False)] = rng.uniform(-1e8, 1e8, 37).astype(np.float32)
    f = np.float32(1 / np.sqrt(4099))
    c, s, n_exact = _values(x, float(f))
    x64 = x.astype(np.float64)
    assert n_exact == 37
    assert np.max(np.abs(c - f * np.cos(x64))) <= 3 * U * f + U * f
    assert np.max(np.abs(s - f * np.sin(x64))) <= 3 * U * f + U * f


def test_nonfinite_arguments_give_nan():
    # the thin stage never passes them; the kernels still must not invent a value
    c, s, n_exact = _values(np.array([np.nan, np.inf, -np.inf, 1.0], dtype=np.float32))
    assert n_exact == 3
    assert np.all(np.isnan(c[:3])) and np.all(np.isnan(s[:3]))
    assert abs(c[3] - np.cos(1.0)) <= 3 * U


def test_weighted_sums_match_float64_oracle():
    rng = np.random.default_rng(3)
    n, width = 300, 1031  # width not a multiple of the SIMD width
    theta = rng.normal(0, 30, (n, width)).astype(np.float32)
    theta[5, 7] = 5e7  # one exact-path element
    theta[200, :3] = -2e6
    w = rng.integers(1, 5, n).astype(np.float32)
    cs = np.zeros(width, dtype=np.float32)
    ss = np.zeros(width, dtype=np.float32)
    n_exact = _trig.cos_sin_sums(theta, w, cs, ss)
    t64 = theta.astype(np.float64)
    bound = n * w.sum() * 2.0**-23 + 3 * U * w.sum()  # module docstring of this test
    assert n_exact == 4
    assert np.max(np.abs(cs - w @ np.cos(t64))) <= bound
    assert np.max(np.abs(ss - w @ np.sin(t64))) <= bound
    # the accumulators are added to, not overwritten
    cs2, ss2 = cs.copy(), ss.copy()
    _trig.cos_sin_sums(theta[:1], w[:1], cs2, ss2)
    np.testing.assert_allclose(cs2 - cs, w[0] * np.cos(t64[0]), atol=4 * U * w[0] + 1e-4)


def _fmap(d: int, n_features: int, kernel: str = "gaussian", dtype=np.float32):
    rng = np.random.default_rng(4)
    return draw_feature_map(
        get_kernel(kernel), d, n_features, "rff", 0.7, np.full(d, 0.3), np.full(d, 2.0), rng,
        dtype,
    )  # fmt: skip


def _phases(fmap, x):
    """theta = float32(z) W^T evaluated in float64, and a bound on the float32 product's
    rounding error: a float32 dot product of length d is within gamma_d ~ d 2^-24 of
    sum_k |w_k z_k| (Higham 2002, Eq. 3.5); +2 covers the rounding of z and W to float32."""
    z = ((x - fmap.mean) / fmap.scale).astype(np.float32).astype(np.float64)
    w = fmap.omega.T.astype(np.float32).astype(np.float64)
    err = (z.shape[1] + 2) * U * (np.abs(z) @ np.abs(w))
    return z @ w, err


@pytest.mark.parametrize("kernel", ["gaussian", "laplace"])
def test_features_of_rows_match_float64_reference(kernel):
    # reference: the feature formula phi = D^-1/2 [cos(W z), sin(W z)] in float64 numpy
    # (Rahimi & Recht 2007, Eq. 2), with theta from the same float32 product as the code
    rng = np.random.default_rng(5)
    d, n_freq = 6, 500
    fmap = _fmap(d, n_freq, kernel)
    x = rng.normal(0.3, 2.0, (257, d))
    rows = rng.choice(257, 100, replace=False)
    phi = features_of_rows(fmap, x, rows, chunk_size=33)
    theta, err = _phases(fmap, x[rows])
    want = np.hstack([np.cos(theta), np.sin(theta)]) / np.sqrt(n_freq)
    # 3 U per value (kernel) + 1 U (scaling) + the product's rounding (|d cos/d theta| <= 1)
    tol = (4 * U + np.hstack([err, err])) / np.sqrt(n_freq)
    assert np.all(np.abs(phi - want) <= tol)
    # float64 feature maps keep numpy's path: equal to the formula to float64 rounding
    f64 = _fmap(d, n_freq, kernel, np.float64)
    phi64 = features_of_rows(f64, x, rows, chunk_size=33)
    t64 = ((x[rows] - f64.mean) / f64.scale) @ f64.omega.T
    np.testing.assert_allclose(phi64, np.hstack([np.cos(t64), np.sin(t64)]) / np.sqrt(n_freq),
                               atol=1e-12)  # fmt: skip


def test_feature_map_unscaled_and_caller_buffer():
    rng = np.random.default_rng(6)
    fmap = _fmap(3, 64)
    x = rng.normal(size=(10, 3))
    scaled = fmap(x)
    raw = fmap(x, scaled=False)
    np.testing.assert_allclose(scaled, raw * np.float32(1 / 8), rtol=2**-22)
    # a non-contiguous caller buffer takes numpy's path and agrees to float32 tolerance
    big = np.zeros((10, 2 * 128 + 5), dtype=np.float32)
    view = big[:, 5 : 5 + 128]
    fmap(x, out=view)
    np.testing.assert_allclose(view, scaled, atol=4 * U)


@pytest.mark.parametrize("kernel", ["gaussian", "laplace"])
def test_mean_embedding_matches_oracle_and_is_bit_identical_across_workers(kernel):
    rng = np.random.default_rng(7)
    d, n_freq, n = 4, 300, 2_000
    fmap = _fmap(d, n_freq, kernel)
    x = rng.normal(0.3, 2.0, (n, d))
    counts = rng.integers(1, 6, n).astype(np.float64)
    runs = [mean_embedding(fmap, x, None, counts, chunk_size=128, workers=w) for w in (1, 2, 3)]
    for other in runs[1:]:
        np.testing.assert_array_equal(other, runs[0])  # bit-identical, any worker count
    theta, err = _phases(fmap, x)
    want = counts @ np.hstack([np.cos(theta), np.sin(theta)]) / counts.sum() / np.sqrt(n_freq)
    # weighted mean: float32 sums over at most one chunk of 128 rows (module docstring bound,
    # relative to the chunk's weight) + 3 U per value + the product's rounding, all divided
    # by the normalisation sqrt(D)
    per_value = 3 * U + np.tile(counts @ err / counts.sum(), 2)
    tol = (128 * 2.0**-23 + per_value) / np.sqrt(n_freq)
    assert np.all(np.abs(runs[0] - want) <= tol)
    # a subset of rows with progress reports, and the float64 feature map
    rows = rng.choice(n, 500, replace=False)
    seen: list[int] = []
    sub = mean_embedding(
        fmap, x, rows, counts[rows], chunk_size=64, workers=2,
        progress=lambda done, total, what: seen.append(done),
    )  # fmt: skip
    want_sub = counts[rows] @ np.hstack([np.cos(theta[rows]), np.sin(theta[rows])])
    want_sub /= counts[rows].sum() * np.sqrt(n_freq)
    per_value = 3 * U + np.tile(counts[rows] @ err[rows] / counts[rows].sum(), 2)
    assert np.all(np.abs(sub - want_sub) <= (64 * 2.0**-23 + per_value) / np.sqrt(n_freq))
    assert seen[-1] == 500 and seen == sorted(seen)
    f64 = _fmap(d, n_freq, kernel, np.float64)
    mu64 = mean_embedding(f64, x, None, counts, chunk_size=128, workers=2)
    t64 = ((x - f64.mean) / f64.scale) @ f64.omega.T
    want64 = counts @ np.hstack([np.cos(t64), np.sin(t64)]) / counts.sum() / np.sqrt(n_freq)
    np.testing.assert_allclose(mu64, want64, atol=1e-12)


def test_thinning_import_does_not_load_numba_and_kernels_release_the_gil():
    # numba costs ~0.5 s to import: the thin module loads it on the first feature pass only
    import subprocess
    import sys

    code = "import sys, winnow.tasks.thin; print('numba' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
    # the mean-embedding workers run the kernels in parallel only if they drop the GIL
    for kernel in (_trig.cos_sin_sums, _trig.cos_sin_features):
        assert kernel.targetoptions["nogil"] is True
        assert kernel.targetoptions.get("parallel", False) is False  # workers give parallelism
