"""Product formulas, their circuits and the commutator bounds.

References: Childs, Su, Tran, Wiebe, Zhu, "Theory of Trotter error with commutator scaling",
Phys. Rev. X 11, 011020 (2021) (bounds and orders); exact propagators from scipy.linalg.expm
(Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 31, 970 (2009)) and qhl.exact.engine.ExactEngine.
"""

import numpy as np
import pytest
import scipy.linalg as sla
from qiskit.quantum_info import Operator, SparsePauliOp

from qhl import ExactEngine, QhlInputError, build_model
from qhl.spins.cluster import Cluster, Experiment, Pair, Spin
from qhl.circuits.trotter import product_formula_slots, trotter_circuit, trotter_terms, trotter_unitary
from qhl.circuits.trotter_bounds import commutator_prefactor, operator_norm, trotter_error_bound, trotter_steps_for

from made_up_clusters import random_cluster
from made_up_clusters import small_model
from reference_trotter import trotter_signal

CHECK_H = [SparsePauliOp("XI", 0.5), SparsePauliOp("ZZ", 0.5)]


def _true_error(ops, time, steps, order):
    mats = [o.to_matrix() for o in ops]
    tau = time / steps
    step = np.eye(mats[0].shape[0], dtype=complex)
    seq = [(h, tau) for h in mats] if order == 1 else \
        [(h, tau / 2) for h in mats] + [(h, tau / 2) for h in mats[::-1]]
    for h, d in seq:
        step = sla.expm(-1j * d * h) @ step
    exact = sla.expm(-1j * time * sum(mats))
    return np.linalg.norm(np.linalg.matrix_power(step, steps) - exact, 2)


# ---------------------------------------------------------------- the check value
def test_check_value_second_order_bound():
    # REFERENCES.md check (H = 0.5 XI + 0.5 ZZ, t = 2, eps = 0.01): "bound 0.0078 at r = 8,
    # 0.0102 at r = 7, true error 0.00429". Childs et al. (2021) second-order bound, derived by
    # hand: [ZZ,[ZZ,XI]] = 4 XI and [XI,[XI,ZZ]] = 4 ZZ, so alpha_2 = 0.5/12 + 0.5/24 = 1/16 and
    # the bound is t^3 / (16 r^2) = 1/(2 r^2): 1/128 = 0.0078125 and 1/98 = 0.0102.
    assert trotter_error_bound(CHECK_H, 2.0, 8, 2) == pytest.approx(1 / 128, rel=1e-12)
    assert trotter_error_bound(CHECK_H, 2.0, 7, 2) == pytest.approx(1 / 98, rel=1e-12)
    assert trotter_steps_for(CHECK_H, 2.0, 0.01, 2) == 8
    assert _true_error(CHECK_H, 2.0, 8, 2) == pytest.approx(0.00429, abs=5e-6)


def test_check_value_first_order_discrepancy():
    # The same check is labelled "first order" in REFERENCES.md, but the numbers above are the
    # second-order formula's. The first-order bound of Childs et al. (2021),
    # (t^2/2) ||[H_2, H_1]|| per step with ||[0.5 ZZ, 0.5 XI]|| = 0.5 (anticommuting Paulis),
    # gives t^2 / (4 r) = 1/r: 0.125 at r = 8 and r = 100 for eps = 0.01 (derived by hand).
    assert trotter_error_bound(CHECK_H, 2.0, 8, 1) == pytest.approx(0.125, rel=1e-12)
    assert trotter_steps_for(CHECK_H, 2.0, 0.01, 1) == 100
    assert trotter_error_bound(CHECK_H, 2.0, 99, 1) > 0.01
    # the first-order true error at r = 8 is 0.0875, far above the 0.00429 quoted
    assert _true_error(CHECK_H, 2.0, 8, 1) == pytest.approx(0.0875127, abs=1e-6)
    assert _true_error(CHECK_H, 2.0, 100, 1) <= trotter_error_bound(CHECK_H, 2.0, 100, 1)


# ---------------------------------------------------------------- the bound is a bound
@pytest.mark.parametrize("seed,n,hetero", [(0, 3, False), (1, 4, True), (2, 4, False)])
@pytest.mark.parametrize("grouping", ["pairs", "offsets", "layers"])
def test_bound_never_below_true_error(seed, n, hetero, grouping):
    # Childs et al. (2021): the commutator bounds hold for every ordering and step count
    rng = np.random.default_rng(seed)
    c = random_cluster(rng, n, hetero)
    model = build_model(c)
    ex = c.experiments[0]
    for ordering in ("offsets-first", "offsets-last"):
        terms = trotter_terms(model, ex, grouping=grouping, ordering=ordering)
        ops = terms.operators()
        scale = float(np.sum(np.abs(terms.hamiltonian().coeffs)))
        for order in (1, 2):
            exact_alpha = commutator_prefactor(terms, order, norm="exact")
            pauli_alpha = commutator_prefactor(terms, order, norm="pauli")
            assert exact_alpha <= pauli_alpha * (1 + 1e-12)
            for time in (0.3 / scale, 3.0 / scale):
                for steps in (1, 3, 10):
                    err = _true_error(ops, time, steps, order)
                    bound = exact_alpha * time ** (order + 1) / steps ** order   # see the scaling test
                    assert err <= bound * (1 + 1e-9) + 1e-14


def test_bound_scaling_in_time_and_steps():
    # eps(t, r) <= alpha_p t^(p+1) / r^p (Childs et al. 2021)
    for order in (1, 2):
        b = trotter_error_bound(CHECK_H, 1.0, 1, order)
        assert trotter_error_bound(CHECK_H, 3.0, 5, order) == pytest.approx(b * 3.0 ** (order + 1) / 5 ** order)


def test_operator_norm_exact_and_pauli():
    # ||X + Z|| = sqrt(2) (eigenvalues +-sqrt 2); the Pauli 1-norm bound is 2 (common practice)
    op = SparsePauliOp(["X", "Z"], [1.0, 1.0])
    assert operator_norm(op, "exact") == pytest.approx(np.sqrt(2), rel=1e-12)
    assert operator_norm(op, "pauli") == pytest.approx(2.0)


# ---------------------------------------------------------------- commuting terms
@pytest.mark.parametrize("order", [1, 2])
def test_equal_offsets_give_no_trotter_error(order):
    # Two spins with equal offsets: h (Iz1 + Iz2) commutes with the secular dipolar and J terms,
    # and Iz1, Iz2 commute, so every product formula is exact (Childs et al. 2021: the error
    # vanishes with the commutators).
    c = Cluster(9.4, "1H", (Spin("A", "1H", None, 250.0), Spin("B", "1H", None, 250.0)),
                (Pair(("A", "B"), j_hz=7.0, dipolar_hz=900.0),), (Experiment("x", 1e-3, 2),))
    model = build_model(c, free=["offset:*", "dipolar:*", "j:*"])
    h = model.hamiltonian(c.experiments[0]).to_matrix()
    for grouping, ordering in (("pairs", "offsets-first"), ("pairs", "offsets-last"), ("offsets", "offsets-first")):
        terms = trotter_terms(model, c.experiments[0], grouping=grouping, ordering=ordering)
        for steps in (1, 4):
            u = trotter_unitary(terms, 1e-3, steps, order)
            assert np.linalg.norm(u - sla.expm(-1j * 1e-3 * h), 2) < 1e-12
    # with the offsets after the pair (or summed into one term) the bound is zero as well
    for grouping, ordering in (("pairs", "offsets-last"), ("offsets", "offsets-first")):
        terms = trotter_terms(model, c.experiments[0], grouping=grouping, ordering=ordering)
        assert commutator_prefactor(terms, order) == 0.0
        assert trotter_steps_for(terms, 1e-3, 1e-6, order) == 1


# ---------------------------------------------------------------- convergence to the exact engine
RS = np.array([8, 16, 32, 64, 128])


def _slope(rs, errs):
    return np.polyfit(np.log(rs), np.log(errs), 1)[0]


@pytest.mark.parametrize("hetero", [False, True])
def test_propagator_error_slopes_one_and_two(hetero):
    # Product formula of order p: ||U_trot - e^{-iHt}|| = O(r^-p) (Childs et al. 2021)
    model, ex = small_model(hetero, n=3)
    terms = trotter_terms(model, ex)
    exact = sla.expm(-1j * 0.3 * model.hamiltonian(ex).to_matrix())
    for order in (1, 2):
        errs = [np.linalg.norm(trotter_unitary(terms, 0.3, r, order) - exact, 2) for r in RS]
        assert _slope(RS, errs) == pytest.approx(-order, abs=0.1)


@pytest.mark.parametrize("hetero", [False, True])
def test_trotter_signal_converges_to_exact_engine(hetero):
    # Second order: slope 2 (Childs et al. 2021). First order: the NMR signal also converges with
    # slope 2, not 1, because S_trot is the same for a product and its reverse (checked below):
    # the secular blocks are real and invariant under a collective z rotation, and Re S is an
    # autocorrelation Tr[X U X U^dag]; transposition and the z rotation map U to U^T (the
    # reversed product), so the O(1/r) term, odd under reversal, cancels (derived here;
    # common practice for symmetric splittings).
    model, ex = small_model(hetero, n=3)
    exact = ExactEngine(model).signal(ex, times=[0.3])[0]
    for order in (1, 2):
        errs = [abs(trotter_signal(model, ex, 0.3, r, order) - exact) for r in RS]
        assert _slope(RS, errs) == pytest.approx(-2.0, abs=0.1)
        assert errs[-1] < 1e-4


def test_first_order_signal_is_invariant_under_reversed_order():
    model, ex = small_model(True, n=4)
    labels = [g.label for g in trotter_terms(model, ex).groups]
    forward = trotter_signal(model, ex, 0.3, 5, 1)
    backward = trotter_signal(model, ex, 0.3, 5, 1, ordering=labels[::-1])
    other = trotter_signal(model, ex, 0.3, 5, 1, ordering="offsets-last")
    assert abs(forward - backward) < 1e-12
    assert abs(forward - other) > 1e-3      # a different (non-reversed) order does change S_trot


# ---------------------------------------------------------------- circuits and terms
@pytest.mark.parametrize("grouping", ["pairs", "offsets", "layers"])
@pytest.mark.parametrize("order", [1, 2])
def test_circuit_equals_dense_product_formula(grouping, order):
    # rz/rzz/rxx/ryy with merged half steps against expm of each group (qiskit Operator)
    model, ex = small_model(hetero=True, n=4)
    terms = trotter_terms(model, ex, grouping=grouping, ordering="offsets-last")
    qc = trotter_circuit(terms, 0.3, 3, order)
    assert set(qc.count_ops()) <= {"rz", "rzz", "rxx", "ryy"}
    np.testing.assert_allclose(Operator(qc).data, trotter_unitary(terms, 0.3, 3, order), atol=1e-12)


@pytest.mark.parametrize("grouping", ["pairs", "offsets", "layers"])
def test_terms_sum_to_the_hamiltonian_and_commute_within_groups(grouping):
    rng = np.random.default_rng(7)
    c = random_cluster(rng, 5, hetero=True)
    model = build_model(c)
    ex = c.experiments[0]
    terms = trotter_terms(model, ex, grouping=grouping)
    diff = (terms.hamiltonian() - model.hamiltonian(ex)).simplify(atol=1e-9)
    assert np.all(np.abs(diff.coeffs) < 1e-9)
    for g in terms.groups:
        h = g.operator()
        comm = (h.compose(h.adjoint()) - h.adjoint().compose(h)).simplify(atol=1e-6)
        assert np.all(np.abs(comm.coeffs) < 1e-6)
        for b in g.blocks:
            hb = b.operator()
            comm = (hb.compose(h) - h.compose(hb)).simplify(atol=1e-6)
            assert np.all(np.abs(comm.coeffs) < 1e-6)
    n_blocks = 5 + 10  # 5 offsets and 10 pairs with dipolar terms
    assert sum(len(g.blocks) for g in terms.groups) == n_blocks
    expected_groups = {"pairs": n_blocks, "offsets": 11}.get(grouping)
    if expected_groups is not None:
        assert len(terms.groups) == expected_groups
    else:
        assert len(terms.groups) < n_blocks


def test_second_order_slots_merge_adjacent_halves():
    # S2(tau) = e^{-i tau/2 H1} .. e^{-i tau/2 H3} e^{-i tau/2 H3} .. e^{-i tau/2 H1}; the two middle
    # halves merge, and so do the H1 halves where two steps meet (G = 3, r = 2, tau = 0.5)
    slots = product_formula_slots(3, 1.0, 2, 2)
    assert [s.group for s in slots] == [0, 1, 2, 1, 0, 1, 2, 1, 0]
    assert [s.duration for s in slots] == pytest.approx([0.25, 0.25, 0.5, 0.25, 0.5, 0.25, 0.5, 0.25, 0.25])
    assert sum(s.duration for s in slots) == pytest.approx(3 * 1.0)


@pytest.mark.parametrize("kwargs", [dict(grouping="random"), dict(ordering="alphabetic"),
                                    dict(ordering=["S0", "S1"])])
def test_bad_term_options_raise(kwargs):
    model, ex = small_model()
    with pytest.raises(QhlInputError):
        trotter_terms(model, ex, **kwargs)


@pytest.mark.parametrize("args", [(1.0, 0, 1), (1.0, 2, 3), (-1.0, 2, 1), (float("nan"), 2, 1)])
def test_bad_evolution_arguments_raise(args):
    model, ex = small_model()
    with pytest.raises(QhlInputError):
        trotter_circuit(trotter_terms(model, ex), *args)


def test_bad_bound_arguments_raise():
    with pytest.raises(QhlInputError):
        trotter_steps_for(CHECK_H, 1.0, 0.0, 1)
    with pytest.raises(QhlInputError):
        trotter_error_bound(CHECK_H, 1.0, 2, 3)
    with pytest.raises(QhlInputError):
        operator_norm(CHECK_H[0], "frobenius")
