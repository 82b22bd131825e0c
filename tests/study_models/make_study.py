"""Build a small, fast study (straight-line model, tiny solver) in a folder, for tests."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import yaml

HERE = Path(__file__).resolve().parent


def write_observations(path: Path, *, seed: int, n: int = 12) -> None:
    """Noisy points of y = 1 + 0.5 x (invented test data), sigma 0.1."""
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 4.0, n)
    y = 1.0 + 0.5 * x + rng.normal(0.0, 0.1, n)
    rows = ["x,y,sigma"] + [f"{float(a)!r},{float(b)!r},0.1" for a, b in zip(x, y, strict=True)]
    path.write_text("\n".join(rows) + "\n")


def make_study(folder: Path, *, budget: int = 4, seed: int = 3, **overrides) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    obs = folder / "obs.csv"
    if not obs.exists():
        write_observations(obs, seed=seed)
    data = {
        "study": {"name": "line-test", "seed": seed},
        "store": "study.h5",
        "run_root": "runs",
        "budget": budget,
        "parameters": [
            {"name": "a", "units": "-", "prior": {"dist": "normal", "mu": 0.0, "sigma": 10.0}},
            {"name": "b", "units": "-", "prior": {"dist": "normal", "mu": 0.0, "sigma": 10.0}},
        ],
        "sample": {
            "model": {"forward": "linear_model:forward", "search_path": str(HERE)},
            "observations": {
                "file": "obs.csv",
                "target": "y",
                "inputs": ["x"],
                "noise": {"column": "sigma"},
            },
            "chains": 4,
            "draws": 3000,
            "checks": {"on_failure": "warn"},
        },
        "thin": {"method": "greedy", "features": 256},
        "dispatch": {
            "template_dir": str(HERE),
            "templates": ["line.deck.j2"],
            "command": ["{python}", str(HERE / "tiny_solver.py"), "{deck}"],
            "outputs": ["result.json"],
            "timeout": 60,
            "concurrency": 2,
        },
        "collect": {
            "qoi": [
                {
                    "name": "y2",
                    "units": "-",
                    "reader": {"json": {"file": "result.json", "key": "y2"}},
                    "cheap_qoi": "linear_model:cheap_y2",
                    "thresholds": [2.0],
                }
            ],
            "bootstrap": 100,
        },
    }
    for dotted, value in overrides.items():
        node = data
        *head, last = dotted.split(".")
        for k in head:
            node = node[k]
        node[last] = value
    path = folder / "study.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path
