"""Small studies built in a temporary folder for the fault, bad-input and load tests.

Each study imports a seeded normal chain (``chain.npy``, 2 parameters ``x``, ``y``), thins it
by stride (cheap, deterministic) and runs ``fault_solver.py`` on every chosen point; the
solver's behaviour is chosen by the deck constants (see that script). Nothing here is a
test; the test modules import it as ``from fault_solvers.kit import ...``.
"""

from __future__ import annotations

import copy
import os
from pathlib import Path
from typing import Any

import numpy as np
import yaml

SOLVER = Path(__file__).resolve().parent / "fault_solver.py"

TEMPLATE = """\
# fault-solver deck
mode = {{ mode }}
fault_below = {{ fault_below }}
state = {{ state }}
slow_s = {{ slow_s }}
max_sleep_ms = {{ max_sleep_ms }}
fail_rate = {{ fail_rate }}
fail_once = {{ fail_once }}
x = {{ x }}
y = {{ y }}
"""


def write_chain(path: Path, n_rows: int, *, rng: int = 8) -> np.ndarray:
    """A seeded (n_rows, 2) standard normal chain saved as .npy; returns it."""
    g = np.random.default_rng(rng)
    draws = g.normal(size=(n_rows, 2))
    np.save(path, draws)
    return draws


def study_data(folder: Path, **over: Any) -> dict[str, Any]:
    """The study config as a dict; keyword ``a__b=v`` sets ``data[a][b] = v``."""
    state = folder / "state"
    data: dict[str, Any] = {
        "study": {"name": "faults", "description": "fault injection", "seed": 11},
        "store": "study.h5",
        "run_root": "runs",
        "budget": 6,
        "parameters": [
            {"name": "x", "units": "m", "prior": {"dist": "uniform", "low": -8, "high": 8}},
            {"name": "y", "units": "m", "prior": {"dist": "uniform", "low": -8, "high": 8}},
        ],
        "sample": {
            "import_chain": {"file": "chain.npy", "chains": 2},
            "checks": {"on_failure": "warn"},
        },
        "thin": {"method": "stride", "features": 256},
        "dispatch": {
            "template_dir": "templates",
            "templates": ["deck.txt.j2"],
            "constants": {
                "mode": "ok",
                "fault_below": 1e300,
                "state": str(state),
                "slow_s": 5.0,
                "max_sleep_ms": 200.0,
                "fail_rate": 0.1,
                "fail_once": 0,
            },
            "command": ["{python}", str(SOLVER), "{deck}"],
            "outputs": ["out.json"],
            "timeout": 30,
            "retries": 0,
            "concurrency": 2,
            "runner": "local",
        },
        "collect": {
            "qoi": [
                {"name": "q", "units": "m", "reader": {"json": {"file": "out.json", "key": "q"}}}
            ],
            "quantiles": [0.1, 0.5, 0.9],
            "bootstrap": 50,
        },
    }
    for dotted, value in over.items():
        node = data
        *head, last = dotted.split("__")
        for k in head:
            node = node[k]
        node[last] = copy.deepcopy(value)
    return data


def make_study(folder: Path, *, n_rows: int = 400, chain_rng: int = 8, **over: Any) -> Path:
    """Write chain, template and config into ``folder``; returns the config path."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "state").mkdir(exist_ok=True)
    (folder / "templates").mkdir(exist_ok=True)
    (folder / "templates" / "deck.txt.j2").write_text(TEMPLATE)
    if not (folder / "chain.npy").exists():
        write_chain(folder / "chain.npy", n_rows, rng=chain_rng)
    path = folder / "study.yaml"
    path.write_text(yaml.safe_dump(study_data(folder, **over), sort_keys=False))
    return path


def run_study(path: Path, **kwargs: Any):
    """Run the study flow in-process (needs the ``prefect_harness`` fixture)."""
    from winnow.flows.study import study_flow
    from winnow.tasks.config import parse_config

    text = path.read_text()
    cfg = parse_config(yaml.safe_load(text), source=str(path))
    return study_flow(
        cfg, base_dir=str(path.parent), config_text=text, config_path=str(path), **kwargs
    )


def calls(folder: Path) -> list[tuple[str, int, str]]:
    """Solver invocations logged by the fault solver: (run folder name, pid, mode)."""
    return [(name, pid, mode) for name, pid, mode, _ in calls_with_parent(folder)]


def calls_with_parent(folder: Path) -> list[tuple[str, int, str, int]]:
    """Solver invocations: (run folder name, pid, mode, pid of the process that started it)."""
    log = folder / "state" / "calls.log"
    if not log.exists():
        return []
    out = []
    for line in log.read_text().splitlines():
        name, pid, mode, *parent = line.split()
        out.append((name, int(pid), mode, int(parent[0]) if parent else 0))
    return out


def read_runs(store: Path, revision: str | None = None):
    """(specs, outcomes by run id, values by run id) of a revision of the store."""
    from winnow.tasks.store import RunStore

    with RunStore.open_read(store) as r:
        specs, outcomes = r.read_runs(revision)
        done = r.stages_done(revision)
        values = r.read_results(revision)[0] if "results" in done else []
    return specs, {o.run_id: o for o in outcomes}, {v.run_id: v for v in values}


def snapshot(folder: Path) -> dict[str, tuple[int, int]]:
    """Every file and folder under ``folder``: relative path -> (size, mtime in ns)."""
    out = {}
    for root, dirs, files in os.walk(folder):
        for name in dirs + files:
            p = Path(root) / name
            st = p.lstat()
            out[str(p.relative_to(folder))] = (st.st_size, st.st_mtime_ns)
    return out
