"""Windowed low-rank time bases (qhl.exact.time_basis) and the gradient's time-basis path.

References:
  * the table [cos(E t) | sin(E t)] computed here with numpy; a truncated SVD keeps every row to
    the cut (Eckart-Young; Golub and Van Loan, "Matrix Computations", 4th ed., 2013, thm. 2.4.8);
  * the table path of the fast gradient contraction (equal to the previous engine to 1e-12,
    tests/test_engine_fast.py) and the dense full-space central differences of reference_dense.py
    (scipy.linalg.expm; independent of qhl).
"""

import numpy as np
import pytest

import qhl.exact.engine as engine_module
from qhl import ExactEngine, build_model
from qhl.exact.engine import FAST_RTOL, SINGLE_RTOL
from qhl.exact.time_basis import time_basis
from qhl.spins.cluster import Cluster, Experiment, Pair, Spin

from made_up_clusters import random_cluster
from reference_dense import central_difference, dense_signal

FREE = ["offset:*", "dipolar:*", "j:*"]
CASES = [(4, False, 12), (5, True, 13), (6, False, 14)]


def _rel(a, b):
    return np.abs(a - b).max() / np.abs(b).max()


@pytest.mark.parametrize("rtol", [1e-7, 1e-13])
@pytest.mark.parametrize("d", [7, 400])
def test_basis_reproduces_the_time_table(rtol, d):
    rng = np.random.default_rng(d)
    e = np.sort(rng.normal(0, 1.5e5, d))
    t = np.linspace(0, 2e-4, 256)
    x = np.concatenate([np.cos(np.outer(e, t)), np.sin(np.outer(e, t))], axis=1)
    b = time_basis(e, t, rtol, 50)
    row_err = np.linalg.norm(x - b.u @ b.b, axis=1) / np.sqrt(t.size)     # each row has norm sqrt(T)
    assert row_err.max() < 2 * rtol
    np.testing.assert_allclose(b.u.T @ b.u, np.eye(b.size), atol=1e-12)
    for lo, hi, c0, c1 in b.windows():                    # columns vanish outside their window
        assert not np.any(b.u[:lo, c0:c1]) and not np.any(b.u[hi:, c0:c1])
    if d == 400:
        assert b.size < d / 2                             # the point: far fewer columns than levels


def _force(monkeypatch, path):
    calls = []
    original = ExactEngine._gradient_basis

    def counted(self, *args):
        calls.append(1)
        return original(self, *args)

    monkeypatch.setattr(ExactEngine, "_gradient_basis", counted)
    monkeypatch.setattr(engine_module, "BASIS_MIN_SECONDS", -1.0)      # small clusters too
    monkeypatch.setattr(engine_module, "PAIR_FORM_MIN_LEVELS", 0)      # pair forms in every sector
    monkeypatch.setattr(ExactEngine, "_path_costs",
                        (lambda self, *a: (0.0, 1.0)) if path == "basis" else (lambda self, *a: (1.0, 0.0)))
    return calls


def _experiments():
    return (Experiment("a", 2e-4, 6, 0.7), Experiment("b", 1e-3, 5, 0.1), Experiment("c", 2e-4, 256))


@pytest.mark.parametrize("n,hetero,seed", CASES)
def test_basis_path_equals_table_path(monkeypatch, n, hetero, seed):
    c = random_cluster(np.random.default_rng(seed), n, hetero, experiments=_experiments())
    model = build_model(c, free=FREE)
    for ex in c.experiments:
        _force(monkeypatch, "table")
        _, g0 = ExactEngine(model).gradient(ex, method="full")
        calls = _force(monkeypatch, "basis")
        _, g1 = ExactEngine(model).gradient(ex, method="full")
        _, g32 = ExactEngine(model, precision="single").gradient(ex, method="full")
        _, g16 = ExactEngine(model, precision="fast").gradient(ex, method="full")
        assert len(calls) == 3
        assert _rel(g1, g0) < 1e-12
        assert _rel(g32, g0) < SINGLE_RTOL
        assert _rel(g16, g0) < FAST_RTOL


def test_basis_path_matches_dense_central_differences(monkeypatch):
    c = random_cluster(np.random.default_rng(13), 5, experiments=(Experiment("c", 2e-4, 64),))
    model = build_model(c, free=FREE)
    ex = c.experiments[0]
    calls = _force(monkeypatch, "basis")
    _, g = ExactEngine(model).gradient(ex, method="full")
    assert calls
    fd = central_difference(lambda x: dense_signal(model, ex, ex.times_s, x), model.free_values_hz, 1e-2)
    assert _rel(g, fd) < 1e-6       # central-difference truncation ~1e-10 relative (test_engine_dense)


def test_degenerate_levels_take_the_table_path(monkeypatch):
    """Equal offsets and couplings on three spins: degenerate levels, so B is not diagonal."""
    spins = tuple(Spin(f"S{i}", "1H", None, 100.0) for i in range(3))
    pairs = (Pair(("S0", "S1"), dipolar_hz=900.0), Pair(("S1", "S2"), dipolar_hz=900.0),
             Pair(("S0", "S2"), dipolar_hz=900.0))
    c = Cluster(9.4, "1H", spins, pairs, (Experiment("x", 3e-4, 7),))
    model = build_model(c)
    calls = _force(monkeypatch, "basis")
    eng = ExactEngine(model)
    _, g = eng.gradient(c.experiments[0], method="full")
    assert not calls
    _, g0 = eng.gradient(c.experiments[0], method="general")
    assert _rel(g, g0) < 1e-12


def test_basis_path_with_a_parameter_subset(monkeypatch):
    c = random_cluster(np.random.default_rng(14), 6, experiments=(Experiment("c", 2e-4, 128),))
    model = build_model(c, free=FREE)
    ex = c.experiments[0]
    _force(monkeypatch, "table")
    _, g0 = ExactEngine(model).gradient(ex, method="full")
    calls = _force(monkeypatch, "basis")
    names = [model.free[3], model.free[0], model.free[-1]]
    _, g1 = ExactEngine(model).gradient(ex, parameters=names, method="full")
    assert calls
    ref = g0[[3, 0, len(model.free) - 1]]
    assert _rel(g1, ref) < 1e-12


def test_basis_path_one_parameter_row(monkeypatch):
    """One gradient row: the reused product buffer must still hold one full d x d product (its
    size is set by half the K buffer, which for one row is smaller than d^2)."""
    c = random_cluster(np.random.default_rng(21), 6, experiments=(Experiment("c", 2e-4, 32),))
    model = build_model(c, free=FREE)
    ex = c.experiments[0]
    name = model.free[3]
    _force(monkeypatch, "table")
    _, g0 = ExactEngine(model).gradient(ex, method="full", parameters=[name])
    calls = _force(monkeypatch, "basis")
    _, g1 = ExactEngine(model).gradient(ex, method="full", parameters=[name])
    assert calls and g1.shape == g0.shape == (1, ex.points)
    assert _rel(g1, g0) < 1e-12


@pytest.mark.parametrize("signs", ["mixed", "positive", "negative"])
def test_weighted_gram_equals_dense_product(signs):
    # r diag(u) r^T through one rank-k product and the shift c = max(0, -min u) (engine._weighted_gram)
    # against the plain numpy product in float64 (common practice)
    rng = np.random.default_rng({"mixed": 1, "positive": 2, "negative": 3}[signs])
    r = rng.normal(size=(30, 12))
    u = rng.normal(size=12)
    u = {"mixed": u, "positive": np.abs(u), "negative": -np.abs(u)}[signs]
    ref = (r * u) @ r.T
    for dtype, tol in ((np.float64, 1e-13), (np.float32, 1e-5)):
        rx = r.astype(dtype)
        out = np.full((30, 30), np.nan, dtype)           # every entry must be written
        engine_module._weighted_gram(rx, u, out, engine_module._gram(rx))
        assert out.dtype == dtype
        assert np.abs(out - ref).max() < tol * np.abs(ref).max()
