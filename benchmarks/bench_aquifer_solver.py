"""Cost and accuracy of the aquifer demo solver per grid choice.

For each grid (coarse, standard, fine) the solver runs as a separate process on the demo
scenario at the true parameters (``python -m winnow.examples.aquifer.solver DECK``), and the
table shows the wall time and child CPU time per run (median of ``--repeat`` runs), the grid
size, time steps and factorisations, the spring drawdown and its relative difference from
the image-well solution (Ferris et al. 1962).  ``--corners`` adds in-process runs of the
standard grid at the corners of the suggested prior box.

Usage::

    nice python benchmarks/bench_aquifer_solver.py --repeat 3
    nice python benchmarks/bench_aquifer_solver.py --repeat 1 --grids standard --corners

The machine may be shared: wall times move with the load; CPU times are steadier.
"""

from __future__ import annotations

import argparse
import itertools
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from jinja2 import StrictUndefined
from jinja2.sandbox import SandboxedEnvironment

import winnow.examples.aquifer as aquifer_pkg
from winnow.examples.aquifer import theis
from winnow.examples.aquifer.make_data import TRUE_THETA
from winnow.examples.aquifer.solver import ModelConfig, simulate


def _deck(grid: str, log10_t: float, log10_s: float) -> str:
    env = SandboxedEnvironment(undefined=StrictUndefined, keep_trailing_newline=True)
    tpl = (Path(aquifer_pkg.__file__).parent / "templates" / "aquifer.deck.j2").read_text()
    return env.from_string(tpl).render(
        log10_T=log10_t,
        log10_S=log10_s,
        pumping_rate=theis.SUPPLY_PUMPING_RATE_M3S,
        t_end=theis.PREDICTION_TIME_S,
        spring_x=theis.SPRING_X_M,
        spring_y=theis.SPRING_Y_M,
        river_distance=theis.RIVER_DISTANCE_M,
        grid=grid,
    )


def _reference(log10_t: float, log10_s: float) -> float:
    return float(
        theis.theis_with_river(
            theis.SPRING_X_M, theis.SPRING_Y_M, theis.PREDICTION_TIME_S, 10**log10_t,
            10**log10_s, theis.SUPPLY_PUMPING_RATE_M3S, theis.RIVER_DISTANCE_M,
        )
    )  # fmt: skip


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--grids", nargs="+", default=["coarse", "standard", "fine"])
    parser.add_argument("--corners", action="store_true")
    args = parser.parse_args()
    lt, ls = TRUE_THETA
    ref = _reference(lt, ls)
    print(f"scenario at the true parameters; image-well reference {ref:.5f} m")
    print(f"{'grid':>9} {'wall s':>7} {'cpu s':>6} {'nodes':>9} {'steps':>5} {'LU':>3} "
          f"{'drawdown m':>10} {'rel. diff':>9}")  # fmt: skip
    with tempfile.TemporaryDirectory(prefix="winnow-aquifer-bench-") as tmp:
        for grid in args.grids:
            run = Path(tmp) / grid
            run.mkdir()
            (run / "aquifer.deck").write_text(_deck(grid, lt, ls))
            walls, cpus = [], []
            for _ in range(args.repeat):
                before = resource.getrusage(resource.RUSAGE_CHILDREN)
                t0 = time.perf_counter()
                subprocess.run(
                    [sys.executable, "-m", "winnow.examples.aquifer.solver", "aquifer.deck"],
                    cwd=run, check=True, capture_output=True,
                )  # fmt: skip
                walls.append(time.perf_counter() - t0)
                after = resource.getrusage(resource.RUSAGE_CHILDREN)
                cpus.append(after.ru_utime - before.ru_utime + after.ru_stime - before.ru_stime)
            doc = json.loads((run / "result.json").read_text())
            g, tm = doc["meta"]["grid"], doc["meta"]["time"]
            s = doc["qoi"]["drawdown_spring"]
            print(
                f"{grid:>9} {np.median(walls):7.2f} {np.median(cpus):6.2f} "
                f"{g['nx']:>4}x{g['ny']:<4} {tm['n_steps']:>5} {tm['n_factorisations']:>3} "
                f"{s:10.5f} {s / ref - 1:+9.4f}"
            )
    if args.corners:
        print("\nstandard grid, in process, corners of the prior box")
        print(f"{'log10_T':>8} {'log10_S':>8} {'cpu s':>6} {'drawdown m':>10} {'image m':>9} "
              f"{'rel. diff':>9}")  # fmt: skip
        for a, b in itertools.product((-4.0, -1.0), (-5.0, -2.0)):
            cfg = ModelConfig(
                10**a, 10**b, theis.SUPPLY_PUMPING_RATE_M3S, theis.PREDICTION_TIME_S,
                theis.SPRING_X_M, theis.SPRING_Y_M, True, theis.RIVER_DISTANCE_M,
            )  # fmt: skip
            c0 = time.process_time()
            res = simulate(cfg)
            cpu = time.process_time() - c0
            r = _reference(a, b)
            print(f"{a:8.1f} {b:8.1f} {cpu:6.2f} {res.drawdown_spring:10.5f} {r:9.5f} "
                  f"{res.drawdown_spring / r - 1:+9.4f}")  # fmt: skip


if __name__ == "__main__":
    main()
