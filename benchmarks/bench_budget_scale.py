"""`qhl budget` at scale: time and peak memory of BudgetModel(...).budget(t, eps) against cluster size.

Clusters are invented: protons on a jittered simple-cubic lattice (spacing 1.8 A, uniform jitter
+-0.3 A, seed fixed), one free-induction experiment of 128 points over 0.5 ms (the window that
`qhl cut` writes), offsets drawn from a normal distribution of 500 Hz width, 9.4 T. Each size runs
in a fresh process (peak resident memory from resource.getrusage is per process; tracemalloc
peak of Python allocations beside it). Prints one row per size, then the fitted exponent b of
time ~ n^b and memory ~ n^b over the sizes >= 24 (least squares on logs).

Goals (issue: budgets beyond classical reach): 50 spins < 30 s, 100 < 2 min, 200 < 10 min.
Usage:
    python benchmarks/bench_budget_scale.py [--sizes 16 24 32 50 100 200] [--precision 0.01]
"""

import argparse
import json
import os
import subprocess
import sys

import numpy as np

GOALS_S = {50: 30.0, 100: 120.0, 200: 600.0}


def lattice_cluster(n, seed=0):
    """An invented n-proton cluster on a jittered cubic lattice (qhl.spins.cluster.Cluster)."""
    from qhl.spins.cluster import Cluster, Experiment, Spin
    rng = np.random.default_rng(seed)
    side = int(np.ceil(n ** (1 / 3)))
    grid = np.array([(a, b, c) for a in range(side) for b in range(side) for c in range(side)], float)
    grid = grid[np.argsort(np.linalg.norm(grid - (side - 1) / 2, axis=1), kind="stable")][:n]
    pos = 1.8 * grid + rng.uniform(-0.3, 0.3, size=(n, 3))
    spins = tuple(Spin(f"H{i + 1}", "1H", position_angstrom=tuple(float(v) for v in p),
                       offset_hz=float(rng.normal(0, 500))) for i, p in enumerate(pos))
    return Cluster(field_tesla=9.4, observe="1H", spins=spins, name=f"lattice-H{n}",
                   experiments=(Experiment("fid", t_max_s=5e-4, points=128, noise=1e-3),))


def one(n, precision, limit_gib):
    """Run one budget in this process (address space capped at limit_gib); print a JSON line."""
    import resource
    import time
    import tracemalloc
    resource.setrlimit(resource.RLIMIT_AS, (int(limit_gib * 2**30), int(limit_gib * 2**30)))
    from qhl.costing import BudgetModel
    cluster = lattice_cluster(n)
    tracemalloc.start()
    t0 = time.perf_counter()
    bm = BudgetModel(cluster, progress=lambda m: print(f"  n={n}: {m}", file=sys.stderr, flush=True))
    b = bm.budget(bm.default_time_s, precision)
    sec = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024.0
    print(json.dumps({"n": n, "seconds": sec, "tracemalloc_peak": peak, "peak_rss": rss,
                      "exact": bm.tiers["exact"], "steps": b.fault_tolerant["trotter_steps"],
                      "t_count": b.fault_tolerant["t_count"], "shots": b.near_term["shots_per_gradient"],
                      "commutators": b.methods["fault_tolerant"]["commutator_sums"]}))


def fit_exponent(ns, ys):
    ns, ys = np.asarray(ns, float), np.asarray(ys, float)
    ok = (ns >= 24) & (ys > 0)
    if ok.sum() < 2:
        return float("nan")
    return float(np.polyfit(np.log(ns[ok]), np.log(ys[ok]), 1)[0])


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", type=int, nargs="+", default=[16, 24, 32, 50, 100, 200])
    ap.add_argument("--precision", type=float, default=0.01)
    ap.add_argument("--memory-limit-gib", type=float, default=4.0,
                    help="address-space cap of each run (a guard for shared machines; default 4)")
    ap.add_argument("--one", type=int, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.one:
        one(args.one, args.precision, args.memory_limit_gib)
        return
    rows = []
    env = dict(os.environ)
    print(f"{'spins':>6}{'seconds':>10}{'peak RSS MiB':>14}{'tracemalloc MiB':>17}{'exact tier':>12}"
          f"{'commutators':>16}{'FT steps':>12}{'T-count':>12}{'goal':>8}", flush=True)
    for n in args.sizes:
        out = subprocess.run([sys.executable, __file__, "--one", str(n), "--precision", str(args.precision),
                              "--memory-limit-gib", str(args.memory_limit_gib)],
                             capture_output=True, text=True, env=env)
        if out.returncode != 0:
            print(f"n = {n}: failed\n{out.stderr[-2000:]}", file=sys.stderr)
            continue
        r = json.loads(out.stdout.strip().splitlines()[-1])
        rows.append(r)
        goal = GOALS_S.get(r["n"])
        mark = "-" if goal is None else ("ok" if r["seconds"] < goal else "MISSED")
        print(f"{r['n']:>6}{r['seconds']:>10.2f}{r['peak_rss'] / 2**20:>14.0f}{r['tracemalloc_peak'] / 2**20:>17.0f}"
              f"{r['exact']:>12}{r['commutators']:>16}{r['steps']:>12.3g}{r['t_count']:>12.3g}{mark:>8}",
              flush=True)
    ns = [r["n"] for r in rows]
    print(f"fitted growth exponent (n >= 24): time ~ n^{fit_exponent(ns, [r['seconds'] for r in rows]):.2f}, "
          f"peak RSS ~ n^{fit_exponent(ns, [r['peak_rss'] for r in rows]):.2f}, "
          f"tracemalloc ~ n^{fit_exponent(ns, [r['tracemalloc_peak'] for r in rows]):.2f}")


if __name__ == "__main__":
    main()
