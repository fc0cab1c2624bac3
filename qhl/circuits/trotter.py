"""Product-formula (Trotter) circuits for the secular spin Hamiltonian.

Convention. H = sum_g H_g (rad/s) is split into groups of mutually commuting Pauli terms, so
each group's exponential is an exact product of Pauli rotations. For step duration tau = t/r
(Childs, Su, Tran, Wiebe, Zhu, "Theory of Trotter error with commutator scaling",
Phys. Rev. X 11, 011020 (2021)):
    first order    S1(tau) = e^{-i tau H_G} ... e^{-i tau H_1}          (H_1 acts first)
    second order   S2(tau) = e^{-i tau/2 H_1} ... e^{-i tau/2 H_G} e^{-i tau/2 H_G} ... e^{-i tau/2 H_1}
and U_trot(t) = S(t/r)^r. In circuits the two adjacent half steps of H_G (and of H_1 between
consecutive second-order steps) are merged into one exponential (the same operator).

Blocks. One block per spin (its offset, Z_i) and one per spin pair (XX, YY, ZZ of every
dipolar and J parameter on the pair; these three commute on two qubits). A block knows, for
each parameter acting on it, d(coefficient)/dh = 2 pi s_n g_{n,P} (rad/s per Hz), which the
gradient circuits use. Rotations are Aer-native: rz, rzz, rxx, ryy with R_P(theta) =
exp(-i theta P / 2), so e^{-i tau c P} = R_P(2 tau c). Identity terms (a global phase) are
dropped.

Grouping: 'pairs' (one group per block), 'offsets' (all offsets in one group, one per pair),
'layers' (blocks packed greedily into groups of mutually commuting blocks, e.g. pairs on
disjoint spins). Ordering of blocks before grouping: 'offsets-first' (model order),
'offsets-last', or an explicit sequence of block labels ('H1', 'H1-H2').
"""

from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as sla
from qiskit import QuantumCircuit
from qiskit.circuit.library import PauliEvolutionGate
from qiskit.quantum_info import SparsePauliOp

from ..base.errors import QhlInputError
from ..base.memory import require_memory
from ..spins.cluster import refuse_steps

__all__ = ["TermBlock", "TermGroup", "TrotterTerms", "Slot", "trotter_terms", "product_formula_slots",
           "append_block_rotations", "trotter_circuit", "trotter_unitary", "GROUPINGS", "ORDERINGS"]

GROUPINGS = ("pairs", "offsets", "layers")
ORDERINGS = ("offsets-first", "offsets-last")


@dataclass(frozen=True)
class TermBlock:
    """The Pauli terms of one spin or spin pair.

    Attributes:
        label: 'H1' or 'H1-H2'.
        qubits: the block's qubits.
        paulis: full-width Pauli labels (qiskit order), mutually commuting, no identity.
        coeffs: coefficient of each Pauli in H (rad/s).
        derivatives: parameter name -> d coeffs / d h (rad/s per Hz), one entry per Pauli.
    """

    label: str
    qubits: tuple
    paulis: tuple
    coeffs: np.ndarray
    derivatives: dict = field(default_factory=dict)

    def operator(self) -> SparsePauliOp:
        return SparsePauliOp(list(self.paulis), np.asarray(self.coeffs, complex))


@dataclass(frozen=True)
class TermGroup:
    """One product-formula term H_g: blocks whose Paulis all commute."""

    label: str
    blocks: tuple

    def operator(self) -> SparsePauliOp:
        return SparsePauliOp.sum([b.operator() for b in self.blocks]).simplify(atol=0)


@dataclass(frozen=True)
class TrotterTerms:
    """The ordered groups H_1..H_G of a Hamiltonian, ready for product formulas.

    Attributes:
        n_qubits: number of qubits (qubit i = spin i).
        groups: the groups in product order (H_1 acts first).
    """

    n_qubits: int
    groups: tuple

    def operators(self) -> list:
        """H_g as SparsePauliOp (rad/s), in product order."""
        return [g.operator() for g in self.groups]

    def hamiltonian(self) -> SparsePauliOp:
        return SparsePauliOp.sum(self.operators()).simplify(atol=0)

    def locate(self, parameter: str) -> list:
        """(group index, block index) of every block on which `parameter` acts."""
        return [(gi, bi) for gi, g in enumerate(self.groups) for bi, b in enumerate(g.blocks)
                if parameter in b.derivatives]


@dataclass(frozen=True)
class Slot:
    """One exponential e^{-i duration H_group} of the product formula (duration in seconds)."""

    group: int
    duration: float
    step: int


def _pauli_weight(label: str) -> int:
    return sum(ch != "I" for ch in label)


def trotter_terms(model, experiment=None, values_hz=None, grouping: str = "pairs",
                  ordering="offsets-first") -> TrotterTerms:
    """Split the model's Hamiltonian into ordered groups of commuting blocks.

    Args:
        model: qhl.spins.model.HamiltonianModel.
        experiment: sets the dipolar scale s_n (None: s_n = 1).
        values_hz: all parameter values (default the model's).
        grouping: one of GROUPINGS (see the module docstring).
        ordering: one of ORDERINGS or a sequence of every block label.

    Returns:
        TrotterTerms whose groups sum to model.hamiltonian(experiment) (identity terms dropped).

    Raises:
        QhlInputError: unknown grouping or ordering, or an ordering that is not a permutation.
    """
    refuse_steps(experiment, "the Trotter circuits")
    if grouping not in GROUPINGS:
        raise QhlInputError(f"unknown grouping '{grouping}': expected one of {', '.join(GROUPINGS)}",
                            key="grouping")
    n = model.n_spins
    vals = model.values_hz if values_hz is None else np.asarray(values_hz, float)
    scale = model.scale_factors(experiment)
    supports = {}
    for k, p in enumerate(model.parameters):
        gen = p.generator.simplify(atol=0)
        for label, c in zip(gen.paulis.to_labels(), gen.coeffs):
            if _pauli_weight(label) == 0:
                continue
            if abs(c.imag) > 1e-14:
                raise QhlInputError(f"generator of '{p.name}' is not Hermitian", key="parameter")
            qubits = tuple(q for q in range(n) if label[n - 1 - q] != "I")
            entry = supports.setdefault(qubits, {})
            row = entry.setdefault(label, {})
            row[p.name] = row.get(p.name, 0.0) + 2 * np.pi * scale[k] * float(c.real)
    values = dict(zip(model.names, vals))
    blocks = []
    for qubits, table in supports.items():
        labels = tuple(table)
        coeffs = np.array([sum(d * values[name] for name, d in table[lab].items()) for lab in labels])
        names = sorted({name for lab in labels for name in table[lab]}, key=model.names.index)
        derivs = {name: np.array([table[lab].get(name, 0.0) for lab in labels]) for name in names}
        blabel = "-".join(model.labels[q] for q in qubits)
        blocks.append(TermBlock(blabel, qubits, labels, coeffs, derivs))
    blocks = _order_blocks(blocks, ordering)
    return TrotterTerms(n, tuple(_group_blocks(blocks, grouping)))


def _order_blocks(blocks, ordering):
    if isinstance(ordering, str):
        if ordering == "offsets-first":
            return sorted(blocks, key=lambda b: len(b.qubits))
        if ordering == "offsets-last":
            return sorted(blocks, key=lambda b: -len(b.qubits))
        raise QhlInputError(f"unknown ordering '{ordering}': expected one of {', '.join(ORDERINGS)} "
                            "or a list of block labels", key="ordering")
    order = list(ordering)
    by_label = {b.label: b for b in blocks}
    if sorted(order) != sorted(by_label):
        raise QhlInputError(f"ordering must list every block once: {', '.join(by_label)}", key="ordering")
    return [by_label[lab] for lab in order]


def _blocks_commute(a: TermBlock, b: TermBlock) -> bool:
    if not set(a.qubits) & set(b.qubits):
        return True
    pa, pb = a.operator().paulis, b.operator().paulis
    return all(bool(np.all(pa.commutes(p))) for p in pb)


def _group_blocks(blocks, grouping):
    if grouping == "pairs":
        return [TermGroup(b.label, (b,)) for b in blocks]
    if grouping == "offsets":
        offsets = [b for b in blocks if len(b.qubits) == 1]
        out, placed = [], False
        for b in blocks:
            if len(b.qubits) == 1:
                if not placed:
                    out.append(TermGroup("offsets", tuple(offsets)))
                    placed = True
            else:
                out.append(TermGroup(b.label, (b,)))
        return out
    groups = []
    for b in blocks:
        for g in groups:
            if all(_blocks_commute(b, other) for other in g):
                g.append(b)
                break
        else:
            groups.append([b])
    return [TermGroup(f"layer{k}", tuple(g)) for k, g in enumerate(groups)]


def product_formula_slots(n_groups: int, time: float, steps: int, order: int, merge: bool = True) -> list:
    """The sequence of exponentials of U_trot(t) = S(t/r)^r, first applied first.

    Args:
        n_groups: G.
        time: t in seconds; steps: r >= 1; order: 1 or 2.
        merge: join adjacent exponentials of the same group (second order: the middle group and
            group 1 between steps); the product is the same operator.

    Returns:
        list of Slot(group, duration, step); a merged slot carries the earlier step index.

    Raises:
        QhlInputError: order not 1 or 2, steps < 1, time not finite.
    """
    check_evolution_arguments(time, steps, order)
    tau = time / steps
    if order == 1:
        one = [(g, tau) for g in range(n_groups)]
    else:
        one = [(g, tau / 2) for g in range(n_groups)] + [(g, tau / 2) for g in reversed(range(n_groups))]
    slots = []
    for j in range(steps):
        for g, d in one:
            if merge and slots and slots[-1].group == g:
                slots[-1] = Slot(g, slots[-1].duration + d, slots[-1].step)
            else:
                slots.append(Slot(g, d, j))
    return slots


def check_evolution_arguments(time, steps, order):
    """Raise QhlInputError unless time is finite and >= 0, steps an integer >= 1, order 1 or 2."""
    if not np.isfinite(time) or time < 0:
        raise QhlInputError(f"expected a finite time >= 0 s, got {time!r}", key="time")
    if int(steps) != steps or steps < 1:
        raise QhlInputError(f"expected an integer number of steps >= 1, got {steps!r}", key="steps")
    if order not in (1, 2):
        raise QhlInputError(f"expected product-formula order 1 or 2, got {order!r}", key="order")


_NATIVE = {"Z": "rz", "X": "rx", "Y": "ry", "ZZ": "rzz", "XX": "rxx", "YY": "ryy"}


def append_block_rotations(qc: QuantumCircuit, block: TermBlock, duration: float, qubits,
                           shifts=None) -> None:
    """Append e^{-i duration H_block} as Pauli rotations on `qubits` (qc indices of the spins).

    Args:
        shifts: optional {pauli index: Parameter psi}; that rotation becomes
            e^{-i (duration c + psi) P} (used by the parameter-shift circuits).
    """
    n = len(qubits)
    for k, (label, c) in enumerate(zip(block.paulis, block.coeffs)):
        angle = 2 * duration * float(c)
        if shifts and k in shifts:
            angle = angle + 2 * shifts[k]
        elif angle == 0:
            continue
        support = [q for q in range(n) if label[n - 1 - q] != "I"]
        kind = "".join(label[n - 1 - q] for q in support)
        wires = [qubits[q] for q in support]
        name = _NATIVE.get(kind) if len(set(kind)) == 1 else None
        if name is not None:
            getattr(qc, name)(angle, *wires)
        else:  # a general Pauli string: exact evolution gate (not produced by qhl's models)
            qc.append(PauliEvolutionGate(SparsePauliOp(kind[::-1]), time=angle / 2), wires)


def trotter_circuit(terms: TrotterTerms, time: float, steps: int, order: int = 1,
                    merge: bool = True) -> QuantumCircuit:
    """The circuit of U_trot(t) = S(t/r)^r on terms.n_qubits qubits.

    Example:
        >>> from qhl import demo_cluster, build_model
        >>> terms = trotter_terms(build_model(demo_cluster()), demo_cluster().experiments[0])
        >>> qc = trotter_circuit(terms, 1e-5, 2, order=2)
        >>> sorted(qc.count_ops())
        ['rxx', 'ryy', 'rz', 'rzz']
    """
    qc = QuantumCircuit(terms.n_qubits, name=f"trotter{order}")
    qubits = list(range(terms.n_qubits))
    for slot in product_formula_slots(len(terms.groups), time, steps, order, merge):
        for block in terms.groups[slot.group].blocks:
            append_block_rotations(qc, block, slot.duration, qubits)
    return qc


def trotter_unitary(terms: TrotterTerms, time: float, steps: int, order: int = 1) -> np.ndarray:
    """Dense U_trot(t) from scipy.linalg.expm of each group matrix (small n; for checks).

    Built from the product formula as written in the module docstring, without the circuit
    code or slot merging.
    """
    check_evolution_arguments(time, steps, order)
    require_memory("the dense Trotter product unitary", 16.0 * 4 ** terms.n_qubits * (len(terms.groups) + 3))
    tau = time / steps
    mats = [op.to_matrix() for op in terms.operators()]
    dim = 2 ** terms.n_qubits
    step = np.eye(dim, dtype=complex)
    if order == 1:
        for h in mats:
            step = sla.expm(-1j * tau * h) @ step
    else:
        halves = [sla.expm(-0.5j * tau * h) for h in mats]
        for u in halves + halves[::-1]:
            step = u @ step
    return np.linalg.matrix_power(step, steps)
