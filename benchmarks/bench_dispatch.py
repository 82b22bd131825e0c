"""Orchestration overhead of the dispatch stage per run.

Runs N times a solver that exits at once (``/bin/true``) through

(a) the Prefect-free ``LocalRunner`` (``winnow.tasks.dispatch.dispatch``),
(b) the Prefect flow with ``ThreadPoolTaskRunner``,
(c) a two-worker local Dask cluster: ``DaskRunner`` and the flow with ``DaskTaskRunner``,

and prints runs per second and the overhead per run, i.e. the per-run wall time times the
number of parallel slots minus the cost of a bare process spawn measured in the same process.
Target: under 100 ms overhead per run on the local runner.

Usage::

    nice python benchmarks/bench_dispatch.py --runs 500
    nice python benchmarks/bench_dispatch.py --runs 100 --no-prefect

The machine may be shared: figures move with the load; the ratios measured side by side in
one run are the meaningful part.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def _prefect_env() -> None:
    # Same settings as the test suite: offline, in-memory database, patient server start.
    os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "180")
    os.environ.setdefault("PREFECT_HOME", tempfile.mkdtemp(prefix="winnow-bench-prefect-"))
    os.environ.setdefault(
        "PREFECT_API_DATABASE_CONNECTION_URL",
        "sqlite+aiosqlite:///file::memory:?cache=shared&uri=true&check_same_thread=false",
    )
    os.environ.setdefault("PREFECT_LOGGING_LEVEL", "ERROR")


def _render(run_root: Path, n: int, solver: str):
    from winnow.tasks.dispatch import DeckSpec, render_run

    tpl = run_root.parent / "templates"
    tpl.mkdir(exist_ok=True)
    (tpl / "deck.in.j2").write_text("x = {{ x }}\nid = {{ run_id }}\n")
    decks = DeckSpec(["deck.in.j2"])
    return [
        render_run(
            {"x": 0.001 * i},
            point_index=i,
            weight=1.0 / n,
            run_root=run_root,
            decks=decks,
            command=[solver, "{deck}"],
            template_root=tpl,
        )
        for i in range(n)
    ]


def _bare_spawn(n: int, solver: str) -> float:
    """Seconds per ``subprocess.run([solver])``, sequential."""
    t0 = time.perf_counter()
    for _ in range(n):
        subprocess.run([solver, "x"], check=True)
    return (time.perf_counter() - t0) / n


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--runs", type=int, default=500)
    parser.add_argument("--no-prefect", action="store_true", help="skip the Prefect flow rows")
    parser.add_argument("--no-dask", action="store_true", help="skip the Dask rows")
    args = parser.parse_args()
    n = args.runs
    if n < 1:
        parser.error("--runs must be >= 1")
    solver = shutil.which("true") or "/bin/true"
    server = None
    if not args.no_prefect:
        _prefect_env()
        # A local API server whose address every process sees (Dask workers started below
        # inherit PREFECT_API_URL); otherwise each worker would start its own temporary one.
        from prefect.server.api.server import SubprocessASGIServer

        server = SubprocessASGIServer()
        server.start(timeout=180)
        os.environ["PREFECT_API_URL"] = server.api_url

    from winnow.tasks.dispatch import DaskRunner, LocalRunner, dispatch

    work = Path(tempfile.mkdtemp(prefix="winnow-bench-dispatch-"))
    rows: list[tuple[str, int, float, float]] = []  # label, slots, seconds, bare spawn
    prefect_rows: list[tuple[str, int, float]] = []  # baselines without a solver
    try:
        t0 = time.perf_counter()
        _render(work / "warm", 5, solver)
        render_specs = _render(work / "render", n, solver)
        render_s = (time.perf_counter() - t0) / (n + 5)
        bare = _bare_spawn(n, solver)

        def fresh(label: str):
            return _render(work / label, n, solver)

        def timed(label: str, slots: int, fn) -> None:
            specs = fresh(label.replace(" ", "_").replace("(", "").replace(")", ""))
            t = time.perf_counter()
            outcomes = fn(specs)
            seconds = time.perf_counter() - t
            states = {o.state for o in outcomes}
            if states != {"succeeded"} or len(outcomes) != n:
                raise SystemExit(f"{label}: unexpected states {states}")
            rows.append((label, slots, seconds, bare))
            print(f"  {label}: {seconds:.2f} s for {n} runs", file=sys.stderr, flush=True)

        timed("(a) LocalRunner, 1 slot", 1, lambda s: dispatch(s, runner=LocalRunner(1)))
        timed("(a) LocalRunner, 2 slots", 2, lambda s: dispatch(s, runner=LocalRunner(2)))

        cluster = None
        if not args.no_dask:
            from distributed import LocalCluster

            cluster = LocalCluster(
                n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0"
            )
            addr = cluster.scheduler_address
            timed(
                "(c) DaskRunner, 2 workers",
                2,
                lambda s: dispatch(s, runner=DaskRunner(address=addr)),
            )

        if not args.no_prefect:
            from winnow.flows.dispatch import dispatch_flow

            # Warm the temporary API server so its start-up is not charged to the runs.
            dispatch_flow(render_specs[:2], runner="local", concurrency=1)
            timed(
                "(b) flow, ThreadPoolTaskRunner 1",
                1,
                lambda s: dispatch_flow(s, runner="local", concurrency=1),
            )
            timed(
                "(b) flow, ThreadPoolTaskRunner 2",
                2,
                lambda s: dispatch_flow(s, runner="local", concurrency=2),
            )
            if cluster is not None:
                timed(
                    "(c) flow, DaskTaskRunner 2 workers",
                    2,
                    lambda s: dispatch_flow(s, runner={"dask": {"address": addr}}),
                )
                # Baseline: Prefect's own cost of a task that does nothing, same task runner.
                from prefect import flow, task
                from prefect_dask import DaskTaskRunner

                @task
                def noop(i: int) -> int:
                    return i

                @flow(task_runner=DaskTaskRunner(address=addr))
                def noop_flow(k: int) -> int:
                    return sum(st.is_completed() for st in noop.map(range(k), return_state=True))

                t = time.perf_counter()
                noop_flow(n)
                prefect_rows.append(
                    ("(c) baseline: no-op Prefect task, Dask", 2, time.perf_counter() - t)
                )
        if cluster is not None:
            cluster.close()
    finally:
        shutil.rmtree(work, ignore_errors=True)
        if server is not None:
            server.stop()

    print()
    print(
        f"dispatch overhead, {n} runs of {solver} (machine shared with other work; "
        f"{os.cpu_count()} CPUs)"
    )
    print(f"render_run per run: {render_s * 1e3:.2f} ms;  bare spawn per run: {bare * 1e3:.2f} ms")
    print()
    head = f"{'runner':<36} {'slots':>5} {'wall s':>8} {'runs/s':>8} {'per run ms':>11} {'overhead ms':>12}"
    print(head)
    print("-" * len(head))
    for label, slots, seconds, bare_s in rows:
        per_run = seconds / n
        overhead = per_run * slots - bare_s  # slot-seconds per run minus the bare spawn
        print(
            f"{label:<36} {slots:>5d} {seconds:>8.2f} {n / seconds:>8.1f} "
            f"{per_run * 1e3:>11.2f} {overhead * 1e3:>12.2f}"
        )
    for label, slots, seconds in prefect_rows:
        per_run = seconds / n
        print(
            f"{label:<36} {slots:>5d} {seconds:>8.2f} {n / seconds:>8.1f} "
            f"{per_run * 1e3:>11.2f} {per_run * slots * 1e3:>12.2f}"
        )
    print()
    print("overhead = wall / runs * slots - bare spawn (slot time each run costs beyond spawning)")
    print("target: < 100 ms overhead per run on the local runner")
    sys.stdout.flush()


if __name__ == "__main__":
    main()
