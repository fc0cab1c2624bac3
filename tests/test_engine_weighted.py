"""The weighted (vector-Jacobian) gradient v_n = sum_t c_t dS(t)/dh_n of ExactEngine.gradient_weighted.

Reference chain: v is checked against sum_t c_t J[:, t] with J the engine's full Jacobian, and J is
checked against central differences of the dense reference signal (tests/reference_dense.py:
scipy.linalg.expm in the full 2^n space, Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 31, 970
(2009)) in tests/test_engine_dense.py::test_gradient_matches_central_differences; the adjoint
Jacobian (per time point, stable sinc divided differences) equals the full one in
tests/test_engine_fast.py and is the reference where all gaps are tiny. One test here also
differentiates sum_t c_t S_dense(t) directly (no engine in the reference).
"""

import tracemalloc

import numpy as np
import pytest

import qhl.exact.engine as engine_module
from qhl import ExactEngine, build_model
from qhl.base.errors import QhlInputError
from qhl.exact.likelihood import synthetic_dataset
from qhl.learning.fitting import ExactGradientProvider, fit, perturbed_start
from qhl.spins.cluster import Cluster, Delay, Experiment, Pair, Pulse, Spin

from made_up_clusters import random_cluster, small_model
from reference_dense import central_difference, dense_signal

FREE = ["offset:*", "dipolar:*", "j:*"]
RTOL = 1e-12


def _rel(a, b):
    return float(np.abs(a - b).max() / np.abs(b).max())


def _weights(rng, size):
    return rng.normal(size=size) + 1j * rng.normal(size=size)


@pytest.mark.parametrize("n,hetero,seed", [(2, False, 0), (3, False, 1), (4, True, 2), (5, False, 3),
                                           (6, True, 4)])
def test_equals_weighted_sum_of_full_jacobian(n, hetero, seed):
    rng = np.random.default_rng(seed)
    c = random_cluster(rng, n, hetero)
    model = build_model(c, free=FREE if n > 2 else ["offset:*", "dipolar:*"])
    eng = ExactEngine(model)
    for ex in c.experiments:
        cw = _weights(rng, ex.points)
        sig, jac = eng.gradient(ex, method="full")
        s, v = eng.gradient_weighted(ex, cw)
        assert v.shape == (len(model.free),) and v.dtype == complex
        assert _rel(v, jac @ cw) < RTOL
        np.testing.assert_allclose(s, sig, rtol=0, atol=1e-14)
        _, vr = eng.gradient_weighted(ex, cw, real=True)
        assert vr.dtype == float and _rel(vr, (jac @ cw).real) < RTOL


@pytest.mark.parametrize("hetero,n", [(False, 3), (True, 3), (False, 4)])
def test_hz_scale_clusters_and_a_parameter_subset(hetero, n):
    model, ex = small_model(hetero, n)
    eng = ExactEngine(model)
    cw = _weights(np.random.default_rng(n), ex.points)
    _, jac = eng.gradient(ex)
    assert _rel(eng.gradient_weighted(ex, cw)[1], jac @ cw) < RTOL
    names = list(model.free[1:3])
    _, sub = eng.gradient_weighted(ex, cw, parameters=names)
    assert _rel(sub, (jac @ cw)[1:3]) < RTOL


def test_directly_against_dense_central_differences():
    """d/dh_n of sum_t c_t S(t) with S from the dense reference: nothing of the engine in the reference."""
    rng = np.random.default_rng(11)
    c = random_cluster(rng, 4, hetero=True)
    model = build_model(c, free=FREE)
    eng = ExactEngine(model)
    ex = c.experiments[0]
    cw = _weights(rng, ex.points)
    _, v = eng.gradient_weighted(ex, cw)
    # step 1e-2 Hz on couplings of ~1e3-1e4 Hz: truncation error ~ (h t)^2 ~ 1e-10 relative
    fd = central_difference(lambda x: dense_signal(model, ex, ex.times_s, x) @ cw, model.free_values_hz, 1e-2)
    assert _rel(v, fd) < 1e-6


@pytest.mark.parametrize("axis", ["x", "y"])
def test_rf_term_general_contraction(axis):
    """An rf term breaks the sectors (one block, rho0 and O not mirrored); axis y makes H complex."""
    rng = np.random.default_rng(31)
    c = random_cluster(rng, 3)
    model = build_model(c, free=FREE).with_rf_term("1H", 5000.0, axis=axis).with_free(
        ["offset:*", "rf:*", "dipolar:*"])
    eng = ExactEngine(model)
    assert not eng.mirrored and eng.real == (axis == "x")
    ex = c.experiments[0]
    cw = _weights(rng, ex.points)
    _, jac = eng.gradient(ex)
    assert _rel(eng.gradient_weighted(ex, cw)[1], jac @ cw) < RTOL
    assert _rel(eng.gradient_weighted(ex, cw, real=True)[1], (jac @ cw).real) < RTOL


def _triangle():
    """Equal offsets on an equilateral triangle: exactly degenerate doublets (C3 symmetry)."""
    h = 1.8 * np.sqrt(3) / 2
    spins = (Spin("A", "1H", (0, 0, 0), 100.0), Spin("B", "1H", (1.8, 0, 0), 100.0),
             Spin("C", "1H", (0.9, h, 0), 100.0))
    return Cluster(9.4, "1H", spins, (), (Experiment("x", 3e-4, 7),))


def _j_quartet():
    """Four protons, equal offsets, equal J couplings, no dipolar terms: degenerate multiplets."""
    spins = tuple(Spin(f"S{i}", "1H", None, 50.0) for i in range(4))
    pairs = tuple(Pair((f"S{i}", f"S{j}"), j_hz=3.0) for i in range(4) for j in range(i + 1, 4))
    return Cluster(9.4, "1H", spins, pairs, (Experiment("x", 0.5, 16),))


@pytest.mark.parametrize("make,free", [(_triangle, None), (_j_quartet, ["offset:*", "j:*"])])
def test_degenerate_levels(make, free):
    c = make()
    model = build_model(c) if free is None else build_model(c, free=free)
    eng = ExactEngine(model)
    ex = c.experiments[0]
    energies = np.concatenate(eng.spectrum(ex).energies)
    gaps = np.abs(energies[:, None] - energies[None, :])[~np.eye(energies.size, dtype=bool)]
    assert gaps.min() * ex.t_max_s < 1e-9                    # degenerate pairs are present
    cw = _weights(np.random.default_rng(5), ex.points)
    ref = eng.gradient(ex, method="adjoint")[1] @ cw
    assert _rel(eng.gradient_weighted(ex, cw)[1], ref) < RTOL
    assert _rel(eng.gradient(ex, method="full")[1] @ cw, ref) < RTOL


@pytest.mark.parametrize("x", [1e-4, 1e-3, 3e-3, 1e-2, 1e-1, 1.0, 10.0])
def test_short_times_put_pairs_on_both_sides_of_the_taylor_switch(x, monkeypatch):
    """max|t| times the largest gap equal to x: from every pair on the Taylor series (x <= 2e-3,
    WEIGHTED_TAYLOR_BELOW) to none but the diagonal. The reference is the adjoint Jacobian."""
    rng = np.random.default_rng(17)
    c = random_cluster(np.random.default_rng(5), 5)
    eng = ExactEngine(build_model(c, free=FREE))
    ex = c.experiments[0]
    gmax = max(float(np.ptp(e)) for e in eng.spectrum(ex).energies)
    t = np.linspace(0, x / gmax, 9)
    cw = _weights(rng, t.size)
    ref = eng.gradient(ex, t, method="adjoint")[1] @ cw
    assert _rel(eng.gradient_weighted(ex, cw, t)[1], ref) < RTOL
    assert _rel(eng.gradient_weighted(ex, cw, t, real=True)[1], ref.real) < RTOL
    if x <= 1e-1:       # the near-degenerate pairs matter here: leaving them out is visibly wrong
        monkeypatch.setattr(engine_module, "_taylor_pairs", lambda *a, **k: None)
        assert _rel(eng.gradient_weighted(ex, cw, t)[1], ref) > 1e-6


def test_single_precision_engine_runs_the_weighted_path_in_double():
    rng = np.random.default_rng(23)
    c = random_cluster(rng, 6)
    model = build_model(c, free=FREE)
    ex = c.experiments[0]
    cw = _weights(rng, ex.points)
    ref = ExactEngine(model).gradient(ex, method="full")[1] @ cw
    assert _rel(ExactEngine(model, precision="single").gradient_weighted(ex, cw)[1], ref) < RTOL


@pytest.mark.parametrize("hetero", [False, True])
def test_lean_sweep_equals_full_storage(hetero):
    rng = np.random.default_rng(29)
    c = random_cluster(rng, 5, hetero)
    model = build_model(c, free=FREE)
    ex = c.experiments[0]
    cw = _weights(rng, ex.points)
    ref = ExactEngine(model).gradient(ex, method="full")[1] @ cw
    lean = ExactEngine(model, lean=True)
    assert _rel(lean.gradient_weighted(ex, cw)[1], ref) < RTOL
    assert _rel(lean.gradient_weighted(ex, cw, real=True)[1], ref.real) < RTOL


@pytest.mark.parametrize("n,points,real,lean", [(10, 256, True, False), (11, 64, True, False),
                                                (11, 64, False, False), (11, 64, True, True)])
def test_memory_estimate_within_1p5x_of_measured_peak(n, points, real, lean, monkeypatch):
    """weighted_memory_bytes against the tracemalloc peak (numpy reports its arrays to Python's
    allocation tracer) of engine construction + weighted gradient; 1.5x either way is the project's
    accuracy goal for memory models (common practice for refusing jobs up front). lean: a lowered
    threshold puts the engine and the estimate in the memory-lean mode."""
    if lean:
        monkeypatch.setattr(engine_module, "LEAN_ABOVE_BYTES", 1 << 20)
    rng = np.random.default_rng(n)
    spins = []
    while len(spins) < n:
        pos = rng.uniform(0, 1, 3) * n ** (1 / 3) * 2.2
        if all(np.linalg.norm(pos - np.array(s.position_angstrom)) > 1.5 for s in spins):
            spins.append(Spin(f"H{len(spins)}", "1H", tuple(pos), float(rng.normal(0, 1000))))
    c = Cluster(9.4, "1H", tuple(spins), (), (Experiment("fid", 2e-4, points),))
    model = build_model(c)
    tracemalloc.start()
    try:
        eng = ExactEngine(model)
        eng.gradient_weighted(c.experiments[0], np.full(points, 1 + 0.5j), real=real)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert eng.lean == lean
    est = eng.weighted_memory_bytes(points, real)
    assert 1 / 1.5 < est / peak < 1.5, (peak, est)


def test_callable_weights_zero_times_and_bad_input():
    rng = np.random.default_rng(3)
    c = random_cluster(rng, 3)
    eng = ExactEngine(build_model(c, free=FREE))
    ex = c.experiments[0]
    sig = eng.signal(ex)
    s1, v1 = eng.gradient_weighted(ex, lambda s: np.conj(s))
    s2, v2 = eng.gradient_weighted(ex, np.conj(sig))
    np.testing.assert_array_equal(v1, v2)
    # at t = 0 every derivative of S vanishes (S(0) = 1 for all h)
    _, v0 = eng.gradient_weighted(ex, np.ones(3), times=[0.0, 0.0, 0.0])
    assert np.all(v0 == 0)
    with pytest.raises(QhlInputError, match="weights"):
        eng.gradient_weighted(ex, np.ones(ex.points + 1))
    with pytest.raises(QhlInputError, match="weights"):
        eng.gradient_weighted(ex)
    seq = Experiment("s", 0.3, 5, 1.0, steps=(Delay(0.06), Pulse(90, 0)))
    with pytest.raises(QhlInputError, match="pulse-sequence"):
        eng.gradient_weighted(seq, np.ones(5))
    spin = Experiment("m", 4e-4, 5, spinning_hz=5000.0)
    with pytest.raises(QhlInputError, match="spinning"):
        eng.gradient_weighted(spin, np.ones(5))


def test_provider_weighted_path_contracts_the_full_gradient_for_spinning():
    # common practice: the weighted gradient is sum_t Re[J_t c_t]; for a spinning experiment (no
    # weighted sweep) the provider contracts the spinning engine's full Jacobian with the weights.
    rng = np.random.default_rng(4)
    c = random_cluster(rng, 3)
    eng = ExactEngine(build_model(c, free=FREE))
    spin = Experiment("m", 4e-4, 5, spinning_hz=5000.0)
    prov = ExactGradientProvider(eng, [spin])
    w = np.linspace(0.5, 1.5, 5) * np.exp(0.3j * np.arange(5))
    out = prov.weighted_gradients(None, {"m": spin.times_s}, {"m": w})["m"]
    sig, jac = eng.gradient(spin)
    np.testing.assert_allclose(out[0], sig, rtol=0, atol=1e-14)
    np.testing.assert_allclose(out[1], np.real(jac @ w), rtol=1e-12, atol=1e-14 * np.abs(jac).max())


class _Counting(ExactGradientProvider):
    """The exact provider, counting full and weighted evaluations; weighted=False hides the weighted path
    (the fit then runs as before it existed)."""

    def __init__(self, engine, experiments, weighted=True):
        super().__init__(engine, experiments)
        self.weighted, self.full_calls, self.weighted_calls = weighted, 0, 0

    def signals_and_gradients(self, values_hz, times_by_experiment):
        self.full_calls += 1
        return super().signals_and_gradients(values_hz, times_by_experiment)

    def weighted_gradients(self, values_hz, times_by_experiment, weights_by_experiment):
        if not self.weighted:
            return None
        self.weighted_calls += 1
        return super().weighted_gradients(values_hz, times_by_experiment, weights_by_experiment)


@pytest.mark.parametrize("method", ["lbfgs", "cg"])
def test_fit_uses_the_weighted_path_and_reaches_the_same_optimum(method):
    spins = (Spin("A", "1H", (0.0, 0.0, 0.0), -300.0), Spin("B", "1H", (2.0, 0.0, 0.0), 250.0),
             Spin("C", "1H", (0.5, 2.3, 0.6), 700.0))
    exps = (Experiment("static", 4e-4, 48, 1.0, 1e-3), Experiment("scaled", 1.5e-3, 48, 0.3, 1e-3))
    c = Cluster(9.4, "1H", spins, (), exps)
    model = build_model(c, free=("offset:*", "dipolar:*"))
    engine = ExactEngine(model)
    data = synthetic_dataset(engine, c.experiments, seed=7)
    start = perturbed_start(model.free_values_hz, 0.05, 7)
    old = _Counting(engine, c.experiments, weighted=False)
    new = _Counting(engine, c.experiments)
    ref = fit(old, data, start, method=method, max_iter=500)
    res = fit(new, data, start, method=method, max_iter=500)
    assert ref.converged and res.converged, (ref.message, res.message)
    # the same optimum: well within a hundredth of a standard error
    assert np.max(np.abs(res.values_hz - ref.values_hz) / ref.stderr_hz) < 0.01
    assert res.cost == pytest.approx(ref.cost, rel=1e-9)
    np.testing.assert_allclose(res.stderr_hz, ref.stderr_hz, rtol=1e-6)
    # the full gradient only at the start (preconditioner) and at the best point (Fisher matrix)
    assert new.full_calls == 2 and new.weighted_calls >= res.iterations > 3
    assert old.weighted_calls == 0 and old.full_calls >= ref.iterations
