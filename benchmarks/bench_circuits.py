"""Compile and transpile the gradient circuit family of a 10-spin cluster (r = 20).

Goal: one parameterised circuit per parameter and time, and zero rebuilds while Monte Carlo
sampling binds insertion points. Prints, side by side in one run (medians):
  - compile and transpile time of every parameter's gradient family,
  - the number of circuit builds during sampling and binding (goal 0),
  - the ratio rebuild-per-sample / bind-per-sample, for the raw family circuit and for a
    circuit transpiled once and bound many times.

The cluster is invented: ten protons on two staggered pentagons, offsets -600..750 Hz.
Run: python benchmarks/bench_circuits.py [--samples N] [--steps R]
"""

import argparse
import statistics
import sys
import time

import numpy as np

from qhl import build_model
from qhl.circuits.circuit_counts import count_gates, transpile_for_counts
from qhl.circuits.circuit_family import circuit_builds
from qhl.spins.cluster import Cluster, Experiment, Spin
from qhl.circuits.gradient_circuits import gradient_circuit
from timing import median_time


def ten_spin_cluster():
    spins = []
    for k in range(10):
        ring, a = k // 5, 2 * np.pi * (k % 5) / 5 + 0.3 * (k // 5)
        spins.append(Spin(f"H{k + 1}", "1H", (2.2 * np.cos(a), 2.2 * np.sin(a), 1.6 * ring), 150.0 * k - 600.0))
    return Cluster(9.4, "1H", tuple(spins), (), (Experiment("static", 2e-4, 8),), name="bench-H10")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", type=int, default=20)
    ap.add_argument("--time", type=float, default=5e-5)
    ap.add_argument("--order", type=int, default=2)
    ap.add_argument("--samples", type=int, default=2000)
    args = ap.parse_args(argv)

    cluster = ten_spin_cluster()
    model = build_model(cluster)
    ex = cluster.experiments[0]
    names = list(model.free)
    print(f"cluster {cluster.name}: {model.n_spins} spins, {len(names)} free parameters; "
          f"t = {args.time:g} s, r = {args.steps}, order {args.order}")

    builds0 = circuit_builds()
    compile_t, transpile_t, families = [], [], {}
    for k, name in enumerate(names):
        t0 = time.perf_counter()
        fam = gradient_circuit(model, ex, name, args.time, args.steps, args.order)
        t1 = time.perf_counter()
        tq = transpile_for_counts(fam.with_measurements(fam.representative()))
        t2 = time.perf_counter()
        compile_t.append(t1 - t0)
        transpile_t.append(t2 - t1)
        families[name] = (fam, count_gates(tq))
        print(f"\r  compiled and transpiled {k + 1}/{len(names)}", end="", file=sys.stderr)
    print(file=sys.stderr)
    built = circuit_builds() - builds0
    print(f"families built: {built} (one per parameter: {len(names)})")
    print(f"compile   per parameter: median {statistics.median(compile_t) * 1e3:8.1f} ms, "
          f"total {sum(compile_t):6.2f} s")
    print(f"transpile per parameter: median {statistics.median(transpile_t) * 1e3:8.1f} ms, "
          f"total {sum(transpile_t):6.2f} s  (representative member, [cx, rz, sx, x], level 2)")
    for name in (names[0], names[-1]):
        fam, c = families[name]
        print(f"  {name:<16} qubits {c.qubits:3d}  cx {c.cx:6d}  depth {c.depth:6d}  rotations {c.rotations:6d}"
              f"  parameters {fam.num_parameters:4d}  insertion rows {len(fam.insertions):4d}")

    rng = np.random.default_rng(0)
    name = "dipolar:H1-H2"
    fam, _ = families[name]
    shots = fam.sample(rng, args.samples)
    builds_before = circuit_builds()
    t0 = time.perf_counter()
    for vals in shots.values:
        fam.circuit.assign_parameters(vals)
    bind_total = time.perf_counter() - t0
    rebuilds = circuit_builds() - builds_before
    print(f"\nsampling {args.samples} insertion settings of {name}: circuit rebuilds {rebuilds} (goal 0)")

    bind_raw = median_time(lambda: fam.circuit.assign_parameters(shots.values[0]), 30)
    rebuild_raw = median_time(lambda: gradient_circuit(model, ex, name, args.time, args.steps, args.order), 7)
    transpiled = transpile_for_counts(fam.circuit)     # transpile once with symbolic parameters
    index = {p.name: k for k, p in enumerate(fam.circuit.parameters)}
    cols = np.array([index[p.name] for p in transpiled.parameters])
    bind_tq = median_time(lambda: transpiled.assign_parameters(shots.values[0][cols]), 30)
    retranspile = median_time(lambda: transpile_for_counts(fam.bind(np.zeros(model.n_spins), 0)), 5)
    print(f"{'per sample':<34}{'median (ms)':>12}")
    print(f"{'bind family circuit':<34}{bind_raw * 1e3:12.2f}")
    print(f"{'rebuild family circuit':<34}{rebuild_raw * 1e3:12.2f}   ratio rebuild/bind {rebuild_raw / bind_raw:8.1f}")
    print(f"{'bind transpiled circuit':<34}{bind_tq * 1e3:12.2f}")
    print(f"{'transpile a bound member':<34}{retranspile * 1e3:12.2f}   ratio transpile/bind {retranspile / bind_tq:8.1f}")
    print(f"(all {args.samples} binds: {bind_total:.2f} s)")
    return 0 if rebuilds == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
