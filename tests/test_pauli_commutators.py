"""Fast symplectic commutator sums against SparsePauliOp commutators (qiskit.quantum_info).

The reference below is a slow, direct computation with qiskit's SparsePauliOp algebra (compose,
simplify) and Pauli-coefficient 1-norms; it imports nothing of the module it checks.
"""

import numpy as np
import pytest
from qiskit.quantum_info import Pauli, PauliList, SparsePauliOp

from qhl import build_model
from qhl.circuits.pauli_commutators import (anticommuting, pauli_arrays, product_phase, quadrature_norms,
                                            trotter_prefactor)
from qhl.circuits.trotter import trotter_terms
from qhl.spins.cluster import Cluster, Experiment, Spin


# ----------------------------------------------------------------------------- slow references
def _ref_comm(a, b):
    return (a.compose(b) - b.compose(a)).simplify(atol=1e-12)


def _l1(op):
    return float(np.sum(np.abs(op.coeffs)))


def ref_prefactor(ops, order):
    """Childs, Su, Tran, Wiebe, Zhu, PRX 11, 011020 (2021): alpha_1, alpha_2 with Pauli 1-norms."""
    n = ops[0].num_qubits
    total = 0.0
    for g, h in enumerate(ops):
        tail = SparsePauliOp.sum(ops[g + 1:]).simplify(atol=0) if g + 1 < len(ops) else SparsePauliOp("I" * n, 0)
        if order == 1:
            total += 0.5 * _l1(_ref_comm(tail, h))
        else:
            total += _l1(_ref_comm(tail, _ref_comm(tail, h))) / 12 + _l1(_ref_comm(h, _ref_comm(h, tail))) / 24
    return total


def ref_quadrature(h, labels):
    c1 = c2 = 0.0
    for lab in labels:
        p = SparsePauliOp(lab)
        k1 = _ref_comm(h, p)
        c1 = max(c1, _l1(k1))
        c2 = max(c2, _l1(_ref_comm(h, k1)))
    return c1, c2


# ----------------------------------------------------------------------------- invented clusters
def _cluster(n, seed, hetero=False):
    rng = np.random.default_rng(seed)
    side = int(np.ceil(n ** (1 / 3)))
    grid = np.array([(a, b, c) for a in range(side) for b in range(side) for c in range(side)][:n], float)
    pos = 1.8 * grid + rng.uniform(-0.3, 0.3, size=(n, 3))      # jittered cubic lattice (invented)
    spins = [Spin(f"H{i + 1}", "13C" if hetero and i % 3 == 2 else "1H", offset_hz=float(rng.normal(0, 800)),
                  position_angstrom=tuple(p)) for i, p in enumerate(pos)]
    return Cluster(field_tesla=9.4, observe="1H", spins=tuple(spins),
                   experiments=(Experiment("fid", t_max_s=2e-4, points=16),), name=f"rand{n}")


@pytest.mark.parametrize("n,seed,hetero", [(3, 0, False), (5, 1, False), (6, 2, True), (8, 3, False),
                                           (10, 4, False)])
def test_trotter_prefactor_equals_sparse_pauli_op_sums(n, seed, hetero):
    c = _cluster(n, seed, hetero)
    terms = trotter_terms(build_model(c), c.experiments[0])
    ops = terms.operators()
    for order in (1, 2):
        fast, method = trotter_prefactor(ops, order)
        assert method == "pauli-1-norm"
        assert fast == pytest.approx(ref_prefactor(ops, order), rel=1e-9)


@pytest.mark.parametrize("n,seed", [(4, 5), (7, 6), (10, 7)])
def test_quadrature_norms_equal_sparse_pauli_op_sums(n, seed):
    c = _cluster(n, seed)
    model = build_model(c)
    h = model.hamiltonian(c.experiments[0])
    labels = sorted({lab for name in model.free for lab in model.parameter(name).generator.paulis.to_labels()})
    c1, c2, method = quadrature_norms(h, SparsePauliOp(labels))
    r1, r2 = ref_quadrature(h, labels)
    assert method == "pauli-1-norm"
    assert c1 == pytest.approx(r1, rel=1e-9)
    assert c2 == pytest.approx(r2, rel=1e-9)


@pytest.mark.parametrize("n,seed", [(6, 8), (9, 9)])
def test_locality_bound_is_never_below_the_exact_sum(n, seed):
    c = _cluster(n, seed)
    model = build_model(c)
    ops = trotter_terms(model, c.experiments[0]).operators()
    for order in (1, 2):
        exact, _ = trotter_prefactor(ops, order)
        bound, method = trotter_prefactor(ops, order, max_products=0)
        assert method == "locality-bound"
        assert exact <= bound * (1 + 1e-12) and bound < 50 * exact
    h = model.hamiltonian(c.experiments[0])
    e1, e2, _ = quadrature_norms(h, h)
    b1, b2, m = quadrature_norms(h, h, max_products=0)
    assert m == "locality-bound" and b1 == pytest.approx(e1, rel=1e-12) and e2 <= b2 * (1 + 1e-12)


def test_products_and_anticommutation_match_qiskit_paulis():
    # qiskit.quantum_info.Pauli.compose and .anticommutes as the reference, 70 qubits (two words)
    rng = np.random.default_rng(11)
    labels = ["".join(rng.choice(list("IXYZ"), size=70)) for _ in range(40)]
    arr = pauli_arrays(SparsePauliOp(labels))
    i, j = np.triu_indices(40, 1)
    anti = anticommuting(arr.x[i], arr.z[i], arr.x[j], arr.z[j])
    xc, zc, k = product_phase(arr.x[i], arr.z[i], arr.x[j], arr.z[j])
    for m in range(0, i.size, 37):
        a, b = Pauli(labels[i[m]]), Pauli(labels[j[m]])
        assert anti[m] == a.anticommutes(b)
        prod = a.dot(b)       # a b (qiskit: dot is the matrix product a @ b)
        herm = Pauli((prod.z, prod.x))
        phase = (-1j) ** prod.phase / (-1j) ** herm.phase
        out = pauli_arrays(SparsePauliOp(PauliList([herm])))
        assert np.array_equal(out.x[0], xc[m]) and np.array_equal(out.z[0], zc[m])
        assert phase == pytest.approx(1j ** k[m])
