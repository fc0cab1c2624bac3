"""Routing benchmark: the demo's near-term circuit routed on a 127-qubit offline fake backend.

What is timed (one run, the issue's goal: under 30 s in all):
    whole     the demo's Hadamard-test gradient circuit (worst component dipolar:H1-H2, second order,
              two Trotter steps) routed with qhl.circuits.routing.route_circuit: every seed tried with
              qiskit's layout, the greedy layout as a Sabre starting layout, and the greedy layout fixed;
    budget    the routing the budget does (one- and two-step members, qhl.circuits.routing.routed_step_counts).
Prints the seconds, the tries and the kept counts beside the all-to-all count. Usage:
    python benchmarks/bench_routing.py [--target fake_brisbane] [--seeds N]
"""

import argparse
import time
import warnings

from qhl import demo_cluster
from qhl.circuits.circuit_counts import circuit_counts
from qhl.circuits.gradient_circuits import gradient_circuit
from qhl.circuits.routing import DEFAULT_SEEDS, route_circuit, routed_step_counts
from qhl.circuits.targets import backend_names, resolve_target
from qhl.spins.model import build_model

GOAL_S = 30.0


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--target", default="fake_brisbane")
    ap.add_argument("--seeds", type=int, default=len(DEFAULT_SEEDS))
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    if args.target.startswith("fake_") and args.target not in backend_names():
        raise SystemExit(f"{args.target} needs qiskit-ibm-runtime (pip install 'qhl[device]')")
    c = demo_cluster()
    m = build_model(c)
    ex = c.experiments[0]
    fam = gradient_circuit(m, ex, "dipolar:H1-H2", 2e-5, 2, 2)
    qc = fam.with_measurements(fam.representative())
    seeds = tuple(range(11, 11 + 12 * args.seeds, 12))
    t0 = time.perf_counter()
    target = resolve_target(args.target, qc.num_qubits)
    t_resolve = time.perf_counter() - t0
    t0 = time.perf_counter()
    r = route_circuit(qc, target, seeds=seeds)
    t_whole = time.perf_counter() - t0
    t0 = time.perf_counter()
    est = routed_step_counts(lambda k: gradient_circuit(m, ex, "dipolar:H1-H2", k * 1e-5, k, 2), 2, target,
                             seeds=seeds)
    t_budget = time.perf_counter() - t0
    base = circuit_counts(qc)
    print(f"target {target.name}: {target.num_qubits} qubits; circuit {qc.num_qubits} qubits, all-to-all {base.cx} cx, "
          f"depth {base.depth}")
    print(f"resolve target (fake provider load)  {t_resolve:8.2f} s")
    print(f"route + layout search, whole circuit {t_whole:8.2f} s  ({len(r.tries)} tries: {len(seeds)} seeds x 3 layouts)")
    print(f"budget routing (one + two steps)     {t_budget:8.2f} s")
    total = t_resolve + t_whole + t_budget
    print(f"total                                {total:8.2f} s  (goal < {GOAL_S:g} s: "
          f"{'met' if total < GOAL_S else 'NOT met'})")
    print(f"kept: {r.two_qubit} {r.two_qubit_gate} (x{r.two_qubit / base.cx:.2f} all-to-all), depth {r.depth}, "
          f"{r.swaps} SWAPs, layout {r.layout} ({r.layout_method}, seed {r.seed})")
    by = {}
    for method, seed, two in r.tries:
        by.setdefault(method, []).append(two)
    print("best two-qubit count per layout method: " + ", ".join(f"{k} {min(v)}" for k, v in by.items()))
    print(f"budget extrapolation at 2 steps: {est['two_qubit']:.0f} two-qubit gates")


if __name__ == "__main__":
    main()
