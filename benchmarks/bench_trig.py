"""Per-(row, frequency) cost of the random-feature passes: numpy cos/sin against the compiled
float32 kernels of ``tasks/thin/_trig.py``, side by side in one run.

Run:  nice .venv/bin/python benchmarks/bench_trig.py [--rows 50000] [--repeats 3]

For d in {10, 50} and D = 4096 frequencies (float32 feature map, Gaussian kernel):

* ``mean embedding``: the streamed weighted sum of the features of every row, one worker
  thread and two. ``numpy`` is the previous implementation (one float32 product into the
  feature array, ``np.sin`` and in-place ``np.cos``, the chunk summed by a BLAS product),
  rebuilt here; ``compiled`` is ``mean_embedding`` as it is now, with the phases computed
  ``rows`` at a time (the module default is marked ``*``);
* ``features``: ``features_of_rows`` of every row (numpy path against the compiled kernel).

Reported: nanoseconds per (row, frequency), wall time divided by rows x D (so two workers
show half the one-worker figure when they scale), best of ``--repeats``. The first call
(compile or load of the cached kernels) is timed separately.

BLAS runs single-threaded (OPENBLAS_NUM_THREADS=1 unless set), as in bench_thin.py. Times on
a shared machine are noisy. The chain is synthetic (standard normal, seeded).
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import time  # noqa: E402
from concurrent.futures import ThreadPoolExecutor  # noqa: E402

import numpy as np  # noqa: E402

from winnow.tasks.thin import (  # noqa: E402
    PHASE_ROWS,
    draw_feature_map,
    features_of_rows,
    get_kernel,
    mean_embedding,
    one_blas_thread,
)

D = 4096
CHUNK = 512  # rows per chunk, as thin() picks for D = 4096 (16 MB of float32 features)


def numpy_mean_embedding(fmap, x, counts, workers):
    """The previous implementation of the float32 pass (numpy cos/sin + BLAS chunk sum)."""
    n = x.shape[0]
    spans = [(a, min(n, a + CHUNK)) for a in range(0, n, CHUNK)]
    bufs = [np.empty((CHUNK, fmap.width), dtype=np.float32) for _ in range(workers)]
    wt = np.ascontiguousarray(fmap.omega.T, dtype=np.float32)

    def chunk_sum(k, buf):
        a, b = spans[k]
        z = ((x[a:b] - fmap.mean) / fmap.scale).astype(np.float32)
        phi = buf[: b - a]
        head = phi[:, :D]
        np.matmul(z, wt, out=head)
        np.sin(head, out=phi[:, D:])
        np.cos(head, out=head)
        return counts[a:b].astype(np.float32) @ phi

    acc = np.zeros(fmap.width)
    with one_blas_thread(), ThreadPoolExecutor(max_workers=workers) as pool:
        for r in range(0, len(spans), workers):
            for part in pool.map(chunk_sum, range(r, min(r + workers, len(spans))), bufs):
                acc += part
    return acc


def numpy_features(fmap, x):
    """Features with numpy's cos/sin: a non-contiguous output buffer takes that path."""
    view = np.empty((x.shape[0], fmap.width + 1), dtype=np.float32)[:, :-1]
    with one_blas_thread():
        for a in range(0, x.shape[0], CHUNK):
            b = min(x.shape[0], a + CHUNK)
            fmap(x[a:b], out=view[a:b])
    return view


def best(f, repeats):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        f()
        times.append(time.perf_counter() - t0)
    return min(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=50_000)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    rng = np.random.default_rng(0)
    n = args.rows
    print(f"bench_trig: rows {n}, D {D}, chunk {CHUNK} rows, BLAS threads "
          f"{os.environ.get('OPENBLAS_NUM_THREADS')}; ns per (row, frequency), best of "
          f"{args.repeats}; shared machine: times are noisy")  # fmt: skip
    t0 = time.perf_counter()
    small = draw_feature_map(get_kernel("gaussian"), 2, 8, "rff", 1.0, np.zeros(2), np.ones(2), rng)
    mean_embedding(small, rng.normal(size=(4, 2)), None, np.ones(4), chunk_size=4)
    small(rng.normal(size=(3, 2)))
    print(f"first call of the compiled kernels (compile, or load from cache): "
          f"{time.perf_counter() - t0:.2f} s")  # fmt: skip
    for d in (10, 50):
        bench_dimension(d, n, args.repeats, rng)


def bench_dimension(d: int, n: int, repeats: int, rng: np.random.Generator) -> None:
    x = rng.normal(size=(n, d))
    counts = np.ones(n)
    fmap = draw_feature_map(
        get_kernel("gaussian"), d, D, "rff", float(np.sqrt(d)), np.zeros(d), np.ones(d), rng
    )
    per = 1e9 / (n * D)
    print(f"\n d = {d}")
    print(f"   {'pass':<36} {'1 worker':>9} {'2 workers':>10}")
    t1, t2 = (best(lambda w=w: numpy_mean_embedding(fmap, x, counts, w), repeats) for w in (1, 2))
    print(f"   {'mean embedding, numpy':<36} {t1 * per:9.2f} {t2 * per:10.2f}")
    ref = numpy_mean_embedding(fmap, x, counts, 1) / (n * np.sqrt(D))

    def compiled(w: int, rows: int) -> np.ndarray:
        return mean_embedding(fmap, x, None, counts, chunk_size=CHUNK, workers=w, phase_rows=rows)

    for rows in (16, 32, 64, CHUNK):
        star = " *" if rows == PHASE_ROWS else ""
        t1, t2 = (best(lambda w=w, r=rows: compiled(w, r), repeats) for w in (1, 2))
        diff = np.abs(compiled(2, rows) - ref).max()
        print(f"   {f'mean embedding, compiled, {rows} rows{star}':<36} {t1 * per:9.2f} "
              f"{t2 * per:10.2f}   max |diff| to numpy {diff:.1e}")  # fmt: skip
    part = x[: n // 4]
    t_np = best(lambda: numpy_features(fmap, part), repeats)
    t_c = best(lambda: features_of_rows(fmap, part, None, chunk_size=CHUNK), repeats)
    print(f"   {'features, numpy':<36} {t_np * per * 4:9.2f}")
    print(f"   {'features, compiled':<36} {t_c * per * 4:9.2f}")


if __name__ == "__main__":
    main()
