"""Circuit families for the Trotterised signal, its gradient and its Hessian.

Let U = U_trot(t) (qhl.circuits.trotter) and rho~ = rho0 / Tr[O rho0] (qhl.circuits.state_prep). Every slot s of
the product formula applies e^{-i tau_s sum_k c_k P_k} to a block of commuting Paulis, with
c_k = sum_n 2 pi s_n h_n g_{n,k}. An insertion point a = (slot s, Pauli k) of parameter h_n has
    beta_a = tau_s * d c_k / d h_n = tau_s 2 pi s_n g_{n,k}     (rad per Hz),
and since P_k commutes with its own block, d/dh_n of that exponential is -i beta_a P_k times it.
So, with D_a the superoperator -i[P_a, .] applied right after slot s (A = sum_j X_j/2 or Y_j/2):
    dS/dh_n        = sum_a beta_a Tr[A U_{>a} D_a(U_{<=a} rho~ U_{<=a}^dag) U_{>a}^dag]
    d2S/dh_m dh_n  = sum_{a in m} sum_{b in n} beta_a beta_b Tr[A ... D_later(... D_earlier(...))]
(all ordered pairs, the earlier insertion nested inside; same slot: the two Paulis commute).
These are exact derivatives of the Trotterised signal, not of the exact evolution.

Hadamard test (one ancilla in |+>, controlled-P_a at a, ancilla read in Y): the ancilla's
Y-channel applies (-i/2)[P_a, .], so <Y (x) A> = (1/2) Tr[A U_> D_a(...) U_>^dag] and
    dS/dh_n = sum_a (2 beta_a) <Y (x) A>_a .
Two ancillas, each controlling one parameter's insertion (time order comes from the circuit):
<Y Y (x) A> = (-1/4) Tr[A U [P_b, V [P_a, .] V^dag] U^dag], so with D_b D_a = -[P_b,[P_a, .]]
    d2S/dh_m dh_n = sum_{a, b} (4 beta_a beta_b) <Y Y (x) A>_{a, b} .
Single-shot values of the Hadamard gradient estimator lie in +-2 W N_obs with W = sum_a |beta_a|
(variance bound 4 W^2 N_obs^2, Popoviciu; common practice).

Circuit gadget (parameter phi per insertion point, bound to pi at the sampled point, 0
elsewhere): basis change B with B^dag Z B = P on each qubit of P (X: h, Y: sdg h), a controlled
rz(phi) from the ancilla to each of those qubits, B^dag. The controlled rz is written as
rz(phi/2) on the qubit and rzz(-phi/2) on (ancilla, qubit) (the same operator, since
|1><1| = (I - Z)/2): qiskit-aer 0.18 binds parameterised controlled rotations (crz, cp, crx,
cry) as identities through parameter_binds (open upstream, qiskit-aer issues #2323 and #2403),
while rz and rzz bind correctly. At phi = pi the |1> branch gets (-i)^w P (w = Pauli
weight), undone by p(lambda) on the ancilla before the final h, lambda = (w - 1) pi / 2 (which
also turns the X read-out into Y). Both are bound per row, so every insertion point, input and
Re/Im basis is a parameter value: one circuit per parameter and time.

Stochastic parameter shift (Banchi and Crooks, "Measuring analytic gradients of general quantum
evolution with the stochastic parameter shift rule", Quantum 5, 386 (2021)), ancilla-free: for
a rotation e^{-i theta P}, d<A>/dtheta = <A>(theta + pi/4) - <A>(theta - pi/4), hence
    dS/dh_n = sum_a beta_a [S(psi_a = +pi/4) - S(psi_a = -pi/4)],
with the shift psi_a added to the angle of P_a at slot s (a parameter per insertion point, so
no extra gates). Banchi and Crooks sample the insertion time s uniformly; here it is drawn from
the product formula's own slots with weights |beta_a|, which is exact for U_trot.
"""

from dataclasses import dataclass

import numpy as np
from qiskit import QuantumCircuit
from qiskit.circuit import Parameter, ParameterVector
from qiskit.quantum_info import SparsePauliOp

from .circuit_family import CircuitFamily, InsertionTable, count_build
from ..base.errors import QhlInputError
from .state_prep import input_ensemble
from .trotter import (append_block_rotations, check_evolution_arguments, product_formula_slots,
                      trotter_circuit, trotter_terms)

__all__ = ["InsertionPoint", "insertion_points", "signal_circuit", "gradient_circuit", "hessian_circuit",
           "GRADIENT_METHODS"]

GRADIENT_METHODS = ("hadamard", "shift")


@dataclass(frozen=True)
class InsertionPoint:
    """Where d/dh_n acts: slot index, its step, group and block, the Pauli and beta (rad/Hz)."""

    slot: int
    step: int
    group: int
    block: int
    block_label: str
    pauli_index: int
    pauli: str          # on the block's qubits, lowest qubit first, e.g. 'XX', 'Z'
    qubits: tuple
    beta: float

    @property
    def weight(self) -> int:
        return len(self.pauli)

    def describe(self) -> dict:
        return {"slot": self.slot, "step": self.step, "block": self.block_label, "pauli": self.pauli,
                "beta": self.beta}


def insertion_points(terms, slots, parameter: str) -> list:
    """Every insertion point of `parameter` in the slot sequence (beta != 0 only).

    Args:
        terms: qhl.circuits.trotter.TrotterTerms; slots: from product_formula_slots; parameter: a name.
    """
    points = []
    n = terms.n_qubits
    where = terms.locate(parameter)
    for s, slot in enumerate(slots):
        for gi, bi in where:
            if gi != slot.group:
                continue
            block = terms.groups[gi].blocks[bi]
            for k, (label, d) in enumerate(zip(block.paulis, block.derivatives[parameter])):
                beta = slot.duration * float(d)
                if beta == 0:
                    continue
                support = tuple(q for q in range(n) if label[n - 1 - q] != "I")
                local = "".join(label[n - 1 - q] for q in support)
                points.append(InsertionPoint(s, slot.step, gi, bi, block.label, k, local, support, beta))
    return points


# ---------------------------------------------------------------- shared pieces
def _setup(model, experiment, time, steps, order, grouping, ordering, values_hz):
    check_evolution_arguments(time, steps, order)
    terms = trotter_terms(model, experiment, values_hz, grouping, ordering)
    slots = product_formula_slots(len(terms.groups), time, steps, order)
    return terms, slots


def _prepare(qc, n):
    prep = ParameterVector("prep", n)
    for q in range(n):
        qc.ry(prep[q], q)
    return tuple(prep)


def _read_out(qc, model):
    obs = model.observed_qubits()
    basis = ParameterVector("basis", len(obs))
    for k, q in enumerate(obs):
        qc.rz(basis[k], q)
        qc.h(q)
    return tuple(basis)


def _system_observable(model, n_total, ancillas=()):
    labels = []
    for j in model.observed_qubits():
        chars = ["I"] * n_total
        chars[n_total - 1 - j] = "Z"
        for a in ancillas:
            chars[n_total - 1 - a] = "Z"
        labels.append("".join(chars))
    return SparsePauliOp(labels, np.full(len(labels), 0.5))


def _evolve(qc, terms, slots, shifts=None, gadgets=None):
    """Append the product formula; `gadgets[(slot, group, block)]` run right after that block."""
    qubits = list(range(terms.n_qubits))
    for s, slot in enumerate(slots):
        for bi, block in enumerate(terms.groups[slot.group].blocks):
            key = (s, slot.group, bi)
            append_block_rotations(qc, block, slot.duration, qubits, (shifts or {}).get(key))
            for gadget in (gadgets or {}).get(key, ()):
                gadget(qc)


def _controlled_pauli(ancilla, point, phi):
    """Gadget: controlled-((-i)^w P) at phi = pi, identity at phi = 0."""
    def gadget(qc):
        for q, ch in zip(point.qubits, point.pauli):
            if ch == "Y":
                qc.sdg(q)
            if ch in "XY":
                qc.h(q)
        for q in point.qubits:   # crz(phi) = rz(phi/2) on q . rzz(-phi/2) on (ancilla, q), exactly
            qc.rz(phi / 2, q)
            qc.rzz(-phi / 2, ancilla, q)
        for q, ch in zip(point.qubits, point.pauli):
            if ch in "XY":
                qc.h(q)
            if ch == "Y":
                qc.s(q)
    return gadget


def _ancilla_phase(point) -> float:
    return (point.weight - 1) * np.pi / 2


def _hadamard_head(n, name, points):
    """The Hadamard test's opening on n system qubits + ancilla n: (circuit, ancilla, preparation, insertion
    angles, {(slot, group, block): [gadget]}) for the located insertion points."""
    anc = n
    qc = QuantumCircuit(n + 1, name=name)
    prep = _prepare(qc, n)
    qc.h(anc)
    phi = ParameterVector("ins", len(points))
    gadgets = {}
    for a, pt in enumerate(points):
        gadgets.setdefault((pt.slot, pt.group, pt.block), []).append(_controlled_pauli(anc, pt, phi[a]))
    return qc, anc, prep, phi, gadgets


def _require_points(points, name, experiment):
    if not points:
        where = f" in experiment '{experiment.name}'" if experiment is not None else ""
        raise QhlInputError(f"parameter '{name}' does not act{where} (zero coefficient or time 0): "
                            "its derivative is zero", key="parameter")


def _positive_time(time):
    if not np.isfinite(time) or time <= 0:
        raise QhlInputError(f"expected a time > 0 s for a derivative, got {time!r}", key="time")


def _family(kind, qc, model, observable, scheme, prep, basis, table, measured, terms, time, steps, order,
            names=(), evolution=None):
    count_build()
    return CircuitFamily(kind=kind, circuit=qc, observable=observable, inputs=input_ensemble(model, scheme),
                         prep=prep, basis=basis, insertions=table, measured_qubits=tuple(measured),
                         time=float(time), steps=int(steps), order=int(order), parameters=tuple(names),
                         step_circuit=trotter_circuit(terms, time / steps, 1, order), evolution=evolution)


def _evolution(model, experiment, values_hz, grouping, ordering) -> dict:
    """What the Trotterised reference (qhl.circuits.trotter_reference) needs to recompute X."""
    return dict(model=model, experiment=experiment, values_hz=values_hz, grouping=grouping, ordering=ordering)


# ---------------------------------------------------------------- builders
def signal_circuit(model, experiment=None, time: float = 0.0, steps: int = 1, order: int = 1, *,
                   grouping="pairs", ordering="offsets-first", scheme="product", values_hz=None) -> CircuitFamily:
    """The family whose weighted expectation is the Trotterised signal S_trot(t).

    Args:
        model: HamiltonianModel; experiment: sets the dipolar scale (None: 1).
        time: t in seconds (>= 0); steps: r; order: 1 or 2.
        grouping, ordering: see qhl.circuits.trotter.trotter_terms; scheme: see qhl.circuits.state_prep.
        values_hz: all parameter values (default the model's).

    Returns:
        CircuitFamily (kind 'signal', one insertion row of weight 1).

    Raises:
        QhlInputError: bad time, steps, order, grouping, ordering or scheme.
    """
    terms, slots = _setup(model, experiment, time, steps, order, grouping, ordering, values_hz)
    n = model.n_spins
    qc = QuantumCircuit(n, name="signal")
    prep = _prepare(qc, n)
    _evolve(qc, terms, slots)
    basis = _read_out(qc, model)
    table = InsertionTable((), np.zeros((1, 0)), np.ones(1), ({"kind": "signal"},))
    return _family("signal", qc, model, _system_observable(model, n), scheme, prep, basis, table,
                   model.observed_qubits(), terms, time, steps, order,
                   evolution=_evolution(model, experiment, values_hz, grouping, ordering))


def gradient_circuit(model, experiment=None, parameter: str = "", time: float = 0.0, steps: int = 1,
                     order: int = 1, *, method: str = "hadamard", grouping="pairs", ordering="offsets-first",
                     scheme="product", values_hz=None) -> CircuitFamily:
    """The family whose weighted expectation is dS_trot/dh_n (1/Hz) at time t.

    Args:
        parameter: name of h_n (any model parameter, free or not).
        method: 'hadamard' (one ancilla, controlled Pauli at the sampled insertion point) or
            'shift' (stochastic parameter shift, no ancilla).
        Other arguments as in signal_circuit.

    Returns:
        CircuitFamily; `insertions.rows` describe (step, slot, block, pauli[, shift]).

    Raises:
        QhlInputError: unknown parameter or method, time <= 0, a parameter that does not act.

    Example:
        >>> from qhl import demo_cluster, build_model
        >>> c = demo_cluster(); m = build_model(c)
        >>> fam = gradient_circuit(m, c.experiments[0], "dipolar:H1-H2", 1e-5, 3, order=1)
        >>> fam.circuit.num_qubits, len(fam.insertions)          # 6 spins + ancilla; 3 steps x 3 Paulis
        (7, 9)
    """
    model.parameter(parameter)
    if method not in GRADIENT_METHODS:
        raise QhlInputError(f"unknown gradient method '{method}': expected hadamard or shift", key="method")
    _positive_time(time)
    terms, slots = _setup(model, experiment, time, steps, order, grouping, ordering, values_hz)
    points = insertion_points(terms, slots, parameter)
    _require_points(points, parameter, experiment)
    n = model.n_spins
    if method == "shift":
        return _shift_family(model, terms, slots, points, parameter, scheme, time, steps, order,
                             _evolution(model, experiment, values_hz, grouping, ordering))
    qc, anc, prep, phi, gadgets = _hadamard_head(n, "gradient", points)
    _evolve(qc, terms, slots, gadgets=gadgets)
    lam = Parameter("anc_phase")
    qc.p(lam, anc)
    qc.h(anc)
    basis = _read_out(qc, model)
    values = np.zeros((len(points), len(points) + 1))
    values[np.arange(len(points)), np.arange(len(points))] = np.pi
    values[:, -1] = [_ancilla_phase(pt) for pt in points]
    weights = np.array([2 * pt.beta for pt in points])
    table = InsertionTable((*phi, lam), values, weights, tuple(pt.describe() for pt in points))
    return _family("gradient", qc, model, _system_observable(model, n + 1, (anc,)), scheme, prep, basis, table,
                   [*model.observed_qubits(), anc], terms, time, steps, order, (parameter,),
                   _evolution(model, experiment, values_hz, grouping, ordering))


def _shift_family(model, terms, slots, points, parameter, scheme, time, steps, order, evolution):
    n = model.n_spins
    qc = QuantumCircuit(n, name="gradient-shift")
    prep = _prepare(qc, n)
    psi = ParameterVector("shift", len(points))
    shifts = {}
    for a, pt in enumerate(points):
        shifts.setdefault((pt.slot, pt.group, pt.block), {})[pt.pauli_index] = psi[a]
    _evolve(qc, terms, slots, shifts=shifts)
    basis = _read_out(qc, model)
    k = len(points)
    values = np.zeros((2 * k, k))
    values[np.arange(k), np.arange(k)] = np.pi / 4
    values[k + np.arange(k), np.arange(k)] = -np.pi / 4
    weights = np.concatenate([[pt.beta for pt in points], [-pt.beta for pt in points]])
    rows = tuple({**pt.describe(), "shift": s} for s in ("+pi/4", "-pi/4") for pt in points)
    table = InsertionTable(tuple(psi), values, weights, rows)
    return _family("gradient-shift", qc, model, _system_observable(model, n), scheme, prep, basis, table,
                   model.observed_qubits(), terms, time, steps, order, (parameter,), evolution)


def hessian_circuit(model, experiment=None, parameters=("", ""), time: float = 0.0, steps: int = 1,
                    order: int = 1, *, grouping="pairs", ordering="offsets-first", scheme="product",
                    values_hz=None) -> CircuitFamily:
    """The family whose weighted expectation is d2S_trot/dh_m dh_n (1/Hz^2) at time t.

    Two ancillas: ancilla 1 controls the insertion of h_m, ancilla 2 that of h_n; a row binds one
    insertion point of each, so the circuit itself time-orders them (the earlier one nested
    inside). Rows run over all ordered pairs (a in m, b in n), weight 4 beta_a beta_b.

    Args:
        parameters: (m, n) names; m == n gives a diagonal entry.
        Other arguments as in signal_circuit.

    Raises:
        QhlInputError: unknown parameter, not two names, time <= 0, a parameter that does not act.
    """
    names = tuple(parameters)
    if len(names) != 2:
        raise QhlInputError(f"a Hessian entry needs two parameter names, got {len(names)}", key="parameter")
    for nm in names:
        model.parameter(nm)
    _positive_time(time)
    terms, slots = _setup(model, experiment, time, steps, order, grouping, ordering, values_hz)
    pm, pn = (insertion_points(terms, slots, nm) for nm in names)
    _require_points(pm, names[0], experiment)
    _require_points(pn, names[1], experiment)
    n = model.n_spins
    a1, a2 = n, n + 1
    qc = QuantumCircuit(n + 2, name="hessian")
    prep = _prepare(qc, n)
    qc.h([a1, a2])
    phi_m = ParameterVector("ins_m", len(pm))
    phi_n = ParameterVector("ins_n", len(pn))
    gadgets = {}
    for anc, pts, phis in ((a1, pm, phi_m), (a2, pn, phi_n)):
        for a, pt in enumerate(pts):
            gadgets.setdefault((pt.slot, pt.group, pt.block), []).append(_controlled_pauli(anc, pt, phis[a]))
    _evolve(qc, terms, slots, gadgets=gadgets)
    lam = ParameterVector("anc_phase", 2)
    qc.p(lam[0], a1)
    qc.p(lam[1], a2)
    qc.h([a1, a2])
    basis = _read_out(qc, model)
    km, kn = len(pm), len(pn)
    ia, ib = np.meshgrid(np.arange(km), np.arange(kn), indexing="ij")
    ia, ib = ia.ravel(), ib.ravel()
    values = np.zeros((km * kn, km + kn + 2))
    values[np.arange(km * kn), ia] = np.pi
    values[np.arange(km * kn), km + ib] = np.pi
    values[:, -2] = [_ancilla_phase(pm[a]) for a in ia]
    values[:, -1] = [_ancilla_phase(pn[b]) for b in ib]
    weights = np.array([4 * pm[a].beta * pn[b].beta for a, b in zip(ia, ib)])
    rows = tuple({"m": pm[a].describe(), "n": pn[b].describe()} for a, b in zip(ia, ib))
    table = InsertionTable((*phi_m, *phi_n, *lam), values, weights, rows)
    return _family("hessian", qc, model, _system_observable(model, n + 2, (a1, a2)), scheme, prep, basis, table,
                   [*model.observed_qubits(), a1, a2], terms, time, steps, order, names,
                   _evolution(model, experiment, values_hz, grouping, ordering))
