"""Exact-engine benchmark: qhl against a general-purpose library, dense propagation and the eigh floor.

Prints medians and ratios measured side by side in one run. Usage:
    python benchmarks/bench_engine.py [--quick] [--n N] [--quspin-python PATH] [--scale] [--crossover]
                                      [--weighted]

Columns (one random proton cluster, offsets + all dipolar couplings free, 256 points):
  * floor: the eigendecomposition alone (scipy eigh of every sector's H, H assembled beforehand);
  * qhl signal (engine construction included), full gradient in double and single precision, and
    the adjoint path against the full path at few (8) time points;
  * peer (optional, --quspin-python or $QHL_QUSPIN_PYTHON: a Python that has QuSpin, a general-
    purpose exact-diagonalisation library; not a qhl dependency): its signal (benchmarks/
    quspin_peer.py; the first call, which compiles, is not timed) and its central-difference
    gradient, 2P signals, measured as one signal times 2P (each costs the same);
  * baseline (one BLAS thread): full-space dense U(dt) = expm(-i H dt), rho <- U rho U^dag, timed over BASELINE_STEPS
    steps and scaled to the grid; gradient by central differences (2P + 1 signals).
--scale adds n = 12 gradients (double, single) and n = 14 signals (qhl, peer) in fresh processes,
with peak memory. --crossover prints BLAS one- against two-thread times of square products.
--signal-at N [--against DIR]: the N-spin signal alone (256 points), one BLAS thread, fresh
processes, interleaved with the eigh floor, the same signal with precision="fast" (float32 eigh), the qhl tree in DIR (for example `git archive <commit>
qhl | tar -x -C DIR`) and the peer: medians of --repeats rounds, CPU and wall seconds.
--gradient-at N [--against DIR] [--double]: the N-spin full gradient (all P rows, 256 points) in
precisions fast and single (and double), one BLAS thread, fresh processes, this tree interleaved
with the tree in DIR: medians of --repeats rounds, wall and CPU seconds, peak memory; with the
peer, its central differences (2P signals) over each.
--weighted [--n N]: the likelihood gradient at n = 10 and 12 (or N): signal, full gradient
(Jacobian, all P rows), the weighted gradient sum_t c_t dS/dh (ExactEngine.gradient_weighted,
complex and real part) with random complex weights, on an engine built beforehand (spectrum cache
emptied before each call; the four in interleaved rounds), their ratios, and with the peer its
central-difference gradient, 2P + 1 signals (the weighted path returns the signal too), against
the weighted gradient.
BLAS: qhl picks its threads per block (qhl.base.blas); the peer runs with one BLAS/OpenMP thread.
"""

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time

import numpy as np
import scipy.linalg as sla

from qhl import ExactEngine, build_model
from qhl.base.blas import blas_threads
from qhl.spins.cluster import Cluster, Experiment, Spin
from timing import median_time

BASELINE_STEPS = 8
HERE = os.path.dirname(os.path.abspath(__file__))


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

    from threadpoolctl import threadpool_limits
    with threadpool_limits(1, user_api="blas"):
        return median_time(run, 1)


def eigh_floor(model, ex, repeats):
    """Median time of scipy eigh over all sectors, H assembled beforehand (nothing else timed)."""
    eng = ExactEngine(model)
    coeffs, _ = eng._coefficients(ex, None)
    hs = [eng._sector_hamiltonian(k, coeffs) for k in range(len(eng.sectors))]

    def run():
        for h in hs:
            with blas_threads(h.shape[0]):
                sla.eigh(h, driver="evd")
    return median_time(run, repeats)


def signal_engine_built(model, ex, repeats):
    """Median time of a signal on an engine built beforehand (its spectrum cache emptied)."""
    eng = ExactEngine(model)

    def run():
        eng._cache.clear()
        eng.signal(ex)
    return median_time(run, repeats)


PEER_VERSION = ["?"]     # the peer's library versions, as its last run reported them


def peer_signal(python, model, ex, repeats):
    """(median seconds of one QuSpin signal, its signal) from benchmarks/quspin_peer.py."""
    coeffs = 2 * np.pi * model.values_hz * model.scale_factors(ex)
    idx = {lab: i for i, lab in enumerate(model.labels)}
    terms = [(p.kind, [idx[s] for s in p.spins], float(c)) for p, c in zip(model.parameters, coeffs) if c != 0]
    with tempfile.TemporaryDirectory() as tmp:
        case = os.path.join(tmp, "case.json")
        out = os.path.join(tmp, "signal.npy")
        with open(case, "w") as f:
            json.dump({"n": model.n_spins, "terms": terms, "times": list(map(float, ex.times_s)), "out": out}, f)
        env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1",
                   NUMBA_NUM_THREADS="1")
        env.pop("PYTHONPATH", None)
        r = subprocess.run([python, os.path.join(HERE, "quspin_peer.py"), case, str(repeats + 1)],
                           capture_output=True, text=True, env=env, cwd=tmp)
        if r.returncode:
            raise RuntimeError(r.stderr.strip().splitlines()[-1] if r.stderr.strip() else "peer failed")
        res = json.loads(r.stdout.strip().splitlines()[-1])
        laps = res["laps"][1:]                                            # first call compiles
        PEER_VERSION[0] = res.get("version", "?")
        return statistics.median(laps), np.load(out)


def scale_case(n, kind):
    """Run in a fresh process: time and peak RSS of one n-spin signal or full gradient."""
    c = bench_cluster(n)
    if kind == "eigh":
        from threadpoolctl import threadpool_limits
        eng = ExactEngine(build_model(c))
        coeffs, _ = eng._coefficients(c.experiments[0], None)
        hs = [eng._sector_hamiltonian(k, coeffs) for k in range(len(eng.sectors))]
        t0, c0 = time.perf_counter(), time.process_time()
        with threadpool_limits(1, user_api="blas"):
            for h in hs:
                sla.eigh(h, driver="evd")
        print(json.dumps({"n": n, "kind": kind, "seconds": time.perf_counter() - t0,
                          "cpu": time.process_time() - c0}))
        return
    c0 = time.process_time()
    t0 = time.perf_counter()
    prec = "single" if kind == "gradient-single" else "fast" if kind.endswith("-fast") else "double"
    eng = ExactEngine(build_model(c), precision=prec)
    ex = c.experiments[0]
    if kind.startswith("gradient"):
        eng.gradient(ex, method="full")
    else:
        eng.signal(ex)
    dt = time.perf_counter() - t0
    cpu = time.process_time() - c0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps({"n": n, "kind": kind, "seconds": dt, "cpu": cpu, "peak_mib": peak,
                      "parameters": len(eng.model.free)}))


def fresh(tree, n, kind):
    """scale_case in a fresh process on the qhl tree `tree`, one BLAS thread."""
    env = dict(os.environ, PYTHONPATH=tree, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1")
    r = subprocess.run([sys.executable, os.path.abspath(__file__), "--scale-case", str(n), kind],
                       capture_output=True, text=True, env=env)
    if r.returncode:
        raise RuntimeError(r.stderr.strip()[-400:])
    return json.loads(r.stdout.strip().splitlines()[-1])


def signal_at(n, against, quspin, repeats):
    """The n-spin signal side by side: eigh floor, this tree, `against`, the peer (medians)."""
    here = os.environ.get("PYTHONPATH", "").split(os.pathsep)[0] or os.path.dirname(HERE)
    c = bench_cluster(n)
    model = build_model(c)
    res = {"eigh floor (all sectors, H assembled beforehand)": [], "qhl signal (this tree)": [],
           "qhl signal, precision='fast' (float32 eigh)": []}
    if against:
        res[f"qhl signal ({against})"] = []
    if quspin:
        res["peer (QuSpin) signal"] = []
    for _ in range(repeats):
        res["eigh floor (all sectors, H assembled beforehand)"].append(fresh(here, n, "eigh"))
        res["qhl signal (this tree)"].append(fresh(here, n, "signal"))
        res["qhl signal, precision='fast' (float32 eigh)"].append(fresh(here, n, "signal-fast"))
        if against:
            res[f"qhl signal ({against})"].append(fresh(against, n, "signal"))
        if quspin:
            t, _ = peer_signal(quspin, model, c.experiments[0], 1)
            res["peer (QuSpin) signal"].append({"seconds": t, "cpu": float("nan")})
    print(f"{n} spins, 256 points, one BLAS thread, load average {os.getloadavg()[0]:.1f} on "
          f"{os.cpu_count()} cores; medians of {repeats} (qhl: engine construction included)")
    med = {k: (statistics.median(r["seconds"] for r in v), statistics.median(r["cpu"] for r in v))
           for k, v in res.items()}
    ref = med["qhl signal (this tree)"]
    print(f"  {'what':<52} {'wall (s)':>10} {'CPU (s)':>10} {'wall / this':>12} {'CPU / this':>11}")
    for k, (w, cpu) in med.items():
        print(f"  {k:<52} {w:10.2f} {cpu:10.2f} {w / ref[0]:12.2f} {cpu / ref[1]:11.2f}")


def gradient_at(n, against, quspin, repeats, double):
    """The n-spin full gradient side by side in fresh processes, interleaved rounds: this tree and
    `against` in precisions fast and single (and double with `double`); with the peer, its central
    differences as 2P signals (one signal timed in each round, times 2P; the per-round column is the median of the rounds' ratios)."""
    here = os.environ.get("PYTHONPATH", "").split(os.pathsep)[0] or os.path.dirname(HERE)
    kinds = ["gradient-fast", "gradient-single"] + (["gradient"] if double else [])
    trees = [("this tree", here)] + ([(against, against)] if against else [])
    res = {}
    c = bench_cluster(n)
    P = n * (n + 1) // 2
    peer_laps = []
    for _ in range(repeats):                 # interleaved rounds: the peer runs inside each round too
        for label, tree in trees:
            for kind in kinds:
                res.setdefault((kind, label), []).append(fresh(tree, n, kind))
        if quspin:
            peer_laps.append(2 * P * peer_signal(quspin, build_model(c), c.experiments[0], 1)[0])
    peer = statistics.median(peer_laps) if peer_laps else None
    print(f"{n} spins, 256 points, {P} parameters, one BLAS thread, load average {os.getloadavg()[0]:.1f} on "
          f"{os.cpu_count()} cores; medians of {repeats} fresh processes (engine construction included)")
    print(f"  {'what':<58} {'wall (s)':>9} {'CPU (s)':>9} {'peak MiB':>9} {'vs this':>8}"
          + (f" {'peer / it':>10} {'per round':>10}" if peer else ""))
    for kind in kinds:
        ref = statistics.median(r["seconds"] for r in res[(kind, "this tree")])
        for label, _ in trees:
            v = res[(kind, label)]
            w = statistics.median(r["seconds"] for r in v)
            cpu = statistics.median(r["cpu"] for r in v)
            mem = max(r["peak_mib"] for r in v)
            line = f"  {kind + ' (' + label + ')':<58} {w:9.2f} {cpu:9.2f} {mem:9.0f} {w / ref:8.2f}"
            if peer:
                # the median of the per-round ratios: each round's peer and qhl runs saw the same load
                per_round = statistics.median(q / r["seconds"] for q, r in zip(peer_laps, v))
                line += f" {peer / w:10.1f} {per_round:10.1f}"
            print(line)
    if peer:
        print(f"  peer (QuSpin) central differences, {2 * P} signals (one signal timed per round, "
              f"times {2 * P}): median {peer:.1f} s, rounds " + ", ".join(f"{x:.0f}" for x in peer_laps)
              + f"; peer: {PEER_VERSION[0]}")
    else:
        print("  peer column skipped: give --quspin-python (a Python with QuSpin installed)")


def weighted(sizes, quspin, reps):
    """Signal, full gradient and weighted gradient side by side (medians of `reps`)."""
    print(f"weighted gradient: 256 points, offsets + all dipolar couplings free; load average "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores; medians of {reps}; engine built beforehand")
    for n in sizes:
        c = bench_cluster(n)
        ex = c.experiments[0]
        model = build_model(c)
        P = len(model.free)
        eng = ExactEngine(model)
        cw = np.array([1.0, 1j]) @ np.random.default_rng(n).normal(size=(2, ex.points))
        out, laps = {}, {}
        runs = {"signal": lambda: eng.signal(ex), "full": lambda: eng.gradient(ex, method="full")[1],
                "weighted": lambda: eng.gradient_weighted(ex, cw)[1],
                "real": lambda: eng.gradient_weighted(ex, cw, real=True)[1]}
        eng.gradient(ex, times=ex.times_s[:2], method="full")       # builds the generator blocks once
        for _ in range(reps):                                         # interleaved rounds: load hits all alike
            for key, fun in runs.items():
                eng._cache.clear()
                t0 = time.perf_counter()
                out[key] = fun()
                laps.setdefault(key, []).append(time.perf_counter() - t0)
        t_sig, t_full, t_w, t_wr = (statistics.median(laps[k]) for k in ("signal", "full", "weighted", "real"))
        ref = out["full"] @ cw
        err = np.abs(out["weighted"] - ref).max() / np.abs(ref).max()
        err_r = np.abs(out["real"] - ref.real).max() / np.abs(ref.real).max()
        print(f"n = {n} ({P} parameters, load now {os.getloadavg()[0]:.1f}):")
        row("qhl signal", t_sig)
        row(f"qhl full gradient (Jacobian, {P} rows)", t_full, t_sig, "ratio to signal")
        row("qhl weighted gradient sum_t c_t dS/dh (complex)", t_w, t_sig,
            f"ratio to signal; full / weighted {t_full / t_w:.1f}; difference {err:.1e}")
        row("qhl weighted gradient, real part (likelihood)", t_wr, t_sig,
            f"ratio to signal; full / weighted {t_full / t_wr:.1f}; difference {err_r:.1e}")
        if quspin:
            try:
                t_peer, _ = peer_signal(quspin, model, ex, reps)
            except (OSError, RuntimeError) as e:
                print(f"  peer column skipped: {e}")
                continue
            row("peer (QuSpin) signal", t_peer, t_sig, "ratio to qhl signal")
            row(f"peer (QuSpin) central differences ({2 * P + 1} signals, scaled)", (2 * P + 1) * t_peer, t_wr,
                "ratio to qhl weighted (real part)")


def crossover():
    from threadpoolctl import threadpool_limits
    rng = np.random.default_rng(0)
    print(f"BLAS crossover (square float64 products, median of repeats; load {os.getloadavg()[0]:.1f}):")
    for d in (256, 512, 924, 1716, 2400):
        a, b = rng.standard_normal((d, d)), rng.standard_normal((d, d))
        res = {1: [], 2: []}
        for th in (1, 2, 1, 2):
            with threadpool_limits(th, user_api="blas"):
                res[th].append(median_time(lambda: a @ b, max(3, int(3e9 / (2 * d**3)))))
        t1, t2 = np.median(res[1]), np.median(res[2])
        print(f"  d = {d:5d}: one thread {t1 * 1e3:8.1f} ms, two {t2 * 1e3:8.1f} ms, two/one {t2 / t1:5.2f}")


def row(name, seconds, ref=None, note=""):
    ratio = f"{seconds / ref:8.2f}" if ref else " " * 8
    print(f"  {name:<52} {seconds:10.3f} s {ratio}  {note}")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="n = 8, fewer repeats")
    ap.add_argument("--n", type=int, default=None)
    ap.add_argument("--quspin-python", default=os.environ.get("QHL_QUSPIN_PYTHON"))
    ap.add_argument("--scale", action="store_true")
    ap.add_argument("--crossover", action="store_true")
    ap.add_argument("--scale-case", nargs=2, metavar=("N", "KIND"), help=argparse.SUPPRESS)
    ap.add_argument("--signal-at", type=int, default=None, metavar="N")
    ap.add_argument("--gradient-at", type=int, default=None, metavar="N")
    ap.add_argument("--double", action="store_true", help="with --gradient-at: also precision double")
    ap.add_argument("--against", default=None, metavar="DIR")
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--weighted", action="store_true")
    args = ap.parse_args()
    if args.weighted:
        weighted([args.n] if args.n else [10, 12], args.quspin_python, args.repeats)
        return
    if args.signal_at:
        signal_at(args.signal_at, args.against, args.quspin_python, args.repeats)
        return
    if args.gradient_at:
        gradient_at(args.gradient_at, args.against, args.quspin_python, args.repeats, args.double)
        return
    if args.scale_case:
        scale_case(int(args.scale_case[0]), args.scale_case[1])
        return
    if args.crossover:
        crossover()
        return
    n = args.n or (8 if args.quick else 10)
    reps = 3
    c = bench_cluster(n)
    ex = c.experiments[0]
    model = build_model(c)
    P = len(model.free)
    print(f"cluster: {n} protons, {ex.points} time points, {P} free parameters (offsets + dipolar); "
          f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores; medians of {reps}")
    t_eig = eigh_floor(model, ex, reps)
    t_sig = median_time(lambda: ExactEngine(model).signal(ex), reps)
    t_sig_built = signal_engine_built(model, ex, reps)
    grads = {}

    def grad(prec, method="full", times=None):
        def run():
            grads[(prec, method, None if times is None else len(times))] = \
                ExactEngine(model, precision=prec).gradient(ex, times=times, method=method)[1]
        return run

    t_gd = median_time(grad("double"), reps)
    t_gs = median_time(grad("single"), reps)
    few = ex.times_s[:: max(1, ex.points // 8)][:8]
    t_full8 = median_time(grad("double", "full", few), reps)
    t_adj8 = median_time(grad("double", "adjoint", few), reps)
    gd, gs = grads[("double", "full", None)], grads[("single", "full", None)]
    err_single = np.abs(gs - gd).max() / np.abs(gd).max()
    err_adj = (np.abs(grads[("double", "adjoint", 8)] - grads[("double", "full", 8)]).max()
               / np.abs(grads[("double", "full", 8)]).max())
    t_base_signal = baseline_signal_time(model, ex, BASELINE_STEPS) * (ex.points - 1) / BASELINE_STEPS
    peer = None
    if args.quspin_python:
        try:
            t_peer, s_peer = peer_signal(args.quspin_python, model, ex, reps)
            peer = (t_peer, np.abs(s_peer - ExactEngine(model).signal(ex)).max())
        except (OSError, RuntimeError) as e:
            print(f"  peer column skipped: {e}")
    print(f"{'':2}{'what':<52} {'median':>12} {'ratio':>8}")
    row("eigh floor (all sectors, H assembled beforehand)", t_eig, t_eig, "ratio to floor")
    row("qhl signal (engine construction included)", t_sig, t_eig, "ratio to floor")
    row("qhl signal (engine built beforehand)", t_sig_built, t_eig, "ratio to floor")
    row(f"qhl full gradient, double ({P} parameters)", t_gd)
    row("qhl full gradient, single", t_gs, t_gd, f"ratio to double; max error {err_single:.1e} of max |grad|")
    row("qhl gradient at 8 points, full path", t_full8)
    row("qhl gradient at 8 points, adjoint path", t_adj8, t_full8, f"ratio to full; difference {err_adj:.1e}")
    row(f"dense expm baseline gradient ({2 * P + 1} signals, scaled)", t_base_signal * (2 * P + 1), t_gd,
        "ratio to qhl double")
    if peer:
        t_peer, diff = peer
        row("peer (QuSpin) signal", t_peer, t_sig, f"ratio to qhl signal; |S_peer - S_qhl| {diff:.1e}")
        row(f"peer (QuSpin) central differences ({2 * P} signals, scaled)", 2 * P * t_peer, t_gd,
            "ratio to qhl double")
        row("  the same", 2 * P * t_peer, t_gs, "ratio to qhl single")
    elif not args.quspin_python:
        print("  peer column skipped: give --quspin-python (a Python with QuSpin installed)")
    if not args.scale:
        return
    for n_scale, kind in [(12, "gradient"), (12, "gradient-single"), (14, "signal")]:
        r = subprocess.run([sys.executable, __file__, "--scale-case", str(n_scale), kind],
                           capture_output=True, text=True, check=True)
        d = json.loads(r.stdout.strip().splitlines()[-1])
        print(f"scale: n = {d['n']} {d['kind']:<16} ({d['parameters']} parameters, 256 points): "
              f"{d['seconds']:.1f} s, peak memory {d['peak_mib']:.0f} MiB")
    if args.quspin_python:
        c14 = bench_cluster(14)
        t14, _ = peer_signal(args.quspin_python, build_model(c14), c14.experiments[0], 1)
        print(f"scale: n = 14 peer (QuSpin) signal: {t14:.1f} s")


if __name__ == "__main__":
    main()
