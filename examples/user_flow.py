"""A user's own Prefect flow that calls winnow's tasks on its own sampler output.

Not every team calibrates with winnow's sampler. Here the "user" fits the Theis model of the
aquifer demo by least squares and draws from the Laplace (Gaussian) approximation of the
posterior, then hands those draws to winnow: :func:`~winnow.tasks.thin_task` picks the
points, :func:`~winnow.tasks.render_runs_task` writes their decks, the
:func:`~winnow.flows.dispatch.dispatch_flow` subflow runs the solver, and the collect stage's
estimator weighs the results.

Run it with ``python -m winnow.examples.user_flow RUN_FOLDER``. The data are the demo's
invented observations; the caution of the demo applies (see examples/aquifer/README.md).
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

import numpy as np
from prefect import flow, task

from winnow.examples.aquifer import theis
from winnow.examples.aquifer.make_data import load_observations
from winnow.flows.dispatch import dispatch_flow
from winnow.tasks import render_runs_task, thin_task
from winnow.tasks.collect import estimate_qoi, read_qoi
from winnow.tasks.dispatch import DeckSpec

TEMPLATES = Path(theis.__file__).with_name("templates")
SCENARIO = {
    "pumping_rate": theis.SUPPLY_PUMPING_RATE_M3S,
    "t_end": theis.PREDICTION_TIME_S,
    "spring_x": theis.SPRING_X_M,
    "spring_y": theis.SPRING_Y_M,
    "river_distance": theis.RIVER_DISTANCE_M,
}


@task(name="my-laplace-sampler")
def my_sampler(n: int, seed: int) -> np.ndarray:
    """The user's own calibration: least squares, then draws from the Laplace approximation."""
    from scipy.optimize import least_squares

    obs = load_observations()

    def residuals(theta: np.ndarray) -> np.ndarray:
        return (theis.forward(theta, obs) - obs["drawdown_m"]) / obs["sigma_m"]

    fit = least_squares(residuals, x0=np.array([-2.5, -3.5]))
    cov = np.linalg.inv(fit.jac.T @ fit.jac)  # Gauss-Newton approximation of the posterior
    return np.random.default_rng(seed).multivariate_normal(fit.x, cov, size=n)


@flow(name="my-aquifer-prediction")
def my_prediction(run_root: str, budget: int = 6, seed: int = 1, grid: str = "coarse") -> dict:
    """Thin the user's draws, run the costly solver on the chosen points, weigh the results."""
    draws = my_sampler(20_000, seed)
    selection = thin_task(draws, budget, method="greedy", rng=seed)
    specs = render_runs_task(
        selection,
        list(theis.PARAM_NAMES),
        run_root=Path(run_root),
        decks=DeckSpec(templates=["aquifer.deck.j2"], constants={**SCENARIO, "grid": grid}),
        command=["{python}", "-m", "winnow.examples.aquifer.solver", "{deck}"],
        template_root=TEMPLATES,
    )
    outcomes = dispatch_flow(specs, concurrency=2, timeout=600, outputs=["result.json"])
    reader: dict[str, Any] = {
        "name": "drawdown_spring",
        "units": "m",
        "reader": {"json": {"file": "result.json", "key": "qoi.drawdown_spring"}},
    }
    values = [
        read_qoi(s.run_dir, reader, run_id=s.run_id, run_state=o.state)
        for s, o in zip(specs, outcomes, strict=True)
    ]
    est = estimate_qoi(values, selection.weights, name="drawdown_spring", units="m", rng=seed)
    return {
        "indices": selection.indices.tolist(),
        "weights": selection.weights.tolist(),
        "states": [o.state for o in outcomes],
        "mean_m": float(est.mean),
        "sd_m": float(est.sd),
        "mmd_exact": selection.mmd_exact,
    }


if __name__ == "__main__":  # pragma: no cover - a usage example
    print(my_prediction(sys.argv[1] if len(sys.argv) > 1 else "user-flow-runs"))
