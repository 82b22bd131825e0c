"""Time the collect-stage estimate of one QoI against the chain size and QoI length.

Usage: nice .venv/bin/python benchmarks/collect_estimates.py

Prints one row per case: chain rows n, chosen points m, QoI components k, seconds for
estimate_qoi with every uncertainty source on (cheap prediction on the chain, split-chain ESS
over 4 chains, 1000 bootstrap resamples), and the seconds of the chain ESS alone.
"""

from __future__ import annotations

import time

import numpy as np

from winnow.tasks.collect import chain_ess, estimate_qoi


def main() -> None:
    rng = np.random.default_rng(0)
    print(f"{'n':>7} {'m':>4} {'k':>4} {'estimate (s)':>13} {'chain ESS (s)':>14}")
    for n, m, k in [(10_000, 40, 1), (50_000, 40, 1), (50_000, 40, 20), (50_000, 40, 100)]:
        shape = (n,) if k == 1 else (n, k)
        cheap = np.cumsum(rng.normal(size=shape), axis=0) * 0.01 + rng.normal(size=shape)
        idx = rng.choice(n, m, replace=False)
        w = rng.dirichlet(np.ones(m))
        chains = np.repeat(np.arange(4), n // 4)
        t0 = time.perf_counter()
        estimate_qoi(
            cheap[idx] + 0.1,
            w,
            name="q",
            cheap_on_points=cheap[idx],
            cheap_on_chain=cheap,
            chain_index=chains,
            rng=1,
        )
        t1 = time.perf_counter()
        chain_ess(cheap, chains)
        t2 = time.perf_counter()
        print(f"{n:>7} {m:>4} {k:>4} {t1 - t0:>13.3f} {t2 - t1:>14.3f}")


if __name__ == "__main__":
    main()
