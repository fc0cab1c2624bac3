"""Exact single-shot moments of a circuit family's Monte Carlo estimator (no shots).

One shot of a family (qhl.circuits.circuit_family, `CircuitFamily.sample`) draws an insertion row j with
probability |w_j| / W (W = sum_j |w_j|), an input k with probability p_k and weight w_k
(qhl.circuits.state_prep), binds the circuit U_j, measures, and returns
    x = W sign(w_j) w_k a,
with a the eigenvalue of the family observable O (diagonal: products of Z) on the measured bit
string. Averaging over the Born outcomes (E[a | j, k] = <O>_{jk}, E[a^2 | j, k] = <O^2>_{jk})
and over the draws (common practice; law of total expectation):
    E[x]   = sum_j w_j   Tr[O   U_j rho_1 U_j^dag],   rho_1 = sum_k p_k w_k   |psi_k><psi_k| (x) |0><0|_anc
    E[x^2] = W sum_j |w_j| Tr[O^2 U_j rho_2 U_j^dag],  rho_2 = sum_k p_k w_k^2 |psi_k><psi_k| (x) |0><0|_anc
    Var x  = E[x^2] - E[x]^2          (per part: 're' and 'im' bind different read-out bases)
and in general E[x^m] = W^(m-1) sum_j sign(w_j)^m |w_j| Tr[O^m U_j rho_m U_j^dag] (m = 1..4 are
kept: the fourth central moment gives the spread of a sample variance, Var(v) ~ (mu_4 - Var^2)/N).
The standard error of the mean of N i.i.d. shots is sqrt(Var x / N) (central limit theorem,
common practice), so N = Var x / eps^2 shots reach standard error eps.

The row unitaries U_j are dense (2^q x 2^q, q qubits with the ancillas), built with numpy by
prefix products: the circuit is cut into runs of
gates free of insertion parameters and single gates that carry one; a row rebinds only the few
gates whose parameters it sets. Meant for small clusters (MAX_QUBITS).
"""

from dataclasses import dataclass

import numpy as np

from ..base.blas import single_thread_blas
from ..circuits.circuit_family import PARTS
from ..base.errors import QhlInputError
from ..base.memory import require_memory

__all__ = ["FamilyMoments", "family_moments", "row_unitaries", "input_moment_operator", "input_probability",
           "MAX_QUBITS"]

MAX_QUBITS = 8   # 6 spins + 2 ancillas (Hessian families): 256 x 256 row unitaries


@dataclass(frozen=True)
class FamilyMoments:
    """Exact single-shot moments of one part of a family's estimator.

    Attributes:
        part: 're' or 'im'.
        raw: (E[x], E[x^2], E[x^3], E[x^4]); E[x] equals qhl.circuits.circuit_family.exact_expectation's part.
        value_range: R = W max_k |w_k| max |a|: every shot lies in [-R, R].
    """

    part: str
    raw: tuple
    value_range: float

    @property
    def mean(self) -> float:
        return self.raw[0]

    @property
    def second_moment(self) -> float:
        return self.raw[1]

    @property
    def fourth_central_moment(self) -> float:
        """mu_4 = E[(x - mu)^4] = m4 - 4 mu m3 + 6 mu^2 m2 - 3 mu^4."""
        m1, m2, m3, m4 = self.raw
        return max(0.0, m4 - 4 * m1 * m3 + 6 * m1 ** 2 * m2 - 3 * m1 ** 4)

    @property
    def kurtosis(self) -> float:
        """mu_4 / Var^2 (nan for a constant estimator)."""
        v = self.variance
        return self.fourth_central_moment / v ** 2 if v > 0 else float("nan")

    @property
    def variance(self) -> float:
        """Var x = E[x^2] - E[x]^2 (clipped at 0 against rounding)."""
        return max(0.0, self.second_moment - self.mean ** 2)

    def shots_for(self, eps) -> float:
        """N = Var x / eps^2 (float) for standard error eps of the mean."""
        return self.variance / float(eps) ** 2


def check_exact_family(family, part: str, what: str) -> int:
    """The family's qubit count, after refusing an unknown part or more than MAX_QUBITS qubits."""
    if part not in PARTS:
        raise QhlInputError(f"unknown part '{part}': expected re or im", key="part")
    nq = family.circuit.num_qubits
    if nq > MAX_QUBITS:
        raise QhlInputError(f"{what} needs at most {MAX_QUBITS} qubits, the family has {nq}", key="qubits")
    return nq


def input_probability(ensemble) -> float:
    """p_k of each enumerated input: 2^-n ('product') or 1 / (N_obs 2^n) ('marked').

    These are the draw probabilities of `InputEnsemble.sample` (uniform bits, and for 'marked'
    a uniform observed spin), so `enumerate()` weights are p_k w_k.
    """
    n = ensemble.n_qubits
    if ensemble.scheme == "product":
        return 2.0 ** -n
    return 1.0 / (ensemble.n_observed * 2.0 ** n)


def input_moment_operator(ensemble, power: int) -> np.ndarray:
    """sum_k p_k w_k^power |psi_k><psi_k| (power 1: rho0 / Tr[O rho0]; power 2: rho_2 above)."""
    n = ensemble.n_qubits
    require_memory("the dense input moment operator", 16.0 * 4 ** n)
    angles, pw = ensemble.enumerate()
    p = input_probability(ensemble)
    coeff = p * (pw / p) ** power
    # ry(theta)|0> = cos(theta/2)|0> + sin(theta/2)|1>; qubit q is bit q (kron high to low)
    amp = np.stack([np.cos(angles / 2), np.sin(angles / 2)], axis=-1)          # (K, n, 2)
    psi = amp[:, n - 1, :]
    for q in range(n - 2, -1, -1):
        psi = np.einsum("ka,kb->kab", psi, amp[:, q, :]).reshape(len(angles), -1)
    return (psi.T * coeff) @ psi.conj()


def family_moments(family, part: str = "re") -> FamilyMoments:
    """E[x], E[x^2] and the range of one shot of `family` for part 're' or 'im' (module docstring).

    Args:
        family: a qhl.circuits.circuit_family.CircuitFamily (signal, gradient, shift or Hessian).
        part: 're' or 'im'.

    Returns:
        FamilyMoments (in the family's own units: 1/Hz for a gradient).

    Raises:
        QhlInputError: unknown part, more than MAX_QUBITS qubits.
        MemoryBudgetError: dense unitaries that would not fit.
    """
    nq = check_exact_family(family, part, "exact estimator variance")
    # rho moments (4), their product with a row unitary and that product times U^* (2), and the
    # cached prefix unitaries and working matrices of row_unitaries (row_unitaries_matrices).
    require_memory("exact estimator variance", 16.0 * 4 ** nq * (6 + row_unitaries_matrices(family)))
    n_anc = nq - family.inputs.n_qubits
    start = np.zeros((2 ** n_anc, 2 ** n_anc))
    start[0, 0] = 1.0
    rhos = [np.kron(start, input_moment_operator(family.inputs, m)) for m in (1, 2, 3, 4)]
    obs = np.real(np.diag(family.observable.to_matrix()))
    if not np.allclose(family.observable.to_matrix(), np.diag(obs)):
        raise QhlInputError("the family observable must be diagonal (Z's only)", key="observable")
    total = family.insertions.total_weight
    raw = np.zeros(4)
    powers = np.stack([obs ** m for m in (1, 2, 3, 4)])
    with single_thread_blas(2 ** nq):
        for j, wj, u in row_unitaries(family, part):
            # Tr[D U rho U^dag] for diagonal D = sum_i D_ii (U rho U^dag)_ii
            diag = np.stack([np.real(np.sum((u @ rho) * u.conj(), axis=1)) for rho in rhos])   # (4, 2^q)
            tr = np.sum(powers * diag, axis=1)
            raw += total ** np.arange(4) * np.sign(wj) ** np.arange(1, 5) * abs(wj) * tr
    _, pw = family.inputs.enumerate()
    w_max = float(np.max(np.abs(pw))) / input_probability(family.inputs)
    return FamilyMoments(part, tuple(float(v) for v in raw), total * w_max * float(np.max(np.abs(obs))))


def _apply_gate(gate, qubits, m, n):
    """gate (2^k x 2^k, qiskit order: qubits[0] least significant) applied to the rows of m (2^n x D)."""
    k = len(qubits)
    t = m.reshape((2,) * n + (-1,))
    axes = [n - 1 - q for q in reversed(qubits)]
    t = np.tensordot(gate.reshape((2,) * (2 * k)), t, axes=(list(range(k, 2 * k)), axes))
    return np.moveaxis(t, list(range(k)), axes).reshape(m.shape)


def _gate_matrix(operation, binding):
    params = [float(p.bind({q: binding[q] for q in p.parameters})) if hasattr(p, "parameters") else p
              for p in operation.params]
    if not any(hasattr(p, "parameters") for p in operation.params):
        return operation.to_matrix()
    bound = operation.copy()
    bound.params = params
    return bound.to_matrix()


def _items_operator(instructions, index, binding, n):
    u = np.eye(2 ** n, dtype=complex)
    for inst in instructions:
        u = _apply_gate(_gate_matrix(inst.operation, binding), [index[q] for q in inst.qubits], u, n)
    return u


def _segments(family):
    """The circuit's instructions cut into static runs and runs that use an insertion parameter."""
    qc = family.circuit
    ins = set(family.insertions.parameters)
    items = []                                   # (dynamic?, instructions, insertion parameters used)
    for inst in qc.data:
        used = set()
        for prm in inst.operation.params:
            if hasattr(prm, "parameters"):
                used |= set(prm.parameters) & ins
        if used or not items or items[-1][0]:
            items.append((bool(used), [inst], used))
        else:
            items[-1][1].append(inst)
    return items


def row_unitaries_matrices(family) -> int:
    """Dense 2^q x 2^q matrices row_unitaries holds at once: one cached prefix per segment plus
    one, and the row's unitary with two temporaries of a product."""
    return _row_matrices(len(_segments(family)))


def _row_matrices(n_segments: int) -> int:
    return n_segments + 1 + 3


def row_unitaries(family, part: str = "re"):
    """Yield (j, w_j, U_j) for every insertion row with w_j != 0: the bound circuit's unitary with
    every input angle 0 (the inputs enter as operators, see the module docstring).
    """
    qc = family.circuit
    n = qc.num_qubits
    index = {q: k for k, q in enumerate(qc.qubits)}
    ins = set(family.insertions.parameters)
    items = _segments(family)
    require_memory("exact row unitaries", 16.0 * 4 ** n * _row_matrices(len(items)))
    read_out = set(family.basis)                 # prep angles 0, read-out basis of `part`
    values = family.parameter_values(np.zeros(len(family.prep)), 0, part)
    base = {p: (float(v) if p in read_out else 0.0) for p, v in zip(qc.parameters, values)
            if p not in ins}
    zero = {**base, **{p: 0.0 for p in ins}}
    prefix = [np.eye(2 ** n, dtype=complex)]
    for _, instructions, _ in items:
        prefix.append(_items_operator(instructions, index, zero, n) @ prefix[-1])
    names = family.insertions.parameters
    for j, wj in enumerate(family.insertions.weights):
        if wj == 0:
            continue
        row = dict(zip(names, family.insertions.values[j]))
        u = np.eye(2 ** n, dtype=complex)
        last = 0                                 # items [0, last) are already in u
        for i, (dynamic, instructions, used) in enumerate(items):
            if dynamic and any(row[p] != 0 for p in used):
                u = _items_operator(instructions, index, {**base, **row}, n) @ prefix[i] @ prefix[last].conj().T @ u
                last = i + 1
        yield j, float(wj), prefix[-1] @ prefix[last].conj().T @ u
