"""`qhl budget`: near-term shots and fault-tolerant resources to learn a cluster's Hamiltonian."""

import math
import sys

import numpy as np

from ..costing.shots import check_precision, check_time
from ..costing.surface_code import check_physical_error
from ..costing.noisy_shots import MITIGATIONS
from ..costing.synthesis import SYNTHESIS_METHODS
from ..base.errors import QhlInputError
from ..spins.parameter_names import DEFAULT_FREE
from .common import (CYCLE_TIME, FAILURE, ITERATIONS, PRECISION, PROBABILITY, SWEEP, TIME_S, add_cluster_argument,
                     add_report_argument, check_output_path, cluster_from_args, number_in, print_json,
                     report_if_asked, write_output)

# noise-aware near-term counts (qhl.costing.noisy_shots): depolarising parameters stay below 1
GATE_ERROR = number_in(0, 0.75, high_open=True, name="gate error")
READOUT_ERROR = number_in(0, 0.5, high_open=True, name="readout error")
MAX_SHOTS = number_in(1, 1e300, name="shot cap")
def register(sub):
    p = sub.add_parser("budget", help="near-term and fault-tolerant budgets (model-based) for learning a cluster")
    add_cluster_argument(p)
    p.add_argument("--time", type=TIME_S, default=None, metavar="T",
                   help="evolution time in seconds (default: the shortest window of an experiment that sees "
                        "every free parameter; 2e-4 s for the demo)")
    p.add_argument("--precision", type=PRECISION, default=0.01, metavar="EPS",
                   help="standard error per gradient component, derivatives per kHz (default 0.01)")
    p.add_argument("--sweep-time", type=SWEEP, metavar="A:B:N", help="log grid of N times from A to B seconds")
    p.add_argument("--sweep-precision", type=SWEEP, metavar="A:B:N", help="log grid of N precisions from A to B")
    p.add_argument("--plot", metavar="FILE.png", help="log-log plots of every budget (a default sweep if none given)")
    p.add_argument("--physical-error", type=PROBABILITY, default=None, metavar="P",
                   help="physical error rate for a surface-code estimate (below the 1%% threshold)")
    p.add_argument("--cycle-time", type=CYCLE_TIME, default=1e-6, metavar="S",
                   help="surface-code cycle time in seconds (default 1e-6)")
    p.add_argument("--failure-budget", type=FAILURE, default=0.01, metavar="F",
                   help="allowed failure probability of the fault-tolerant circuit (default 0.01)")
    p.add_argument("--synthesis", choices=SYNTHESIS_METHODS, default="ross-selinger",
                   help="rotation synthesis T-count rule (default ross-selinger)")
    p.add_argument("--iterations", type=ITERATIONS, default=50, help="learning iterations (default 50)")
    p.add_argument("--free", nargs="+", default=list(DEFAULT_FREE), metavar="PATTERN",
                   help="free parameters as glob patterns (default: offsets and dipolar couplings)")
    p.add_argument("--typical", action="store_true",
                   help="where the exact engine is skipped, estimate means with the pure-state engine "
                        "(estimated tier, error bars; slow: about 1 + P signals per time)")
    p.add_argument("--no-classical", action="store_true",
                   help="leave out the classical-cost meter (it measures this machine's rates, a few seconds)")
    p.add_argument("--clifford-t", metavar="FILE.qasm",
                   help="write one Trotter step, every rotation synthesised to Clifford+T, as OpenQASM 3")
    noisy = p.add_argument_group("noise-aware near-term shots (routed circuit, circuit fidelity F, shots / F^2)")
    noisy.add_argument("--target", default="all-to-all", metavar="NAME",
                       help="all-to-all (default), line, ring, grid, heavy-hex or an offline fake backend "
                            "(fake_brisbane, ...: its coupling map, native gates and calibrated errors)")
    noisy.add_argument("--gate-error", type=GATE_ERROR, default=None, metavar="P",
                       help="error per two-qubit gate (average infidelity); single-qubit P/10 unless --single-error")
    noisy.add_argument("--single-error", type=GATE_ERROR, default=None, metavar="P1",
                       help="error per single-qubit gate (default P/10)")
    noisy.add_argument("--readout-error", type=READOUT_ERROR, default=None, metavar="Q",
                       help="bit-flip probability of each measured qubit")
    noisy.add_argument("--mitigation", choices=MITIGATIONS, default="none",
                       help="error-mitigation sampling overhead: none (rescale by 1/F), pec or zne (default none)")
    noisy.add_argument("--max-shots", type=MAX_SHOTS, default=1e9, metavar="N",
                       help="shot cap for the largest useful evolution time (default 1e9)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    add_report_argument(p)
    p.set_defaults(func=run)


def parse_range(text, option):
    """'A:B:N' -> N log-spaced values from A to B (A, B > 0, A < B, N >= 2 an integer)."""
    parts = str(text).split(":")
    if len(parts) != 3:
        raise QhlInputError(f"expected A:B:N (start:stop:count), got {text!r}", key=option)
    try:
        a, b = float(parts[0]), float(parts[1])
        n = int(parts[2])
    except ValueError:
        raise QhlInputError(f"expected numbers A:B and an integer count N, got {text!r}", key=option) from None
    if not (math.isfinite(a) and math.isfinite(b)) or a <= 0 or b <= a or n < 2:
        raise QhlInputError(f"expected 0 < A < B and N >= 2, got {text!r}", key=option)
    return np.geomspace(a, b, n)


def _progress(msg):
    print(f"budget: {msg}", file=sys.stderr, flush=True)


def _fmt(v):
    if v is None:
        return "-"
    if isinstance(v, (int, np.integer)) or (isinstance(v, float) and v.is_integer() and abs(v) < 1e15):
        return f"{int(v):,}" if abs(v) < 1e7 else f"{float(v):.3e}"
    return f"{float(v):.3e}"


def run(args):
    from ..costing import BudgetModel, BudgetSettings
    check_precision(args.precision, "--precision")
    if args.time is not None:
        check_time(args.time, "--time")
    if args.physical_error is not None:
        check_physical_error(args.physical_error)
    if not 0 < args.failure_budget < 1:
        raise QhlInputError(f"expected a failure probability in (0, 1), got {args.failure_budget}", key="--failure-budget")
    times = parse_range(args.sweep_time, "--sweep-time") if args.sweep_time else None
    precs = parse_range(args.sweep_precision, "--sweep-precision") if args.sweep_precision else None
    if precs is not None:
        check_precision(precs, "--sweep-precision")
    if args.plot:
        check_output_path(args.plot, "--plot")
    if args.clifford_t:
        check_output_path(args.clifford_t, "--clifford-t")
    cluster = cluster_from_args(args)
    settings = BudgetSettings(iterations=args.iterations, synthesis=args.synthesis,
                              physical_error=args.physical_error, cycle_time_s=args.cycle_time,
                              failure_budget=args.failure_budget, classical_meter=not args.no_classical,
                              **_noise_settings(args))
    _progress(f"preparing {cluster.name}: {cluster.n_spins} spins")
    bm = BudgetModel(cluster, free=args.free, settings=settings, progress=_progress,
                     estimator="typical" if args.typical else None)
    for note in bm.notes:
        _progress(f"note: {note}")
    t = bm.default_time_s if args.time is None else args.time
    _progress(f"budget at t = {t:g} s, eps = {args.precision:g}")
    known = len(bm.notes)
    budget = bm.budget(t, args.precision)
    if args.clifford_t and getattr(bm, "spinning_only", False):
        _progress("note: --clifford-t writes a free-evolution step; every experiment of this cluster spins")
    elif args.clifford_t and bm.sequence_only:
        _progress("note: --clifford-t writes a free-evolution step; this cluster has sequence experiments only")
    elif args.clifford_t:
        from ..costing.synthesis import write_clifford_t_step
        ft = budget.fault_tolerant
        x = [e.name for e in bm.experiments].index(ft["worst_component"]["experiment"])
        step = []
        if write_output(args, "--clifford-t", args.clifford_t, lambda: step.append(write_clifford_t_step(
                bm.trotter[x].terms, ft["trotter_order"], budget.time_s / ft["trotter_steps"], ft["rotation_error"],
                args.clifford_t))):
            budget.fault_tolerant["clifford_t_step"] = step[0]
    for note in bm.notes[known:]:
        _progress(f"note: {note}")
    sweep = None
    if times is not None or precs is not None or args.plot:
        if times is None and precs is None:   # default grid for a plot
            times = np.geomspace(t / 10, t * 10, 20)
            precs = np.geomspace(args.precision / 10, min(args.precision * 10, 0.5), 20)
        times = np.array([t]) if times is None else times
        precs = np.array([args.precision]) if precs is None else precs
        _progress(f"sweeping {len(times)} x {len(precs)} (t, eps) points")
        sweep = bm.sweep(times, precs)
        if args.plot:
            from ..costing.budget_plots import plot_budget_sweep
            plotted = write_output(args, "--plot", args.plot, lambda: plot_budget_sweep(
                sweep, args.plot, int(np.argmin(abs(np.log(times / t)))),
                int(np.argmin(abs(np.log(precs / args.precision))))))
    out = budget.to_json()
    if sweep is not None:
        out["sweep"] = sweep.to_json()
    if args.plot and plotted:
        out["plot"] = args.plot
    report_if_asked(args, "budget", out, cluster.name, sweep=sweep)
    if args.json:
        print_json(out)
        return 0
    _print_budget(budget, bm)
    if sweep is not None:
        _print_sweep(sweep, t, args.precision)
    if args.plot and plotted:
        print(f"wrote {args.plot}")
    return 0


def _noise_settings(args):
    """BudgetSettings fields of the noise-aware options (absent in namespaces built without them)."""
    return {k: getattr(args, k) for k in ("target", "gate_error", "single_error", "readout_error", "mitigation",
                                          "max_shots") if getattr(args, k, None) is not None}


def _print_noisy(nt):
    r = nt.get("routing")
    if not r:
        print("noise-aware shots: not computed (give --target NAME or --gate-error P --readout-error Q)")
        return
    print(f"noise-aware ({r['target']}; error rates: {r['error_rates']}): {r['circuit']}, order "
          f"{r['trotter_order']}, r = {_fmt(r['trotter_steps'])} steps ({r.get('trotter_steps_source', 'commutator bound')})")
    if not r["computed"]:
        print(f"  {r['reason']}")
        return
    lay = ", ".join(f"{i}->{p}" for i, p in enumerate(r["layout"]))
    print(f"  routed: {_fmt(r['two_qubit'])} {r['two_qubit_gate']}, depth {_fmt(r['depth'])}, "
          f"{_fmt(r['swaps'])} SWAPs, {_fmt(r['rotations'])} rotations; per step {r['per_step']['two_qubit']} "
          f"{r['two_qubit_gate']}, {r['per_step']['swaps']} SWAPs; layout qubit->physical {lay} ({r['layout_method']})")
    print(f"  ({r['method']})")
    if nt.get("circuit_fidelity") is None:
        return
    m = nt["mitigation"]
    print(f"  circuit fidelity F = {nt['circuit_fidelity']:.3e} (log10 F = {r['log10_circuit_fidelity']:.4g}; gates "
          f"{r['gate_fidelity']:.3e}, readout {r['readout_fidelity']:.3e}): the signal shrinks by F")
    print(f"  shots per component, noisy (mitigation {m['method']}, x {_fmt(m['overhead'])} over the bound): "
          f"{_fmt(nt['shots_per_component_noisy'])}")
    tm = nt["max_useful_time_s"]
    print(f"  largest useful t under {_fmt(r['max_shots'])} shots: "
          + ("none on the grid" if tm is None else f"{tm:.3g} s (r = {_fmt(r['max_useful_trotter_steps'])} steps)"))
    print("  model: independent errors, global depolarising approximation (F = prod (1 - p_g) x readout); "
          "estimates, see --json 'assumptions'")


def _print_sequence_budget(b, bm):
    """Text of a budget whose every experiment has pulse-sequence steps (per component, worst experiment)."""
    nt = b.near_term
    print(f"budget for {b.cluster}: {bm.model.n_spins} spins, {len(bm.model.free)} free parameters, "
          f"t = {b.time_s:g} s after the sequence, eps = {b.precision:g} (per kHz)  [model-based estimates]")
    for name, blk in b.sequences.items():
        n, f = blk["near_term"], blk["fault_tolerant"]
        print(f"sequence '{name}': evolution {blk['evolution_time_s']:.4g} s (delays {blk['total_delay_s']:.4g} s), "
              f"worst component {n['worst_parameter']}, R = {n['component_range']:.4g}")
        print(f"  shots per component: {_fmt(n['shots_per_component'])} (R^2 - mu^2; bound R^2 "
              f"{_fmt(n['shots_per_component_bound'])}, Hoeffding {_fmt(n['shots_per_component_hoeffding'])}, "
              f"compiled estimator {_fmt(n['shots_per_component_circuit'])})")
        print(f"  gradient circuit: {_fmt(f['trotter_steps'])} Trotter steps (order {f['trotter_order']}), "
              f"{_fmt(f['gradient_circuit']['cx'])} CX, {_fmt(f['gradient_circuit']['rotations'])} rotations, "
              f"depth {_fmt(f['gradient_circuit']['depth'])}")
        print(f"  fault-tolerant: {_fmt(f['steps_whole_evolution'])} steps over the whole evolution, T-count "
              f"{_fmt(f['t_count'])}, gate layers {_fmt(f['depth'])}, {f['logical_qubits']} logical qubits")
    c = b.comparison
    print(f"worst: '{nt['experiment']}'; {'fault-tolerant' if c['fault_tolerant_cheaper'] else 'near-term'} is "
          "cheaper per component (total gate layers). Full-gradient, Hessian and learning-run numbers need a "
          "free-evolution experiment; see --json 'assumptions' and 'notes'")


def _print_spinning(b):
    """One block per spinning experiment (the 'spinning' entries)."""
    for e in b.spinning or ():
        c, g = e["signal_circuit"], e["gradient_circuit"]
        print(f"spinning '{e['name']}': {e['spinning_hz']:g} Hz at {e['angle_deg']:.4g} deg, t = {e['time_s']:g} s "
              f"({e['rotor_periods']:.3g} rotor periods)")
        print(f"  {e['trotter_steps']:,} Trotter steps, order {e['trotter_order']} ({e['steps_from']}; rule: "
              f"{e['steps_rule']})")
        print(f"  signal circuit: {c['qubits']} qubits, {_fmt(c['cx'])} CX, {_fmt(c['rotations'])} rotations, depth "
              f"{_fmt(c['depth'])}, T-count {_fmt(c['t_count'])} ({e['counts_method']})")
        print(f"  gradient circuit: {_fmt(g['cx'])} CX, {_fmt(g['rotations'])} rotations, depth {_fmt(g['depth'])}, "
              f"T-count {_fmt(g['t_count'])} (estimate)")
        n = e["near_term"]
        print(f"  worst gradient component {n['worst_parameter']}: range R = {n['component_range']:.4g}, shots "
              f"R^2/eps^2 {_fmt(n['shots_per_component_bound'])} (Hoeffding {_fmt(n['shots_per_component_hoeffding'])}; "
              f"bounds), compiled estimator's exact variance {_fmt(n['shots_per_component_circuit'])}"
              + (f", from the exact mean {n['mean']:.3g}: {_fmt(n['shots_per_component'])}" if n.get("mean") is not None
                 else ""))
        ae = (e.get("fault_tolerant") or {}).get("amplitude_estimation")
        if ae:
            print(f"  fault-tolerant estimate of {e['fault_tolerant']['parameter']} ({_fmt(e['fault_tolerant']['trotter_steps'])} "
                  f"steps: {e['fault_tolerant']['steps_from']}): {_fmt(ae['queries'])} queries x "
                  f"{ae['runs']} runs, T-count {_fmt(ae['t_count'])}, T-depth <= {_fmt(ae['t_depth_bound'])}, "
                  f"{ae['logical_qubits']} logical qubits (estimate)")
        if e.get("signal_error") and e["signal_error"]["value"] is not None:
            print(f"  signal error at {e['trotter_steps']:,} steps: {e['signal_error']['value']:.2g} "
                  f"({e['signal_error']['method']})")


def _print_spinning_budget(b, bm):
    """Text of a budget whose every experiment spins: the per-experiment circuit counts only."""
    print(f"budget for {b.cluster}: {bm.model.n_spins} spins, {len(bm.model.free)} free parameters, "
          f"t = {b.time_s:g} s, eps = {b.precision:g} (per kHz)  [model-based estimates]")
    _print_spinning(b)
    _print_classical(b)
    print("every experiment spins: Hessian, Fisher "
          "and learning-run numbers are not covered for spinning experiments (top-level --json keys empty)")
    for note in b.notes:
        print(f"note: {note}")


def _print_budget(b, bm):
    if getattr(bm, "spinning_only", False):
        return _print_spinning_budget(b, bm)
    if getattr(bm, "sequence_only", False):
        _print_sequence_budget(b, bm)
        _print_spinning(b)
        return None
    nt, ft = b.near_term, b.fault_tolerant
    print(f"budget for {b.cluster}: {bm.model.n_spins} spins, {len(bm.model.free)} free parameters, "
          f"t = {b.time_s:g} s, eps = {b.precision:g} (per kHz)  [model-based estimates]")
    w = ft["worst_component"]
    print(f"worst component: {w['parameter']} in '{w['experiment']}', single-shot range R = {w['range']:.4g}")
    print()
    mn = b.methods.get("near_term", {})
    rows = [
        ("shots per component", nt["shots_per_component"], nt["shots_per_component_bound"], "shots_per_component"),
        ("  (Hoeffding, delta = 0.05)", None, nt["shots_per_component_hoeffding"], "shots_per_component_hoeffding"),
        ("  compiled estimator's exact variance", nt.get("shots_per_component_circuit"), None,
         "shots_per_component_circuit"),
        ("shots per gradient, optimal", nt["shots_per_gradient"], nt["shots_per_gradient_bound"], "shots_per_gradient"),
        ("shots per gradient, uniform", nt["shots_per_gradient_uniform"], nt["shots_per_gradient_uniform_bound"],
         "shots_per_gradient_uniform"),
        ("shots per Hessian entry", nt["shots_per_hessian_entry"], nt["shots_per_hessian_entry_bound"],
         "shots_per_hessian_entry"),
        ("shots per full Hessian", None, nt["shots_per_hessian_bound"], "shots_per_hessian_bound"),
        ("shots per Fisher matrix", nt["shots_per_fisher"], nt["shots_per_fisher_bound"], "shots_per_fisher"),
        (f"shots per learning run ({nt['iterations']} it.)", nt["shots_per_learning_run"], None,
         "shots_per_learning_run"),
        (f"  with signals, {nt['learning_run']['method']} ({nt['learning_run']['evaluations']} eval.)",
         nt["learning_run"]["shots_total"], None, "learning_run"),
    ]
    print(f"{'near-term':<36}{'best':>16}{'bound R^2':>16}{'method':>10}")
    for name, a, c, key in rows:
        print(f"{name:<36}{_fmt(a):>16}{_fmt(c):>16}{mn.get(key) or '-':>10}")
    print("  best: R^2 - mu^2 with mu from the engine where it ran (method exact/estimated), else the bound R^2.")
    print("  A full gradient is a weighted mean of all components (weights summing to 1), so its shots can be")
    print("  fewer than one worst component's: earlier times and smaller couplings have smaller ranges.")
    _print_noisy(nt)
    print()
    print(f"{'fault-tolerant (per component)':<36}{'chosen':>16}" + "".join(f"{'order ' + p:>14}" for p in ft["orders"])
          + f"  {'method'}")
    prow = [("Trotter steps r", "trotter_steps", "steps"),
            ("  from the commutator bound", None, "steps_trotter_bound"),
            ("  exact propagator (same error)", None, "steps_trotter_empirical"),
            ("  signal and gradient error at t", None, "steps_trotter_signal"),
            ("  from the time quadrature", None, "steps_quadrature"),
            ("AE queries M", "queries", "queries"),
            ("depth (Trotter steps)", "depth_trotter_steps", "depth_steps"),
            ("depth (gate layers)", "depth", "gate_layers"),
            ("T-depth (T layers)", "t_depth", "t_depth"),
            ("rotations", "rotations", "rotations"),
            ("T-count", "t_count", "t_count"),
            ("logical qubits", "logical_qubits", "logical_qubits")]
    mf = b.methods.get("fault_tolerant", {})
    how = {"trotter_steps": mf.get("commutator_sums"), "steps_trotter": mf.get("commutator_sums"),
           "steps_trotter_empirical": "exact", "steps_trotter_signal": "exact", "steps_quadrature": mf.get("quadrature_sums"),
           "depth": f"bound, {mf.get('gate_counts_per_step')}", "rotations": f"bound, {mf.get('gate_counts_per_step')}"}
    for name, key, okey in prow:
        chosen = ft[key] if key else None
        values = [o.get(okey) for o in ft["orders"].values()]
        method = (how.get(key or okey) or mf.get(key or okey) or "bound") \
            if chosen is not None or any(v is not None for v in values) else "-"
        print(f"{name:<36}{_fmt(chosen):>16}" + "".join(f"{_fmt(v):>14}" for v in values) + f"  {method}")
    print(f"chosen Trotter order {ft['trotter_order']} (steps from the {ft['trotter_steps_source']}); "
          f"{ft['t_per_rotation']:.0f} T per rotation measured by gridsynth (rule 3 log2(1/eps): "
          f"{ft['t_per_rotation_rule']:.0f}; rotation error {ft['rotation_error']:.2e}); T-depth per step "
          f"{ft['step_t_depth']} ({ft['step_rotation_depth']} rotations on the critical path); AE success >= "
          f"{ft['success_probability']:.3f} per run, {ft['median_repetitions']} runs for 95% (in the totals)")
    if ft.get("gradient"):
        g = ft["gradient"]
        print(f"full gradient (coherent sums): T-count {_fmt(g['t_count'])}, gate layers {_fmt(g['gate_layers'])}, "
              f"logical qubits {int(g['logical_qubits'])}")
    e = b.error_budget
    print(f"error budget: Trotter {e['trotter']:.3g} + synthesis {e['synthesis']:.3g} + estimation {e['estimation']:.3g}"
          f" = {b.precision:g}")
    c = b.comparison
    nt_layers = c.get("near_term_total_layers_per_component_circuit") or c["near_term_total_layers_per_component"]
    print(f"total gate layers executed per component: near-term {_fmt(nt_layers)}"
          f" (shots x {_fmt(c['near_term_layers_per_shot'])}), fault-tolerant "
          f"{_fmt(c['fault_tolerant_total_layers_per_component'])}: "
          f"{'fault-tolerant' if c['fault_tolerant_cheaper'] else 'near-term'} is cheaper per component")
    if c.get("fault_tolerant_total_layers_per_gradient") is not None:
        print(f"total gate layers per full gradient: near-term {_fmt(c['near_term_total_layers_per_gradient'])}, "
              f"fault-tolerant {_fmt(c['fault_tolerant_total_layers_per_gradient'])}: "
              f"{'fault-tolerant' if c['fault_tolerant_cheaper_per_gradient'] else 'near-term'} is cheaper per gradient")
    ph = b.precision_hz
    if ph:
        print(f"precision: eps = {b.precision:g} per kHz = {ph['derivative_error_per_hz']:.3g} per Hz on each dS/dh; "
              f"it resolves parameter changes of about {ph['value']:.3g} Hz (eps / |d2S/dh2| of the worst entry, "
              f"{ph['method']})")
    if b.surface_code:
        s = b.surface_code
        print(f"surface code at p = {s['physical_error']:g}: distance {s['code_distance']}, "
              f"{_fmt(s['physical_qubits'])} physical qubits ({s['factories']} factories, "
              f"{s['distillation_levels']} distillation level(s)), wall time {s['wall_time_s']:.3g} s "
              f"at {s['cycle_time_s']:g} s per cycle (limited by {s['limited_by']})")
    if ft.get("clifford_t_step"):
        c = ft["clifford_t_step"]
        print(f"wrote {c['path']}: one Clifford+T Trotter step, T-count {c['t_count']}, T-depth {c['t_depth']}")
    print("tiers: " + ", ".join(f"{k} {v}" for k, v in b.tiers.items()))
    for note in b.notes:
        print(f"note: {note}")
    _print_classical(b)
    _print_spinning(b)
    print(f"{len(b.assumptions)} assumptions with sources: qhl budget --json (key 'assumptions')")


def _print_classical(b):
    """The classical-cost meter's lines (the 'classical' entry), where the budget has one."""
    if not b.classical:
        return
    c = b.classical
    print(f"classical simulation (estimate, {c['method']}): {c['memory_bytes'] / 2**30:.3g} GiB, "
          f"{_duration(c['seconds'])} on this machine: {'feasible here' if c['feasible_here'] else 'not feasible here'}"
          + (f" ({c['covers']})" if c.get("covers") else ""))
    if c.get("crossover_spins"):
        print(f"  at this density of couplings, exact classical simulation exceeds a day and 1 TiB from "
              f"{c['crossover_spins']} spins: the size from which a quantum computer is needed")


def _duration(seconds):
    for unit, size in (("years", 3.15576e7), ("days", 86400.0), ("h", 3600.0), ("min", 60.0)):
        if seconds >= size:
            return f"{seconds / size:.3g} {unit}"
    return f"{seconds:.3g} s"


def _print_sweep(sw, t, eps):
    i = int(np.argmin(abs(np.log(sw.times / t))))
    j = int(np.argmin(abs(np.log(sw.precisions / eps))))
    cols = [("NT comp.", "near_term_component_bound"), ("NT comp. ex", "near_term_component_exact"),
            ("NT grad", "near_term_gradient_exact"), ("NT Hess.", "near_term_hessian_entry_bound"),
            ("FT steps", "fault_tolerant_trotter_steps"), ("FT depth", "fault_tolerant_depth"),
            ("FT T", "fault_tolerant_t_count")]
    for axis, values, cut, label in (("t (s)", sw.times, lambda a: a[:, j], f"eps = {sw.precisions[j]:.3g}"),
                                     ("eps", sw.precisions, lambda a: a[i, :], f"t = {sw.times[i]:.3g} s")):
        if len(values) < 2:
            continue
        print()
        print(f"sweep over {axis} at {label}")
        print(f"{axis:>11}{'order':>6}" + "".join(f"{c:>12}" for c, _ in cols))
        orders = cut(sw.orders)
        for k, v in enumerate(values):
            print(f"{v:>11.3e}{int(orders[k]):>6}" + "".join(f"{float(cut(sw.tables[key])[k]):>12.3e}" for _, key in cols))
    print()
    print(f"{'fitted scaling exponents':<32}{'t':>8}{'expected':>10}{'eps':>8}{'expected':>10}")
    for name, (bt, be, et, ee) in sw.exponents.items():
        print(f"{name:<32}{bt:>8.2f}{et:>10.2f}{be:>8.2f}{ee:>10.2f}")
    wins = [c for c in sw.crossover if c["largest_precision_ft_cheaper"] is not None]
    if len(sw.precisions) > 1:
        if wins:
            print("crossover: fault-tolerant cheaper (total layers) for eps below "
                  + ", ".join(f"{c['largest_precision_ft_cheaper']:.2e} at t = {c['time_s']:.2e} s"
                              for c in wins[:: max(1, len(wins) // 4)]))
        else:
            print("crossover: near-term cheaper everywhere on the grid")
