"""Time the demo study end to end, as a user runs it: `winnow run configs/aquifer_demo.yaml`.

The config is copied into a scratch folder with the store and run folders redirected there,
so the repository's own `studies/` is left alone. Prints one table: wall time of the command
(Prefect's temporary server included), CPU time of the command and its solver processes,
peak memory of the largest process, and the per-stage times recorded in the run store.
Target (issue 2): under 3 minutes on 2 cores.

Run: python benchmarks/bench_demo.py
"""

from __future__ import annotations

import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parents[1]


def main() -> int:
    data = yaml.safe_load((ROOT / "configs" / "aquifer_demo.yaml").read_text())
    with tempfile.TemporaryDirectory(prefix="winnow-bench-demo-") as tmp:
        tmp_path = Path(tmp)
        data["store"] = str(tmp_path / "aquifer_demo.h5")
        data["run_root"] = str(tmp_path / "runs")
        data["sample"]["observations"]["file"] = str(
            ROOT / "examples/aquifer/data/observations.csv"
        )
        data["dispatch"]["template_dir"] = str(ROOT / "examples/aquifer/templates")
        cfg = tmp_path / "aquifer_demo.yaml"
        cfg.write_text(yaml.safe_dump(data, sort_keys=False))
        env = {**os.environ, "PREFECT_HOME": str(tmp_path / "prefect-home")}
        winnow = Path(sys.executable).with_name("winnow")
        t0 = time.perf_counter()
        proc = subprocess.run(
            [str(winnow), "run", str(cfg)], env=env, capture_output=True, text=True
        )
        wall = time.perf_counter() - t0
        usage = resource.getrusage(resource.RUSAGE_CHILDREN)
        if proc.returncode != 0:
            print(proc.stdout[-3000:], proc.stderr[-3000:], sep="\n")
            return proc.returncode

        from winnow.tasks.store import RunStore

        with RunStore.open_read(data["store"]) as store:
            chain = store.read_chain()
            sel = store.read_selection()
            _, outcomes = store.read_runs()
        stages = {
            "sampling (s)": chain.diagnostics.details.get("seconds", float("nan")),
            "thinning (s)": sel.report["timings"]["total"],
            "solver runs, summed (s)": sum(o.seconds for o in outcomes),
        }
    rows = [
        ("wall time of `winnow run` (s)", f"{wall:.1f}"),
        ("CPU time, command and solvers (s)", f"{usage.ru_utime + usage.ru_stime:.1f}"),
        ("peak memory of one process (MiB)", f"{usage.ru_maxrss / 1024:.0f}"),
        *((k, f"{v:.1f}") for k, v in stages.items()),
        (
            "solver runs",
            f"{len(outcomes)} ({sum(o.state == 'succeeded' for o in outcomes)} succeeded)",
        ),
        ("target: wall under 180 s", "met" if wall < 180 else "NOT met"),
    ]
    width = max(len(k) for k, _ in rows)
    print(f"demo study on {os.cpu_count()} cores")
    for k, v in rows:
        print(f"  {k:<{width}}  {v}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
