"""Exact-engine benchmark: qhl against dense full-space propagation, the eigen floor, and scale.

Prints ratios measured side by side in one run (medians of repeats). Usage:
    python benchmarks/bench_engine.py [--quick]

Baseline: the full-space dense approach, U(dt) = scipy.linalg.expm(-i H dt) and
rho_{k+1} = U rho_k U^dag, one signal per evaluation, gradient by central differences
(2P + 1 signals). It is timed over BASELINE_STEPS time steps and scaled linearly to the full
grid (the cost per step is constant), which is stated in the output.
"""

import argparse
import json
import resource
import subprocess
import sys
import time

import numpy as np
import scipy.linalg as sla

from qhl import ExactEngine, build_model
from qhl.spins.cluster import Cluster, Experiment, Spin
from timing import median_time

BASELINE_STEPS = 8


def bench_cluster(n, points=256, seed=0):
    """An invented random proton cluster of density similar to an organic solid."""
    rng = np.random.default_rng(seed)
    while True:
        pos = rng.uniform(0, 1, (n, 3)) * n ** (1 / 3) * 2.2
        d = np.linalg.norm(pos[:, None] - pos[None], axis=-1) + np.eye(n) * 9
        if d.min() > 1.5:
            break
    spins = tuple(Spin(f"H{i}", "1H", tuple(p), float(rng.normal(0, 1000))) for i, p in enumerate(pos))
    return Cluster(9.4, "1H", spins, (), (Experiment("fid", 2e-4, points),))


def baseline_signal_time(model, ex, steps):
    h = model.hamiltonian(ex).to_matrix()
    rho = model.initial_operator().to_matrix()
    obs = model.detection_operator().to_matrix()
    dt = ex.times_s[1]

    def run():
        u = sla.expm(-1j * h * dt)
        r = rho.copy()
        out = [np.trace(obs @ r)]
        for _ in range(steps):
            r = u @ r @ u.conj().T
            out.append(np.trace(obs @ r))
        return out

    return median_time(run, 1)


def scale_case(n, kind):
    """Run in a fresh process: time and peak RSS of one n-spin signal or full gradient."""
    c = bench_cluster(n)
    t0 = time.perf_counter()
    eng = ExactEngine(build_model(c))
    ex = c.experiments[0]
    if kind == "gradient":
        eng.gradient(ex)
    else:
        eng.signal(ex)
    dt = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps({"n": n, "kind": kind, "seconds": dt, "peak_mib": peak, "parameters": len(eng.model.free)}))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="n = 8 instead of 10, skip the scale runs")
    ap.add_argument("--scale-case", nargs=2, metavar=("N", "KIND"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.scale_case:
        scale_case(int(args.scale_case[0]), args.scale_case[1])
        return
    n = 8 if args.quick else 10
    c = bench_cluster(n)
    ex = c.experiments[0]
    model = build_model(c)
    P = len(model.free)
    print(f"cluster: {n} protons, {ex.points} time points, {P} free parameters (offsets + dipolar)")

    def fresh_gradient():
        ExactEngine(model).gradient(ex)

    def fresh_signal():
        ExactEngine(model).signal(ex)

    def eigen_floor():
        eng = ExactEngine(model)
        eng.spectrum(ex)

    t_grad = median_time(fresh_gradient, 3)
    t_sig = median_time(fresh_signal, 5)
    t_eig = median_time(eigen_floor, 5)
    t_base_steps = baseline_signal_time(model, ex, BASELINE_STEPS)
    t_base_signal = t_base_steps * (ex.points - 1) / BASELINE_STEPS
    t_base_grad = t_base_signal * (2 * P + 1)
    print(f"baseline dense expm + central differences (measured over {BASELINE_STEPS} steps, scaled to "
          f"{ex.points - 1} steps x {2 * P + 1} signals): {t_base_grad:9.1f} s")
    print(f"qhl exact gradient (all {P} parameters, {ex.points} points, median of 3): {t_grad:9.3f} s")
    print(f"  speed-up over baseline: {t_base_grad / t_grad:9.0f}x   (goal >= 100x)")
    print(f"qhl signal only (median of 5): {t_sig:.4f} s;  eigendecomposition floor: {t_eig:.4f} s")
    print(f"  signal / floor ratio: {t_sig / t_eig:.2f}   (goal <= 3)")
    print(f"  baseline single signal / qhl signal: {t_base_signal / t_sig:.0f}x")
    if args.quick:
        return
    for n_scale, kind in [(12, "gradient"), (14, "signal")]:
        r = subprocess.run([sys.executable, __file__, "--scale-case", str(n_scale), kind],
                           capture_output=True, text=True, check=True)
        d = json.loads(r.stdout.strip().splitlines()[-1])
        print(f"scale: n = {d['n']} {d['kind']:<8} ({d['parameters']} parameters, 256 points): "
              f"{d['seconds']:.1f} s, peak memory {d['peak_mib']:.0f} MiB")


if __name__ == "__main__":
    main()
