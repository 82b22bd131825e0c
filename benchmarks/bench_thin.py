"""Benchmark of the thin stage: quality (exact MMD) and speed, side by side in one run.

Run:  nice .venv/bin/python benchmarks/bench_thin.py [--quick]

Quality: for four targets (curved 2-D banana; 3-D mixture with mode weights 0.6/0.3/0.1;
20-D correlated Gaussian with coordinates in units from 1e-6 to 1e9; 4-D random-walk
Metropolis chain with repeated rows) and m in {10, 30, 100}, the exact-kernel MMD (Gaussian
kernel, median-heuristic bandwidth, standardised coordinates, all chain rows) of

* random subsets (mean over 10), stride, greedy, greedy+swap, genetic, each with uniform and
  with optimal simplex weights;
* a yardstick without random features: fully corrective greedy with the exact kernel over a
  random pool of 3000 distinct rows (kernel mean embedding exact over the whole chain), with
  its optimal weights; the mean over 5 independent pool draws (one draw alone moves it by
  about +-25 %, so a single pool is a noisy reference), each draw printed beside it.

Weighted points: with optimal weights, how many of the chosen points carry weight
(``w_i > 1e-6 / m``) before the replacement of points without weight (the first selection,
as ``replace_unweighted=False`` returns it) and after, with both exact MMDs, per target, m and
method.

Repeated rows: three random-walk Metropolis chains of 20,000 rows with about 25 % acceptance
(4-D banana-shaped density, step 1.45) thinned to 5, 10 and 30 points by greedy, swap and
genetic selection, against exact-kernel references on random pools of 3000 distinct rows:
plain kernel herding (equal weights) and the fully corrective greedy (optimal weights).
``--repeats-only`` runs this section alone.

Speed: N = 10^6 rows, d = 10, m = 100 (greedy, simplex weights, auto features) in a separate
process: wall time, peak resident memory (resource.getrusage), and the ratio to the floor,
one pass computing the features of every row with the chosen feature count (both with two
worker threads for the streaming pass).

BLAS runs single-threaded here (OPENBLAS_NUM_THREADS=1 unless set): on a machine shared by
several jobs, multi-threaded BLAS on small matrices spins and distorts every timing. Times on
a shared machine are noisy.

Synthetic targets are made up for this benchmark (demo data), seeded.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import json  # noqa: E402
import resource  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from winnow.tasks.thin import (  # noqa: E402
    ExactMMD,
    draw_feature_map,
    get_kernel,
    mean_embedding,
    median_heuristic,
    solve_simplex_qp,
    thin,
)


# ------------------------------------------------------------------------------- targets
def banana(n, rng):
    z = rng.standard_normal((n, 2))
    return np.c_[z[:, 0], z[:, 1] + 0.5 * z[:, 0] ** 2 - 0.5]


def mixture(n, rng):
    centres = np.array([[0.0, 0.0, 0.0], [4.0, 1.0, -2.0], [-3.0, 4.0, 2.0]])
    k = rng.choice(3, size=n, p=[0.6, 0.3, 0.1])
    return centres[k] + rng.standard_normal((n, 3)) * np.array([1.0, 0.7, 1.2])


def correlated20(n, rng):
    d = 20
    cov = 0.9 ** np.abs(np.subtract.outer(np.arange(d), np.arange(d)))  # AR(1), rho 0.9
    z = rng.standard_normal((n, d)) @ np.linalg.cholesky(cov).T
    units = 10.0 ** np.linspace(-6, 9, d)  # mixed units 1e-6 .. 1e9
    return z * units + units


def metropolis(n, rng, step=1.2):
    # random-walk Metropolis on a 4-D banana-shaped density; rejections repeat rows
    # (acceptance about 33 % at step 1.2, about 25 % at step 1.45)
    def logp(x):
        return -0.5 * (x[0] ** 2 + (x[1] + 0.5 * x[0] ** 2 - 0.5) ** 2 + x[2] ** 2 / 4 + x[3] ** 2)

    x = np.zeros(4)
    lp = logp(x)
    out = np.empty((n, 4))
    steps = rng.standard_normal((n, 4)) * step
    u = np.log(rng.random(n))
    for i in range(n):
        prop = x + steps[i]
        lq = logp(prop)
        if u[i] < lq - lp:
            x, lp = prop, lq
        out[i] = x
    return out


TARGETS = {
    "banana 2-D": banana,
    "mixture 3-D (0.6/0.3/0.1)": mixture,
    "correlated 20-D, mixed units": correlated20,
    "Metropolis 4-D (repeats)": metropolis,
}


# ----------------------------------------------------------------------------- yardstick
YARD_POOLS = 5
YARD = f"yardstick (exact greedy, pool 3000, mean of {YARD_POOLS})"


def exact_greedy(z_pool, a_pool, m, kern, bw):
    """Fully corrective greedy with the exact kernel on a pool (no random features)."""
    k_pp = kern.gram(z_pool, z_pool, bw)
    q = np.diag(k_pp).copy()
    chosen = [int(np.argmax(a_pool - q / 2))]
    w = np.ones(1)
    avail = np.ones(len(z_pool), bool)
    avail[chosen] = False
    for _ in range(m - 1):
        ks = k_pp[:, chosen]
        c = ks @ w
        ss = float(w @ k_pp[np.ix_(chosen, chosen)] @ w)
        rs = float(w @ a_pool[chosen]) - ss
        num = a_pool - c - rs
        den = np.maximum(q - 2 * c + ss, 1e-300)
        gam = np.clip(num / den, 0, 1)
        score = np.where(avail, 2 * gam * num - gam**2 * den, -np.inf)
        j = int(np.argmax(score))
        chosen.append(j)
        avail[j] = False
        w = solve_simplex_qp(k_pp[np.ix_(chosen, chosen)], a_pool[chosen])
    return np.array(chosen), w


def exact_herding(k_pp, a_pool, m):
    """Kernel herding without repeats with the exact kernel on a pool, equal weights (Chen,
    Welling & Smola 2010; Riabiz et al. 2022, Algorithm 1): the plain greedy reference."""
    q = np.diag(k_pp)
    c = np.zeros(len(a_pool))
    avail = np.ones(len(a_pool), bool)
    chosen = []
    for t in range(m):
        cost = np.where(avail, 2 * c - 2 * (t + 1) * a_pool + q, np.inf)
        j = int(np.argmin(cost))
        chosen.append(j)
        avail[j] = False
        c += k_pp[:, j]
    return np.array(chosen), np.full(m, 1.0 / m)


def exact_pools(uniq, counts, kern, bw, rng, n_pools, size=3000):
    """Random pools of distinct rows (drawn in proportion to multiplicity, like thin()'s own
    pool) with their exact kernel mean embedding over the whole chain."""
    pools = []
    for _ in range(n_pools):
        keys = np.log(rng.random(len(uniq))) / counts
        pool = np.argsort(-keys)[: min(size, len(uniq))]
        a_pool = np.zeros(len(pool))
        for s in range(0, len(uniq), 2000):
            a_pool += (counts[s : s + 2000] / counts.sum()) @ kern.gram(
                uniq[s : s + 2000], uniq[pool], bw
            )
        pools.append((pool, a_pool))
    return pools


# ------------------------------------------------------------------------- repeated rows
REPEAT_MS = (5, 10, 30)


def repeats(quick: bool) -> dict:
    """Random-walk Metropolis chains with about 25 % acceptance (each value repeated about
    four times on average) thinned to 5, 10 and 30 points, against exact-kernel greedy
    references on random pools of 3000 distinct rows (mean of 5 pools per chain): plain
    kernel herding with equal weights, and the fully corrective greedy with optimal weights
    (the yardstick of the quality table). Mean over independent chains."""
    n = 5000 if quick else 20000
    n_chains = 1 if quick else 3
    gen_opts = {"population": 12, "generations": 10} if quick else {}
    kern = get_kernel("gaussian")
    acc: dict[int, dict[str, list]] = {m: {} for m in REPEAT_MS}
    print(f"\n== repeated rows: random-walk Metropolis 4-D, step 1.45, N={n}, "
          f"{n_chains} chain(s)", flush=True)  # fmt: skip
    for c in range(n_chains):
        rng = np.random.default_rng(500 + c)
        x = metropolis(n, rng, step=1.45)
        accept = float(np.mean(np.any(np.diff(x, axis=0) != 0, axis=1)))
        mean, sd = x.mean(0), x.std(0)
        z = (x - mean) / sd
        uniq, counts = np.unique(z, axis=0, return_counts=True)
        bw, _ = median_heuristic(z, rng=rng)
        exact = ExactMMD(uniq, counts.astype(float), kern, bw, precision="double")
        pools = exact_pools(uniq, counts, kern, bw, rng, YARD_POOLS)
        grams = [kern.gram(uniq[p], uniq[p], bw) for p, _ in pools]
        print(f"   chain {c}: acceptance {accept:.3f}, distinct {len(uniq)} "
              f"(mean multiplicity {n / len(uniq):.2f}), bandwidth {bw:.3g}", flush=True)  # fmt: skip
        for m in REPEAT_MS:
            row = acc[m]
            herd, corr = [], []
            for (pool, a_pool), k_pp in zip(pools, grams, strict=True):
                ids, w = exact_herding(k_pp, a_pool, m)
                herd.append(exact(uniq[pool][ids], w))
                ids, w = exact_greedy(uniq[pool], a_pool, m, kern, bw)
                corr.append(exact(uniq[pool][ids], w))
            row.setdefault("herding", []).append(float(np.mean(herd)))
            row.setdefault("corrective", []).append(float(np.mean(corr)))
            for meth in ("greedy", "swap", "genetic"):
                opts = gen_opts if meth == "genetic" else {}
                sel = thin(x, m, method=meth, rng=1, bandwidth=bw, exact_max_rows=n, **opts)
                row.setdefault(meth, []).append(exact((sel.points - mean) / sd, sel.weights))
                if meth == "greedy":
                    # the rule of the first selection (replacements use the corrective one)
                    first = sel.report.get("weighted_points", {}).get("first", {})
                    row.setdefault("rule", []).append(first.get("greedy_rule") or "corrective")
    print(f"   {'m':>3s} {'greedy':>10s} {'swap':>10s} {'genetic':>10s} {'herding ref':>12s} "
          f"{'corrective':>11s} {'greedy/herding':>15s} {'greedy/corr.':>13s}  rule kept")  # fmt: skip
    for m, row in acc.items():
        g, h, k = (float(np.mean(row[key])) for key in ("greedy", "herding", "corrective"))
        per = "/".join(f"{a / b:.2f}" for a, b in zip(row["greedy"], row["herding"], strict=True))
        print(f"   {m:3d} {g:10.3e} {np.mean(row['swap']):10.3e} {np.mean(row['genetic']):10.3e} "
              f"{h:12.3e} {k:11.3e} {g / h:15.2f} {g / k:13.2f}  {','.join(row['rule'])} "
              f"(per chain greedy/herding {per})")  # fmt: skip
    sys.stdout.flush()
    return {m: {k: v for k, v in row.items()} for m, row in acc.items()}


# --------------------------------------------------------------------------------- quality
def quality(quick: bool) -> dict:
    n = 5000 if quick else 20000
    ms = (10, 30) if quick else (10, 30, 100)
    n_random = 3 if quick else 10
    gen_opts = {"population": 12, "generations": 10} if quick else {}
    kern = get_kernel("gaussian")
    results = {}
    weighted: dict[tuple, dict] = {}
    for ti, (name, make) in enumerate(TARGETS.items()):
        rng = np.random.default_rng(100 + ti)
        x = make(n, rng)
        mean, sd = x.mean(0), x.std(0)
        z = (x - mean) / sd
        uniq, first, counts = np.unique(z, axis=0, return_index=True, return_counts=True)
        bw, _ = median_heuristic(z, rng=rng)
        t0 = time.perf_counter()
        exact = ExactMMD(uniq, counts.astype(float), kern, bw, precision="double")
        _ = exact.self_term
        t_self = time.perf_counter() - t0
        # yardstick pools: 3000 distinct rows drawn in proportion to multiplicity (5 draws:
        # the pool draw alone moves the yardstick by about +-25 %), exact embedding
        pools = exact_pools(uniq, counts, kern, bw, rng, YARD_POOLS)
        print(f"\n== {name}: N={n}, d={x.shape[1]}, distinct={len(uniq)}, "
              f"bandwidth={bw:.3g} (self term {t_self:.1f} s)", flush=True)  # fmt: skip
        common = {"bandwidth": bw, "exact_max_rows": 0}
        rows = {}
        for m in ms:
            res: dict[str, dict[str, float]] = {}
            info: dict[str, object] = {}
            t0 = time.perf_counter()
            g = thin(x, m, method="greedy", rng=1, **common)
            n_feat = g.n_features
            info["auto_features"] = n_feat
            info["auto_history"] = [
                (h["n_features"], round(h["gap"], 3)) for h in g.report["auto_features_history"]
            ]
            times = {"greedy": time.perf_counter() - t0}
            fixed = {**common, "n_features": n_feat}
            for rule in ("uniform", "simplex"):
                vals = []
                for r in range(n_random):
                    s = thin(x, m, method="random", weights=rule, rng=1000 + r, n_candidates=m,
                             **fixed)  # fmt: skip
                    vals.append(exact((s.points - mean) / sd, s.weights))
                res.setdefault("random (mean)", {})[rule] = float(np.mean(vals))
                s = thin(x, m, method="stride", weights=rule, rng=1, n_candidates=m, **fixed)
                res.setdefault("stride", {})[rule] = exact((s.points - mean) / sd, s.weights)
                for meth in ("greedy", "swap", "genetic"):
                    t0 = time.perf_counter()
                    opts = gen_opts if meth == "genetic" else {}
                    # simplex weights: thin() judges replacements of unweighted points by
                    # its exact MMD too, as by default, so it runs over all rows here
                    ex = {"exact_max_rows": n if rule == "simplex" else 0}
                    s = thin(x, m, method=meth, weights=rule, rng=1, **{**fixed, **ex}, **opts)
                    times[f"{meth}/{rule}"] = time.perf_counter() - t0
                    res.setdefault(meth, {})[rule] = exact((s.points - mean) / sd, s.weights)
                    if rule == "simplex":
                        wp = s.report["weighted_points"]
                        first = wp["first"]
                        z_first = (x[first["indices"]] - mean) / sd
                        before = exact(z_first, np.array(first["weights"]))
                        weighted[(name, m, meth)] = {
                            "before_weighted": first["n_weighted"], "before_mmd": before,
                            "after_weighted": wp["n_weighted"], "after_m": s.m,
                            "after_mmd": res[meth][rule], "replaced": wp["replaced"],
                            "rounds": len(wp["rounds"]), "reason": wp["reason"],
                        }  # fmt: skip
                        if meth == "greedy":  # the setting that turns replacement off
                            off = thin(x, m, method=meth, rng=1, replace_unweighted=False,
                                       **{**fixed, **ex})  # fmt: skip
                            assert off.indices.tolist() == first["indices"]
                    if meth in ("swap", "genetic"):
                        sel = s.report["selector"]
                        info[f"{meth}/{rule} start->end (features)"] = (
                            sel["start_mmd"], s.mmd_features,
                        )  # fmt: skip
                    if meth == "genetic":
                        pm = np.array([v for _, v in s.population])
                        sets = {tuple(sorted(i.tolist())) for i, _ in s.population}
                        info[f"genetic/{rule} population"] = {
                            "size": len(pm),
                            "distinct": len(sets) == len(pm),
                            "spread_top5": float(pm[: min(5, len(pm))].max() / pm[0] - 1),
                        }
            yard = []
            for pool, a_pool in pools:
                ids, w = exact_greedy(uniq[pool], a_pool, m, kern, bw)
                yard.append(exact(uniq[pool][ids], w))
            res[YARD] = {"simplex": float(np.mean(yard))}
            info["yardstick per pool"] = [float(v) for v in yard]
            rows[m] = {"mmd": res, "info": info, "times": times}
            print(f"-- m = {m} (auto features D = {n_feat}; history {info['auto_history']})")
            print(f"   {'method':46s} {'uniform':>11s} {'optimal':>11s}")
            for meth, v in res.items():
                u = f"{v['uniform']:.3e}" if "uniform" in v else "-"
                print(f"   {meth:46s} {u:>11s} {v['simplex']:.3e}")
            print("   times (s): " + ", ".join(f"{k} {v:.1f}" for k, v in times.items()))
            for k, v in info.items():
                if k.startswith(("swap", "genetic", "yardstick")):
                    print(f"   {k}: {v}")
            sys.stdout.flush()
        results[name] = {"d": x.shape[1], "rows": rows}
    print("\n== weighted points (simplex weights): chosen points with w_i > 1e-6/m, before "
          "replacement (replace_unweighted=False) and after; exact MMD")  # fmt: skip
    print(f"   {'target':30s} {'m':>4s} {'method':8s} {'before: weighted':>17s} {'MMD':>10s} "
          f"{'after: weighted = returned':>27s} {'MMD':>10s} {'replaced':>9s} {'saved':>6s}"
          "  why")  # fmt: skip
    for (name, m, meth), v in weighted.items():
        print(f"   {name[:30]:30s} {m:4d} {meth:8s} {v['before_weighted']:>11d} / {m:<3d} "
              f"{v['before_mmd']:10.3e} {v['after_weighted']:>21d} / {m:<3d} {v['after_mmd']:10.3e} "
              f"{v['replaced']:9d} {m - v['after_m']:6d}  {v['reason']}")  # fmt: skip
    results["_weighted"] = {f"{k[0]}|{k[1]}|{k[2]}": v for k, v in weighted.items()}
    return results


# ------------------------------------------------------------------------------------ speed
def speed_child(n: int) -> None:
    rng = np.random.default_rng(7)
    d = 10
    cov = 0.5 ** np.abs(np.subtract.outer(np.arange(d), np.arange(d)))
    x = rng.standard_normal((n, d)) @ np.linalg.cholesky(cov).T
    x[:, 0] = np.abs(x[:, 0]) ** 1.5  # a skewed margin
    t0 = time.perf_counter()
    sel = thin(x, 100, rng=3, exact_max_rows=10_000)
    wall = time.perf_counter() - t0
    # the floor: one pass computing the features of every row at the chosen feature count
    fmap = draw_feature_map(
        get_kernel("gaussian"), d, sel.n_features, "orf", sel.bandwidth,
        x.mean(0), x.std(0), rng,
    )  # fmt: skip
    # with the same two worker threads as thin() uses by default
    t0 = time.perf_counter()
    chunk = int(max(256, 2**22 // fmap.width))
    mean_embedding(fmap, x, None, np.ones(n), chunk_size=chunk, workers=2)
    floor = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # kB -> MB (Linux)
    print(json.dumps({
        "n": n, "d": d, "m": 100, "wall_s": wall, "floor_s": floor, "peak_mb": peak,
        "n_features": sel.n_features, "timings": sel.report["timings"],
        "mmd_features": sel.mmd_features, "mmd_exact": sel.mmd_exact,
        "mmd_exact_rows": sel.mmd_exact_rows,
    }))  # fmt: skip


def speed(quick: bool) -> dict:
    n = 200_000 if quick else 1_000_000
    out = subprocess.run(
        [sys.executable, __file__, "--speed-child", str(n)],
        capture_output=True, text=True, check=True,
    )  # fmt: skip
    return json.loads(out.stdout.strip().splitlines()[-1])


# ------------------------------------------------------------------------------------- main
def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small chains, m in {10, 30}")
    ap.add_argument("--speed-child", type=int, default=0, help=argparse.SUPPRESS)
    ap.add_argument("--skip-quality", action="store_true")
    ap.add_argument("--repeats-only", action="store_true",
                    help="only the repeated-rows chains (budgets 5, 10, 30)")  # fmt: skip
    args = ap.parse_args()
    if args.speed_child:
        speed_child(args.speed_child)
        return
    t_all = time.perf_counter()
    print(f"bench_thin ({'quick' if args.quick else 'full'}); BLAS threads "
          f"{os.environ.get('OPENBLAS_NUM_THREADS')}; shared machine: times are noisy")  # fmt: skip
    repeats(args.quick)
    if args.repeats_only:
        print(f"\ntotal benchmark time {time.perf_counter() - t_all:.0f} s")
        return
    q = {} if args.skip_quality else quality(args.quick)
    sp = speed(args.quick)
    print("\n== speed")
    print(f"   N={sp['n']}, d={sp['d']}, m=100, D={sp['n_features']}: wall {sp['wall_s']:.1f} s, "
          f"peak RSS {sp['peak_mb']:.0f} MB, floor (one feature pass) {sp['floor_s']:.1f} s, "
          f"ratio {sp['wall_s'] / sp['floor_s']:.2f}")  # fmt: skip
    print("   steps (s): " + ", ".join(f"{k} {v:.1f}" for k, v in sp["timings"].items()))
    print(f"   MMD features {sp['mmd_features']:.3e}, exact {sp['mmd_exact']:.3e} "
          f"on {sp['mmd_exact_rows']} rows")  # fmt: skip

    print("\n== targets")
    m_top = 30 if args.quick else 100
    for name, r in q.items():
        if name.startswith("_"):
            continue
        row = r["rows"][m_top]
        mmd = row["mmd"]
        ratio = mmd["greedy"]["simplex"] / mmd["random (mean)"]["uniform"]
        bound = 1 / 8 if r["d"] <= 6 else 1 / 4
        best = min(v["simplex"] for k, v in mmd.items() if not k.startswith(("yard", "random")))
        yard = mmd[YARD]["simplex"]
        print(f"   {name} (m={m_top}): greedy+optimal / random = {ratio:.3f} "
              f"(target <= {bound:.3f}: {'met' if ratio <= bound else 'NOT met'}); "
              f"best / yardstick = {best / yard:.2f} "
              f"(target <= 1.15: {'met' if best <= 1.15 * yard else 'NOT met'})")  # fmt: skip
        for rule in ("uniform", "simplex"):
            g = mmd["greedy"][rule]
            for meth in ("swap", "genetic"):
                start, end = row["info"][f"{meth}/{rule} start->end (features)"]
                print(f"      {meth}/{rule}: features MMD {start:.3e} -> {end:.3e} "
                      f"({'not worse' if end <= start * (1 + 1e-9) else 'WORSE'} than its greedy "
                      f"start); exact {mmd[meth][rule]:.3e} vs greedy {g:.3e}")  # fmt: skip
            pop = row["info"][f"genetic/{rule} population"]
            print(f"      genetic/{rule} population: {pop['size']} members, distinct "
                  f"{pop['distinct']}, top-5 spread {100 * pop['spread_top5']:.1f} % "
                  f"(target <= 5 %: {'met' if pop['spread_top5'] <= 0.05 else 'NOT met'})")  # fmt: skip
    ok_t = sp["wall_s"] < 20
    ok_m = sp["peak_mb"] < 2048
    ok_r = sp["wall_s"] <= 3 * sp["floor_s"]
    print(f"   speed: wall < 20 s {'met' if ok_t else 'NOT met'}; peak < 2 GB "
          f"{'met' if ok_m else 'NOT met'}; <= 3x floor {'met' if ok_r else 'NOT met'}")  # fmt: skip
    print(f"\ntotal benchmark time {time.perf_counter() - t_all:.0f} s")


if __name__ == "__main__":
    main()
