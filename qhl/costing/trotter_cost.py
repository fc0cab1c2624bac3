"""Trotter steps and per-step gate counts of a cluster Hamiltonian, orders 1, 2 and 4.

Terms are qhl.circuits.trotter's groups H_1..H_G (grouping 'pairs': one group per spin and per spin pair,
each an exact product of commuting Pauli rotations; H_1 acts first). One step of duration tau
has error <= C_p tau^(p+1); r steps of tau = t/r give <= C_p t^(p+1) / r^p, so
    r_p(t, eps) = ceil((C_p t^(p+1) / eps)^(1/p))      (vectorised over t and eps).
C_1, C_2: qhl.circuits.trotter_bounds.commutator_prefactor (Childs, Su, Tran, Wiebe, Zhu, PRX 11, 011020
(2021), first- and second-order bounds). C_4: qhl.costing.trotter_order4 on the Pauli strings of
H, an upper bound on the same sum over groups (each group's commutators split into its Pauli
strings by the triangle inequality).

Gates per step: qhl.circuits.circuit_counts on qhl.circuits.trotter.trotter_circuit (transpiled to cx, rz, sx, x,
all-to-all connectivity), taken as the marginal cost of one more step (counts at r = 2 minus
r = 1, so merged exponentials between steps are not double counted), up to
TRANSPILE_MAX_QUBITS qubits; above, the count rule of qhl.circuits.step_counts (no circuit is
built). Order 4 is five second-order stages per step: five times the marginal second-order step
(common practice).

Large clusters: C_1 and C_2 come from qhl.circuits.pauli_commutators (exact Pauli 1-norms, or its
locality bound when the products would be too many; `TrotterModel.methods` says which). C_4 uses
trotter_order4's prefactor with the nested sum replaced by the locality bound
    alpha_comm <= Lambda prod_{d=1..4} 2 (d+1) Lambda_max
(before the d-th commutator the nested product of one- and two-qubit terms acts on at most d+1
qubits, and a term that anticommutes with it must touch one of them; Lambda = sum |c|,
Lambda_max = the largest sum of |c| over the terms touching one qubit). Up to
ORDER4_EXACT_MAX_QUBITS qubits the smaller of this and trotter_order4's own sum is used.

The empirical step count applies the product formula to the dense propagator (n <= 8 qubits)
and finds the smallest r (to within 1%) whose exact error ||S(t/r)^r - exp(-iHt)||_2 is within
eps (power-law jumps, then bisection; assumes the error falls with r: common practice).
"""

from dataclasses import dataclass, field
import math

import numpy as np
from qiskit.quantum_info import SparsePauliOp

from ..circuits.circuit_counts import circuit_counts
from ..base.blas import single_thread_blas
from ..base.errors import QhlInputError
from ..circuits.trotter import trotter_circuit, trotter_terms
from ..circuits.pauli_commutators import pauli_arrays
from ..circuits.step_counts import step_counts_rule
from ..circuits.trotter_bounds import prefactor_and_method
from .trotter_order4 import SUZUKI4_U, nested_commutator_sum, order4_step_error_constant

__all__ = ["ORDERS", "TrotterModel", "trotter_model", "rotor_bound_model", "steps_from_constant", "empirical_trotter_steps", "empirical_flops",
           "product_formula_unitary", "ASSUMPTIONS"]

ORDERS = (1, 2, 4)
EMPIRICAL_MAX_QUBITS = 8
TRANSPILE_MAX_QUBITS = 8
ORDER4_EXACT_MAX_QUBITS = 16
_COUNT_TIME_S = 1e-6      # any generic duration: rotation angles must not be Clifford multiples of pi/2

ASSUMPTIONS = {
    "trotter_terms": "product-formula terms: one group per spin and per spin pair (qhl.circuits.trotter, grouping 'pairs')",
    "trotter_orders_1_2": "first- and second-order commutator bounds (Childs, Su, Tran, Wiebe, Zhu, PRX 11, "
                          "011020 (2021)) via qhl.circuits.trotter_bounds",
    "trotter_steps": "r = ceil((C_p t^(p+1)/eps)^(1/p)) from r * C_p (t/r)^(p+1) <= eps",
    "gates_per_step": "transpiled counts (cx, rz, sx, x; all-to-all) of one more Trotter step (qhl.circuits.circuit_counts); "
                      "order 4 = 5 second-order stages",
    "empirical_steps": "smallest r with exact ||S(t/r)^r - e^{-iHt}|| <= eps on the dense propagator (n <= 8)",
}


def steps_from_constant(constant, order, t, eps):
    """r = ceil((C t^(p+1) / eps)^(1/p)), at least 1 (arrays broadcast)."""
    t = np.asarray(t, float)
    eps = np.asarray(eps, float)
    r = np.ceil((constant * t ** (order + 1) / eps) ** (1.0 / order) * (1 - 1e-12))
    return np.maximum(r, 1.0)


@dataclass
class TrotterModel:
    """Per-step error constants and (lazily) per-step gate counts of one experiment's Hamiltonian.

    Attributes:
        terms: qhl.circuits.trotter.TrotterTerms.
        constants: {order: C_p} with per-step error <= C_p tau^(p+1) (tau in s, H in rad/s).
    """

    terms: object
    constants: dict
    methods: dict = field(default_factory=dict)
    _counts: dict = field(default_factory=dict)

    @property
    def hamiltonian(self):
        return self.terms.hamiltonian()

    def steps(self, order, t, eps):
        return steps_from_constant(self.constants[order], order, t, eps)

    def step_counts(self, order) -> dict:
        """Marginal {cx, depth, rotations} of one Trotter step of `order`."""
        if order not in self._counts and self.terms.n_qubits > TRANSPILE_MAX_QUBITS:
            self._counts[order] = step_counts_rule(self.terms, order)
        if order not in self._counts:
            base = 2 if order == 4 else order
            one = circuit_counts(trotter_circuit(self.terms, _COUNT_TIME_S, 1, base)).to_dict()
            two = circuit_counts(trotter_circuit(self.terms, 2 * _COUNT_TIME_S, 2, base)).to_dict()
            per = {k: max(two[k] - one[k], 1) for k in ("cx", "depth", "rotations")}
            if order == 4:
                per = {k: 5 * v for k, v in per.items()}
            self._counts[order] = per
        return self._counts[order]

    @property
    def counts_method(self):
        return "count rule" if self.terms.n_qubits > TRANSPILE_MAX_QUBITS else "transpiled"

    def rotations_per_step(self, order):
        return self.step_counts(order)["rotations"]

    def layers_per_step(self, order):
        return self.step_counts(order)["depth"]


def trotter_model(model, experiment=None) -> TrotterModel:
    """TrotterModel of `model.hamiltonian(experiment)`: constants C_1, C_2, C_4."""
    terms = trotter_terms(model, experiment, grouping="pairs")
    if not terms.groups:
        raise QhlInputError("the Hamiltonian has no non-identity terms", key="hamiltonian")
    ops = terms.operators()
    (c1, m1), (c2, m2) = prefactor_and_method(ops, 1), prefactor_and_method(ops, 2)
    c4, m4 = _order4_locality_constant(ops), "locality-bound"
    if terms.n_qubits <= ORDER4_EXACT_MAX_QUBITS:
        nested = order4_step_error_constant(terms.hamiltonian())
        if nested <= c4:
            c4, m4 = nested, "nested commutators"
    return TrotterModel(terms, {1: float(c1), 2: float(c2), 4: float(c4)}, {1: m1, 2: m2, 4: m4})


def rotor_bound_model(model, experiment) -> TrotterModel:
    """TrotterModel of a spinning experiment's Hamiltonian with every coupling at its largest rotor factor.

    H(t) = 2 pi sum_n s_n(t) h_n G_n (qhl.spins.spinning); each |s_n(t)| <= s_b,n = the sum of the absolute
    values of its five Fourier coefficients. The model is that of the static Hamiltonian with h_n replaced by
    h_n max(1, s_b,n): every term's coefficient bounds the term at all times, so its commutator constants
    bound those of any step-averaged Hamiltonian of the time-dependent product formula (commutator bounds
    grow with each coefficient's magnitude; Childs et al., PRX 11, 011020 (2021)). The Magnus error of the
    time dependence within a step is not in these constants (the rotor rule of
    qhl.circuits.spinning_circuits covers it; not a bound). A static experiment gives trotter_model's.
    """
    from dataclasses import replace as _replace
    from ..spins.spinning import is_spinning, spinning_factors
    if not is_spinning(experiment):
        return trotter_model(model, experiment)
    bound = np.abs(spinning_factors(model, experiment).fourier).sum(axis=1)
    stretched = model.with_values(model.all_values_hz() * np.maximum(bound, 1.0), free_only=False)
    return trotter_model(stretched, _replace(experiment, steps=(), spinning_hz=0.0))


def _order4_locality_constant(ops):
    """C_4 of trotter_order4 with its nested sum bounded by locality (module docstring)."""
    arr = pauli_arrays(ops)
    absc = np.abs(arr.coeffs)
    lam, lam_max = float(absc.sum()), float(arr.qubit_weights().max())
    nested = lam * math.prod(2 * (d + 1) * lam_max for d in range(1, 5))
    # trotter_order4's prefactor C_4 / alpha_comm, read off a two-term example (one place for it)
    probe = SparsePauliOp(["XI", "ZZ"], [1.0, 1.0])
    return nested * order4_step_error_constant(probe) / nested_commutator_sum(probe, 4)


# ---------------------------------------------------------------------- exact product formulas
def _group_propagators(terms):
    """Eigendecompositions of each group matrix, for exp(-i x H_g) at any x."""
    out = []
    for op in terms.operators():
        e, v = np.linalg.eigh(op.to_matrix())
        out.append((e, v))
    return out


def _expm(eig, x):
    e, v = eig
    return (v * np.exp(-1j * x * e)) @ v.conj().T


def _step(eigs, order, tau):
    dim = eigs[0][1].shape[0]

    def s1(x):
        u = np.eye(dim, dtype=complex)
        for eig in eigs:
            u = _expm(eig, x) @ u
        return u

    def s2(x):
        u = np.eye(dim, dtype=complex)
        for eig in eigs + eigs[::-1]:
            u = _expm(eig, x / 2) @ u
        return u

    if order == 1:
        return s1(tau)
    if order == 2:
        return s2(tau)
    if order == 4:
        a = s2(SUZUKI4_U * tau)
        return a @ a @ s2((1 - 4 * SUZUKI4_U) * tau) @ a @ a
    raise QhlInputError(f"unsupported Trotter order {order}: expected 1, 2 or 4", key="order")


def product_formula_unitary(terms, order: int, time: float, steps: int) -> np.ndarray:
    """Dense S_p(t/r)^r over the groups of `terms` (orders 1, 2, 4; n <= 8 qubits)."""
    if terms.n_qubits > EMPIRICAL_MAX_QUBITS:
        raise QhlInputError(f"dense product formulas are limited to {EMPIRICAL_MAX_QUBITS} qubits", key="qubits")
    return np.linalg.matrix_power(_step(_group_propagators(terms), order, time / steps), steps)


def empirical_trotter_steps(terms, order: int, t: float, eps: float, r_max: int = 1 << 24, rtol: float = 0.01):
    """Smallest r (to within rtol relative) with ||S_p(t/r)^r - exp(-iHt)||_2 <= eps.

    The search jumps with the power law err ~ C / r^p from each evaluated point until it brackets
    the target, then bisects until the bracket is narrower than max(1, rtol * r): the returned r
    meets eps, and r - max(1, rtol r) does not (common practice: error falling with r assumed).

    Returns:
        (r, error at r), or (None, None) above EMPIRICAL_MAX_QUBITS qubits or beyond r_max.
    """
    if terms.n_qubits > EMPIRICAL_MAX_QUBITS:
        return None, None
    with single_thread_blas(2 ** terms.n_qubits):
        return _empirical_search(terms, order, t, eps, r_max, rtol)


def empirical_flops(terms, steps_bound):
    """Rough floating-point operations of empirical_trotter_steps for one order: about 30 error
    evaluations, each 2 log2(r) + 4 G products of 2^n-square complex matrices (8 d^3 real
    operations each; r: the bound's steps, G: groups). Common practice: d^3 per dense product."""
    d = 2.0 ** terms.n_qubits
    return 30 * (2 * math.log2(max(steps_bound, 2)) + 4 * len(terms.groups)) * 8 * d**3


def _empirical_search(terms, order, t, eps, r_max, rtol):
    eigs = _group_propagators(terms)
    e, v = np.linalg.eigh(terms.hamiltonian().to_matrix())
    exact = (v * np.exp(-1j * e * t)) @ v.conj().T
    cache = {}

    def err(r):
        if r not in cache:
            cache[r] = float(np.linalg.norm(np.linalg.matrix_power(_step(eigs, order, t / r), r) - exact, 2))
        return cache[r]

    lo, hi = 0, 1
    if err(1) > eps:
        r = 1
        while err(r) > eps:
            lo = r
            jump = (err(r) / eps) ** (1.0 / order) if err(r) < 1.0 else 4.0
            r = int(min(max(math.ceil(r * jump * 1.02), r + 1, 2 * r if err(r) >= 1.0 else 0), 2 * r_max))
            if r > r_max:
                return None, None
        hi = r
    while hi - lo > max(1, rtol * hi):
        mid = (lo + hi) // 2
        if err(mid) <= eps:
            hi = mid
        else:
            lo = mid
    return hi, err(hi)
