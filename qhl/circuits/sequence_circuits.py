"""Signal circuits of pulse-sequence experiments: Trotterised delays, ideal pulses, then the acquisition.

The experiment (qhl.spins.cluster.Experiment with `steps`) prepares rho_prep = W rho0 W^dag before
the acquisition; qhl.exact.sequence_engine computes its signal exactly. The circuit replaces each
factor of W by what a quantum computer runs (qubit i = spin i, steps in the order they act):
    Delay(tau)                 U_trot(tau) = S(tau / r_d)^{r_d}, the same product formula (order,
                               grouping, ordering; qhl.circuits.trotter) as the acquisition;
    Pulse(theta, phi, iso)     R = exp(-i theta sum_k (cos phi Ix_k + sin phi Iy_k)) over the pulsed
                               spins = one qiskit RGate(theta, phi) per pulsed qubit, since
                               RGate(theta, phi) = exp(-i theta/2 (cos phi X + sin phi Y)) (qiskit
                               circuit library documentation) and I = sigma/2: the angles map one to
                               one (tests/test_sequence_circuits.py checks the matrix against scipy).
Then the acquisition U_trot(t) with `steps` steps, and the read-out of the signal family
(qhl.circuits.gradient_circuits.signal_circuit: input states of qhl.circuits.state_prep, observable
sum_j X_j/2 or Y_j/2 on the observed spins), so the family's weighted expectation is
    S_trot(t) = Tr[O U_trot(t) W_trot rho0 W_trot^dag U_trot(t)^dag] / Tr[O rho0].
Assumptions: ideal (instantaneous) pulses, exact as single-qubit rotations; delays carry the only
Trotter error of the preparation, with the acquisition's product formula.

Steps per delay (`delay_steps`): an integer for every delay, a sequence with one integer per delay
(delays in the order they act, repeats unrolled), or None: proportional to the delay's length,
r_d = max(1, ceil(tau / dt)) with dt = `step_s` or, by default, the acquisition's step t / steps
(so halving dt halves every step length of the whole circuit).

Gradient families (`sequence_gradient_circuit`, Hadamard test). Pulses carry no parameter, so by the
product rule over the factors of U_trot(t) W_trot, dS_trot/dh_n is the sum over every Trotterised
segment (each delay and the acquisition) of that segment's insertion-point sum, exactly as for the
free evolution (qhl.circuits.gradient_circuits): an insertion point a = (segment, slot s, Pauli k) has
beta_a = tau_s 2 pi s_n g_{n,k} with tau_s the slot length of its own segment, the controlled Pauli
is placed right after its block inside that segment, and
    dS_trot/dh_n = sum_segments sum_a (2 beta_a) <Y (x) A>_a .
These are exact derivatives of the Trotterised sequence signal (not of the exact one; they converge
to qhl.exact.sequence_engine's gradient as every step length shrinks).
"""

import dataclasses
import math

import numpy as np
from qiskit import QuantumCircuit
from qiskit.circuit import Parameter, ParameterVector

from ..base.errors import QhlInputError
from ..exact.sequence_engine import _pulse_qubits
from ..spins.cluster import Delay, Pulse, flat_steps, has_finite_pulses
from .circuit_family import CircuitFamily, InsertionTable, count_build
from .gradient_circuits import (_ancilla_phase, _controlled_pauli, _evolve, _prepare, _read_out, _require_points,
                                _system_observable, insertion_points)
from .state_prep import input_ensemble
from .trotter import check_evolution_arguments, product_formula_slots, trotter_circuit, trotter_terms

__all__ = ["PlannedDelay", "PlannedPulse", "sequence_plan", "acquisition_terms", "append_pulse",
           "preparation_circuit", "sequence_signal_circuit", "sequence_segments", "sequence_insertion_points",
           "sequence_gradient_circuit", "sequence_counts", "pulse_counts", "PULSE_LAYERS",
           "ASSUMPTIONS"]

PULSE_LAYERS = 5     # RGate in [cx, rz, sx, x]: rz sx rz sx rz at most (common practice; tested on transpiles)

ASSUMPTIONS = ("ideal (instantaneous) pulses compiled exactly as single-qubit rotations RGate(theta, phi) on the "
               "pulsed isotope's qubits; each delay Trotterised with the acquisition's product formula and order")


@dataclasses.dataclass(frozen=True)
class PlannedDelay:
    """A delay of `seconds` compiled as `steps` product-formula steps."""

    seconds: float
    steps: int


@dataclasses.dataclass(frozen=True)
class PlannedPulse:
    """An ideal pulse: RGate(theta, phi) on each of `qubits` (angles in radians)."""

    theta: float
    phi: float
    qubits: tuple


def acquisition_terms(model, experiment, values_hz=None, grouping="pairs", ordering="offsets-first"):
    """TrotterTerms of the experiment's Hamiltonian (its dipolar scale), the same during delays and
    the acquisition; the steps themselves are compiled by this module, not by trotter_terms."""
    bare = None if experiment is None else dataclasses.replace(experiment, steps=())
    return trotter_terms(model, bare, values_hz, grouping, ordering)


def sequence_plan(model, experiment, time: float, steps: int, delay_steps=None, step_s=None) -> list:
    """The preparation of `experiment` as PlannedDelay / PlannedPulse in the order they act.

    Args:
        model: HamiltonianModel (isotopes of the pulsed spins).
        experiment: an Experiment with steps (none: an empty plan).
        time, steps: the acquisition's t and r (set the default step length t / r).
        delay_steps: None, an int or one int per delay (module docstring).
        step_s: the step length of proportional delays (default t / r).

    Raises:
        QhlInputError: bad delay_steps / step_s, or proportional delays with no step length (t = 0
            and no step_s).
    """
    flat = flat_steps(getattr(experiment, "steps", ()) or ())
    if has_finite_pulses(experiment):
        raise QhlInputError(f"experiment '{experiment.name}' has finite pulses (duration_s): the circuits compile "
                            "ideal pulses only (the exact engine covers finite ones)", key="experiment.step.duration_s")
    delays = [st for st in flat if isinstance(st, Delay)]
    if delay_steps is None:
        dt = step_s if step_s is not None else (time / steps if time > 0 else None)
        if dt is None or not np.isfinite(dt) or dt <= 0:
            if delays:
                raise QhlInputError(f"expected a step length > 0 s for the delays (step_s), got {dt!r}: "
                                    "give step_s or delay_steps when the acquisition time is 0", key="step_s")
            counts = []
        else:
            counts = [max(1, math.ceil(d.seconds / dt * (1 - 1e-12))) for d in delays]
    elif np.ndim(delay_steps) == 0:
        counts = [delay_steps] * len(delays)
    else:
        counts = list(delay_steps)
        if len(counts) != len(delays):
            raise QhlInputError(f"expected one step count per delay ({len(delays)}), got {len(counts)}",
                                key="delay_steps")
    for c in counts:
        if isinstance(c, bool) or int(c) != c or c < 1:
            raise QhlInputError(f"expected an integer number of steps >= 1 per delay, got {c!r}", key="delay_steps")
    out, k = [], 0
    for st in flat:
        if isinstance(st, Delay):
            out.append(PlannedDelay(float(st.seconds), int(counts[k])))
            k += 1
        elif isinstance(st, Pulse):
            out.append(PlannedPulse(float(np.deg2rad(st.angle_deg)), float(np.deg2rad(st.phase_deg)),
                                    tuple(_pulse_qubits(model, st.isotope))))
    return out


def append_pulse(qc: QuantumCircuit, pulse: PlannedPulse) -> None:
    """exp(-i theta sum_k (cos phi Ix_k + sin phi Iy_k)) as one r(theta, phi) per pulsed qubit."""
    for q in pulse.qubits:
        qc.r(pulse.theta, pulse.phi, q)


def preparation_circuit(terms, plan, order: int) -> QuantumCircuit:
    """The circuit of W_trot: each delay's U_trot(tau) with its steps, each pulse's rotations."""
    qc = QuantumCircuit(terms.n_qubits, name="preparation")
    for item in plan:
        if isinstance(item, PlannedDelay):
            qc.compose(trotter_circuit(terms, item.seconds, item.steps, order), inplace=True)
        else:
            append_pulse(qc, item)
    return qc


def pulse_counts(pulse: PlannedPulse) -> dict:
    """{rotations, depth} of one ideal pulse by rule: RGate(theta, phi) = rz(phi) rx(theta) rz(-phi), so
    per pulsed qubit [theta not a multiple of pi/2] + 2 [phi not a multiple of pi/2] arbitrary rotations
    (an upper bound: the transpiler may merge them with neighbours), PULSE_LAYERS layers (all qubits at once)."""
    from .circuit_counts import is_clifford_angle

    if is_clifford_angle(pulse.theta) and round(pulse.theta / (np.pi / 2)) % 4 == 0:
        return {"rotations": 0, "depth": 0}                # theta = 0 mod 2 pi: the identity
    per_qubit = int(not is_clifford_angle(pulse.theta)) + 2 * int(not is_clifford_angle(pulse.phi))
    return {"rotations": per_qubit * len(pulse.qubits), "depth": PULSE_LAYERS}


def sequence_counts(model, experiment, time: float, steps: int, order: int, *, delay_steps=None, step_s=None,
                    values_hz=None, terms=None) -> dict:
    """Gate counts of one sequence experiment's signal circuit (preparation + acquisition) by the count
    rule of qhl.circuits.step_counts (no circuit built; all-to-all connectivity; order 1, 2 or 4).

    Returns:
        {"acquisition": {steps, cx, rotations, depth}, "preparation": {steps, delays, pulses, pulse_rotations,
        delay_s, cx, rotations, depth}, "total": {steps, cx, rotations, depth}, "preparation_share":
        {cx, rotations, depth}}: preparation cx exact by the rule, rotations an upper bound (pulses counted
        by pulse_counts), depth the sum of the parts (delays, pulses and acquisition run one after the other).
    """
    from .step_counts import evolution_counts_rule

    check_evolution_arguments(time, steps, 2 if order == 4 else order)
    terms = terms if terms is not None else acquisition_terms(model, experiment, values_hz)
    plan = sequence_plan(model, experiment, time, steps, delay_steps, step_s)
    acq = dict(evolution_counts_rule(terms, order, steps), steps=int(steps))
    prep = {"steps": 0, "delays": 0, "pulses": 0, "pulse_rotations": 0, "delay_s": 0.0, "cx": 0, "rotations": 0,
            "depth": 0}
    by_steps = {}
    for item in plan:
        if isinstance(item, PlannedDelay):
            if item.steps not in by_steps:
                by_steps[item.steps] = evolution_counts_rule(terms, order, item.steps)
            c = by_steps[item.steps]
            prep["steps"] += item.steps
            prep["delays"] += 1
            prep["delay_s"] += item.seconds
            for k in ("cx", "rotations", "depth"):
                prep[k] += c[k]
        else:
            c = pulse_counts(item)
            prep["pulses"] += 1
            prep["pulse_rotations"] += c["rotations"]
            prep["rotations"] += c["rotations"]
            prep["depth"] += c["depth"]
    total = {k: prep[k] + acq[k] for k in ("steps", "cx", "rotations", "depth")}
    share = {k: (prep[k] / total[k] if total[k] else 0.0) for k in ("cx", "rotations", "depth")}
    return {"acquisition": acq, "preparation": prep, "total": total, "preparation_share": share}


def sequence_signal_circuit(model, experiment, time: float = 0.0, steps: int = 1, order: int = 1, *,
                            delay_steps=None, step_s=None, grouping="pairs", ordering="offsets-first",
                            scheme="product", values_hz=None) -> CircuitFamily:
    """The family whose weighted expectation is the Trotterised sequence signal S_trot(t).

    Args:
        model: HamiltonianModel; experiment: an Experiment (its steps and dipolar scale).
        time: t (s) after the last step; steps: r of the acquisition; order: 1 or 2.
        delay_steps, step_s: steps of the delays (module docstring).
        grouping, ordering, scheme, values_hz: as qhl.circuits.gradient_circuits.signal_circuit.

    Returns:
        CircuitFamily (kind 'signal', one insertion row of weight 1). Its `evolution` is None: the
        free-evolution reference (qhl.circuits.trotter_reference) does not cover the preparation,
        so exact_expectation needs method='statevector' or 'density'. `steps` is the acquisition's
        r; `preparation` (attribute set here) the plan; `sequence` {terms, plan} what the emulator's
        fast path (qhl.emulation.fast_path) rebuilds the gates from.

    Raises:
        QhlInputError: bad time, steps, order, grouping, ordering, scheme or delay steps.
    """
    check_evolution_arguments(time, steps, order)
    terms = acquisition_terms(model, experiment, values_hz, grouping, ordering)
    plan = sequence_plan(model, experiment, time, steps, delay_steps, step_s)
    n = model.n_spins
    qc = QuantumCircuit(n, name="sequence-signal")
    prep = _prepare(qc, n)
    qc.compose(preparation_circuit(terms, plan, order), inplace=True)
    qc.compose(trotter_circuit(terms, time, steps, order), inplace=True)
    basis = _read_out(qc, model)
    table = InsertionTable((), np.zeros((1, 0)), np.ones(1), ({"kind": "signal"},))
    count_build()
    family = CircuitFamily(kind="signal", circuit=qc, observable=_system_observable(model, n),
                           inputs=input_ensemble(model, scheme), prep=prep, basis=basis, insertions=table,
                           measured_qubits=tuple(model.observed_qubits()), time=float(time), steps=int(steps),
                           order=int(order), step_circuit=trotter_circuit(terms, time / steps, 1, order),
                           evolution=None)
    family.preparation = tuple(plan)
    family.sequence = {"terms": terms, "plan": tuple(plan)}   # for the emulator's fast path (qhl.emulation)
    return family


# ---------------------------------------------------------------- gradients
def sequence_segments(terms, plan, time: float, steps: int, order: int) -> list:
    """The evolution in the order it acts: ("delay" | "acquisition", slots) per Trotterised segment
    (slots from product_formula_slots, the same as trotter_circuit writes) and ("pulse", PlannedPulse)."""
    out = []
    for item in plan:
        if isinstance(item, PlannedDelay):
            out.append(("delay", product_formula_slots(len(terms.groups), item.seconds, item.steps, order)))
        else:
            out.append(("pulse", item))
    out.append(("acquisition", product_formula_slots(len(terms.groups), time, steps, order)))
    return out


def sequence_insertion_points(terms, segments, parameter: str) -> list:
    """[(segment index, InsertionPoint)] of `parameter` over every Trotterised segment, in circuit order
    (slot indices are local to their segment; pulses have none)."""
    return [(i, pt) for i, (kind, body) in enumerate(segments) if kind != "pulse"
            for pt in insertion_points(terms, body, parameter)]


def sequence_gradient_circuit(model, experiment, parameter: str = "", time: float = 0.0, steps: int = 1,
                              order: int = 1, *, delay_steps=None, step_s=None, grouping="pairs",
                              ordering="offsets-first", scheme="product", values_hz=None) -> CircuitFamily:
    """The Hadamard-test family whose weighted expectation is dS_trot/dh_n (1/Hz) of a sequence experiment.

    Args:
        parameter: name of h_n (any model parameter).
        Other arguments as in sequence_signal_circuit (time may be 0: the delays still depend on h_n).

    Returns:
        CircuitFamily (kind 'gradient', one ancilla after the spins); `insertions.rows` describe
        (segment, step, slot, block, pauli, beta); `evolution` is None (exact_expectation needs
        method='statevector' or 'density'); `preparation` the plan; `sequence` {terms, plan,
        segments, points} for the emulator's fast path.

    Raises:
        QhlInputError: unknown parameter, bad time / steps / order / delay steps, or a parameter that
            acts in no segment.
    """
    model.parameter(parameter)
    check_evolution_arguments(time, steps, order)
    terms = acquisition_terms(model, experiment, values_hz, grouping, ordering)
    plan = sequence_plan(model, experiment, time, steps, delay_steps, step_s)
    segments = sequence_segments(terms, plan, time, steps, order)
    located = sequence_insertion_points(terms, segments, parameter)
    _require_points(located, parameter, experiment)
    n = model.n_spins
    anc = n
    qc = QuantumCircuit(n + 1, name="sequence-gradient")
    prep = _prepare(qc, n)
    qc.h(anc)
    phi = ParameterVector("ins", len(located))
    gadgets = [{} for _ in segments]
    for a, (i, pt) in enumerate(located):
        gadgets[i].setdefault((pt.slot, pt.group, pt.block), []).append(_controlled_pauli(anc, pt, phi[a]))
    for i, (kind, body) in enumerate(segments):
        if kind == "pulse":
            append_pulse(qc, body)
        else:
            _evolve(qc, terms, body, gadgets=gadgets[i])
    lam = Parameter("anc_phase")
    qc.p(lam, anc)
    qc.h(anc)
    basis = _read_out(qc, model)
    k = len(located)
    values = np.zeros((k, k + 1))
    values[np.arange(k), np.arange(k)] = np.pi
    values[:, -1] = [_ancilla_phase(pt) for _, pt in located]
    weights = np.array([2 * pt.beta for _, pt in located])
    rows = tuple({"segment": i, "segment_kind": segments[i][0], **pt.describe()} for i, pt in located)
    table = InsertionTable((*phi, lam), values, weights, rows)
    count_build()
    family = CircuitFamily(kind="gradient", circuit=qc, observable=_system_observable(model, n + 1, (anc,)),
                           inputs=input_ensemble(model, scheme), prep=prep, basis=basis, insertions=table,
                           measured_qubits=(*model.observed_qubits(), anc), time=float(time), steps=int(steps),
                           order=int(order), parameters=(parameter,),
                           step_circuit=trotter_circuit(terms, time / steps, 1, order), evolution=None)
    family.preparation = tuple(plan)
    family.sequence = {"terms": terms, "plan": tuple(plan), "segments": segments, "points": tuple(located)}
    return family
