"""Trotter costs: the order-4 nested-commutator sum, bounds against exact product-formula errors."""

import itertools

import numpy as np
import pytest
from qiskit.quantum_info import SparsePauliOp

from qhl import build_model, demo_cluster
from qhl.costing.trotter_cost import (empirical_trotter_steps, product_formula_unitary, steps_from_constant,
                                      trotter_model)
from qhl.costing.trotter_order4 import SUZUKI4_U, nested_commutator_sum
from qhl.circuits.trotter import trotter_unitary
from qhl.circuits.trotter_bounds import trotter_steps_for


def _brute_force(op, depth):
    mats = [SparsePauliOp(p, c).to_matrix() for p, c in zip(op.paulis, op.coeffs)]
    total = 0.0
    for tup in itertools.product(range(len(mats)), repeat=depth + 1):
        m = mats[tup[0]]
        for k in tup[1:]:
            m = mats[k] @ m - m @ mats[k]
        total += np.linalg.norm(m, 2)
    return total


@pytest.mark.parametrize("depth", [1, 2, 4])
def test_nested_commutator_sum_matches_dense_enumeration(depth):
    # alpha_comm of Childs, Su, Tran, Wiebe, Zhu, PRX 11, 011020 (2021), summed over every ordered
    # tuple with dense matrices (numpy spectral norms) as the independent computation.
    rng = np.random.default_rng(depth)
    labels = ["XIZ", "ZZI", "IYX", "XXX", "ZIY"]
    op = SparsePauliOp(labels, rng.normal(size=len(labels)))
    assert nested_commutator_sum(op, depth) == pytest.approx(_brute_force(op, depth), rel=1e-10)


@pytest.fixture(scope="module")
def static_model():
    c = demo_cluster()
    return trotter_model(build_model(c), c.experiments[0])


def test_suzuki4_is_fourth_order(static_model):
    # Suzuki, Phys. Lett. A 146, 319 (1990): one-step error O(tau^5), so halving tau divides it by ~32
    terms = static_model.terms
    h = terms.hamiltonian().to_matrix()
    e, v = np.linalg.eigh(h)
    errs = []
    for tau in (2e-6, 1e-6):
        exact = (v * np.exp(-1j * e * tau)) @ v.conj().T
        errs.append(np.linalg.norm(product_formula_unitary(terms, 4, tau, 1) - exact, 2))
    assert 25 < errs[0] / errs[1] < 40
    assert SUZUKI4_U == pytest.approx(0.4144907717943757, rel=1e-12)   # 1/(4 - 4^(1/3)) [derived]


@pytest.mark.parametrize("order", [1, 2])
def test_dense_product_formula_matches_the_trotter_module(static_model, order):
    # independent implementation: qhl.circuits.trotter.trotter_unitary (scipy expm of each group)
    mine = product_formula_unitary(static_model.terms, order, 3e-5, 3)
    theirs = trotter_unitary(static_model.terms, 3e-5, 3, order)
    assert np.max(np.abs(mine - theirs)) < 1e-10


@pytest.mark.parametrize("order", [1, 2, 4])
def test_bounds_never_undercut_the_exact_error(static_model, order):
    # Childs et al. 2021: the commutator bound is an upper bound, so its step count is never
    # below the smallest r whose exact error meets the target; and the bound holds per step.
    t, eps = 2e-5, 1e-3
    r_bound = int(static_model.steps(order, t, eps))
    r_exact, err = empirical_trotter_steps(static_model.terms, order, t, eps)
    assert err <= eps
    assert r_exact <= r_bound
    h = static_model.terms.hamiltonian().to_matrix()
    e, v = np.linalg.eigh(h)
    for tau in (1e-6, 5e-6):
        exact = (v * np.exp(-1j * e * tau)) @ v.conj().T
        one = np.linalg.norm(product_formula_unitary(static_model.terms, order, tau, 1) - exact, 2)
        assert one <= static_model.constants[order] * tau ** (order + 1)


@pytest.mark.parametrize("order", [1, 2])
def test_steps_agree_with_the_bounds_module(static_model, order):
    for t, eps in ((1e-5, 1e-2), (2e-4, 1e-5)):
        assert int(static_model.steps(order, t, eps)) == trotter_steps_for(static_model.terms, t, eps, order)


def test_steps_from_constant_is_the_smallest_r():
    r = steps_from_constant(3.7, 2, 1.3, 1e-4)
    assert 3.7 * 1.3**3 / r**2 <= 1e-4 < 3.7 * 1.3**3 / (r - 1) ** 2


def test_order4_step_counts_against_the_transpiled_suzuki_circuit(static_model):
    # Suzuki 1990: S4(tau) = S2(u tau)^2 S2((1-4u) tau) S2(u tau)^2, S2(-x) = S2(x)^dag. The real
    # S4 circuit, transpiled here by qiskit (cx, rz, sx, x; level 2), one more step's counts
    # (two steps minus one) against the model's five second-order stages.
    from qiskit import transpile
    from qhl.circuits.circuit_counts import is_clifford_angle
    from qhl.circuits.trotter import trotter_circuit

    def s4(steps, tau=1e-6):
        qc = None
        for _ in range(steps):
            for f in (SUZUKI4_U, SUZUKI4_U, 1 - 4 * SUZUKI4_U, SUZUKI4_U, SUZUKI4_U):
                x = trotter_circuit(static_model.terms, abs(f) * tau, 1, 2)
                x = x if f > 0 else x.inverse()
                qc = x if qc is None else qc.compose(x)
        t = transpile(qc, basis_gates=["cx", "rz", "sx", "x"], optimization_level=2, seed_transpiler=1234)
        rot = sum(1 for i in t.data if i.operation.name == "rz" and not is_clifford_angle(i.operation.params[0]))
        return {"rotations": rot, "cx": t.count_ops().get("cx", 0), "depth": t.depth()}

    one, two = s4(1), s4(2)
    model = static_model.step_counts(4)
    for key in ("rotations", "cx", "depth"):
        assert model[key] == pytest.approx(two[key] - one[key], rel=0.05), key


def test_order4_locality_bound_is_never_below_the_nested_sum():
    # the nested sum of trotter_order4 (checked above against dense enumeration) is exact for the Pauli
    # decomposition; the locality bound must lie above it
    from qhl.costing.trotter_cost import _order4_locality_constant
    from qhl.costing.trotter_order4 import order4_step_error_constant
    from test_pauli_commutators import _cluster
    from qhl.circuits.trotter import trotter_terms
    for n in (3, 5):
        c = _cluster(n, n)
        terms = trotter_terms(build_model(c), c.experiments[0])
        assert order4_step_error_constant(terms.hamiltonian()) <= _order4_locality_constant(terms.operators())


def test_large_cluster_counts_come_from_the_rule_without_a_circuit(monkeypatch):
    # 20 spins: per-step counts by qhl.circuits.step_counts; building a circuit would fail here
    import qhl.costing.trotter_cost as tc
    from test_pauli_commutators import _cluster
    monkeypatch.setattr(tc, "trotter_circuit", None)
    c = _cluster(20, 1)
    m = trotter_model(build_model(c), c.experiments[0])
    assert m.counts_method == "count rule"
    assert m.step_counts(1)["cx"] == 3 * 190          # every homonuclear pair: XX, YY, ZZ -> 3 CX
    assert m.methods[1] == "pauli-1-norm"
