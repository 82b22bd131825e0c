"""Cost of the run store's safe (copy-on-write) commits for a large chain.

Measures, side by side in one run, for an n x d chain (default 10^6 x 10):

* a plain h5py write of the chain arrays into a new file (no copy, no hashes, no fsync):
  the baseline;
* ``write_chain`` into a store (copy of the store, write, SHA-256 of every dataset and of the
  record, fsync of file and folder, ``os.replace``);
* a small commit (``write_selection`` of 50 points) into a store that already holds the
  chain: this is what copy-on-write costs every later stage;
* ``shutil.copyfile`` of that store alone (the copy part of a commit);
* ``check`` (re-hashes every dataset and record) and ``read_chain``.

Run with ``nice .venv/bin/python benchmarks/store_commit_cost.py [--rows N] [--cols D]``.
"""

from __future__ import annotations

import argparse
import os
import shutil
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np

from winnow.tasks.records import Chain, Selection
from winnow.tasks.store import RunStore, check


def _timed(fn, repeat: int = 3) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--cols", type=int, default=10)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    rng = np.random.default_rng(20240601)
    n, d = args.rows, args.cols
    chain = Chain(
        samples=rng.normal(size=(n, d)),
        names=tuple(f"x{i}" for i in range(d)),
        units=("1",) * d,
        chain_index=np.repeat(np.arange(4), -(-n // 4))[:n].astype(np.int64),
        draw_index=np.arange(n, dtype=np.int64),
        log_density=rng.normal(size=n),
        source="sampled:benchmark",
    )
    idx = np.sort(rng.choice(n, size=50, replace=False))
    sel = Selection(
        idx,
        np.full(50, 1 / 50),
        chain.samples[idx],
        "greedy",
        "simplex",
        "gaussian",
        1.0,
        "rff",
        1024,
        1,
        1e-3,
        1e-3,
        20000,
    )

    with tempfile.TemporaryDirectory(dir=os.getcwd(), prefix=".bench-store-") as tmp:
        folder = Path(tmp)
        raw = folder / "raw.h5"

        def plain_write() -> None:
            with h5py.File(raw, "w") as f:
                for k in ("samples", "chain_index", "draw_index", "log_density"):
                    f.create_dataset(k, data=getattr(chain, k))

        store = folder / "store.h5"

        def store_chain() -> None:
            RunStore.create(store, "bench", force=True)
            with RunStore.open_for_write(store) as w:
                w.new_revision("bench: 1\n")
                w.write_chain("latest", chain)

        def empty_store_commit() -> None:  # creation + new revision alone
            RunStore.create(store, "bench", force=True)
            with RunStore.open_for_write(store) as w:
                w.new_revision("bench: 1\n")

        t_plain = _timed(plain_write, args.repeat)
        t_empty = _timed(empty_store_commit, args.repeat)
        t_chain = _timed(store_chain, args.repeat) - t_empty
        size = store.stat().st_size

        def small_commit() -> None:
            with RunStore.open_for_write(store) as w:
                w.write_selection("latest", sel)

        t_small = _timed(small_commit, args.repeat)
        copy_to = folder / "copy.h5"
        t_copy = _timed(lambda: shutil.copyfile(store, copy_to), args.repeat)

        def copy_fsync() -> None:
            shutil.copyfile(store, copy_to)
            fd = os.open(copy_to, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)

        t_copy_sync = _timed(copy_fsync, args.repeat)
        t_check = _timed(lambda: check(store), 1)
        assert check(store).ok

        def read() -> None:
            with RunStore.open_read(store) as r:
                r.read_chain("latest")

        t_read = _timed(read, args.repeat)

    rows = [
        ("plain h5py write of the chain (baseline)", t_plain),
        ("store.write_chain (copy-on-write, hashes, fsync)", t_chain),
        ("small commit (write_selection) on that store", t_small),
        ("  copying the store file", t_copy),
        ("  copying the store file + fsync of the copy", t_copy_sync),
        ("check (re-hash every dataset and record)", t_check),
        ("read_chain", t_read),
    ]
    print(f"chain {n} x {d} float64; store file {size / 1e6:.1f} MB; best of {args.repeat}")
    print(f"{'operation':<52} {'seconds':>9} {'x baseline':>11}")
    for name, t in rows:
        print(f"{name:<52} {t:>9.3f} {t / t_plain:>11.2f}")


if __name__ == "__main__":
    main()
