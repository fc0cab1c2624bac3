"""Time-dependent Trotter circuits of spinning (magic-angle spinning) free-induction decays.

In a spinning experiment H(t) = 2 pi sum_n s_n(t) h_n G_n with the rotor factors s_n(t) of
qhl.spins.spinning (dipolar terms; offsets and J: s_n = 1). The acquisition time t is cut into r
equal steps [t_k, t_k + tau], tau = t / r, and step k uses the step-averaged Hamiltonian
    Hbar_k = 2 pi sum_n sbar_{n,k} h_n G_n,   sbar_{n,k} = (1/tau) int_{t_k}^{t_k+tau} s_n(u) du
(exact interval averages, SpinningFactors.mean), in the usual product formula of
qhl.circuits.trotter (same grouping, ordering, merging):
    first order   S1_k = e^{-i tau Hbar_{k,G}} ... e^{-i tau Hbar_{k,1}}
    second order  S2_k = e^{-i tau/2 Hbar_{k,1}} ... e^{-i tau/2 Hbar_{k,G}} e^{-i tau/2 Hbar_{k,G}} ... e^{-i tau/2 Hbar_{k,1}}
    U_trot(t) = S_{r-1} ... S_1 S_0 .
So a step circuit has the gates of a static step, with angles from the step averages. Adjacent
exponentials of the same group (second order: group 1 between steps k and k+1) are merged into
one rotation with the summed angles tau/2 (c_k + c_{k+1}) per Pauli: the Paulis of one group
commute, so the merged exponential is the same operator.

Error. The averaged step exp(-i tau Hbar_k) is the first Magnus term of the step's time-ordered
propagator; the second Magnus term, (1/2) int int [H(u), H(v)], is O(tau^3 ||H|| ||dH/dt||) per
step (W. Magnus, Commun. Pure Appl. Math. 7, 649 (1954); S. Blanes, F. Casas, J. A. Oteo and
J. Ros, Phys. Rep. 470, 151 (2009), section 2), i.e. O(tau^2) over t like the second-order
product formula, whose own splitting error is O(tau^3) per step (Childs, Su, Tran, Wiebe, Zhu,
Phys. Rev. X 11, 011020 (2021)). Hence the signal error is O(tau) for order 1 and O(tau^2) for
order 2; the time-dependence constant grows with the rotor frequency (||dH/dt|| ~ 2 pi (2 nu_r)
||H_dip||), so the steps must resolve the rotor modulation (`steps_rule`). When the H(t) at all
times commute (a homonuclear pair with equal offsets: Z_A + Z_B commutes with the flip-flop and
ZZ terms, and XX, YY, ZZ of one pair commute), U(t) = exp(-i int H) and the exact averages make
the circuit exact at any r (tests/test_spinning_circuits.py).

Gradient (Hadamard test). For the exact evolution,
    dU(t)/dh_n = -i int_0^t U(t, u) 2 pi s_n(u) G_n U(u, 0) du,
which a Monte Carlo estimator samples by drawing the insertion time u (density proportional to
|s_n(u)|) and inserting G_n, weighted by s_n(u), at u. Compiled, the time u falls in one step k,
and there the derivative of the circuit's exponential with respect to h_n is exact when the
generator is inserted at the slot of step k with weight
    beta_a = (slot share of tau) 2 pi g_{n,P} sbar_{n,k} = 2 pi g_{n,P} int_{slot share of step k} s_n(u) du,
i.e. the sampled u integrated analytically over each step (a merged second-order slot sums its
two halves' weights). So the insertion table of qhl.circuits.gradient_circuits, with these
weights (signs included; CircuitFamily.sample draws rows with probability |w| / W and carries the
sign), is the time sampling of the static gradient circuits with s_n(u) as the weight, and
    dS_trot/dh_n = sum_a (2 beta_a) <Y (x) A>_a
is the exact derivative of the Trotterised spinning signal (it converges to the time-ordered
gradient at the signal's order).

Steps (`steps_rule`): r = max(r_requested, ceil(STEPS_PER_ROTOR_PERIOD nu_r t)), 8 steps per
rotor period = 4 per period of the second harmonic 2 nu_r (the fastest modulation of s_n), so
the step averages follow the modulation (common practice: sampling at several points per
period of the fastest component); the measured signal errors are in README.md and
tests/test_spinning_circuits.py.
"""

import dataclasses
import math

import numpy as np
from qiskit import QuantumCircuit
from qiskit.circuit import Parameter

from ..base.errors import QhlInputError
from ..spins.cluster import refuse_steps
from ..spins.spinning import is_spinning, spinning_factors
from .circuit_family import CircuitFamily, InsertionTable, count_build
from .gradient_circuits import (InsertionPoint, _ancilla_phase, _hadamard_head, _positive_time, _prepare,
                                _read_out, _require_points, _system_observable)
from .state_prep import input_ensemble
from .trotter import append_block_rotations, check_evolution_arguments, product_formula_slots, trotter_terms

__all__ = ["STEPS_PER_ROTOR_PERIOD", "SpinSlot", "SpinningEvolution", "steps_rule", "spinning_evolution",
           "spinning_evolution_circuit", "spinning_insertion_points", "spinning_signal_circuit",
           "spinning_gradient_circuit", "spinning_counts_rule", "STEPS_RULE_TEXT"]

STEPS_PER_ROTOR_PERIOD = 8
STEPS_RULE_TEXT = (f"r = max(requested, ceil({STEPS_PER_ROTOR_PERIOD} nu_r t)): {STEPS_PER_ROTOR_PERIOD} steps per rotor "
                   f"period, {STEPS_PER_ROTOR_PERIOD // 2} per period of the second harmonic of s_n(t)")


def steps_rule(spinning_hz: float, time: float, requested: int = 1) -> int:
    """Trotter steps of a spinning acquisition of length `time` (module docstring, STEPS_RULE_TEXT)."""
    need = math.ceil(STEPS_PER_ROTOR_PERIOD * float(spinning_hz) * float(time) * (1 - 1e-12))
    return max(int(requested), need, 1)


@dataclasses.dataclass(frozen=True)
class SpinSlot:
    """One (possibly merged) exponential: group index, first step, and per block of the group the
    exponent theta per Pauli (e^{-i theta P}; radians) and the pieces (step, duration) it joins."""

    group: int
    step: int
    thetas: tuple
    pieces: tuple


@dataclasses.dataclass(frozen=True)
class SpinningEvolution:
    """The compiled time-dependent evolution: unit terms (s_n = 1), step averages, slots.

    Attributes:
        terms: TrotterTerms with s_n = 1 (blocks' derivatives are 2 pi g_{n,P}, rad/s per Hz).
        averages: (r, P) step averages sbar_{n,k} (model parameter order).
        values: (P,) parameter values (Hz).
        names: parameter names (model order).
        slots: SpinSlot list in the order they act.
        time, steps, order.
    """

    terms: object
    averages: np.ndarray
    values: np.ndarray
    names: tuple
    slots: tuple
    time: float
    steps: int
    order: int


def _block_matrix(block, names):
    """(Paulis, P) matrix of d coeff / d h_n for one block (s_n = 1)."""
    out = np.zeros((len(block.paulis), len(names)))
    for name, d in block.derivatives.items():
        out[:, names.index(name)] = d
    return out


def spinning_evolution(model, experiment, time: float, steps: int, order: int = 2, *, grouping="pairs",
                       ordering="offsets-first", values_hz=None) -> SpinningEvolution:
    """The slots of U_trot(t) for a spinning experiment with `steps` equal steps (module docstring).

    Raises:
        QhlInputError: not a spinning experiment, pulse-sequence steps, bad time / steps / order,
            or the spinning factors cannot be formed (qhl.spins.spinning.spinning_factors).
    """
    check_evolution_arguments(time, steps, order)
    if not is_spinning(experiment):
        raise QhlInputError(f"experiment '{getattr(experiment, 'name', None)}' does not spin: expected "
                            "spinning_hz > 0 for the spinning circuits", key="experiment.spinning_hz")
    refuse_steps(experiment, "the spinning circuits")
    factors = spinning_factors(model, experiment)
    terms = trotter_terms(model, None, values_hz, grouping, ordering)
    names = tuple(model.names)
    values = model.values_hz if values_hz is None else np.asarray(values_hz, float)
    tau = time / steps
    edges = np.arange(steps + 1) * tau
    averages = factors.mean(edges[:-1], edges[1:])                            # (r, P)
    mats = [[_block_matrix(b, names) for b in g.blocks] for g in terms.groups]
    coeffs = [[(averages * values) @ m.T for m in gm] for gm in mats]
    # coeffs[g][b]: (r, Paulis) coefficients (rad/s) of block b of group g at each step
    slots = []
    for sl in product_formula_slots(len(terms.groups), time, steps, order, merge=False):
        thetas = tuple(sl.duration * coeffs[sl.group][b][sl.step] for b in range(len(terms.groups[sl.group].blocks)))
        if slots and slots[-1].group == sl.group:
            prev = slots[-1]
            slots[-1] = SpinSlot(prev.group, prev.step, tuple(a + b for a, b in zip(prev.thetas, thetas)),
                                 prev.pieces + ((sl.step, sl.duration),))
        else:
            slots.append(SpinSlot(sl.group, sl.step, thetas, ((sl.step, sl.duration),)))
    return SpinningEvolution(terms, averages, np.asarray(values, float), names, tuple(slots), float(time),
                             int(steps), int(order))


def _append_slot(qc, evo, s, slot, qubits, gadgets=None):
    for bi, block in enumerate(evo.terms.groups[slot.group].blocks):
        append_block_rotations(qc, dataclasses.replace(block, coeffs=slot.thetas[bi]), 1.0, qubits)
        for gadget in (gadgets or {}).get((s, slot.group, bi), ()):
            gadget(qc)


def spinning_evolution_circuit(evo: SpinningEvolution, first_step: int = 0, n_steps: int | None = None) -> QuantumCircuit:
    """U_trot(t) of `evo` as rotations on terms.n_qubits qubits (slots whose first step lies in
    [first_step, first_step + n_steps); all by default)."""
    qc = QuantumCircuit(evo.terms.n_qubits, name=f"spinning-trotter{evo.order}")
    qubits = list(range(evo.terms.n_qubits))
    last = evo.steps if n_steps is None else first_step + n_steps
    for s, slot in enumerate(evo.slots):
        if first_step <= slot.step < last:
            _append_slot(qc, evo, s, slot, qubits)
    return qc


def spinning_insertion_points(evo: SpinningEvolution, parameter: str) -> list:
    """InsertionPoint per (slot, block, Pauli) where h_n acts, beta = sum over the slot's pieces of
    duration 2 pi g_{n,P} sbar_{n,step} (rad/Hz; module docstring); beta = 0 left out."""
    k = evo.names.index(parameter)
    n = evo.terms.n_qubits
    points = []
    for s, slot in enumerate(evo.slots):
        weight = sum(d * evo.averages[j, k] for j, d in slot.pieces)
        for bi, block in enumerate(evo.terms.groups[slot.group].blocks):
            if parameter not in block.derivatives:
                continue
            for pk, (label, d) in enumerate(zip(block.paulis, block.derivatives[parameter])):
                beta = weight * float(d)
                if beta == 0:
                    continue
                support = tuple(q for q in range(n) if label[n - 1 - q] != "I")
                local = "".join(label[n - 1 - q] for q in support)
                points.append(InsertionPoint(s, slot.step, slot.group, bi, block.label, pk, local, support, beta))
    return points


def _family(kind, qc, model, observable, scheme, prep, basis, table, measured, evo, names=()):
    count_build()
    fam = CircuitFamily(kind=kind, circuit=qc, observable=observable, inputs=input_ensemble(model, scheme),
                        prep=prep, basis=basis, insertions=table, measured_qubits=tuple(measured), time=evo.time,
                        steps=evo.steps, order=evo.order, parameters=tuple(names),
                        step_circuit=spinning_evolution_circuit(evo, 0, 1), evolution=None)
    fam.spinning = {"evolution": evo}
    return fam


def spinning_signal_circuit(model, experiment, time: float = 0.0, steps: int = 1, order: int = 2, *,
                            grouping="pairs", ordering="offsets-first", scheme="product",
                            values_hz=None) -> CircuitFamily:
    """The family whose weighted expectation is the Trotterised spinning signal S_trot(t).

    Args:
        model: HamiltonianModel (positions for every dipolar pair); experiment: spinning Experiment.
        time: t (s); steps: r (use steps_rule to resolve the rotor); order: 1 or 2.
        grouping, ordering, scheme, values_hz: as qhl.circuits.gradient_circuits.signal_circuit.

    Returns:
        CircuitFamily (kind 'signal'); `evolution` is None (exact_expectation needs
        method='statevector' or 'density'); `spinning` {evolution: SpinningEvolution}.

    Raises:
        QhlInputError: as spinning_evolution, or a bad scheme.
    """
    evo = spinning_evolution(model, experiment, time, steps, order, grouping=grouping, ordering=ordering,
                             values_hz=values_hz)
    n = model.n_spins
    qc = QuantumCircuit(n, name="spinning-signal")
    prep = _prepare(qc, n)
    qc.compose(spinning_evolution_circuit(evo), inplace=True)
    basis = _read_out(qc, model)
    table = InsertionTable((), np.zeros((1, 0)), np.ones(1), ({"kind": "signal"},))
    return _family("signal", qc, model, _system_observable(model, n), scheme, prep, basis, table,
                   model.observed_qubits(), evo)


def spinning_gradient_circuit(model, experiment, parameter: str = "", time: float = 0.0, steps: int = 1,
                              order: int = 2, *, grouping="pairs", ordering="offsets-first", scheme="product",
                              values_hz=None) -> CircuitFamily:
    """The Hadamard-test family whose weighted expectation is dS_trot/dh_n (1/Hz) of a spinning FID.

    Rows: one per insertion point (slot, block, Pauli) with weight 2 beta_a (module docstring:
    the time sampling with weight s_n(u), integrated over each step).

    Raises:
        QhlInputError: unknown parameter, time <= 0, a parameter that does not act, or as
            spinning_evolution.
    """
    model.parameter(parameter)
    _positive_time(time)
    evo = spinning_evolution(model, experiment, time, steps, order, grouping=grouping, ordering=ordering,
                             values_hz=values_hz)
    points = spinning_insertion_points(evo, parameter)
    _require_points(points, parameter, experiment)
    n = model.n_spins
    qc, anc, prep, phi, gadgets = _hadamard_head(n, "spinning-gradient", points)
    qubits = list(range(n))
    for s, slot in enumerate(evo.slots):
        _append_slot(qc, evo, s, slot, qubits, gadgets)
    lam = Parameter("anc_phase")
    qc.p(lam, anc)
    qc.h(anc)
    basis = _read_out(qc, model)
    k = len(points)
    values = np.zeros((k, k + 1))
    values[np.arange(k), np.arange(k)] = np.pi
    values[:, -1] = [_ancilla_phase(pt) for pt in points]
    weights = np.array([2 * pt.beta for pt in points])
    table = InsertionTable((*phi, lam), values, weights, tuple(pt.describe() for pt in points))
    return _family("gradient", qc, model, _system_observable(model, n + 1, (anc,)), scheme, prep, basis, table,
                   [*model.observed_qubits(), anc], evo, (parameter,))


def spinning_counts_rule(evo: SpinningEvolution) -> dict:
    """{cx, rotations, depth} of U_trot(t) by the count rule of qhl.circuits.step_counts (the static
    rule with the same slots: a spinning step has a static step's gates), all-to-all connectivity."""
    from .step_counts import evolution_counts_rule
    return evolution_counts_rule(evo.terms, evo.order, evo.steps)
