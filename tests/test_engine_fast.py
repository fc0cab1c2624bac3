"""The fast gradient contraction, single precision, the adjoint path and the lean sweep.

References:
  * "today's engine": the general contraction (ExactEngine.gradient(method="general")) is the
    previous engine's gradient code unchanged; the fast path must equal it to 1e-12 (relative to
    the largest entry) on the dense-reference clusters of test_engine_dense.py;
  * the dense full-space reference (reference_dense.py: scipy.linalg.expm, central differences;
    Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 31, 970 (2009)), independent of qhl;
  * the identity R_obs = 2 R rests on I+- = Ix +- i Iy, so (sum Ix) between two magnetisation
    sectors is (sum I-)/2 = (sum I+)^T / 2 (Levitt, "Spin Dynamics", 2nd ed., 2008, from memory);
    it is checked here on matrices built by reference_dense.py, not by qhl.
"""

import numpy as np
import pytest

from qhl import ExactEngine, build_model
from qhl.base.errors import QhlInputError
from qhl.exact.engine import FAST_RTOL, SINGLE_RTOL
from qhl.spins.cluster import Cluster, Experiment, Spin

from made_up_clusters import random_cluster
from reference_dense import all_values, central_difference, dense_signal, hamiltonian_matrix, \
    initial_and_detection

FREE = ["offset:*", "dipolar:*", "j:*"]
CASES = [(3, False, 11), (4, True, 12), (5, False, 13), (6, False, 14), (6, True, 4)]


def _rel(a, b):
    return np.abs(a - b).max() / np.abs(b).max()


def _sector_labels(model):
    """Number of spins up per isotope for every basis state (bit i of k = qubit i, 0 = up)."""
    n = len(model.labels)
    k = np.arange(2**n)
    bits = (k[:, None] >> np.arange(n)[None, :]) & 1
    isos = sorted(set(model.isotopes))
    return [tuple(int(x) for x in row) for row in
            np.stack([(1 - bits[:, [i for i in range(n) if model.isotopes[i] == iso]]).sum(axis=1)
                      for iso in isos], axis=1)]


@pytest.mark.parametrize("n,hetero,seed", [(4, False, 1), (5, True, 2)])
def test_transformed_observable_is_twice_transformed_initial_state(n, hetero, seed):
    """rho0_sp = O_ps^T / 2 between sectors, hence V_p^T O_ps V_s = 2 (V_s^T rho0_sp V_p)^T."""
    c = random_cluster(np.random.default_rng(seed), n, hetero)
    model = build_model(c, free=FREE)
    rho, obs = initial_and_detection(model)
    h = hamiltonian_matrix(model, c.experiments[0], all_values(model))
    labels = _sector_labels(model)
    groups = {}
    for i, lab in enumerate(labels):
        groups.setdefault(lab, []).append(i)
    vecs = {lab: np.linalg.eigh(h[np.ix_(ix, ix)])[1] for lab, ix in groups.items()}
    checked = 0
    for s, ixs in groups.items():
        for p, ixp in groups.items():
            r, o = rho[np.ix_(ixs, ixp)], obs[np.ix_(ixp, ixs)]
            if np.abs(r).max() == 0 or np.abs(o).max() == 0:
                continue
            assert s != p
            np.testing.assert_array_equal(r, o.T / 2)
            rt = vecs[s].conj().T @ r @ vecs[p]
            ot = (vecs[p].conj().T @ o @ vecs[s]).T
            np.testing.assert_allclose(ot, 2 * rt, atol=1e-13)
            checked += 1
    assert checked >= n - 2          # at least one block per raising step of the observed isotope
    assert ExactEngine(model).mirrored


@pytest.mark.parametrize("n,hetero,seed", CASES)
def test_fast_gradient_equals_general_contraction(n, hetero, seed):
    c = random_cluster(np.random.default_rng(seed), n, hetero)
    model = build_model(c, free=FREE)
    eng = ExactEngine(model)
    assert eng.mirrored and eng.real
    for ex in c.experiments:
        s0, g0 = eng.gradient(ex, method="general")
        s1, g1 = eng.gradient(ex, method="full")
        s2, g2 = eng.gradient(ex, method="adjoint")
        assert _rel(g1, g0) < 1e-12
        assert _rel(g2, g0) < 1e-12                      # adjoint path equals the full path
        np.testing.assert_array_equal(s0, s1)


def test_fast_gradient_matches_dense_central_differences():
    c = random_cluster(np.random.default_rng(13), 5)
    model = build_model(c, free=FREE)
    ex = c.experiments[0]
    fd = central_difference(lambda x: dense_signal(model, ex, ex.times_s, x), model.free_values_hz, 1e-2)
    for method in ("full", "adjoint"):
        _, g = ExactEngine(model).gradient(ex, method=method)
        assert _rel(g, fd) < 1e-6     # central-difference truncation ~1e-10 relative (test_engine_dense)


def test_degenerate_levels_fast_path():
    """Equal offsets and equal couplings on three spins: exactly degenerate levels inside a sector
    (the two spin-1/2 doublets of three spins), so the degenerate term D is not diagonal."""
    from qhl.spins.cluster import Pair
    spins = tuple(Spin(f"S{i}", "1H", None, 100.0) for i in range(3))
    pairs = (Pair(("S0", "S1"), dipolar_hz=900.0), Pair(("S1", "S2"), dipolar_hz=900.0),
             Pair(("S0", "S2"), dipolar_hz=900.0))
    c = Cluster(9.4, "1H", spins, pairs, (Experiment("x", 3e-4, 7),))
    model = build_model(c)
    eng = ExactEngine(model)
    ex = c.experiments[0]
    spec = eng.spectrum(ex)
    assert any(np.sum(np.abs(np.diff(e)) <= spec.tol) for e in spec.energies)
    _, g0 = eng.gradient(ex, method="general")
    for method in ("full", "adjoint"):
        assert _rel(eng.gradient(ex, method=method)[1], g0) < 1e-12
    fd = central_difference(lambda x: dense_signal(model, ex, ex.times_s, x), model.free_values_hz, 1e-2)
    assert _rel(eng.gradient(ex, method="full")[1], fd) < 1e-6


def test_hessian_gradient_unchanged():
    c = random_cluster(np.random.default_rng(21), 4, hetero=True)
    model = build_model(c, free=FREE)
    eng = ExactEngine(model)
    ex = c.experiments[0]
    _, g, _ = eng.hessian(ex)
    assert _rel(g, eng.gradient(ex, method="general")[1]) < 1e-12


def test_rf_x_is_real_but_not_mirrored_and_uses_general_path():
    c = random_cluster(np.random.default_rng(31), 3)
    model = build_model(c, free=FREE).with_rf_term("1H", 5000.0, axis="x").with_free(["offset:*", "rf:*"])
    eng = ExactEngine(model)
    assert eng.real and not eng.mirrored
    ex = c.experiments[0]
    _, g = eng.gradient(ex)
    fd = central_difference(lambda x: dense_signal(model, ex, ex.times_s, x), model.free_values_hz, 1e-2)
    assert _rel(g, fd) < 1e-6
    assert _rel(eng.gradient(ex, method="adjoint")[1], g) < 1e-12


@pytest.mark.parametrize("n,hetero,seed", [(6, False, 14), (7, True, 5)])
def test_single_precision_within_stated_tolerance(n, hetero, seed):
    c = random_cluster(np.random.default_rng(seed), n, hetero,
                       experiments=(Experiment("a", 2e-5, 64, 0.7),))
    model = build_model(c, free=FREE)
    ex = c.experiments[0]
    _, gd = ExactEngine(model).gradient(ex, method="full")
    _, gs = ExactEngine(model, precision="single").gradient(ex, method="full")
    err = _rel(gs, gd)
    assert 1e-12 < err < SINGLE_RTOL     # float32 is really used, and within the stated bound


def test_lean_sweep_equals_full_storage():
    c = random_cluster(np.random.default_rng(3), 6, hetero=True)
    model = build_model(c, free=FREE)
    ex = c.experiments[0]
    full, lean = ExactEngine(model, lean=False), ExactEngine(model, lean=True)
    assert lean.lean and not full.lean
    np.testing.assert_allclose(lean.signal(ex), full.signal(ex), atol=1e-14, rtol=0)
    assert _rel(lean.gradient(ex, method="full")[1], full.gradient(ex, method="general")[1]) < 1e-12


def test_auto_method_takes_adjoint_for_few_points_and_full_for_many():
    c = random_cluster(np.random.default_rng(5), 6)
    eng = ExactEngine(build_model(c, free=FREE))
    P = len(eng.model.free)
    assert eng._choose(P, 2) == "adjoint"
    assert eng._choose(P, 512) == "full"


def test_bad_precision_and_method_are_input_errors():
    c = random_cluster(np.random.default_rng(5), 3)
    with pytest.raises(QhlInputError, match="precision"):
        ExactEngine(build_model(c), precision="half")
    with pytest.raises(QhlInputError, match="method"):
        ExactEngine(build_model(c)).gradient(c.experiments[0], method="fast")


@pytest.mark.parametrize("n,hetero,seed", [(6, False, 14), (7, True, 5), (8, False, 3)])
def test_fast_precision_within_stated_tolerance(n, hetero, seed):
    # precision="fast": float32 eigendecompositions; against the double engine (itself checked against the
    # dense reference above). Measured 1.5e-5 / 1.2e-4 (signal / gradient) on the first case, the largest seen.
    c = random_cluster(np.random.default_rng(seed), n, hetero, experiments=(Experiment("a", 5e-4, 128, 1.0),))
    model = build_model(c, free=FREE)
    ex = c.experiments[0]
    sd, gd = ExactEngine(model).gradient(ex, method="full")
    fast = ExactEngine(model, precision="fast")
    sf, gf = fast.gradient(ex, method="full")
    for err in (_rel(fast.signal(ex), sd), _rel(gf, gd)):
        assert 1e-9 < err < FAST_RTOL     # float32 eigensolver really used, and within the stated tolerance
    assert _rel(sf, sd) < FAST_RTOL
