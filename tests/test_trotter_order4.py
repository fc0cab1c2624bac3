"""The fourth-order bound of qhl.costing.trotter_order4 against the exact error of S4.

Exact side, independent of qhl (no qhl import computes it): H from tests/reference_dense.py
(full-space matrices of the generators), split into Pauli strings here by trace projection
(P = tensor products of numpy Pauli matrices, c_P = Tr[P H] / 2^n), the Suzuki formula
S4(tau) = S2(u tau)^2 S2((1-4u) tau) S2(u tau)^2, u = 1/(4 - 4^(1/3)), S2 symmetric (M. Suzuki,
Phys. Lett. A 146, 319 (1990)), exponentials by scipy.linalg.expm (Al-Mohy and Higham 2009), and
the spectral norm by numpy. Bound under test: Childs, Su, Tran, Wiebe, Zhu, PRX 11, 011020 (2021),
arXiv:1912.08854 Eqs. (189), (191), as implemented by qhl (order4_step_error_constant).
"""

import itertools

import numpy as np
import pytest
import scipy.linalg as sla

from made_up_clusters import random_cluster, small_cluster
from reference_dense import all_values, hamiltonian_matrix

from qhl.circuits.trotter import trotter_terms
from qhl.costing.trotter_order4 import ASSUMPTIONS, ORDER4_BOUND_SOURCE, order4_step_error_constant
from qhl.spins.cluster import Experiment
from qhl.spins.model import build_model

_P = {"I": np.eye(2, dtype=complex), "X": np.array([[0, 1], [1, 0]], complex),
      "Y": np.array([[0, -1j], [1j, 0]], complex), "Z": np.diag([1.0, -1.0]).astype(complex)}
_U = 1.0 / (4.0 - 4.0 ** (1.0 / 3.0))


def _pauli_split(h):
    """Non-identity Pauli-string summands c_P P of a dense Hermitian h (trace projection)."""
    n = int(round(np.log2(h.shape[0])))
    out = []
    for word in itertools.product("IXYZ", repeat=n):
        if set(word) == {"I"}:
            continue
        p = _P[word[0]]
        for w in word[1:]:
            p = np.kron(p, _P[w])
        c = np.trace(p @ h).real / 2**n
        if abs(c) > 1e-12 * np.abs(h).max():
            out.append(c * p)
    return out


def _s2(terms, tau):
    u = np.eye(terms[0].shape[0], dtype=complex)
    for a in terms:                                  # forward sweep, then backward: S2 symmetric
        u = sla.expm(-0.5j * tau * a) @ u
    for a in reversed(terms):
        u = sla.expm(-0.5j * tau * a) @ u
    return u


def _s4(terms, tau):
    a = _s2(terms, _U * tau)
    return a @ a @ _s2(terms, (1 - 4 * _U) * tau) @ a @ a


def _exact_error(terms, h, t, steps):
    step = _s4(terms, t / steps)
    return np.linalg.norm(np.linalg.matrix_power(step, steps) - sla.expm(-1j * t * h), 2)


def _cases():
    rng = np.random.default_rng(17)
    ex = Experiment("x", 1e-3, 4, 0.8)
    yield "small3", small_cluster(n=3), (0.05, 0.2, 0.5)
    yield "small4", small_cluster(n=4), (0.1, 0.4)
    yield "small3-hetero", small_cluster(hetero=True, n=3), (0.3,)
    yield "random3", random_cluster(rng, 3, experiments=(ex,)), (2e-5, 1e-4)
    yield "random4-hetero", random_cluster(rng, 4, hetero=True, experiments=(ex,)), (3e-5,)


@pytest.mark.parametrize("name,cluster,times", list(_cases()), ids=[c[0] for c in _cases()])
def test_order4_bound_lies_above_the_exact_suzuki_error(name, cluster, times):
    model = build_model(cluster)
    ex = cluster.experiments[0]
    h = hamiltonian_matrix(model, ex, all_values(model))
    op = trotter_terms(model, ex).hamiltonian()
    # the operator qhl bounds is the Hamiltonian the reference builds (rad/s, same qubit order)
    assert np.allclose(op.to_matrix(), h, atol=1e-9 * np.abs(h).max())
    c4 = order4_step_error_constant(op)
    terms = _pauli_split(h)
    rng = np.random.default_rng(3)
    for order in (terms, [terms[k] for k in rng.permutation(len(terms))]):    # any ordering of the summands
        for t in times:
            for steps in (1, 3):
                exact = _exact_error(order, h, t, steps)
                bound = steps * c4 * (t / steps) ** 5
                assert exact > 1e-11, (name, t, steps)        # a real error, not round-off
                assert exact <= bound, (name, t, steps, exact, bound)


def test_two_summand_dense_s4_obeys_the_published_appendix_m_bound():
    # Childs, Su, Tran, Wiebe, Zhu, PRX 11, 011020 (2021), Appendix M, Eq. (M13): for H = A + B and the
    # fourth-order Suzuki formula, ||S4(t) - e^{-itH}|| <= t^5 sum_k c_k ||[X_k1,[X_k2,[X_k3,[X_k4, A]]]]||
    # with the eight published coefficients below (tuples outermost first, innermost base A; read
    # from a quotation of the paper). Here A = offsets, B = couplings of an invented cluster; the
    # dense S4 of this file must satisfy it (checks the reference the main test relies on) with
    # either assignment of the outer half-steps.
    coefficients = {"AAAB": 0.0047, "AABB": 0.0057, "ABAB": 0.0046, "ABBB": 0.0074,
                    "BAAB": 0.0097, "BABB": 0.0097, "BBAB": 0.0173, "BBBB": 0.0284}
    cluster = small_cluster(n=3)
    model = build_model(cluster)
    ex = cluster.experiments[0]
    vals = all_values(model)
    is_offset = np.array([p.name.startswith("offset:") for p in model.parameters])
    a = hamiltonian_matrix(model, ex, np.where(is_offset, vals, 0.0))
    b = hamiltonian_matrix(model, ex, np.where(is_offset, 0.0, vals))

    def comm(x, y):
        return x @ y - y @ x

    def m13(first, second):
        named = {"A": first, "B": second}
        total = 0.0
        for word, c in coefficients.items():
            x = first
            for letter in reversed(word):
                x = comm(named[letter], x)
            total += c * np.linalg.norm(x, 2)
        return total

    for t in (0.1, 0.3, 0.6):
        for first, second in ((a, b), (b, a)):
            exact = _exact_error([first, second], a + b, t, 1)
            assert 1e-9 < exact <= m13(first, second) * t**5


def test_budget_json_names_the_expression_used():
    assert "Eqs. (189), (191)" in ASSUMPTIONS["order4_bound"]
    assert "from memory" not in ASSUMPTIONS["order4_bound"]
    assert "arXiv:1912.08854" in ORDER4_BOUND_SOURCE
