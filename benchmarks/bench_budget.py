"""Budget sweep benchmark: a 40 x 40 (t, eps) sweep of the demo cluster's budget.

Prints, side by side in one run (medians of repeats):
    sweep     BudgetModel.sweep on the full grid: one exact-engine gradient call per experiment
              covers every time (one eigendecomposition per experiment, cached), eps enters
              vectorised;
    pointwise the same near-term quantities one time at a time with the engine's spectrum cache
              cleared before each (a fresh eigendecomposition per time), and the fault-tolerant
              counts one grid point at a time.
Goal: the sweep in a few seconds (the issue's performance target). Usage:
    python benchmarks/bench_budget.py [--repeats N] [--size N]
"""

import argparse
import time

import numpy as np

from qhl import demo_cluster
from qhl.costing import BudgetModel, BudgetSettings
from qhl.costing.fault_tolerant import choose_order
from qhl.costing.shots import gradient_shot_range
from timing import median_time


def pointwise(bm, times, precisions):
    nt = bm.near
    x, n = nt.worst_range_index()
    for t in times:
        bm.engine._cache.clear()
        nt.component_variances([t])
        bm.engine._cache.clear()
        nt.gradient_strata([t])
        r = gradient_shot_range(t, nt.l1[n], nt.scales[x, n], nt.kappa, bm.settings.unit_hz)
        for e in precisions:
            choose_order(bm._ft(r, t, e, x, bm._n_terms[n]))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--size", type=int, default=40)
    args = ap.parse_args()
    t0 = time.perf_counter()
    bm = BudgetModel(demo_cluster(), settings=BudgetSettings(empirical_trotter=False))
    prep = time.perf_counter() - t0
    times = np.geomspace(1e-5, 1e-3, args.size)
    precs = np.geomspace(1e-4, 1e-1, args.size)
    bm.sweep(times[:2], precs[:2])            # warm the lazy per-step gate counts
    ts = median_time(lambda: bm.sweep(times, precs), args.repeats)
    tp = median_time(lambda: pointwise(bm, times, precs), max(1, args.repeats // 2))
    sw = bm.sweep(times, precs)
    print(f"demo cluster: {bm.model.n_spins} spins, {len(bm.model.free)} free parameters, "
          f"{len(bm.experiments)} experiments; preparation (engine, commutator sums) {prep:.2f} s")
    print(f"{'grid':<10}{'sweep (s)':>12}{'pointwise (s)':>15}{'ratio':>8}")
    print(f"{args.size}x{args.size:<7}{ts:>12.3f}{tp:>15.3f}{tp / ts:>8.1f}")
    print(f"goal: the {args.size}x{args.size} sweep in a few seconds: {'met' if ts < 5 else 'NOT met'} ({ts:.2f} s)")
    print(f"{'fitted exponent':<34}{'t':>7}{'expected':>10}{'eps':>7}{'expected':>10}")
    for name, (bt, be, et, ee) in sw.exponents.items():
        print(f"{name:<34}{bt:>7.2f}{et:>10.2f}{be:>7.2f}{ee:>10.2f}")


if __name__ == "__main__":
    main()
