"""Emulator benchmark: grouped settings (one bind per distinct setting) against one circuit per shot.

Part 1: the demo cluster (6 spins), one dipolar gradient at r = 20 first-order steps, 10^4 shots
per part (Re). Grouped: qhl.emulation.runner.FamilyRunner (transpile once, np.unique over the
per-shot settings, one Aer run with parameter_binds). Naive: bind one circuit per shot and run it
with shots=1; measured on a small shot count and scaled per shot. Goal: ratio >= 50.
Part 2: an invented 8-spin cluster, full gradient (every free parameter, Re and Im) at one
time with 10^4 shots each: prints the time. Medians of repeats where cheap. Run:
    python benchmarks/bench_emulator.py [--quick]
"""

import sys
import time

import numpy as np
from qiskit_aer import AerSimulator

from qhl import build_model, demo_cluster
from qhl.spins.cluster import Cluster, Experiment, Spin
from qhl.emulation import FamilyRunner, estimate_family
from qhl.circuits.gradient_circuits import gradient_circuit


def naive_seconds_per_shot(family, runner, shots, rng):
    sim = AerSimulator(method="statevector", max_parallel_threads=1)
    settings = family.sample(rng, shots, "re")
    start = time.perf_counter()
    for v in settings.values:
        bound = runner.transpiled.assign_parameters({p: v[k] for p, k in runner._bound})
        sim.run(bound, shots=1, seed_simulator=int(rng.integers(2 ** 31 - 1))).result()
    return (time.perf_counter() - start) / shots


def naive_rebuild_seconds_per_shot(model, ex, name, time_s, steps, shots, rng):
    """One circuit per shot from scratch: build the family, bind the shot's setting, transpile, run."""
    from qiskit import transpile

    sim = AerSimulator(method="statevector", max_parallel_threads=1)
    start = time.perf_counter()
    for _ in range(shots):
        fam = gradient_circuit(model, ex, name, time_s, steps)
        s = fam.sample(rng, 1, "re")
        bound = fam.with_measurements(fam.circuit.assign_parameters(s.values[0]))
        sim.run(transpile(bound, sim, optimization_level=0), shots=1,
                seed_simulator=int(rng.integers(2 ** 31 - 1))).result()
    return (time.perf_counter() - start) / shots


def eight_spin_cluster():
    rng = np.random.default_rng(8)
    pos = rng.uniform(0, 4.0, (8, 3))
    spins = tuple(Spin(f"P{i}", "1H", tuple(pos[i]), float(rng.uniform(-800, 800))) for i in range(8))
    return Cluster(9.4, "1H", spins, (), (Experiment("static", 2e-4, 8, 1.0, 1e-3),), name="octet")


def main(quick=False):
    c = demo_cluster()
    model = build_model(c)
    ex = c.experiments[0]
    family = gradient_circuit(model, ex, "dipolar:H1-H2", 1e-4, 20)
    shots = 10_000
    t0 = time.perf_counter()
    runner = FamilyRunner(family)
    transpile_s = time.perf_counter() - t0
    runs = [runner.run(shots, np.random.default_rng(k), "re") for k in range(1 if quick else 3)]
    grouped = float(np.median([e.seconds for e in runs]))
    naive = naive_seconds_per_shot(family, runner, 20 if quick else 50, np.random.default_rng(9)) * shots
    print(f"6-spin demo, r = 20, {shots} shots (Re of dS/d dipolar:H1-H2)")
    print(f"  grouped: {grouped:.2f} s (median), circuits run {runs[0].circuits_run}, "
          f"{shots / grouped:.0f} shots/s, transpile once {transpile_s:.2f} s")
    rebuild = naive_rebuild_seconds_per_shot(model, ex, "dipolar:H1-H2", 1e-4, 20, 5 if quick else 10,
                                             np.random.default_rng(10)) * shots
    print(f"  naive, one new circuit per shot (build + bind + transpile + run, scaled): {rebuild:.1f} s, "
          f"{shots / rebuild:.1f} shots/s")
    print(f"  ratio naive / grouped = {rebuild / grouped:.0f}x (goal >= 50x)")
    print(f"  bind-only per shot (circuit transpiled once, one run per shot, scaled): {naive:.1f} s, "
          f"{shots / naive:.0f} shots/s; ratio {naive / grouped:.0f}x")
    if quick:
        return
    c8 = eight_spin_cluster()
    m8 = build_model(c8)
    start = time.perf_counter()
    circuits = 0
    for k, nm in enumerate(m8.free):
        e = estimate_family(gradient_circuit(m8, c8.experiments[0], nm, 1e-4, 4), shots, k)
        circuits += e.circuits_run
    print(f"8-spin full gradient: {len(m8.free)} parameters x Re/Im x {shots} shots, r = 4, "
          f"{circuits} circuits run, {time.perf_counter() - start:.1f} s")


if __name__ == "__main__":
    main("--quick" in sys.argv)
