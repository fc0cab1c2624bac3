"""Pure-state (typical) engine benchmark: signal time and peak memory against n, the classical-cost
meter's prediction beside each measurement, the extrapolation to 24 spins, and the ratio against
the exact engine at 12 spins. All numbers measured in one run.

Clusters: the n protons nearest the centre of qhl's invented demo structure, invented shifts over
8 ppm at 9.4 T, every pair dipolar-coupled. Signal: 64 points up to 2e-4 s, 2 replicas (the
fewest that give an error bar). Usage:
    python benchmarks/bench_typical.py [--sizes 16 18 20] [--replicas 2] [--against DIR]
                                       [--start real|phase] [--variants threads=1 precision=single ...]

Every case runs in a fresh process (peak RSS per case). --against DIR also times the qhl tree in
DIR (for example `git archive <commit> qhl | tar -x -C DIR`) on the same case right after, with
the same start vectors and engine options (the first variant), so old and new are measured side
by side under the same load; the ratio column is its CPU time over this tree's.

--variants runs each size once per engine option set (comma-separated key=value pairs for
TypicalEngine, e.g. `threads=1`, `precision=single,threads=2`), right after each other; the
first variant is the reference of the `wall ratio` and `CPU ratio` columns (its time over the
variant's: > 1 is faster). The meter's columns and the growth fit use the first variant.
Default: double precision on one core, single precision on one core, single precision with
the engine's thread rule (the cores the load average leaves idle).

Sizes whose predicted time exceeds --max-seconds are not run: their line gives the meter's
prediction scaled by the measured/predicted ratio (of CPU time) of the largest size that was run.
Both wall time and process CPU time are printed: on a shared machine the wall time includes
waiting for the cores; BLAS runs on one thread here, so the CPU time is what an idle core needs.
"""

import argparse
import json
import os
import resource
import subprocess
import sys
import time

import numpy as np

EXP_ARGS = ("fid", 2e-4, 64, 1.0, 1e-3)


def cluster(n):
    from qhl import Experiment
    from qhl.survey.structure import cut_clusters, demo_structure_path, invented_offsets_hz, read_structure
    nuc = read_structure(demo_structure_path(), ("1H",))
    off = invented_offsets_hz(nuc, 8.0, 9.4, 0)
    return cut_clusters(nuc, n, 1, field_tesla=9.4, experiments=(Experiment(*EXP_ARGS),), offsets_hz=off)[0]


def parse_variant(text):
    """'precision=single,threads=2' -> {'precision': 'single', 'threads': 2}."""
    out = {}
    for item in filter(None, (text or "").split(",")):
        key, val = item.split("=")
        out[key] = int(val) if val.isdigit() else float(val) if key == "window_bytes" else val
    return out


def run_case(n, replicas, start, variant=""):
    """In a fresh process: time, CPU time, peak RSS and largest standard error of one estimate."""
    from qhl import build_model
    from qhl.exact.typicality import TypicalEngine
    c = cluster(n)
    kw = {} if start is None else {"start": start}
    kw.update(parse_variant(variant))
    eng = TypicalEngine(build_model(c), replicas=replicas, **kw)
    t0, c0 = time.perf_counter(), time.process_time()
    est = eng.estimate(c.experiments[0])
    dt, cpu = time.perf_counter() - t0, time.process_time() - c0
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 2**30
    err = float(max(est.signal_stderr_real.max(), est.signal_stderr_imag.max()))
    print(json.dumps({"wall": dt, "cpu": cpu, "rss": rss, "stderr": err,
                      "signal": [[float(z.real), float(z.imag)] for z in est.signal]}))


def case(tree, n, replicas, start, variant=""):
    env = dict(os.environ, PYTHONPATH=tree, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
    cmd = [sys.executable, os.path.abspath(__file__), "--case", str(n), str(replicas), start or "-",
           variant or "-"]
    r = subprocess.run(cmd, capture_output=True, text=True, env=env)
    if r.returncode:
        raise RuntimeError(r.stderr.strip()[-400:])
    return json.loads(r.stdout.strip().splitlines()[-1])


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", type=int, nargs="+", default=[12, 14, 16, 18, 20])
    ap.add_argument("--extrapolate", type=int, nargs="+", default=[22, 24])
    ap.add_argument("--replicas", type=int, default=2)
    ap.add_argument("--max-seconds", type=float, default=600.0)
    ap.add_argument("--against", default=None, help="a second qhl tree, timed side by side")
    ap.add_argument("--start", default=None, choices=["real", "phase"], help="start vectors (default: the engine's)")
    ap.add_argument("--variants", nargs="+", default=["threads=1", "precision=single,threads=1", "precision=single"],
                    help="engine option sets, e.g. threads=1 precision=single,threads=2")
    ap.add_argument("--case", nargs=4, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.case:
        run_case(int(args.case[0]), int(args.case[1]), None if args.case[2] == "-" else args.case[2],
                 "" if args.case[3] == "-" else args.case[3])
        return
    here = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    tree = os.environ.get("PYTHONPATH", here).split(os.pathsep)[0] or here
    from qhl import ExactEngine, build_model
    from qhl.costing.classical_cost import calibrate, classical_cost
    from qhl.exact.typicality import TypicalEngine
    cal = calibrate()
    print(f"calibration: c_term {cal.c_term:.3g} s/(nnz col), c_build {cal.c_build:.3g} s/nnz, "
          f"c_eigh {cal.c_eigh:.3g} s/d^3; load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    extra = (f" {'against wall (s)':>17} {'against CPU (s)':>16} {'against/this':>13} {'its stderr':>11} "
             f"{'its RSS (GiB)':>14}" if args.against else "")
    print(f"{'n':>3} {'predicted (s)':>14} {'wall (s)':>10} {'CPU (s)':>10} {'CPU/pred':>9} "
          f"{'peak RSS (GiB)':>15} {'max stderr':>11}{extra}")
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
        r = case(tree, n, args.replicas, args.start, args.variants[0])
        ratio = r["cpu"] / pred["seconds"]
        rows.append((n, r["cpu"]))
        line = (f"{n:>3} {pred['seconds']:>14.4g} {r['wall']:>10.4g} {r['cpu']:>10.4g} {ratio:>9.2f} "
                f"{r['rss']:>15.3g} {r['stderr']:>11.2e}")
        if args.against:
            # the other tree with the same start and engine options (first variant) as this one
            o = case(args.against, n, args.replicas, args.start, args.variants[0])
            line += (f" {o['wall']:>17.4g} {o['cpu']:>16.4g} {o['cpu'] / r['cpu']:>13.2f} {o['stderr']:>11.2e} "
                     f"{o['rss']:>14.3g}")
        print(line + f"   [{args.variants[0] or 'defaults'}]", flush=True)
        ref = np.array(r["signal"])
        for v in args.variants[1:]:
            o = case(tree, n, args.replicas, args.start, v)
            dev = float(np.abs(np.array(o["signal"]) - ref).max())
            print(f"{'':>3} {'':>14} {o['wall']:>10.4g} {o['cpu']:>10.4g} {'':>9} {o['rss']:>15.3g} "
                  f"{o['stderr']:>11.2e}   [{v}] wall ratio {r['wall'] / o['wall']:.2f}, CPU ratio "
                  f"{r['cpu'] / o['cpu']:.2f}, max |S - S_ref| {dev:.1e}", flush=True)
    if len(rows) >= 2:
        ns, ts = np.array(rows, float).T
        q = min(3, len(ns))
        slope = np.polyfit(ns[-q:], np.log2(ts[-q:]), 1)[0]
        print(f"measured growth: CPU time ~ 2^({slope:.2f} n) over n = {int(ns[-q])}..{int(ns[-1])}")
        for target in args.extrapolate:
            est = ts[-1] * 2.0 ** (slope * (target - ns[-1]))
            print(f"  n = {target}: {est:.4g} s = {est / 60:.3g} min CPU from that growth (an extrapolation)")
    c12 = cluster(12)
    m12 = build_model(c12)
    c0 = time.process_time()
    ExactEngine(m12).signal(c12.experiments[0])
    t_exact = time.process_time() - c0
    c0 = time.process_time()
    TypicalEngine(m12, replicas=args.replicas).estimate(c12.experiments[0])
    t_typ = time.process_time() - c0
    print(f"n = 12, CPU time: exact engine {t_exact:.3g} s (eigendecomposition included), typical "
          f"{t_typ:.3g} s, typical/exact = {t_typ / t_exact:.3g}")


if __name__ == "__main__":
    main()
