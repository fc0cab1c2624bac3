"""Pure-state (typical) engine benchmark: signal time and peak memory against n, the classical-cost
meter's prediction beside each measurement, the extrapolation to 24 spins, and the ratio against
the exact engine at 12 spins. All numbers measured in one run.

Clusters: the n protons nearest the centre of qhl's invented demo structure, invented shifts over
8 ppm at 9.4 T, every pair dipolar-coupled. Signal: 64 points up to 2e-4 s, 2 replicas (the
fewest that give an error bar). Usage:
    python benchmarks/bench_typical.py [--sizes 16 18 20] [--replicas 2]

Sizes whose predicted time exceeds --max-seconds are not run: their line gives the meter's
prediction scaled by the measured/predicted ratio (of CPU time) of the largest size that was run.
Both wall time and process CPU time are printed: on a shared machine the wall time includes
waiting for the cores; BLAS runs on one thread here, so the CPU time is what an idle core needs.
"""

import argparse
import resource
import time

import numpy as np

from qhl import ExactEngine, Experiment, build_model
from qhl.costing.classical_cost import calibrate, classical_cost
from qhl.exact.typicality import TypicalEngine
from qhl.survey.structure import cut_clusters, demo_structure_path, invented_offsets_hz, read_structure

EXP = Experiment("fid", 2e-4, 64, 1.0, 1e-3)


def cluster(n):
    nuc = read_structure(demo_structure_path(), ("1H",))
    off = invented_offsets_hz(nuc, 8.0, 9.4, 0)
    return cut_clusters(nuc, n, 1, field_tesla=9.4, experiments=(EXP,), offsets_hz=off)[0]


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", type=int, nargs="+", default=[12, 14, 16, 18, 20])
    ap.add_argument("--extrapolate", type=int, nargs="+", default=[22, 24])
    ap.add_argument("--replicas", type=int, default=2)
    ap.add_argument("--max-seconds", type=float, default=600.0)
    args = ap.parse_args()
    cal = calibrate()
    print(f"calibration: c_term {cal.c_term:.3g} s/(nnz col), c_build {cal.c_build:.3g} s/nnz, "
          f"c_eigh {cal.c_eigh:.3g} s/d^3")
    print(f"{'n':>3} {'predicted (s)':>14} {'wall (s)':>10} {'CPU (s)':>10} {'CPU/pred':>9} "
          f"{'peak RSS (GiB)':>15} {'max stderr':>11}")
    ratio = None
    rows = []
    for n in args.sizes + args.extrapolate:
        c = cluster(n)
        pred = next(r for r in classical_cost(c, replicas=args.replicas, cal=cal).routes
                    if r["method"] == "pure-state")
        if n in args.extrapolate or pred["seconds"] > args.max_seconds:
            scaled = pred["seconds"] * (ratio or 1.0)
            print(f"{n:>3} {pred['seconds']:>14.4g} {'(not run)':>10} {'':>10} {'':>9} "
                  f"{pred['memory_bytes'] / 2**30:>15.3g}   extrapolated: {scaled:.4g} s "
                  f"= {scaled / 60:.3g} min (meter x measured/predicted at n = {rows[-1][0] if rows else '-'})")
            continue
        eng = TypicalEngine(build_model(c), replicas=args.replicas)
        t0, c0 = time.perf_counter(), time.process_time()
        est = eng.estimate(EXP)
        dt, cpu = time.perf_counter() - t0, time.process_time() - c0
        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 2**30
        ratio = cpu / pred["seconds"]
        rows.append((n, cpu))
        print(f"{n:>3} {pred['seconds']:>14.4g} {dt:>10.4g} {cpu:>10.4g} {ratio:>9.2f} {rss:>15.3g} "
              f"{max(est.signal_stderr_real.max(), est.signal_stderr_imag.max()):>11.2e}", flush=True)
    if len(rows) >= 2:
        ns, ts = np.array(rows, float).T
        slope = np.polyfit(ns[-3:], np.log2(ts[-3:]), 1)[0]
        print(f"measured growth: CPU time ~ 2^({slope:.2f} n) over n = {int(ns[-3])}..{int(ns[-1])}")
    c12 = cluster(12)
    m12 = build_model(c12)
    c0 = time.process_time()
    ExactEngine(m12).signal(EXP)
    t_exact = time.process_time() - c0
    c0 = time.process_time()
    TypicalEngine(m12, replicas=args.replicas).estimate(EXP)
    t_typ = time.process_time() - c0
    print(f"n = 12, CPU time: exact engine {t_exact:.3g} s (eigendecomposition included), typical "
          f"{t_typ:.3g} s, typical/exact = {t_typ / t_exact:.3g}")


if __name__ == "__main__":
    main()
