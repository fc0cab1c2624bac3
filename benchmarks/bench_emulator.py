"""Emulator benchmark: the numpy fast path (stratified settings) against the Aer path, side by side.

Part 1: the demo cluster (6 spins), one dipolar gradient component at r = 20 first-order steps,
10^4 shots (Re): fast path (qhl.emulation.fast_path, stratified insertion rows), the Aer path
(grouped settings, one Aer run with parameter_binds, i.i.d. rows: the previous default), and the
raw Aer limit: the same transpiled circuit bound once and run with the same total shots.
Part 2: `qhl check` of an invented 5-spin cluster (15 parameters, Re and Im, 10^4 shots each,
r = 8) through qhl.emulation.check.check_derivatives with the fast path; the previous path
(Aer, i.i.d. settings) measured on 2 of the 15 parameters in the same run and scaled by 15/2.
Goal: under 10 s and >= 10x.
Part 3: an invented 8-spin cluster, full gradient (36 parameters, Re and Im, 10^4 shots, r = 4)
through qhl.emulation.derivatives.emulate_gradients (one batched call). Goal: under 30 s.
Part 4 (--large): one gradient component of an invented 16-spin chain on Aer's statevector
method and of a 30-spin chain on the matrix_product_state method, r = 2, 200 shots per part:
they complete and are timed.
Part 5 (--noisy): a noisy gradient of the invented 5-spin cluster (depolarising p = 1e-3 on sx, x,
cx; P parameters, Re and Im, r = 4) on the Aer path, side by side in one run: the previous
per-setting path (one FamilyRunner per family, Aer binds one circuit per setting, power-of-two
shot buckets) against emulate_gradients (runtime parameter binding, every family in one Aer run
call per shot count, templates transpiled once), noisy and noiseless (method 'aer'). Both
transpile from an empty template cache (and share the cached pass managers). The cProfile top
entries of the batched noisy run follow. Then one noisy component with 40,000 shots (many shots
per setting: density matrices where they pay) against per-setting trajectories, whose cost is
measured on a tenth of the shots and scaled (it is linear in shots).
Part 6 (--beyond): one gradient component (Re) of invented 12- and 14-spin chains, r = 1, the
same shots on the fast path's streaming mode (beyond its 10-spin dense tables) and on Aer's
statevector method (runtime binding), side by side.
Part 7 (--check-noisy [P [SHOTS]]): `qhl check --noise 1e-3` of the invented 5-spin cluster (its
first P parameters, Re and Im, SHOTS shots per part, r = 4, t = 1e-3 s) through check_derivatives,
side by side in one run (interleaved, REPEATS = 2 times, the fastest of each kept): one family at a time (batch=0: estimate_family per family, the previous
scheme) against families batched through run_batch in groups of qhl.emulation.check.BATCH and in
one group of all P; wall time, AerSimulator.run calls (counted by wrapping it) and the largest
|z| between each batched row and the one-at-a-time row. Each run starts from an empty template
cache after a warm-up (imports, pass managers). Beside them the raw Aer limit: the first family's
circuit bound once and run with 2 x SHOTS noisy shots, scaled by P (trajectory cost is linear in shots).
Measured (2 shared cores, defaults P = 10, SHOTS = 500): one at a time 27.3 s (149 Aer run calls),
groups of 8 20.9 s (17 calls, 1.31x), one group 20.0 s (11 calls, 1.36x), raw Aer limit 12.4 s;
batched rows within |z| < 3.2 of one at a time (20 rows). Noisy trajectories (about 1.2 ms per
shot for these 248-cx circuits) dominate, so fewer calls save at most the per-call overhead.
Run:
    python benchmarks/bench_emulator.py [--quick] [--large] [--noisy [P [SHOTS]]] [--beyond [SHOTS]]
                                        [--check-noisy [P [SHOTS]]]
"""

import cProfile
import io
import pstats
import sys
import time

import numpy as np

from qhl import build_model, demo_cluster
from qhl.spins.cluster import Cluster, Experiment, Pair, Spin
from qhl.emulation import FamilyRunner, estimate_family
from qhl.emulation.check import check_derivatives
from qhl.emulation.noise import NoiseSpec
from qhl.emulation.runner import clear_templates
from qhl.emulation.derivatives import emulate_gradients
from qhl.circuits.gradient_circuits import gradient_circuit


def raw_aer_seconds(runner, family, shots, rng):
    """One bound member of the transpiled circuit, run once with `shots` shots (Aer's own limit)."""
    settings = family.sample(rng, 1, "re")
    bound = runner.transpiled.assign_parameters({p: settings.values[0][k] for p, k in runner._bound})
    start = time.perf_counter()
    runner.simulator.run(bound, shots=shots, seed_simulator=1).result()
    return time.perf_counter() - start


def five_spin_cluster():
    """Invented: five protons with Hz-scale offsets and dipolar couplings (all pairs)."""
    rng = np.random.default_rng(5)
    spins = tuple(Spin(f"Q{i}", "1H", None, float(rng.uniform(-300, 300))) for i in range(5))
    pairs = tuple(Pair((f"Q{i}", f"Q{j}"), dipolar_hz=float(rng.uniform(-400, 400)))
                  for i in range(5) for j in range(i + 1, 5))
    return Cluster(9.4, "1H", spins, pairs, (Experiment("static", 4e-3, 8, 1.0, 1e-3),), name="quintet")


def eight_spin_cluster():
    rng = np.random.default_rng(8)
    pos = rng.uniform(0, 4.0, (8, 3))
    spins = tuple(Spin(f"P{i}", "1H", tuple(pos[i]), float(rng.uniform(-800, 800))) for i in range(8))
    return Cluster(9.4, "1H", spins, (), (Experiment("static", 2e-4, 8, 1.0, 1e-3),), name="octet")


def part1(shots, repeats):
    c = demo_cluster()
    model = build_model(c)
    family = gradient_circuit(model, c.experiments[0], "dipolar:H1-H2", 1e-4, 20)
    fast = FamilyRunner(family)
    fast.run(shots, np.random.default_rng(99), "re")          # builds the evolution tables once
    fast_runs = [fast.run(shots, np.random.default_rng(k), "re") for k in range(repeats)]
    t0 = time.perf_counter()
    aer = FamilyRunner(family, method="aer", sampling="iid")
    aer.transpiled
    transpile_s = time.perf_counter() - t0
    aer_runs = [aer.run(shots, np.random.default_rng(k), "re") for k in range(1)]   # slow: once
    raw = float(np.median([raw_aer_seconds(aer, family, shots, np.random.default_rng(k)) for k in range(repeats)]))
    f = float(np.median([e.seconds for e in fast_runs]))
    a = float(np.median([e.seconds for e in aer_runs]))
    print(f"6-spin demo, r = 20, {shots} shots (Re of dS/d dipolar:H1-H2), medians of {repeats} (Aer path: one run)")
    print(f"  fast path (stratified): {f:.3f} s, {fast_runs[0].circuits_run} distinct settings, {shots / f:.0f} shots/s, "
          f"stderr {fast_runs[0].stderr:.3g}")
    print(f"  Aer path (i.i.d., previous default): {a:.2f} s, {aer_runs[0].circuits_run} distinct settings, "
          f"{shots / a:.0f} shots/s, stderr {aer_runs[0].stderr:.3g}; transpile once {transpile_s:.2f} s")
    print(f"  raw Aer limit (one bound circuit, {shots} shots): {raw:.3f} s, {shots / raw:.0f} shots/s")
    print(f"  fast-path shots/s divided by raw-limit shots/s: {raw / f:.2f} (goal: within 3x, i.e. >= 0.33); "
          f"fast vs Aer path: {a / f:.0f}x")


def part2(shots):
    c = five_spin_cluster()
    model = build_model(c)
    names = list(model.free)
    t, r = 1e-3, 8
    start = time.perf_counter()
    rep = check_derivatives(c, t, r, shots, seed=1)
    fast = time.perf_counter() - start
    worst = max(abs(row["z"]) for row in rep.rows)
    sub = names[:2]
    start = time.perf_counter()
    rep_sub = check_derivatives(c, t, r, shots, seed=1, parameters=sub)   # fixed costs + 2 fast rows
    fixed_and_two = time.perf_counter() - start
    m = build_model(c, free=names)
    start = time.perf_counter()
    for k, nm in enumerate(sub):
        fam = gradient_circuit(m, c.experiments[0], nm, t, r)
        estimate_family(fam, shots, k, runner=FamilyRunner(fam, method="aer", sampling="iid"))
    aer_two = time.perf_counter() - start
    old = aer_two * len(names) / len(sub)
    print(f"5-spin check: {len(names)} parameters x Re/Im x {shots} shots, r = {r}, t = {t} s")
    print(f"  fast path: {fast:.2f} s ({rep.circuits_run} distinct settings), max |z| = {worst:.2f}, {rep.verdict()}")
    print(f"  previous path (Aer, i.i.d.) on {len(sub)} parameters: {aer_two:.1f} s -> scaled to {len(names)}: "
          f"{old:.1f} s (+ the exact references, {fixed_and_two:.2f} s with 2 fast rows); "
          f"ratio {old / fast:.0f}x (goal: under 10 s and >= 10x)")
    return rep_sub


def part3(shots):
    c8 = eight_spin_cluster()
    m8 = build_model(c8)
    names = list(m8.free)
    start = time.perf_counter()
    out = emulate_gradients(m8, c8.experiments[0], names, [1e-4], 4, shots, seed=0)
    sec = time.perf_counter() - start
    circuits = sum(e.circuits_run for e in out[:, 0])
    print(f"8-spin full gradient: {len(names)} parameters x Re/Im x {shots} shots, r = 4: {sec:.1f} s "
          f"({circuits} distinct settings; goal under 30 s)")


def chain_cluster(n):
    """Invented: n protons in a chain, offsets up to 300 Hz, nearest-neighbour dipolar couplings only."""
    rng = np.random.default_rng(n)
    spins = tuple(Spin(f"C{i}", "1H", None, float(rng.uniform(-300, 300))) for i in range(n))
    pairs = tuple(Pair((f"C{i}", f"C{i + 1}"), dipolar_hz=float(rng.uniform(-400, 400))) for i in range(n - 1))
    return Cluster(9.4, "1H", spins, pairs, (Experiment("static", 1e-3, 8, 1.0, 1e-3),), name=f"chain{n}")


def part4(shots=200):
    for n, method in ((16, "aer"), (30, "mps")):
        c = chain_cluster(n)
        m = build_model(c)
        fam = gradient_circuit(m, c.experiments[0], "dipolar:C0-C1", 5e-4, 2)
        start = time.perf_counter()
        runner = FamilyRunner(fam, method=method)
        e = estimate_family(fam, shots, 0, runner=runner)
        print(f"{n}-spin chain, one gradient component, r = 2, {shots} shots per part, method "
              f"{runner.simulator.options.method}: {time.perf_counter() - start:.1f} s, "
              f"{e.circuits_run} distinct settings, value {e.value:.3g} +- {abs(e.stderr):.2g}")


def part5(n_params=4, shots=500, steps=4, profile_lines=12):
    c = five_spin_cluster()
    m = build_model(c)
    names = list(m.free)[:n_params]
    ex, t = c.experiments[0], 1e-3
    print(f"5-spin gradient on the Aer path, {len(names)} parameters x Re/Im x {shots} shots, r = {steps}:")
    print(f"  {'noise':<16}{'path':<44}{'seconds':>9}{'settings':>10}{'shots/s':>9}")
    for label, noise in (("depolarising", NoiseSpec(1e-3)), ("none (aer)", NoiseSpec())):
        clear_templates()
        start = time.perf_counter()
        old = []
        for k, nm in enumerate(names):
            fam = gradient_circuit(m, ex, nm, t, steps)
            runner = FamilyRunner(fam, noise, method="aer", binding="per-setting")
            old.append(estimate_family(fam, shots, k, runner=runner))
        old_s = time.perf_counter() - start
        clear_templates()
        prof = cProfile.Profile()
        start = time.perf_counter()
        prof.enable()
        new = emulate_gradients(m, ex, names, [t], steps, shots, seed=0, noise=noise, method="aer")[:, 0]
        prof.disable()
        new_s = time.perf_counter() - start
        zr = [abs((a.re.value - b.re.value) / np.hypot(a.re.stderr, b.re.stderr)) for a, b in zip(new, old)]
        zi = [abs((a.im.value - b.im.value) / np.hypot(a.im.stderr, b.im.stderr)) for a, b in zip(new, old)]
        total = 2 * shots * len(names)
        for path, sec, est in (("per-setting (previous: bound per setting)", old_s, old),
                               ("batched, runtime-bound (emulate_gradients)", new_s, new)):
            print(f"  {label:<16}{path:<44}{sec:>9.2f}{sum(e.circuits_run for e in est):>10}{total / sec:>9.0f}")
        print(f"  {label:<16}speed-up {old_s / new_s:.2f}x; max |z| between the paths: Re {max(zr):.2f}, "
              f"Im {max(zi):.2f}")
        if label == "depolarising":
            buf = io.StringIO()
            pstats.Stats(prof, stream=buf).sort_stats("tottime").print_stats(profile_lines)
            lines = [ln for ln in buf.getvalue().splitlines() if ln.strip()]
            first = next(i for i, ln in enumerate(lines) if ln.lstrip().startswith("ncalls"))
            print("  cProfile of the batched noisy run (top entries by own time; the thread lock is the wait")
            print("  for Aer's C++ simulation):")
            for ln in lines[first:first + profile_lines + 1]:
                print("   ", ln[:150])


def part5_many_shots(shots=40_000, scale=10):
    """Many shots per setting: noisy settings run as density matrices (one Aer state each)."""
    c = five_spin_cluster()
    m = build_model(c)
    nm, ex, t, noise = list(m.free)[5], c.experiments[0], 1e-3, NoiseSpec(1e-3)
    fam = gradient_circuit(m, ex, nm, t, 4)
    old_runner = FamilyRunner(fam, noise, method="aer", binding="per-setting")
    new_runner = FamilyRunner(fam, noise, method="aer")
    old_runner.template, new_runner.template
    old = old_runner.run(shots // scale, np.random.default_rng(1), "re")
    new = new_runner.run(shots, np.random.default_rng(2), "re")
    z = (new.value - old.value) / np.hypot(new.stderr, old.stderr)
    print(f"Noisy 5-spin component (Re of d/d {nm}), {shots} shots, r = 4, {new.circuits_run} distinct settings "
          f"(density matrices from {new_runner.density_from:.0f} shots per setting):")
    print(f"  per-setting trajectories: {old.seconds:.2f} s for {shots // scale} shots -> {old.seconds * scale:.1f} s "
          f"scaled to {shots} (its cost is linear in shots)")
    print(f"  runtime-bound, density matrices where they pay: {new.seconds:.2f} s; "
          f"ratio {old.seconds * scale / new.seconds:.1f}x; z between them {z:.2f}")


def part6(shots=1000, sizes=(12, 14)):
    print(f"Gradient component dS/d dipolar:C0-C1 (Re), r = 1, {shots} shots, noiseless:")
    print(f"  {'spins':>5}{'fast path (s)':>15}{'Aer statevector (s)':>21}{'ratio':>7}{'settings':>10}"
          "  values (fast, Aer)")
    for n in sizes:
        c = chain_cluster(n)
        m = build_model(c)
        fam = gradient_circuit(m, c.experiments[0], "dipolar:C0-C1", 5e-4, 1)
        fast = FamilyRunner(fam)
        assert fast.uses_fast_path and fast.fast.streaming
        aer = FamilyRunner(fam, method="aer")
        aer.transpiled
        ef = fast.run(shots, np.random.default_rng(1), "re")
        ea = aer.run(shots, np.random.default_rng(1), "re")
        print(f"  {n:>5}{ef.seconds:>15.2f}{ea.seconds:>21.2f}{ea.seconds / ef.seconds:>7.1f}{ef.circuits_run:>10}  "
              f"{ef.value:.4g} +- {ef.stderr:.2g}, {ea.value:.4g} +- {ea.stderr:.2g}")


def part7(n_params=10, shots=500, steps=4, t=1e-3, repeats=2):
    from qiskit_aer import AerSimulator
    from qhl.emulation.check import BATCH
    c = five_spin_cluster()
    names = list(build_model(c).free)[:n_params]
    noise = NoiseSpec(1e-3)
    calls = []
    real = AerSimulator.run

    def counted(self, circuits, *args, **kwargs):
        calls.append(kwargs.get("shots"))
        return real(self, circuits, *args, **kwargs)

    AerSimulator.run = counted
    try:
        check_derivatives(c, t, steps, 50, seed=0, noise=noise, parameters=names[:1], batch=0)   # warm-up
        runs = {}
        for _ in range(repeats):          # interleaved; the fastest of each scheme is kept (shared machine)
            for label, batch in (("one family at a time (batch=0)", 0), (f"groups of {BATCH} (default)", BATCH),
                                 (f"one group of {n_params}", n_params)):
                clear_templates()
                calls.clear()
                start = time.perf_counter()
                rep = check_derivatives(c, t, steps, shots, seed=1, noise=noise, parameters=names, batch=batch)
                sec = time.perf_counter() - start
                runs[label] = (min(sec, runs.get(label, (np.inf,))[0]), len(calls), rep)
    finally:
        AerSimulator.run = real
    m = build_model(c, free=names)
    raw_runner = FamilyRunner(gradient_circuit(m, c.experiments[0], names[0], t, steps), noise, method="aer")
    raw = raw_aer_seconds(raw_runner, raw_runner.family, 2 * shots, np.random.default_rng(3)) * n_params
    print(f"qhl check --noise 1e-3, 5 spins, {n_params} parameters x Re/Im x {shots} shots, r = {steps}, t = {t} s:")
    print(f"  {'scheme':<34}{'seconds':>9}{'Aer run calls':>15}{'ratio':>7}{'max |z| vs one':>16}  verdict")
    base_s, _, base = runs["one family at a time (batch=0)"]
    for label, (sec, n_calls, rep) in runs.items():
        zs = [(r["emulated"] - b["emulated"]) / np.hypot(r["stderr"], b["stderr"]) for r, b in zip(rep.rows, base.rows)]
        print(f"  {label:<34}{sec:>9.2f}{n_calls:>15}{base_s / sec:>7.2f}{max(abs(z) for z in zs):>16.2f}  "
              f"{rep.status}")
    print(f"  raw Aer limit: one bound circuit of the first family, {2 * shots} noisy shots (one trajectory each), "
          f"scaled by {n_params} families: {raw:.2f} s")


def main(quick=False, large=False):
    shots = 10_000
    part1(shots, 1 if quick else 3)
    part2(shots)
    if not quick:
        part3(shots)
    if large:
        part4()


if __name__ == "__main__":
    if "--beyond" in sys.argv:
        rest = [int(a) for a in sys.argv[sys.argv.index("--beyond") + 1:] if a.isdigit()]
        part6(*rest[:1])
    elif "--check-noisy" in sys.argv:
        rest = [int(a) for a in sys.argv[sys.argv.index("--check-noisy") + 1:] if a.isdigit()]
        part7(*rest[:2])
    elif "--noisy" in sys.argv:
        rest = [int(a) for a in sys.argv[sys.argv.index("--noisy") + 1:] if a.isdigit()]
        part5(*rest[:2])
        part5_many_shots()
    else:
        main("--quick" in sys.argv, "--large" in sys.argv)
