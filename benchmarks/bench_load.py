"""Load: a study of many chosen points against a slow, randomly failing solver.

Runs ``winnow run`` on a study of N chosen points (an imported chain with 5 N distinct rows,
``thin.method: stride`` with uniform weights so thinning stays cheap) against
``tests/fault_solvers/fault_solver.py`` in ``load`` mode: each attempt sleeps a pseudo-random
0-200 ms and fails with probability 0.1, both drawn from SHA-256 of the point and the number
of its earlier attempts, so the first pass is reproducible and a rerun of a failed point
draws afresh (it fails again with probability 0.1). Local runner, concurrency 8, no retries.
Then ``winnow rerun STORE`` is run until no run fails (at most 3 times).

Checked, not just timed: every point ends in a recorded state after the first pass; after
the reruns the store holds exactly one ``succeeded`` outcome per point and ``check`` passes.

Memory: the peak resident set (VmHWM from /proc/self/status, read at exit) of each
``winnow`` process (the Prefect temporary server is a separate process and not counted).
The same study with ``--compare`` points (default 200) runs side by side, to show that the
peak does not grow with the number of runs beyond the records themselves.

Usage::

    nice .venv/bin/python benchmarks/bench_load.py              # 2,000 points vs 200
    nice .venv/bin/python benchmarks/bench_load.py --points 300 --compare 60
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))

from fault_solvers.kit import calls, make_study, read_runs  # noqa: E402

from winnow.tasks.store import check  # noqa: E402

# Runs the winnow command line and writes the process's peak RSS (kB) to a file at exit.
PEAK_WRAPPER = """
import atexit, sys
out = sys.argv.pop(1)
def _peak():
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            open(out, "w").write(line.split()[1])
atexit.register(_peak)
from winnow.flows.cli import app
sys.argv[0] = "winnow"
app()
"""


def _winnow(args: list[str], folder: Path, tag: str) -> tuple[float, float, int]:
    """Run ``winnow ARGS``; returns (wall seconds, peak RSS in MiB, exit status)."""
    peak = folder / f"peak-{tag}.txt"
    t0 = time.perf_counter()
    with open(folder / f"log-{tag}.txt", "wb") as log:
        rc = subprocess.call(
            [sys.executable, "-c", PEAK_WRAPPER, str(peak), *args],
            cwd=folder,
            stdout=log,
            stderr=subprocess.STDOUT,
        )
    wall = time.perf_counter() - t0
    rss = int(peak.read_text()) / 1024 if peak.exists() else float("nan")
    return wall, rss, rc


def _dispatch_seconds(outcomes) -> float:
    starts = [a.started for o in outcomes.values() for a in o.attempts]
    ends = [a.ended for o in outcomes.values() for a in o.attempts]
    return max(ends) - min(starts) if starts else float("nan")


def run_load(points: int, folder: Path, *, concurrency: int = 8, max_sleep_ms: float = 200.0):
    make_study(
        folder,
        n_rows=5 * points,
        budget=points,
        thin={"method": "stride", "weights": "uniform", "features": 64},
        dispatch__concurrency=concurrency,
        dispatch__retries=0,
        dispatch__timeout=60,
        dispatch__constants__mode="load",
        dispatch__constants__max_sleep_ms=max_sleep_ms,
        dispatch__constants__fail_rate=0.1,
        collect__bootstrap=100,
    )
    store = folder / "study.h5"
    wall, rss, rc = _winnow(["run", "study.yaml"], folder, "run")
    if rc != 0:
        raise SystemExit(f"winnow run failed ({rc}); see {folder / 'log-run.txt'}")
    specs, outcomes, _ = read_runs(store)
    assert len(specs) == points and set(outcomes) == {s.run_id for s in specs}, "unrecorded run"
    first = Counter(o.state for o in outcomes.values())
    dispatch_s = _dispatch_seconds(outcomes)
    failed_first = points - first.get("succeeded", 0)
    reruns, rerun_rss, left = [], [], failed_first
    for k in range(3):
        if left == 0:
            break
        w, r, rc = _winnow(["rerun", "study.h5"], folder, f"rerun{k}")
        specs, outcomes, _ = read_runs(store)
        left = sum(1 for o in outcomes.values() if o.state != "succeeded")
        reruns.append((w, left))
        rerun_rss.append(r)
    succeeded = Counter(o.run_id for o in outcomes.values() if o.state == "succeeded")
    one_each = len(specs) == points and all(succeeded[s.run_id] == 1 for s in specs)
    solved = Counter(name for name, _, _ in calls(folder))
    ok = check(store).ok
    return {
        "points": points,
        "wall_run": wall,
        "dispatch_s": dispatch_s,
        "failed_first": failed_first,
        "left_after": left,
        "reruns": len(reruns),
        "rss_run": rss,
        "rss_rerun": max(rerun_rss) if rerun_rss else float("nan"),
        "one_success_each": one_each,
        "solver_calls": sum(solved.values()),
        "check_ok": ok,
        "store_mib": store.stat().st_size / 2**20,
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--points", type=int, default=2000, help="chosen points (runs)")
    ap.add_argument("--compare", type=int, default=200, help="smaller study run side by side")
    ap.add_argument("--concurrency", type=int, default=8)
    ap.add_argument("--max-sleep-ms", type=float, default=200.0)
    ap.add_argument("--keep", type=Path, default=None, help="keep the study folders here")
    args = ap.parse_args()
    rows = []
    with tempfile.TemporaryDirectory(prefix="winnow-load-") as tmp:
        base = args.keep or Path(tmp)
        for n in (args.compare, args.points):
            print(f"running {n} points ...", flush=True)
            rows.append(
                run_load(
                    n,
                    base / f"load{n}",
                    concurrency=args.concurrency,
                    max_sleep_ms=args.max_sleep_ms,
                )
            )
    cols = [
        ("runs", "points", "{:d}"),
        ("wall run s", "wall_run", "{:.1f}"),
        ("dispatch s", "dispatch_s", "{:.1f}"),
        ("runs/s", None, "{:.1f}"),
        ("failed 1st pass", "failed_first", "{:d}"),
        ("reruns", "reruns", "{:d}"),
        ("failed after", "left_after", "{:d}"),
        ("solver calls", "solver_calls", "{:d}"),
        ("1 success/point", "one_success_each", "{}"),
        ("check ok", "check_ok", "{}"),
        ("peak RSS run MiB", "rss_run", "{:.0f}"),
        ("peak RSS rerun MiB", "rss_rerun", "{:.0f}"),
        ("store MiB", "store_mib", "{:.1f}"),
    ]
    print()
    print("| " + " | ".join(c[0] for c in cols) + " |")
    print("|" + "---|" * len(cols))
    for r in rows:
        cells = []
        for _, key, fmt in cols:
            v = r["points"] / r["dispatch_s"] if key is None else r[key]
            cells.append(fmt.format(v))
        print("| " + " | ".join(cells) + " |")
    print(
        f"\nlocal runner, concurrency {args.concurrency}, solver sleep 0-{args.max_sleep_ms:g} ms, "
        f"10 % failures per attempt; {os.cpu_count()} CPUs; wall includes the Prefect "
        "temporary server start; runs/s over the dispatch span (first start to last end)"
    )
    if not all(r["one_success_each"] and r["check_ok"] and r["left_after"] == 0 for r in rows):
        raise SystemExit("FAILED: not every point ended with exactly one success")


if __name__ == "__main__":
    main()
