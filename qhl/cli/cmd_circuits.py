"""`qhl circuits`: compile the signal, gradient or Hessian circuit family and count its gates."""

import sys
from pathlib import Path

from ..base.errors import QhlInputError
from .common import (STEPS, TIME_S, TROTTER_EPS, add_cluster_argument, check_output_path, check_steps,
                     cluster_from_args, print_json, write_output)

KINDS = ("signal", "gradient", "hessian")
_LARGE = 2000


def register(sub):
    p = sub.add_parser("circuits", help="compile signal/gradient/Hessian circuits and count their gates")
    add_cluster_argument(p)
    p.add_argument("--kind", choices=KINDS, default="signal", help="which circuit family (default signal)")
    p.add_argument("--param", nargs="+", metavar="NAME", default=None,
                   help="parameter to differentiate (gradient: one; hessian: one or two names)")
    p.add_argument("--time", type=TIME_S, required=True, metavar="T", help="evolution time in seconds")
    how = p.add_mutually_exclusive_group()
    how.add_argument("--steps", type=STEPS, metavar="R", help="Trotter steps (or --eps; not both)")
    how.add_argument("--eps", type=TROTTER_EPS, metavar="EPS",
                     help="instead of --steps: fewest steps whose commutator bound is <= EPS")
    p.add_argument("--order", type=int, choices=(1, 2), default=1, help="product-formula order (default 1)")
    p.add_argument("--experiment", metavar="NAME", help="experiment setting the dipolar scale (default: first)")
    p.add_argument("--method", choices=("hadamard", "shift"), default="hadamard",
                   help="gradient estimator: Hadamard test or stochastic parameter shift (default hadamard)")
    p.add_argument("--grouping", choices=("pairs", "offsets", "layers"), default="pairs",
                   help="how terms are grouped into product-formula terms (default pairs)")
    p.add_argument("--ordering", choices=("offsets-first", "offsets-last"), default="offsets-first",
                   help="term order (default offsets-first)")
    p.add_argument("--target", default="all-to-all", metavar="NAME",
                   help="also route for a target: line, ring, grid, heavy-hex or an offline fake backend "
                        "(fake_brisbane, ...); default all-to-all (no routing)")
    p.add_argument("--qasm", metavar="FILE", help="write the counted (transpiled) circuit as OpenQASM 3")
    p.add_argument("--draw", action="store_true", help="print a text drawing of a one-step instance")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=run)


def _experiment(cluster, name):
    if name is None:
        return cluster.experiments[0] if cluster.experiments else None
    return cluster.experiment(name)


def _parameters(kind, names):
    if kind == "signal":
        if names:
            raise QhlInputError("--kind signal differentiates nothing: --param is for --kind gradient or hessian",
                                key="--param")
        return ()
    if not names:
        raise QhlInputError(f"--kind {kind} needs --param NAME", key="--param")
    if kind == "gradient" and len(names) != 1:
        raise QhlInputError(f"--kind gradient takes one --param name, got {len(names)}", key="--param")
    if kind == "hessian":
        if len(names) > 2:
            raise QhlInputError(f"--kind hessian takes one or two --param names, got {len(names)}", key="--param")
        return (names[0], names[-1])
    return tuple(names)


def bound_notes(bound: float) -> list:
    """A note when the commutator bound exceeds 1: ||U_trot - U|| <= 2 always, so such a bound
    says nothing about the error (spectral norm of a difference of unitaries; common practice)."""
    if bound > 1:
        return [f"the Trotter error bound {bound:.3g} is above 1 and says nothing (any two unitaries differ "
                f"by at most 2 in norm): use more --steps, --order 2 or --eps"]
    return []


def build_family(model, experiment, kind, params, time, steps, order, method, grouping, ordering):
    """The CircuitFamily the command counts (a thin switch over qhl.circuits.gradient_circuits)."""
    from ..circuits.gradient_circuits import gradient_circuit, hessian_circuit, signal_circuit
    from ..spins.spinning import is_spinning
    common = dict(grouping=grouping, ordering=ordering)
    if experiment is not None and is_spinning(experiment):      # time-dependent circuits (spinning_circuits)
        from ..circuits.spinning_circuits import spinning_gradient_circuit, spinning_signal_circuit
        if kind == "hessian" or method == "shift":
            raise QhlInputError(f"experiment '{experiment.name}' spins: its circuits are the signal and the "
                                "Hadamard-test gradient (no --kind hessian, no --method shift)", key="--kind")
        if kind == "signal":
            return spinning_signal_circuit(model, experiment, time, steps, order, **common)
        return spinning_gradient_circuit(model, experiment, params[0], time, steps, order, **common)
    if kind == "signal":
        return signal_circuit(model, experiment, time, steps, order, **common)
    if kind == "gradient":
        return gradient_circuit(model, experiment, params[0], time, steps, order, method=method, **common)
    return hessian_circuit(model, experiment, params, time, steps, order, **common)


def _print_routed(target, routed):
    w = routed["whole"]
    print()
    print(f"routed for {target.name} ({target.num_qubits} qubits, native two-qubit gate {w.two_qubit_gate}; "
          f"preset pass manager, level 2, best of {len(w.tries)} tries)")
    print(f"{'':<18}{'2q gates':>9}{'depth':>8}{'swaps':>7}{'rotations':>11}  layout")
    for label, c in (("whole circuit", w), ("one Trotter step", routed["per_step"])):
        lay = " ".join(f"{i}->{p}" for i, p in enumerate(c.layout))
        print(f"{label:<18}{c.two_qubit:>9}{c.depth:>8}{c.swaps:>7}{c.rotations:>11}  {lay} ({c.layout_method}, "
              f"seed {c.seed})")
    print("layout: circuit qubit -> physical qubit (spins first, then ancillas); swaps: inserted by the router")


def run(args):
    from ..spins.model import build_model
    from qiskit import qasm3

    from ..circuits.circuit_counts import family_counts, transpile_for_counts
    from ..circuits.trotter import trotter_terms
    from ..circuits.trotter_bounds import trotter_error_bound, trotter_steps_for

    from ..circuits.targets import resolve_target
    from ..spins.spinning import is_spinning

    if args.qasm:
        check_output_path(args.qasm, "--qasm")
    target_name = getattr(args, "target", "all-to-all")
    resolve_target(target_name, 1, key="--target")           # an unknown name fails before any work
    cluster = cluster_from_args(args)
    experiment = _experiment(cluster, args.experiment)
    model = build_model(cluster)
    params = _parameters(args.kind, args.param)
    for name in params:
        model.parameter(name)
    spinning = experiment is not None and is_spinning(experiment)
    if spinning:
        # the bound of H with every coupling at its largest rotor factor (qhl.costing.trotter_cost.rotor_bound_model;
        # the Magnus error of the time dependence is not in it); r at least the rotor rule
        from ..circuits.spinning_circuits import steps_rule
        from ..costing.trotter_cost import rotor_bound_model
        terms = rotor_bound_model(model, experiment).terms
    else:
        terms = trotter_terms(model, experiment, grouping=args.grouping, ordering=args.ordering)
    if args.steps is None:
        if args.eps is None:
            raise QhlInputError("give --steps R or --eps EPS", key="--steps")
        steps = trotter_steps_for(terms, args.time, args.eps, args.order)
        if spinning:
            steps = steps_rule(experiment.spinning_hz, args.time, steps)
        check_steps(steps, "--eps")
    else:
        steps = args.steps
        if spinning and steps_rule(experiment.spinning_hz, args.time, steps) > steps:
            # the README's rule r = max(requested, ceil(8 nu_r t)) holds for a requested r too
            raised = check_steps(steps_rule(experiment.spinning_hz, args.time, steps), "--steps")
            print(f"qhl: note: --steps {steps} raised to {raised} by the rotor rule (8 steps per rotor period at "
                  f"{experiment.spinning_hz:g} Hz over {args.time:g} s)", file=sys.stderr)
            steps = raised
    family = build_family(model, experiment, args.kind, params, args.time, steps, args.order, args.method,
                          args.grouping, args.ordering)
    if family.circuit.size() > _LARGE:
        print(f"qhl circuits: transpiling {family.circuit.size()} gates on {family.circuit.num_qubits} qubits",
              file=sys.stderr)
    measured = family.with_measurements(family.representative())
    transpiled = transpile_for_counts(measured)
    counts = family_counts(family, transpiled)
    routed = None
    width, spins = family.circuit.num_qubits, model.n_spins
    target = resolve_target(target_name, width, key="--target", what=f"{spins} spins + {width - spins} ancillas")
    if not target.all_to_all:
        from ..circuits.routing import routed_family_counts
        print(f"qhl circuits: routing for {target.name} ({target.num_qubits} qubits)", file=sys.stderr)
        routed = routed_family_counts(family, target)
    bound = trotter_error_bound(terms, args.time, steps, args.order)
    notes = bound_notes(bound)
    if spinning:
        notes.append(f"spinning at {experiment.spinning_hz:g} Hz: time-dependent Trotter circuits (step-averaged "
                     "couplings); the bound is that of every coupling at its largest rotor factor and leaves out the "
                     "Magnus error of the time dependence (rotor rule: 8 steps per period)")
    for note in notes:
        print(f"qhl: note: {note}", file=sys.stderr)
    text = qasm3.dumps(transpiled) if args.qasm else None
    wrote = bool(args.qasm) and write_output(args, "--qasm", args.qasm,
                                             lambda: Path(args.qasm).write_text(text, encoding="utf-8"))
    drawing = None
    if args.draw:
        small = build_family(model, experiment, args.kind, params, args.time / steps, 1, args.order, args.method,
                             args.grouping, args.ordering)
        drawing = str(small.representative().draw(output="text"))
    if args.json:
        report = dict(counts)
        report.update({"kind": family.kind, "parameters": list(params), "time_s": args.time, "order": args.order,
                       "experiment": None if experiment is None else experiment.name,
                       "insertion_settings": len(family.insertions), "trotter_error_bound": bound,
                       "notes": notes})
        if wrote:
            report["qasm"] = args.qasm
        if drawing is not None:
            report["drawing"] = drawing
        if routed is not None:
            report["routing"] = {"target": target.name, "whole": routed["whole"].to_dict(),
                                 "per_step": routed["per_step"].to_dict()}
        print_json(report)
        return 0
    what = family.kind if not params else f"{family.kind} for {' x '.join(dict.fromkeys(params))}"
    exname = "none (dipolar scale 1)" if experiment is None else experiment.name
    print(f"cluster {cluster.name}: {what}; experiment {exname}")
    print(f"t = {args.time:g} s, r = {steps} steps, order {args.order}, grouping {args.grouping}, "
          f"commutator bound on the Trotter error {bound:.3g}")
    print(f"insertion settings {len(family.insertions)}, circuit parameters {family.num_parameters}")
    print(f"{'':<18}{'qubits':>7}{'cx':>8}{'depth':>8}{'rotations':>11}")
    for label, c in (("whole circuit", counts), ("one Trotter step", counts["per_step"])):
        print(f"{label:<18}{c['qubits']:>7}{c['cx']:>8}{c['depth']:>8}{c['rotations']:>11}")
    print("counts after transpile to [cx, rz, sx, x] at optimisation level 2; "
          "rotations = rz angles that are not multiples of pi/2")
    if routed is not None:
        _print_routed(target, routed)
    if drawing is not None:
        print()
        print(drawing)
    if wrote:
        print(f"wrote {args.qasm}")
    return 0
