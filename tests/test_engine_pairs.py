"""Pair form of generator sector blocks (qhl.exact.engine._pair_decomposition / _pair_transform).

Reference: the dense product V^T G V with numpy (common practice: an orthogonal similarity
transform), and scipy.linalg.eigh for the orthogonal V; in the gradient, the general contraction
(ExactEngine.gradient(method="general"), the previous engine's code, which forms V^T G V densely).
"""

import numpy as np
import pytest
import scipy.linalg as sla
import scipy.sparse as sp

import qhl.exact.engine as engine_module
from qhl import ExactEngine, build_model
from qhl.exact.engine import _pair_decomposition, _pair_transform

from made_up_clusters import random_cluster


def _paired_block(d, seed):
    """A random real symmetric d x d matrix with at most one off-diagonal entry per row."""
    rng = np.random.default_rng(seed)
    perm = rng.permutation(d)
    g = np.diag(rng.choice([-0.5, 0.25, 0.5], d))
    for i in range(0, d - 1 - d // 3, 2):
        a, b = perm[i], perm[i + 1]
        g[a, b] = g[b, a] = rng.normal()
    return g


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("dtype, tol", [(np.float64, 1e-13), (np.float32, 1e-5)])
def test_pair_transform_equals_dense_product(seed, dtype, tol):
    d = 40
    g = _paired_block(d, seed)
    rng = np.random.default_rng(10 + seed)
    a = rng.normal(size=(d, d))
    _, v = sla.eigh(a + a.T)
    pairs = _pair_decomposition(sp.csr_matrix(g))
    assert pairs is not None
    f = -3.7
    gt, diag = _pair_transform(pairs, v, f, dtype)
    ref = f * (v.T @ g @ v)
    off = ~np.eye(d, dtype=bool)
    assert gt.dtype == dtype
    assert np.max(np.abs(gt[off] - ref[off])) < tol * np.max(np.abs(ref))
    # the diagonal is read off the product: exact to rounding in float64, float32 rounding in float32
    dtol = 1e-13 if dtype == np.float64 else tol
    assert diag.dtype == np.float64
    assert np.max(np.abs(diag - np.diag(ref))) < dtol * np.max(np.abs(ref))
    # the shift c: the returned matrix is f (V^T G V - c I)
    c = pairs[5]
    assert np.max(np.abs(np.diag(gt) - (np.diag(ref) - f * c))) < tol * np.max(np.abs(ref))


def test_pair_form_drops_the_most_frequent_eigenvalue():
    # diag(1/2, -1/2, -1/2, -1/2): c = -1/2, one row left
    pairs = _pair_decomposition(sp.csr_matrix(np.diag([0.5, -0.5, -0.5, -0.5])))
    x1, x2, w1, w2, lam, c = pairs
    assert c == -0.5
    assert list(x1) == [0] and np.allclose(lam, [1.0])


def test_rows_with_two_off_diagonal_entries_have_no_pair_form():
    g = np.zeros((3, 3))
    g[0, 1] = g[1, 0] = g[0, 2] = g[2, 0] = 1.0
    assert _pair_decomposition(sp.csr_matrix(g)) is None


@pytest.mark.parametrize("n,hetero,seed", [(4, True, 12), (5, False, 13)])
def test_gradient_with_pair_forms_in_every_sector_equals_general_contraction(monkeypatch, n, hetero, seed):
    monkeypatch.setattr(engine_module, "PAIR_FORM_MIN_LEVELS", 0)
    c = random_cluster(np.random.default_rng(seed), n, hetero)
    model = build_model(c, free=["offset:*", "dipolar:*", "j:*"])
    eng = ExactEngine(model)
    for ex in c.experiments:
        _, g0 = eng.gradient(ex, method="general")
        _, g1 = eng.gradient(ex, method="full")
        assert np.abs(g1 - g0).max() < 1e-12 * np.abs(g0).max()
    assert any(v is not None for v in eng._pair_cache.values())
