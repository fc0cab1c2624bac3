"""A compiled circuit family: one parameterised circuit plus the weighted table of its settings.

A family estimates one number X (the Trotterised S(t), dS/dh_n or d2S/dh_m dh_n) as
    X = sum_k sum_j  w_in[k] w_ins[j] <obs>_{k, j, part}      (Re X: part 're'; Im X: part 'im')
where k runs over input states (qhl.circuits.state_prep), j over insertion settings (the rows of
`insertions`: step, term, Pauli, ancilla phase), and <obs> is the expectation of `observable`
(products of Z on the measured qubits) in the circuit with those parameter values bound.
Everything that varies between shots (input, insertion point, Re/Im basis) is a circuit
parameter, so sampling binds values and never rebuilds the circuit.

Monte Carlo (common practice, importance sampling): draw j with probability |w_ins[j]| / W,
W = sum_j |w_ins[j]|, and k from the input ensemble; one shot gives the outcome a of `observable`
(a product of +-1 outcomes times the observable's coefficients); the estimate
W sign(w_ins[j]) w_in[k] a is unbiased for Re X or Im X ('iid' sampling).

Stratified sampling (common practice; Cochran, "Sampling Techniques", 3rd ed. (1977), ch. 5,
from memory): row j gets a fixed number n_j >= 1 of the N shots (`stratified_counts`), the input
stays random; a shot of row j has value (w_ins[j] N / n_j) w_in[k] a, so the mean over all N
shots is sum_j w_ins[j] ybar_j with ybar_j the mean of w_in[k] a over row j's shots: unbiased for
any n_j >= 1, with variance sum_j w_ins[j]^2 sigma_j^2 / n_j (sigma_j^2 the variance of
w_in[k] a within row j). Its standard error needs the within-row sample variances
(qhl.emulation.estimate.Estimate.mean_variance), not the pooled one.
"""

from dataclasses import dataclass, field

import numpy as np
from qiskit import ClassicalRegister, QuantumCircuit
from qiskit.quantum_info import DensityMatrix, SparsePauliOp, Statevector

from ..base.errors import QhlInputError
from ..base.memory import require_memory
from .state_prep import InputEnsemble
from .trotter_reference import family_reference_value

__all__ = ["InsertionTable", "CircuitFamily", "ShotSettings", "exact_expectation", "circuit_builds",
           "PARTS", "SAMPLINGS", "stratified_counts"]

PARTS = ("re", "im")
SAMPLINGS = ("stratified", "iid")
_BASIS_ANGLE = {"re": 0.0, "im": -np.pi / 2}   # rz(mu) then h: measure X (re) or Y (im)
_BUILDS = [0]


def circuit_builds() -> int:
    """How many family circuits this process has built (benchmarks check it stays flat)."""
    return _BUILDS[0]


def count_build() -> None:
    _BUILDS[0] += 1


@dataclass(frozen=True)
class InsertionTable:
    """Insertion settings of a family.

    Attributes:
        parameters: the circuit Parameters these settings bind, in column order.
        values: (J, len(parameters)) values to bind per row.
        weights: (J,) real weights w_ins.
        rows: (J,) dicts describing each row (step, slot, block, pauli, ...), for reports.
    """

    parameters: tuple
    values: np.ndarray
    weights: np.ndarray
    rows: tuple = ()

    def __len__(self) -> int:
        return len(self.weights)

    @property
    def total_weight(self) -> float:
        return float(np.sum(np.abs(self.weights)))


@dataclass(frozen=True)
class ShotSettings:
    """Sampled settings: bind `values[s]` to the family circuit for shot s.

    estimate = mean over s of scale[s] * (outcome of the family observable in shot s).
    """

    values: np.ndarray
    scale: np.ndarray
    insertion_rows: np.ndarray
    part: str
    strata: np.ndarray | None = None      # shots per insertion row when stratified, else None


@dataclass
class CircuitFamily:
    """One parameterised circuit and the weights that turn its expectations into X.

    Attributes:
        kind: 'signal', 'gradient' (Hadamard test), 'gradient-shift' (stochastic
            parameter shift) or 'hessian'.
        circuit: parameterised QuantumCircuit without measurements; qubit i = spin i, ancillas
            after the spins.
        observable: SparsePauliOp of Z's on `measured_qubits` (already in the measured frame).
        inputs: the input ensemble; `prep` its ry angles (one Parameter per spin).
        basis: Parameters of the final rz(mu) (per observed spin) choosing Re or Im.
        insertions: the insertion table (one row with no parameters for 'signal').
        measured_qubits: qubits read out at the end.
        time, steps, order: the Trotterised evolution; parameters: differentiated names.
        step_circuit: one Trotter step of the evolution alone (for per-step counts).
        evolution: {model, experiment, values_hz, grouping, ordering} of the compiled evolution,
            from which qhl.circuits.trotter_reference recomputes X without the circuit.
    """

    kind: str
    circuit: QuantumCircuit
    observable: SparsePauliOp
    inputs: InputEnsemble
    prep: tuple
    basis: tuple
    insertions: InsertionTable
    measured_qubits: tuple
    time: float
    steps: int
    order: int
    parameters: tuple = ()
    step_circuit: QuantumCircuit | None = None
    evolution: dict | None = field(default=None, repr=False)
    _index: dict = field(default_factory=dict, repr=False)

    def __post_init__(self):
        order = {p: k for k, p in enumerate(self.circuit.parameters)}
        missing = [p.name for p in (*self.prep, *self.basis, *self.insertions.parameters) if p not in order]
        if missing or len(order) != len(self.prep) + len(self.basis) + len(self.insertions.parameters):
            raise RuntimeError(f"family parameters do not match the circuit: {missing}")
        self._index = {"prep": np.array([order[p] for p in self.prep], int),
                       "basis": np.array([order[p] for p in self.basis], int),
                       "ins": np.array([order[p] for p in self.insertions.parameters], int)}

    @property
    def num_parameters(self) -> int:
        return self.circuit.num_parameters

    def parameter_values(self, angles, insertion_row: int, part: str = "re") -> np.ndarray:
        """Values for `circuit.parameters` (in that order) for one input, insertion row and part."""
        if part not in PARTS:
            raise QhlInputError(f"unknown part '{part}': expected re or im", key="part")
        v = np.empty(self.num_parameters)
        v[self._index["prep"]] = angles
        v[self._index["basis"]] = _BASIS_ANGLE[part]
        v[self._index["ins"]] = self.insertions.values[insertion_row]
        return v

    def bind(self, angles, insertion_row: int, part: str = "re") -> QuantumCircuit:
        """The bound circuit (a copy with numbers; the family circuit is not rebuilt)."""
        return self.circuit.assign_parameters(self.parameter_values(angles, insertion_row, part))

    def representative(self, part: str = "re") -> QuantumCircuit:
        """A typical bound member: the heaviest insertion row, observed spins in |+>."""
        angles = np.where(np.array(self.inputs.observed), np.pi / 2, 0.0)
        row = int(np.argmax(np.abs(self.insertions.weights)))
        return self.bind(angles, row, part)

    def with_measurements(self, bound: QuantumCircuit) -> QuantumCircuit:
        """`bound` plus a classical register reading `measured_qubits` in order."""
        qc = bound.copy()
        creg = ClassicalRegister(len(self.measured_qubits), "m")
        qc.add_register(creg)
        qc.measure(list(self.measured_qubits), creg)
        return qc

    def outcome_values(self, bits) -> np.ndarray:
        """Single-shot values of `observable` from measured bits.

        Args:
            bits: (shots, len(measured_qubits)) array of 0/1, column k = classical bit k of
                `with_measurements` (measured_qubits[k]); bit 1 means Z = -1.

        Returns:
            (shots,) values of sum_terms c * prod Z over the term's qubits.
        """
        bits = np.atleast_2d(np.asarray(bits, int))
        z = 1 - 2 * bits
        col = {q: k for k, q in enumerate(self.measured_qubits)}
        n = self.circuit.num_qubits
        out = np.zeros(bits.shape[0])
        for label, c in zip(self.observable.paulis.to_labels(), self.observable.coeffs):
            qubits = [q for q in range(n) if label[n - 1 - q] == "Z"]
            out += float(np.real(c)) * np.prod(z[:, [col[q] for q in qubits]], axis=1)
        return out

    def sample(self, rng, size: int, part: str = "re", sampling: str = "iid") -> ShotSettings:
        """Draw `size` shot settings.

        Args:
            sampling: 'iid' (insertion rows drawn i.i.d. by |w_ins|; the original scheme) or
                'stratified' (row j gets the fixed share n_j of `stratified_counts`, the input
                stays random per shot; scale W_j = w_j size / n_j; see the module docstring).
                'stratified' with fewer than 2 shots per nonzero row falls back to 'iid'.

        Returns:
            ShotSettings whose values bind `circuit` per shot (see the module docstring).
        """
        if part not in PARTS:
            raise QhlInputError(f"unknown part '{part}': expected re or im", key="part")
        if sampling not in SAMPLINGS:
            raise QhlInputError(f"unknown sampling '{sampling}': expected {' or '.join(SAMPLINGS)}", key="sampling")
        w = self.insertions.weights
        total = self.insertions.total_weight
        counts = stratified_counts(w, size) if sampling == "stratified" else None
        if counts is None:
            rows = rng.choice(len(w), size=size, p=np.abs(w) / total)
            row_scale = total * np.sign(w)
        else:
            rows = np.repeat(np.arange(len(w)), counts)
            row_scale = np.divide(w * size, counts, out=np.zeros(len(w)), where=counts > 0)
        angles, win = self.inputs.sample(rng, size)
        values = np.empty((size, self.num_parameters))
        values[:, self._index["prep"]] = angles
        values[:, self._index["basis"]] = _BASIS_ANGLE[part]
        values[:, self._index["ins"]] = self.insertions.values[rows]
        scale = row_scale[rows] * win
        return ShotSettings(values, scale, rows, part, counts)


def stratified_counts(weights, size: int, minimum: int = 2):
    """Shots per insertion row for stratified sampling, or None when size < minimum per nonzero row.

    Every row with w_j != 0 gets `minimum` shots and the rest, size - minimum J, is shared in
    proportion to |w_j| by the largest-remainder rule (so first-order formulas give equal shots to
    every Trotter step of one Pauli). The estimate sum_j w_j ybar_j is unbiased for any n_j >= 1
    and, with n_j proportional to |w_j|, has per-shot variance W sum_j |w_j| sigma_j^2 <= that of
    i.i.d. rows (proportional allocation; Cochran, "Sampling Techniques", 3rd ed. (1977), ch. 5;
    from memory).
    """
    w = np.abs(np.asarray(weights, float))
    live = w > 0
    spare = int(size) - minimum * int(live.sum())
    if spare < 0:
        return None
    share = spare * w / w.sum()
    counts = np.floor(share).astype(int)
    left = spare - int(counts.sum())
    if left:
        order = np.argsort(-(share - counts), kind="stable")
        counts[order[:left]] += 1
    counts[live] += minimum
    return counts


def exact_expectation(family: CircuitFamily, parts=PARTS, method: str = "reference") -> complex:
    """X of the family without shots, summed over every input and row.

    Args:
        parts: which of 're', 'im' to compute (one left out counts as 0).
        method: 'reference' (default, fastest) recomputes X from the family's evolution with
            the one Trotterised reference, qhl.circuits.trotter_reference (no circuit is
            simulated); 'statevector' simulates the circuit itself: it binds every input's ry
            angles and every insertion row and sums the statevector expectations; 'density'
            (the same number by linearity) binds the ry angles to 0 and evolves the input
            operator sum_k w_k |psi_k><psi_k| (x) |0><0|_ancillas through every bound member.
            The two circuit methods check the compiled circuits against the reference.

    Returns:
        Re X + i Im X.

    Raises:
        MemoryBudgetError: states that would not fit.
    """
    if method not in ("reference", "density", "statevector"):
        raise QhlInputError(f"unknown method '{method}': expected reference, density or statevector",
                            key="method")
    if method == "reference":
        value = family_reference_value(family)
        return (value.real if "re" in parts else 0.0) + (1j * value.imag if "im" in parts else 0.0)
    nq = family.circuit.num_qubits
    require_memory("exact family expectations", 16.0 * 4 ** nq * 4 if method == "density" else 16.0 * 2 ** nq * 8)
    total = 0j
    if method == "density":
        n_anc = nq - family.inputs.n_qubits
        start = np.zeros((2 ** n_anc, 2 ** n_anc))
        start[0, 0] = 1.0
        rho_in = DensityMatrix(np.kron(start, family.inputs.operator()))
        angles, win = np.zeros((1, family.inputs.n_qubits)), np.ones(1)
    else:
        angles, win = family.inputs.enumerate()
    for part in parts:
        acc = 0.0
        for j, wj in enumerate(family.insertions.weights):
            if wj == 0:
                continue
            for a, wk in zip(angles, win):
                bound = family.bind(a, j, part)
                state = rho_in.evolve(bound) if method == "density" else Statevector(bound)
                acc += wj * wk * float(np.real(state.expectation_value(family.observable)))
        total += acc if part == "re" else 1j * acc
    return total
