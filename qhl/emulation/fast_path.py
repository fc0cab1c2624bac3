"""Exact outcome probabilities of a circuit family's settings from numpy state vectors (no Aer).

Without noise every shot of a setting (input k, insertion row j, part) is a draw from the Born
distribution of one pure state, so the emulator computes that distribution once per distinct
setting and draws the setting's shots from it (multinomial; common practice). The states are
built from the family's Trotterised evolution (qhl.circuits.trotter: the same
`append_block_rotations` that writes the circuit, turned into 4x4 or 2x2 block matrices by
qiskit.quantum_info.Operator), on the n system qubits only, because the ancillas of the
Hadamard-test families (qhl.circuits.gradient_circuits) are untouched by the evolution:

  Gradient (one ancilla a in |+>, controlled-((-i)^w P) after block p, then p(lambda), h):
      x_0 = U psi_k,   x_1 = (-i)^w e^{i lambda} U_{>p} P U_{<=p} psi_k
      amplitude of ancilla outcome o:  (x_0 + (-1)^o x_1) / 2
  Hessian (ancillas a1 for h_m, a2 for h_n; the earlier insertion e nested inside the later l):
      x_{c1 c2} = phases * U_{>l} P_l^{c_l} U_{(e, l]} P_e^{c_e} U_{<=e} psi_k
      amplitude of (o1, o2):  sum_c (-1)^{o.c} x_c / 4
  Signal: U psi_k.
  Pulse-sequence signal (qhl.circuits.sequence_circuits): U = U_acq W_trot, the delays' blocks and
      the pulses' RGate matrices in circuit order (`sequence_tables`), psi_k evolved gate by gate.
  Pulse-sequence gradient: as the gradient above on that flat gate sequence, position p of an
      insertion point = first gate of its segment (delay or acquisition) + its slot's and block's
      place inside the segment (`EvolutionTables.segment_offsets`).
  Spinning signal and gradient (qhl.circuits.spinning_circuits): the same, with each slot's blocks at
      that slot's own angles (`spinning_tables`; step averages of the rotor factors).
followed by the read-out rz(mu), h on every observed spin. U_{<=p} psi_k (the states after
block p, shared by every setting of input k) come from one forward sweep and the dense suffixes
U_{>p} from one backward sweep; both are cached per evolution (`EvolutionTables`), so the families of
every parameter at one time share them. The probabilities are checked against Aer's own
statevector probabilities (`FamilyRunner.audit`, tests/test_emulator_fast.py) to 1e-10.

Streaming mode (signal and gradient families of more than MAX_FAST_QUBITS spins, where dense
2^n x 2^n suffixes do not fit): the settings are taken in chunks of at most `chunk` settings;
one forward sweep applies every block to the chunk's inputs (rows x_0 = psi_k) and to the
branches x_1 (a branch starts at its insertion position p as P applied to its input's state
after block p, and from then on takes the remaining blocks), then the read-out rotations act
qubit by qubit. Nothing of size 4^n is built; the memory is a fixed number of state vectors per
chunk column (`stream_memory_bytes`, checked against tracemalloc in tests/test_fast_path_memory.py)
and is checked up front (qhl.base.memory.require_memory); qhl.emulation.runner falls back to Aer's
statevector method with a one-line note when the estimate does not fit.

The stochastic-parameter-shift family ('gradient-shift') and noisy runs stay on Aer.
"""

from collections import OrderedDict
from dataclasses import dataclass

import numpy as np
from qiskit import QuantumCircuit
from qiskit.circuit.library import HGate, RZGate
from qiskit.quantum_info import Operator

from ..base.errors import QhlInputError
from ..base.memory import require_memory
from ..circuits.circuit_family import _BASIS_ANGLE
from ..circuits.gradient_circuits import insertion_points
from ..circuits.sequence_circuits import sequence_insertion_points, sequence_segments
from ..circuits.trotter import append_block_rotations, product_formula_slots, trotter_terms

__all__ = ["FAST_KINDS", "MAX_FAST_QUBITS", "supports_fast_path", "FastFamily", "EvolutionTables",
           "clear_cache", "stream_memory_bytes", "stream_chunk", "STREAM_KINDS"]

FAST_KINDS = ("signal", "gradient", "hessian")
STREAM_KINDS = ("signal", "gradient")   # kinds that also run in the streaming mode (beyond MAX_FAST_QUBITS)
MAX_FAST_QUBITS = 10          # dense 2^n x 2^n suffixes (16 MiB each at n = 10); beyond: streaming mode
STREAM_CHUNK_BYTES = 256 * 2 ** 20   # target working set of one streaming chunk
STREAM_VECTORS = 7                   # state vectors of 2^n amplitudes held per chunk column at the peak
_PAULI = {"X": np.array([[0, 1], [1, 0]], complex), "Y": np.array([[0, -1j], [1j, 0]], complex),
          "Z": np.array([[1, 0], [0, -1]], complex)}
_CACHE: "OrderedDict" = OrderedDict()
_CACHE_SIZE = 2
_CACHE_BYTES = 1.5 * 2 ** 30   # tables above this are not kept for the whole evolution


def supports_fast_path(family) -> bool:
    """True for signal, Hadamard-gradient and Hessian families with a recorded evolution (Hessians up
    to MAX_FAST_QUBITS spins; signal and gradient beyond it in the streaming mode, memory permitting),
    and for the signal and Hadamard-gradient families of pulse-sequence experiments
    (qhl.circuits.sequence_circuits) and of spinning experiments (qhl.circuits.spinning_circuits) up to
    MAX_FAST_QUBITS spins."""
    if family.kind not in FAST_KINDS:
        return False
    if family.evolution is None:
        return (family.kind in ("signal", "gradient") and (getattr(family, "sequence", None) is not None
                                                           or getattr(family, "spinning", None) is not None)
                and family.inputs.n_qubits <= MAX_FAST_QUBITS)
    return family.inputs.n_qubits <= MAX_FAST_QUBITS or family.kind in STREAM_KINDS


def stream_chunk(n: int) -> int:
    """Settings per streaming chunk: as many as keep the chunk near STREAM_CHUNK_BYTES (at least 1)."""
    return max(1, int(STREAM_CHUNK_BYTES // (STREAM_VECTORS * 16.0 * 2 ** n)))


def stream_memory_bytes(n: int, settings: int, chunk: int | None = None, outcomes: int = 2) -> float:
    """Peak bytes of the streaming mode for `settings` distinct settings of an n-spin family.

    Model: a chunk of c = min(settings, chunk) settings holds STREAM_VECTORS complex state vectors
    (16 bytes per amplitude) per column at its peak: the inputs' and branches' states, the gate
    application's two temporaries, and the combined amplitudes of both ancilla outcomes; plus the
    (settings, outcomes) float result. Estimated, checked against tracemalloc within 1.5x.
    """
    c = min(int(settings), int(chunk or stream_chunk(n)))
    return STREAM_VECTORS * 16.0 * 2 ** n * max(c, 1) + 8.0 * settings * outcomes


def clear_cache() -> None:
    """Forget the cached evolution tables (tests; memory)."""
    _CACHE.clear()


def apply_gate(gate, qubits, states, n):
    """`gate` (2^k x 2^k, qiskit order: qubits[0] least significant) on the rows of states (2^n x K)."""
    k = len(qubits)
    t = states.reshape((2,) * n + (-1,))
    axes = [n - 1 - q for q in reversed(qubits)]
    t = np.tensordot(gate.reshape((2,) * (2 * k)), t, axes=(list(range(k, 2 * k)), axes))
    return np.moveaxis(t, list(range(k)), axes).reshape(states.shape)


def apply_gate_rows(gate, qubits, states, n):
    """`gate` on every row of states (K x 2^n, one state per row; qiskit order as in apply_gate).

    One- and two-qubit gates are applied slice by slice (out_r = sum_c gate[r, c] x_c over the
    2^k sub-arrays with fixed gate-qubit bits), skipping zero entries (rz, zz are diagonal);
    larger gates through np.tensordot.
    """
    k = len(qubits)
    if k > 2:
        t = states.reshape((-1,) + (2,) * n)
        axes = [1 + n - 1 - q for q in reversed(qubits)]
        t = np.tensordot(t, gate.reshape((2,) * (2 * k)), axes=(axes, list(range(k, 2 * k))))
        return np.ascontiguousarray(np.moveaxis(t, list(range(n + 1 - k, n + 1)), axes)).reshape(states.shape)
    if k == 1:
        v = states.reshape(-1, 2, 2 ** qubits[0])
        part = lambda arr, c: arr[:, c]                          # noqa: E731
    else:
        qa, qb = qubits
        hi, lo = max(qa, qb), min(qa, qb)
        v = states.reshape(-1, 2, 2 ** (hi - lo - 1), 2, 2 ** lo)

        def part(arr, c):                                        # bit 0 of c: qubits[0], bit 1: qubits[1]
            a, b = c & 1, c >> 1
            return arr[:, b, :, a, :] if qb == hi else arr[:, a, :, b, :]
    out = np.empty_like(v)
    dim = 2 ** k
    for r in range(dim):
        o = part(out, r)
        first = True
        for c in range(dim):
            g = gate[r, c]
            if g == 0:
                continue
            if first:
                np.multiply(part(v, c), g, out=o)
                first = False
            else:
                o += g * part(v, c)
        if first:
            o[...] = 0
    return out.reshape(states.shape)


def product_states(angles) -> np.ndarray:
    """(2^n, K) columns prod_q ry(theta_q)|0> for the rows of angles (K, n); qubit q = bit q."""
    angles = np.atleast_2d(np.asarray(angles, float))
    K, n = angles.shape
    amp = np.stack([np.cos(angles / 2), np.sin(angles / 2)], axis=-1)   # (K, n, 2)
    psi = amp[:, n - 1, :]
    for q in range(n - 2, -1, -1):
        psi = np.einsum("ka,kb->kab", psi, amp[:, q, :]).reshape(K, -1)
    return np.ascontiguousarray(psi.T.astype(complex))


def _block_gate(block, duration, n):
    """(qubits, matrix) of append_block_rotations(block, duration) restricted to the block's qubits."""
    qubits = sorted(block.qubits)
    local = {q: i for i, q in enumerate(qubits)}
    qc = QuantumCircuit(len(qubits))
    append_block_rotations(qc, block, duration, [local.get(q, 0) for q in range(n)])
    return tuple(qubits), Operator(qc).data


def _evolution_key(terms, slots):
    blocks = tuple((b.label, b.qubits, b.paulis, np.asarray(b.coeffs, float).tobytes())
                   for g in terms.groups for b in g.blocks)
    return (terms.n_qubits, blocks, tuple((s.group, float(s.duration)) for s in slots))


class EvolutionTables:
    """The flat block sequence of one Trotterised evolution, its forward states and dense suffixes.

    Position p = "just after block p" of the flat sequence (slot by slot, block by block, the
    order in which qhl.circuits.gradient_circuits writes them and places the insertion gadgets).

    Attributes:
        terms, slots: the evolution; gates: [(qubits, matrix)] per flat block; n: qubits.
        offsets: flat index of the first block of every slot.
    """

    def __init__(self, terms, slots):
        self.terms, self.slots, self.n = terms, slots, terms.n_qubits
        cache = {}
        self.gates, self.offsets = [], []
        for s in slots:
            self.offsets.append(len(self.gates))
            for bi, block in enumerate(terms.groups[s.group].blocks):
                key = (s.group, bi, float(s.duration))
                if key not in cache:
                    cache[key] = _block_gate(block, s.duration, self.n)
                self.gates.append(cache[key])
        self._inputs = {}          # angle bytes -> column
        self._states = None        # (P, 2^n, K) forward states for the known inputs
        self._final = None
        self._suffix = {}          # part -> {position: dense R_part U_{>p}}
        self.observed = (True,) * self.n   # observed spins (read-out qubits); set by evolution_tables
        self._readout = {}

    def position(self, slot: int, block: int) -> int:
        return self.offsets[slot] + block

    @property
    def nbytes_per_position(self) -> float:
        return 16.0 * 4 ** self.n

    # ---------------------------------------------------------------- forward states
    def states(self, angles, positions):
        """(forward states {p: (2^n, K)}, final (2^n, K)) for the input rows `angles` (K, n).

        The states of every position are cached for all inputs seen so far while that table fits
        in the cache budget; beyond it one sweep keeps only the positions asked for.
        """
        angles = np.asarray(angles, float)
        cols = [self._inputs.get(a.tobytes()) for a in angles]
        if any(c is None for c in cols) or self._states is None:
            known = len(self._inputs) + len(angles)
            if 16.0 * 2 ** self.n * known * (len(self.gates) + 1) > _CACHE_BYTES:
                return self._sweep(angles, positions)
            self._extend(angles)
            cols = [self._inputs[a.tobytes()] for a in angles]
        cols = np.asarray(cols, int)
        return {p: self._states[p][:, cols] for p in positions}, self._final[:, cols]

    def _sweep(self, angles, positions):
        wanted = set(int(p) for p in positions)
        require_memory("fast-path forward states", 16.0 * 2 ** self.n * len(angles) * (len(wanted) + 2))
        psi = product_states(angles)
        out = {}
        for p, (qubits, g) in enumerate(self.gates):
            psi = apply_gate(g, qubits, psi, self.n)
            if p in wanted:
                out[p] = psi
        return out, psi

    def _extend(self, angles):
        new = [a for a in np.unique(angles, axis=0) if a.tobytes() not in self._inputs]
        known = [np.frombuffer(k) for k in self._inputs]
        every = np.array(known + new) if known else np.array(new)
        psi = product_states(every)
        out = np.empty((len(self.gates),) + psi.shape, complex)
        for p, (qubits, g) in enumerate(self.gates):
            psi = apply_gate(g, qubits, psi, self.n)
            out[p] = psi
        self._states, self._final = out, psi
        self._inputs = {a.tobytes(): i for i, a in enumerate(every)}

    # ---------------------------------------------------------------- suffixes
    def readout(self, part: str) -> np.ndarray:
        """R_part: rz(mu) then h on every observed spin, dense (2^n x 2^n)."""
        if part in self._readout:
            return self._readout[part]
        one = HGate().to_matrix() @ RZGate(_BASIS_ANGLE[part]).to_matrix()
        r = np.array([[1.0 + 0j]])
        for q in range(self.n - 1, -1, -1):
            r = np.kron(r, one if self.observed[q] else np.eye(2))
        self._readout[part] = r
        return r

    def suffixes(self, positions, part: str) -> dict:
        """{p: R_part U_{>p}} (dense 2^n x 2^n) for the positions asked (all are kept when they fit)."""
        positions = sorted(set(int(p) for p in positions))
        store = self._suffix.setdefault(part, {})
        missing = [p for p in positions if p not in store]
        if missing:
            keep_all = 2 * self.nbytes_per_position * len(self.gates) <= _CACHE_BYTES
            wanted = set(range(len(self.gates))) if keep_all else set(missing)
            require_memory("fast-path suffix unitaries", self.nbytes_per_position * (len(wanted) + 2))
            t = np.ascontiguousarray(self.readout(part).T)   # (R U_{>p})^T, built by left-multiplying B^T
            for p in range(len(self.gates) - 1, -1, -1):
                if p in wanted and p not in store:
                    store[p] = np.ascontiguousarray(t.T)
                qubits, g = self.gates[p]
                t = apply_gate(g.T, qubits, t, self.n)
        return {p: store[p] for p in positions}

    def propagate(self, states, start: int, stop: int):
        """Blocks start+1 .. stop applied to states (2^n x K)."""
        for p in range(start + 1, stop + 1):
            qubits, g = self.gates[p]
            states = apply_gate(g, qubits, states, self.n)
        return states


def sequence_tables(family) -> EvolutionTables:
    """EvolutionTables of a pulse-sequence signal family (not cached): the gates in circuit order,
    each delay's product formula block by block (the same _block_gate matrices), each ideal pulse as
    one RGate(theta, phi) matrix per pulsed qubit, then the acquisition's product formula."""
    from qiskit.circuit.library import RGate

    spec = family.sequence
    terms, n = spec["terms"], spec["terms"].n_qubits
    tables = EvolutionTables(terms, [])
    cache, gates = {}, []

    segment_offsets = []

    def evolve(seconds, steps):
        offsets = []
        for s in product_formula_slots(len(terms.groups), seconds, steps, family.order):
            offsets.append(len(gates))
            for bi, block in enumerate(terms.groups[s.group].blocks):
                key = (s.group, bi, float(s.duration))
                if key not in cache:
                    cache[key] = _block_gate(block, s.duration, n)
                gates.append(cache[key])
        segment_offsets.append(offsets)

    for item in spec["plan"]:
        if hasattr(item, "steps"):
            evolve(item.seconds, item.steps)
        else:
            segment_offsets.append(None)
            mat = RGate(item.theta, item.phi).to_matrix()
            gates.extend(((q,), mat) for q in item.qubits)
    evolve(family.time, family.steps)
    tables.gates = gates
    tables.segment_offsets = segment_offsets   # per plan item then the acquisition: slot -> flat index
    tables.observed = tuple(bool(o) for o in family.inputs.observed)
    return tables


def spinning_tables(family) -> EvolutionTables:
    """EvolutionTables of a spinning family (not cached): slot by slot, block by block, the rotations of
    qhl.circuits.spinning_circuits with the slot's own angles (the same append_block_rotations, so the same
    matrices as the circuit); `offsets` per slot, so insertion positions are found as for free evolution."""
    import dataclasses as _dc

    evo = family.spinning["evolution"]
    n = evo.terms.n_qubits
    tables = EvolutionTables(evo.terms, [])
    gates, offsets = [], []
    for slot in evo.slots:
        offsets.append(len(gates))
        for bi, block in enumerate(evo.terms.groups[slot.group].blocks):
            gates.append(_block_gate(_dc.replace(block, coeffs=slot.thetas[bi]), 1.0, n))
    tables.gates, tables.offsets, tables.slots = gates, offsets, list(evo.slots)
    tables.observed = tuple(bool(o) for o in family.inputs.observed)
    return tables


def evolution_tables(family) -> EvolutionTables:
    """The (cached) EvolutionTables of a family's evolution."""
    if family.evolution is None and getattr(family, "spinning", None) is not None:
        return spinning_tables(family)
    if family.evolution is None and getattr(family, "sequence", None) is not None:
        return sequence_tables(family)
    ev = family.evolution
    terms = trotter_terms(ev["model"], ev["experiment"], ev["values_hz"], ev["grouping"], ev["ordering"])
    slots = product_formula_slots(len(terms.groups), family.time, family.steps, family.order)
    observed = tuple(bool(o) for o in family.inputs.observed)
    key = (_evolution_key(terms, slots), observed)
    if key in _CACHE:
        _CACHE.move_to_end(key)
        return _CACHE[key]
    tables = EvolutionTables(terms, slots)
    tables.observed = observed
    _CACHE[key] = tables
    while len(_CACHE) > _CACHE_SIZE:
        _CACHE.popitem(last=False)
    return tables


@dataclass(frozen=True)
class _Insertion:
    position: int
    qubits: tuple
    pauli: np.ndarray          # (2^w, 2^w) with the (-i)^w of the gadget
    ancilla: int               # 0 for h_m (or the gradient's), 1 for h_n


class FastFamily:
    """Exact outcome probabilities of the settings of one family (see the module docstring).

    Args:
        family: a CircuitFamily of kind 'signal', 'gradient' (Hadamard) or 'hessian'.

    Raises:
        QhlInputError: another kind, or a family without a recorded evolution.
    """

    def __init__(self, family):
        if not supports_fast_path(family):
            raise QhlInputError(f"the fast path handles {', '.join(FAST_KINDS)} families with at most "
                                f"{MAX_FAST_QUBITS} spins, not '{family.kind}'", key="method")
        self.family = family
        self.tables = evolution_tables(family)
        self.n = family.inputs.n_qubits
        self.streaming = self.n > MAX_FAST_QUBITS
        self.chunk = stream_chunk(self.n)
        if self.streaming:
            require_memory(f"fast-path streaming states of {self.n} spins ({self.chunk} settings per chunk)",
                           stream_memory_bytes(self.n, self.chunk, self.chunk))
        self.n_anc = family.circuit.num_qubits - self.n
        terms, slots = self.tables.terms, self.tables.slots
        table = family.insertions
        if family.kind == "signal":
            self.rows = [()]
        elif family.kind == "gradient" and getattr(family, "spinning", None) is not None:   # spinning
            from ..circuits.spinning_circuits import spinning_insertion_points
            located = spinning_insertion_points(family.spinning["evolution"], family.parameters[0])
            pts = [self._insertion(p, 0) for p in located]
            self._check_rows(pts, len(pts), lambda j: (j,))
            self.rows = [(pts[j],) for j in range(len(pts))]
        elif family.kind == "gradient" and family.evolution is None:       # pulse sequence
            segments = sequence_segments(terms, family.sequence["plan"], family.time, family.steps, family.order)
            located = sequence_insertion_points(terms, segments, family.parameters[0])
            pts = [self._insertion(p, 0, i) for i, p in located]
            self._check_rows(pts, len(pts), lambda j: (j,))
            self.rows = [(pts[j],) for j in range(len(pts))]
        elif family.kind == "gradient":
            pts = [self._insertion(p, 0) for p in insertion_points(terms, slots, family.parameters[0])]
            self._check_rows(pts, len(pts), lambda j: (j,))
            self.rows = [(pts[j],) for j in range(len(pts))]
        else:
            pm = [self._insertion(p, 0) for p in insertion_points(terms, slots, family.parameters[0])]
            pn = [self._insertion(p, 1) for p in insertion_points(terms, slots, family.parameters[1])]
            kn = len(pn)
            self._check_rows(pm + pn, len(pm) * kn, lambda j: (j // kn, len(pm) + j % kn))
            self.rows = [(pm[j // kn], pn[j % kn]) for j in range(len(pm) * kn)]
        self.lam = np.asarray(table.values[:, len(table.values[0]) - self.n_anc:], float) if self.n_anc else \
            np.zeros((len(table), 0))
        self.measured = list(family.measured_qubits)
        self.n_outcomes = 2 ** len(self.measured)

    def _insertion(self, pt, ancilla, segment=None):
        mat = np.array([[1.0 + 0j]])
        for ch in reversed(pt.pauli):             # pt.pauli lists the lowest qubit first
            mat = np.kron(mat, _PAULI[ch])
        position = (self.tables.position(pt.slot, pt.block) if segment is None
                    else self.tables.segment_offsets[segment][pt.slot] + pt.block)
        return _Insertion(position, pt.qubits, (-1j) ** pt.weight * mat, ancilla)

    def _check_rows(self, points, n_rows, columns):
        table = self.family.insertions
        if len(table) != n_rows or len(table.parameters) != len(points) + self.family.circuit.num_qubits - self.n:
            raise RuntimeError("fast path: the insertion table does not match the recomputed insertion points")
        for j in range(n_rows):
            on = np.flatnonzero(table.values[j, :len(points)])
            if sorted(on.tolist()) != sorted(columns(j)) or not np.allclose(table.values[j, on], np.pi):
                raise RuntimeError(f"fast path: insertion row {j} is not a single controlled Pauli per ancilla")

    def _marginal(self, amp) -> np.ndarray:
        """(G, 2^m) outcome probabilities from amplitudes (2^q, G): sum |amp|^2 over unmeasured qubits,
        outcome bit k = measured qubit k."""
        q = self.n + self.n_anc
        p = (np.abs(amp) ** 2).reshape((2,) * q + (-1,))
        drop = tuple(q - 1 - j for j in range(q) if j not in self.measured)
        if drop:
            p = p.sum(axis=drop)
        kept = [j for j in range(q - 1, -1, -1) if j in self.measured]     # axis order after the sum
        order = [kept.index(j) for j in reversed(self.measured)] + [len(kept)]
        return np.transpose(p, order).reshape(self.n_outcomes, -1).T

    def probabilities(self, angles, rows, inputs, part: str = "re") -> np.ndarray:
        """Outcome probabilities of the settings (input angles[inputs[g]], insertion row rows[g]).

        Args:
            angles: (K, n) distinct input angle rows; rows, inputs: (G,) indices.

        Returns:
            (G, 2^m) probabilities over outcomes (bit k = classical bit k of the family's read-out).
        """
        rows, inputs = np.asarray(rows, int), np.asarray(inputs, int)
        if self.streaming:
            return self._stream_probabilities(np.atleast_2d(np.asarray(angles, float)), rows, inputs, part)
        out = np.zeros((len(rows), self.n_outcomes))
        needed = sorted({ins.position for r in set(rows.tolist()) for ins in self.rows[r]})
        fwd, final = self.tables.states(angles, needed)
        final = self.tables.readout(part) @ final
        suf = self.tables.suffixes(needed, part)
        for j in np.unique(rows):
            sel = np.flatnonzero(rows == j)
            cols = inputs[sel]
            branches = self._branches(self.rows[j], fwd, final, suf, cols)
            out[sel] = self._marginal(self._combine(branches, self.lam[j]))
        return out

    # ---------------------------------------------------------------- streaming mode
    def _stream_probabilities(self, angles, rows, inputs, part):
        """probabilities() without dense tables: chunks of settings swept forward (module docstring)."""
        n, G = self.n, len(rows)
        out = np.zeros((G, self.n_outcomes))
        if G == 0:
            return out
        pos = np.array([self.rows[j][0].position if self.rows[j] else -1 for j in range(len(self.rows))])[rows]
        order = np.lexsort((inputs, pos))              # chunks of settings with nearby insertion points
        one = HGate().to_matrix() @ RZGate(_BASIS_ANGLE[part]).to_matrix()
        observed = [q for q in range(n) if self.tables.observed[q]]
        gates = self.tables.gates
        for start in range(0, G, self.chunk):
            sel = order[start:start + self.chunk]
            used, col = np.unique(inputs[sel], return_inverse=True)
            col = col.ravel()
            x0 = np.ascontiguousarray(product_states(angles[used]).T)        # (K_c, 2^n)
            s_pos = pos[sel]
            by_pos = np.argsort(s_pos, kind="stable")
            s_pos_sorted = s_pos[by_pos]
            x1 = np.zeros((len(sel), 2 ** n), complex) if self.n_anc else None
            live = 0                                                       # branches started so far
            for p, (qubits, g) in enumerate(gates):
                x0 = apply_gate_rows(g, qubits, x0, n)
                if x1 is None:
                    continue
                if live:
                    x1[:live] = apply_gate_rows(g, qubits, x1[:live], n)
                stop = int(np.searchsorted(s_pos_sorted, p, side="right"))
                for b in range(live, stop):                               # branches starting after block p
                    ins = self.rows[rows[sel[by_pos[b]]]][0]
                    x1[b] = apply_gate_rows(ins.pauli, ins.qubits, x0[col[by_pos[b]]][None, :], n)[0]
                live = stop
            for q in observed:
                x0 = apply_gate_rows(one, (q,), x0, n)
                if x1 is not None:
                    x1[:live] = apply_gate_rows(one, (q,), x1[:live], n)
            if x1 is None:
                out[sel] = self._marginal_rows(x0[col])
                continue
            lam = np.exp(1j * self.lam[rows[sel[by_pos]], 0])[:, None]
            amp = np.empty((len(sel), 2, 2 ** n), complex)
            base = x0[col[by_pos]]
            amp[:, 0] = base + lam * x1
            amp[:, 1] = base - lam * x1
            amp *= 0.5
            del base
            out[sel[by_pos]] = self._marginal_rows(amp.reshape(len(sel), -1))
        return out

    def _marginal_rows(self, amp) -> np.ndarray:
        """(G, 2^m) outcome probabilities from amplitudes (G, 2^q) (rows; as _marginal)."""
        q = self.n + self.n_anc
        G = amp.shape[0]
        p = (amp.real ** 2 + amp.imag ** 2).reshape((G,) + (2,) * q)
        drop = tuple(1 + q - 1 - j for j in range(q) if j not in self.measured)
        if drop:
            p = p.sum(axis=drop)
        kept = [j for j in range(q - 1, -1, -1) if j in self.measured]
        order = [0] + [1 + kept.index(j) for j in reversed(self.measured)]
        return np.transpose(p, order).reshape(G, self.n_outcomes)

    def _branches(self, row, fwd, final, suf, cols):
        """{ancilla bits c (tuple): R x_c (2^n, G_j)} before the ancilla phases."""
        n = self.n
        x = {(0,) * self.n_anc: final[:, cols]}
        if not row:
            return x
        for ins in row:
            v = apply_gate(ins.pauli, ins.qubits, fwd[ins.position][:, cols], n)
            c = [0] * self.n_anc
            c[ins.ancilla] = 1
            x[tuple(c)] = suf[ins.position] @ v
        if len(row) == 2:
            early, late = sorted(row, key=lambda i: (i.position, i.ancilla))
            v = apply_gate(early.pauli, early.qubits, fwd[early.position][:, cols], n)
            v = self.tables.propagate(v, early.position, late.position)
            v = apply_gate(late.pauli, late.qubits, v, n)
            x[(1, 1)] = suf[late.position] @ v
        return x

    def _combine(self, branches, lam):
        """Amplitudes (2^(n+A), G_j) after the ancillas' p(lambda) and h (module docstring)."""
        n, A = self.n, self.n_anc
        first = next(iter(branches.values()))
        amp = np.zeros((2 ** A,) + first.shape, complex)
        for c, v in branches.items():
            phase = np.exp(1j * float(np.dot(c, lam))) if A else 1.0
            for o in range(2 ** A):
                sign = (-1) ** sum(((o >> a) & 1) * c[a] for a in range(A))
                amp[o] += (sign * phase / 2.0 ** A) * v
        return amp.reshape(2 ** A * 2 ** n, -1)
