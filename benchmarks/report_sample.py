"""Write a sample collect report from invented, demo-like data (for looking at the layout).

Usage: python benchmarks/report_sample.py OUT_DIR [--no-plots]

The data are invented for the picture only: a two-parameter aquifer (log10 transmissivity,
log10 storativity), a Cooper-Jacob drawdown as the cheap model and the same law plus a small
smooth discrepancy as the "costly" solver. Three runs fail so that the report shows left-out
runs and re-solved weights.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from winnow.tasks.collect import ReportData, build_report, estimate_qoi, export_csv
from winnow.tasks.records import (
    Attempt,
    Diagnostics,
    ParameterDiagnostics,
    QoIValue,
    RunOutcome,
    Selection,
)

PUMPING = 0.02  # m^3/s
RADIUS = 150.0  # m, well to spring


def cooper_jacob(theta: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Cooper-Jacob drawdown (m) at RADIUS after time t (s); theta = (log10 T, log10 S)."""
    tr, st = 10.0 ** theta[..., :1], 10.0 ** theta[..., 1:2]
    return PUMPING / (4 * np.pi * tr) * np.log(2.25 * tr * t / (RADIUS**2 * st))


def make_sample_data(seed: int = 3) -> ReportData:
    rng = np.random.default_rng(seed)
    names, units = ("log10_T", "log10_S"), ("log10 m^2/s", "log10 -")
    cov = np.array([[0.04, -0.012], [-0.012, 0.09]])
    chain = rng.multivariate_normal([-2.3, -4.0], cov, size=4000)
    m = 24
    idx = np.sort(rng.choice(chain.shape[0], m, replace=False))
    w = rng.dirichlet(np.full(m, 4.0))
    pts = chain[idx]
    sel = Selection(
        indices=idx,
        weights=w,
        points=pts,
        method="greedy",
        weights_rule="simplex",
        kernel="gaussian",
        bandwidth=1.0,
        feature_map="rff",
        n_features=512,
        seed=seed,
        mmd_features=0.021,
        mmd_exact=0.024,
        mmd_exact_rows=4000,
    )
    days = np.array([1, 2, 5, 10, 20, 30, 45, 60, 90], dtype=float)
    times = days * 86400.0
    cheap_chain_vec = cooper_jacob(chain, times)
    cheap_pts_vec = cooper_jacob(pts, times)
    costly_vec = cheap_pts_vec * 1.04 + 0.01  # the invented "costly" solver
    failed = {5: "failed", 11: "timed_out", 17: "output_missing"}
    run_ids = tuple(f"p{k:03d}" for k in range(m))
    outcomes, scalar_vals, vec_vals = [], [], []
    for k, rid in enumerate(run_ids):
        state = failed.get(k, "succeeded")
        att = Attempt(
            number=1,
            argv=("solver", "deck.in"),
            started=0.0,
            ended=3600.0 + 60 * k,
            exit_status=0 if state == "succeeded" else 1,
            timed_out=state == "timed_out",
            stdout_tail="",
            stderr_tail="",
        )
        msg = {
            "failed": "solver exit status 1",
            "timed_out": "killed after 3600 s",
            "output_missing": "result.json not written",
        }.get(state, "")
        outcomes.append(
            RunOutcome(
                run_id=rid,
                key=f"{k:064x}",
                state=state,
                attempts=(att,),
                run_dir=Path(f"/runs/{rid}"),
                message=msg,
                reused_from="r1" if k < 8 else "",
            )
        )
        if state == "succeeded":
            scalar_vals.append(QoIValue(rid, "drawdown_spring", np.asarray(costly_vec[k, 5]), "ok"))
            vec_vals.append(QoIValue(rid, "drawdown_history", costly_vec[k], "ok"))
        else:
            reason = f"run ended as {state!r}; its output is not read"
            scalar_vals.append(
                QoIValue(rid, "drawdown_spring", np.asarray(np.nan), "run_failed", reason)
            )
            vec_vals.append(
                QoIValue(rid, "drawdown_history", np.full(9, np.nan), "run_failed", reason)
            )

    def resolve(pos: np.ndarray) -> tuple[np.ndarray, float, float]:
        ww = w[pos] / w[pos].sum()  # stands in for the thin stage's re-solve
        return ww, 0.024, 0.031

    est_s = estimate_qoi(
        scalar_vals,
        w,
        name="drawdown_spring",
        units="m",
        thresholds=(3.0, 4.0),
        cheap_on_points=cheap_pts_vec[:, 5],
        cheap_on_chain=cheap_chain_vec[:, 5],
        resolve_weights=resolve,
        rng=1,
    )
    est_v = estimate_qoi(
        vec_vals,
        w,
        name="drawdown_history",
        units="m",
        cheap_on_points=cheap_pts_vec,
        cheap_on_chain=cheap_chain_vec,
        resolve_weights=resolve,
        rng=2,
    )
    params = {
        n: ParameterDiagnostics(
            rhat=1.003 + 0.002 * i,
            ess_bulk=1800.0 - 200 * i,
            ess_tail=1500.0,
            mcse_mean=0.005,
            mcse_q05=0.009,
            mcse_q95=0.009,
            mean=float(chain[:, i].mean()),
            sd=float(chain[:, i].std()),
        )
        for i, n in enumerate(names)
    }
    diag = Diagnostics(
        parameters=params,
        n_chains=4,
        n_draws=1000,
        burn_in=500,
        burn_in_rule="first half of the draws",
        acceptance=np.array([0.31, 0.29, 0.33, 0.30]),
        thresholds={"rhat": 1.01, "ess_bulk": 400.0},
        passed=True,
    )
    return ReportData(
        study="spring-drawdown-demo",
        revision="r2",
        config_hash="9f2c" * 16,
        config_text="study:\n  name: spring-drawdown-demo\n  seed: 3\n",
        description="Drawdown at the spring after 30 days of pumping (invented data).",
        chain_names=names,
        chain_units=units,
        chain_diagnostics=diag,
        chain_samples=chain[:1500],
        chain_rows=chain.shape[0],
        chain_source="sampled:metropolis",
        selection=sel,
        point_run_ids=run_ids,
        outcomes=outcomes,
        qoi_values=scalar_vals + vec_vals,
        estimates=[est_s, est_v],
        qoi_axes={"drawdown_history": {"name": "time", "units": "d", "values": days}},
        qoi_descriptions={"drawdown_spring": "Drawdown at the spring after 30 days."},
        reuse_counts={"ran": 16, "reused": 8},
        provenance={"winnow": "0.1.0", "python": sys.version.split()[0]},
        created="2026-12-02T03:00:00Z",
    )


if __name__ == "__main__":
    out = Path(sys.argv[1] if len(sys.argv) > 1 else "report-sample")
    data = make_sample_data()
    print(build_report(data, out))
    for p in export_csv(data, out):
        print(p)
