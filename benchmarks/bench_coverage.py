"""Coverage of winnow's stated intervals on targets with a known truth.

For each target (``_coverage_cases.py``: a correlated 2-D Gaussian, a banana, an unequal
3-mode mixture and a correlated 6-D Gaussian; 4 autocorrelated chains of 2,500 rows each),
seed, budget (10, 30, 100) and discrepancy between the costly and the cheap model (smooth,
sharp, poorly correlated), the chain is thinned with winnow's default method and weights,
the "costly" values are computed at the chosen points, and ``estimate_qoi`` is called as the
collect stage calls it (cheap model on every row and at the points, chain coordinates, the
weights re-solved against the chain for surviving points). Failed runs are simulated at
budget 30: 20 % missing at random, and the 20 % of points with the largest values missing
(not at random).

Printed per cell, side by side:

* ``bias``, ``rmse``: of the headline estimate against the true posterior expectation;
  ``rmse_plain``: of the plain weighted mean; ``ratio``: rmse / rmse_plain; ``ratio_c``: the
  same ratio for the error against the chain's own mean (the part thinning controls; the
  chain's Monte Carlo error, common to both, is left out);
* ``cov_post``: coverage of the stated 95 % interval for the posterior expectation, among
  the seeds where the method did not flag itself; ``cov_chain``: the same for the stated
  95 % interval of the chain mean (the part thinning controls) against the chain's exact
  mean; ``flag``: share of seeds the method flagged as unreliable;
* ``width``: mean stated half-width / t over the empirical error sd (1 = exact; > 1 wide);
* ``cov_q``, ``cov_p``: coverage of the stated quantile intervals (5, 50, 95 %) and of the
  exceedance-probability interval (threshold: the true 90 % quantile), unflagged seeds.

Run: ``python benchmarks/bench_coverage.py`` (100 seeds per cell, both cores; about an hour
on the 2-core machine) or ``--quick`` (20 seeds, a few minutes). Thinning uses a fixed
1,024 random features instead of the automatic count, to keep the run affordable; the
selection quality is within a few per cent of the automatic count's at these sizes.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np

sys.path.insert(0, os.path.dirname(__file__))

from _coverage_cases import DISCREPANCIES, TARGETS, cheap, costly, truth  # noqa: E402

BUDGETS = (10, 30, 100)


def _ess_params(x: np.ndarray, ci: np.ndarray) -> float:
    """Smallest split-chain ESS of the parameters (the sample stage gives the rank-normalised
    bulk ESS of each parameter; for these chains the two are close)."""
    from winnow.tasks.collect import chain_ess

    return float(np.min(chain_ess(x, ci)))


QS = (0.05, 0.5, 0.95)
LEVEL = 0.95


def _true_quantiles(target, f, grid: int = 1201) -> tuple[np.ndarray, float]:
    """True quantiles QS and the 90 % quantile of f under the target (grid quadrature)."""
    t = np.linspace(-9.0, 9.0, grid)
    h = t[1] - t[0]
    z1, z2 = np.meshgrid(t, t, indexing="ij")
    z = np.column_stack([z1.ravel(), z2.ravel()])
    dens = np.exp(-0.5 * (z * z).sum(1)) / (2 * np.pi) * h * h
    vals, wts = [], []
    for w, fwd in target.latent:
        vals.append(f(fwd(z)))
        wts.append(w * dens)
    v = np.concatenate(vals)
    wt = np.concatenate(wts)
    o = np.argsort(v)
    cdf = np.cumsum(wt[o]) / wt.sum()
    qv = np.interp(QS, cdf, v[o])
    q90 = float(np.interp(0.9, cdf, v[o]))
    return qv, q90


def _one(args: tuple[str, int]) -> list[dict]:
    from scipy import stats

    from winnow.tasks.collect import ChainGeometry, estimate_qoi
    from winnow.tasks.thin import reweight, thin

    tname, seed = args
    T = TARGETS[tname]()
    g = np.random.default_rng(10_000 + seed)
    x = T.draw(g, 4, 2500)
    ci = np.repeat(np.arange(4), 2500)
    u = T.project(x)
    c_chain = cheap(u)
    geo = ChainGeometry(x, rng=seed)
    rows = []
    for m in BUDGETS:
        sel = thin(x, m, n_features=1024, rng=seed)
        idx = sel.indices
        for kind in DISCREPANCIES:
            f = costly(kind)
            tv, tqs, tp = TRUTH[(tname, kind)]
            q90 = TRUTH[(tname, kind, "q90")]
            y = f(u[idx])
            fchain = float(f(u).mean())
            scen = ["none"] + (["mar", "mnar"] if m == 30 else [])
            for sc in scen:
                keep = np.ones(idx.size, dtype=bool)
                if sc == "mar":
                    keep = np.random.default_rng(seed + 7).random(idx.size) >= 0.2
                elif sc == "mnar":
                    keep = y < np.quantile(y, 0.8)
                vals = np.where(keep, y, np.nan)

                def resolve(pos, sel=sel):
                    new = reweight(x, sel, np.asarray(pos), by="position")
                    return new.weights, float(sel.mmd_exact), float(new.mmd_exact)

                full = sc == "none"
                est = estimate_qoi(
                    vals,
                    sel.weights,
                    name="q",
                    quantiles=QS if full else (),
                    thresholds=(q90,) if full else (),
                    cheap_on_points=c_chain[idx],
                    cheap_on_chain=c_chain,
                    chain_index=ci,
                    chain_ess=_ess_params(x, ci),
                    resolve_weights=resolve,
                    points=x[idx],
                    geometry=geo,
                    forecast=False,
                    rng=seed,
                )
                h = est.headline
                comp = h["components"][0]
                tq_ = float(stats.t.ppf(0.5 + LEVEL / 2, max(comp["dof"], 1)))
                row = {
                    "target": tname,
                    "kind": kind,
                    "m": m,
                    "scen": sc,
                    "err": float(h["estimate"]) - tv,
                    "err_plain": float(est.mean) - tv,
                    "err_plain_chain": float(est.mean) - fchain,
                    "err_chain": float(h["estimate"]) - fchain,
                    "half": (float(h["interval_high"]) - float(h["interval_low"])) / 2 / tq_,
                    "cov_post": bool(h["interval_low"] <= tv <= h["interval_high"]),
                    "cov_chain": bool(h["chain_mean_low"] <= fchain <= h["chain_mean_high"]),
                    "flag": not h["reliable"],
                    "rule": h["rule"],
                }
                if full:
                    qi = comp["quantile_intervals"]
                    row["cov_q"] = [
                        bool(qi[q][0] <= tvq <= qi[q][1]) for q, tvq in zip(QS, tqs, strict=True)
                    ]
                    lo, hi = comp["exceedance_intervals"][q90]
                    row["cov_p"] = bool(lo <= tp <= hi)
                rows.append(row)
    return rows


TRUTH: dict = {}


def _init_worker() -> None:
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    _init_truth_full()


def _init_truth_full() -> None:
    for tname, mk in TARGETS.items():
        T = mk()
        for kind in DISCREPANCIES:
            f = costly(kind)
            qv, q90 = _true_quantiles(T, f)
            # truth of the exceedance: P(f > q90) = 0.1 by construction of q90
            TRUTH[(tname, kind)] = (truth(T, f), tuple(float(v) for v in qv), 0.1)
            TRUTH[(tname, kind, "q90")] = q90


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=100)
    ap.add_argument("--quick", action="store_true", help="20 seeds")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--targets", nargs="*", default=list(TARGETS))
    a = ap.parse_args()
    seeds = 20 if a.quick else a.seeds
    t0 = time.time()
    work = [(t, s) for t in a.targets for s in range(seeds)]
    rows: list[dict] = []
    with ProcessPoolExecutor(a.jobs, initializer=_init_worker) as ex:
        for r in ex.map(_one, work, chunksize=1):
            rows.extend(r)
    print(f"# coverage benchmark: {seeds} seeds per cell, {time.time() - t0:.0f} s")
    print(
        f"{'target':10s} {'discrep.':8s} {'m':>4s} {'failed':6s} {'bias':>9s} {'rmse':>9s} "
        f"{'rmse_pl':>9s} {'ratio':>5s} {'ratio_c':>7s} {'cov_post':>8s} {'cov_chain':>9s} {'flag':>5s} "
        f"{'width':>6s} {'cov_q05/50/95':>14s} {'cov_p':>5s}  rules"
    )
    keys = sorted(
        {(r["target"], r["kind"], r["m"], r["scen"]) for r in rows},
        key=lambda k: (list(TARGETS).index(k[0]), k[1], k[2], k[3]),
    )
    for k in keys:
        rs = [r for r in rows if (r["target"], r["kind"], r["m"], r["scen"]) == k]
        err = np.array([r["err"] for r in rs])
        errp = np.array([r["err_plain"] for r in rs])
        fl = np.array([r["flag"] for r in rs])
        un = [r for r in rs if not r["flag"]]
        cp = np.mean([r["cov_post"] for r in un]) if un else np.nan
        cc = np.mean([r["cov_chain"] for r in un]) if un else np.nan
        half = np.array([r["half"] for r in rs])
        width = np.nanmean(half) / np.sqrt(np.mean(err**2))
        if "cov_q" in rs[0] and un:
            cq = np.mean([r["cov_q"] for r in un], axis=0)
            cqs = "/".join(f"{v:.2f}" for v in cq)
            cpp = f"{np.mean([r['cov_p'] for r in un]):.2f}"
        else:
            cqs, cpp = "-", "-"
        rules = {}
        for r in rs:
            rules[r["rule"]] = rules.get(r["rule"], 0) + 1
        rs_ = ",".join(f"{kk[:4]}:{v}" for kk, v in sorted(rules.items()))
        rmse, rmsep = np.sqrt(np.mean(err**2)), np.sqrt(np.mean(errp**2))
        ec = np.array([r["err_chain"] for r in rs])
        ecp = np.array([r["err_plain_chain"] for r in rs])
        ratio_c = np.sqrt(np.mean(ec**2)) / np.sqrt(np.mean(ecp**2))
        print(
            f"{k[0]:10s} {k[1]:8s} {k[2]:4d} {k[3]:6s} {err.mean():+9.2e} {rmse:9.2e} "
            f"{rmsep:9.2e} {rmse / rmsep:5.2f} {ratio_c:7.2f} {cp:8.2f} {cc:9.2f} {fl.mean():5.2f} "
            f"{width:6.2f} {cqs:>14s} {cpp:>5s}  {rs_}"
        )


if __name__ == "__main__":
    main()
