"""Write a sample collect report from invented, demo-like data (for looking at the layout).

Usage: python benchmarks/report_sample.py OUT_DIR [--no-plots]

The data are invented for the picture only: a two-parameter aquifer (log10 transmissivity,
log10 storativity), a Cooper-Jacob drawdown as the cheap model and the same law plus a small
smooth discrepancy as the "costly" solver. Three runs fail so that the report shows left-out
runs and re-solved weights. The points are chosen by the thin stage (greedy, simplex weights)
and the estimates carry the error model's headline (interval, estimator, checks, forecast).

Besides the ReportData fields it sets the optional attributes the report reads when present:
``chain_index`` / ``draw_index`` of the plotted rows, ``cheap_at_points`` (the cheap
prediction at the chosen points) and ``observations`` (invented pumping-test drawdowns with the
cheap model's predictions over chain rows).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from winnow.tasks.collect import ChainGeometry, ReportData, build_report, estimate_qoi, export_csv
from winnow.tasks.records import Attempt, Diagnostics, ParameterDiagnostics, QoIValue, RunOutcome
from winnow.tasks.thin import thin

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
    n_chains, n_draws = 4, 1000
    chain = rng.multivariate_normal([-2.3, -4.0], cov, size=n_chains * n_draws)
    m = 24
    sel = thin(chain, m, rng=seed, workers=1)
    w, pts = sel.weights, sel.points
    days = np.array([1, 2, 5, 10, 20, 30, 45, 60, 90], dtype=float)
    times = days * 86400.0
    cheap_chain_vec = cooper_jacob(chain, times)
    cheap_pts_vec = cooper_jacob(pts, times)
    # the invented "costly" solver: the cheap law scaled, plus a smooth discrepancy in T
    costly_vec = cheap_pts_vec * 1.04 + 0.01 + 0.3 * (pts[:, :1] + 2.3) ** 2 * days / 30.0
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
        return ww, float(sel.mmd_exact), 1.3 * float(sel.mmd_exact)

    geometry = ChainGeometry(chain, rng=seed)

    est_s = estimate_qoi(
        scalar_vals,
        w,
        name="drawdown_spring",
        units="m",
        thresholds=(3.0, 4.0),
        cheap_on_points=cheap_pts_vec[:, 5],
        cheap_on_chain=cheap_chain_vec[:, 5],
        resolve_weights=resolve,
        points=pts,
        geometry=geometry,
        chain_ess=1600.0,
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
        points=pts,
        geometry=geometry,
        chain_ess=1600.0,
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
        n_chains=n_chains,
        n_draws=n_draws,
        burn_in=500,
        burn_in_rule="first half of the draws",
        acceptance=np.array([0.31, 0.29, 0.33, 0.30]),
        thresholds={"rhat": 1.01, "ess_bulk": 400.0},
        passed=True,
    )
    data = ReportData(
        study="spring-drawdown-demo",
        revision="r2",
        config_hash="9f2c" * 16,
        config_text="study:\n  name: spring-drawdown-demo\n  seed: 3\n  caution: Invented "
        "data; a prediction for a real spring needs the local water authority's review.\n",
        description="Drawdown at the spring after 30 days of pumping (invented data).",
        chain_names=names,
        chain_units=units,
        chain_diagnostics=diag,
        chain_samples=chain,
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
    # optional attributes the report reads when present (not fields of ReportData)
    data.chain_index = np.repeat(np.arange(n_chains), n_draws)  # type: ignore[attr-defined]
    data.draw_index = np.tile(np.arange(n_draws), n_chains)  # type: ignore[attr-defined]
    data.cheap_at_points = {  # type: ignore[attr-defined]
        "drawdown_spring": cheap_pts_vec[:, 5],
        "drawdown_history": cheap_pts_vec,
    }
    obs_t = np.geomspace(600.0, 5 * 86400.0, 14)
    truth = cooper_jacob(np.array([[-2.3, -4.0]]), obs_t)[0]
    sigma = np.full(obs_t.size, 0.02)
    rows = chain[:: chain.shape[0] // 400]
    data.observations = {  # type: ignore[attr-defined]
        "x": obs_t / 86400.0,
        "observed": truth + rng.normal(0.0, 0.02, obs_t.size),
        "sigma": sigma,
        "predictions": cooper_jacob(rows, obs_t),
        "x_label": "time since pumping started (d)",
        "y_label": "drawdown at the test well (m)",
    }
    return data


if __name__ == "__main__":
    out = Path(sys.argv[1] if len(sys.argv) > 1 else "report-sample")
    data = make_sample_data()
    print(build_report(data, out))
    for p in export_csv(data, out):
        print(p)
