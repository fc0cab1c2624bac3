"""Exact engine against dense scipy.linalg.expm and central finite differences (n <= 6).

Reference: the engine's closed forms (Daleckii-Krein divided differences; R. Bhatia, "Matrix
Analysis", 1997, ch. V) must agree with brute-force propagation U = expm(-iHt) in the full
2^n space (scipy.linalg.expm: Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 31, 970 (2009)).
"""

import numpy as np
import pytest

from qhl import ExactEngine, build_model
from qhl.spins.cluster import Cluster, Experiment, Spin

from made_up_clusters import random_cluster
from reference_dense import central_difference, dense_signal

FREE = ["offset:*", "dipolar:*", "j:*"]


@pytest.mark.parametrize("n,hetero,seed", [(2, False, 0), (3, False, 1), (4, True, 2), (5, False, 3),
                                           (6, True, 4), (6, False, 5)])
def test_signal_matches_dense_expm(n, hetero, seed):
    rng = np.random.default_rng(seed)
    c = random_cluster(rng, n, hetero)
    model = build_model(c, free=FREE if n > 2 else ["offset:*", "dipolar:*"])
    eng = ExactEngine(model)
    assert eng.symmetric
    for ex in c.experiments:
        ref = dense_signal(model, ex, ex.times_s)
        np.testing.assert_allclose(eng.signal(ex), ref, atol=1e-10, rtol=0)


@pytest.mark.parametrize("n,hetero,seed", [(3, False, 11), (4, True, 12), (5, False, 13), (6, False, 14)])
def test_gradient_matches_central_differences(n, hetero, seed):
    rng = np.random.default_rng(seed)
    c = random_cluster(rng, n, hetero)
    model = build_model(c, free=FREE)
    eng = ExactEngine(model)
    ex = c.experiments[0]
    x0 = model.free_values_hz
    _, grad = eng.gradient(ex)
    # step 1e-2 Hz on couplings of ~1e3-1e4 Hz: truncation error ~ (h t)^2 ~ 1e-10 relative
    fd = central_difference(lambda x: dense_signal(model, ex, ex.times_s, x), x0, 1e-2)
    scale = np.abs(fd).max()
    assert np.abs(grad - fd).max() / scale < 1e-6


def test_hessian_symmetric_and_equal_to_differences_of_gradients():
    rng = np.random.default_rng(21)
    c = random_cluster(rng, 4, hetero=True)
    model = build_model(c, free=FREE)
    eng = ExactEngine(model)
    ex = c.experiments[0]
    x0 = model.free_values_hz
    _, g, hess = eng.hessian(ex)
    np.testing.assert_allclose(hess, hess.transpose(1, 0, 2), atol=1e-14 * np.abs(hess).max())
    fd = central_difference(lambda x: eng.gradient(ex, free_values_hz=x)[1], x0, 1e-2)
    assert np.abs(hess - fd).max() / np.abs(fd).max() < 1e-6
    np.testing.assert_allclose(g, eng.gradient(ex)[1])


def _assert_derivatives_match_differences(model, eng, ex):
    """Gradient vs central differences of the dense signal; Hessian vs differences of gradients."""
    _, grad = eng.gradient(ex)
    fd = central_difference(lambda x: dense_signal(model, ex, ex.times_s, x), model.free_values_hz, 1e-2)
    assert np.abs(grad - fd).max() / np.abs(fd).max() < 1e-6
    _, _, hess = eng.hessian(ex)
    fdh = central_difference(lambda x: eng.gradient(ex, free_values_hz=x)[1], model.free_values_hz, 1e-2)
    assert np.abs(hess - fdh).max() / np.abs(fdh).max() < 1e-6


def test_degenerate_offsets_handled_exactly():
    """Equal offsets and a symmetric geometry give exactly degenerate levels."""
    spins = (Spin("A", "1H", (0, 0, 0), 100.0), Spin("B", "1H", (1.8, 0, 0), 100.0),
             Spin("C", "1H", (0.9, 1.5588, 0), 100.0))
    c = Cluster(9.4, "1H", spins, (), (Experiment("x", 3e-4, 7),))
    model = build_model(c)
    eng = ExactEngine(model)
    ex = c.experiments[0]
    _assert_derivatives_match_differences(model, eng, ex)


@pytest.mark.parametrize("axis", ["x", "y"])
def test_rf_term_falls_back_to_full_space(axis):
    rng = np.random.default_rng(31)
    c = random_cluster(rng, 3)
    model = build_model(c, free=FREE).with_rf_term("1H", 5000.0, axis=axis).with_free(["offset:*", "rf:*",
                                                                                         "dipolar:*"])
    eng = ExactEngine(model)
    assert not eng.symmetric and len(eng.sectors) == 1
    assert eng.real == (axis == "x")
    ex = c.experiments[0]
    np.testing.assert_allclose(eng.signal(ex), dense_signal(model, ex, ex.times_s), atol=1e-10, rtol=0)
    _assert_derivatives_match_differences(model, eng, ex)


def test_dipolar_scale_enters_gradient_as_chain_rule():
    rng = np.random.default_rng(41)
    c = random_cluster(rng, 4)
    model = build_model(c)
    eng = ExactEngine(model)
    a, b = c.experiments  # dipolar_scale 0.7 and 0.1
    name = next(n for n in model.free if n.startswith("dipolar:"))
    k = model.free.index(name)
    _, g = eng.gradient(b)
    fd = central_difference(lambda x: dense_signal(model, b, b.times_s, x), model.free_values_hz, 1e-2)[k]
    assert np.abs(g[k] - fd).max() / np.abs(fd).max() < 1e-6
