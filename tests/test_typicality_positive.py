"""The typical engine's one-propagation scheme (psi = sqrt(rho0+) r) against outside references.

References: dense matrices from qiskit's SparsePauliOp.to_matrix, numpy's eigh (the positive part
of rho0 and its square root), scipy's expm (the rotation exp(-i pi/2 Iy)), the exact engine
(qhl.exact.engine, checked against dense expm in test_engine_dense.py) and the engine's own pair
scheme (checked against the same references in test_typicality.py).

Statistics: fixed seeds (deterministic); each tolerance states the false-failure rate of a correct
engine (Student t with R - 1 degrees of freedom, union bound over the points checked).
"""

import numpy as np
import pytest
import scipy.linalg as sla
from qiskit.quantum_info import SparsePauliOp

from qhl import Cluster, Experiment, ExactEngine, Pair, Spin, build_model
from qhl.base.errors import QhlInputError
from qhl.exact.typicality import TypicalEngine
from qhl.survey.structure import cut_clusters, demo_structure_path, invented_offsets_hz, read_structure

EXP = Experiment("fid", 1.5e-4, 24, 1.0, 1e-3)


def invented_cluster(n, seed=0):
    """n protons cut from the invented demo structure, invented shifts over 8 ppm at 9.4 T."""
    nuc = read_structure(demo_structure_path(), ("1H",))
    off = invented_offsets_hz(nuc, 8.0, 9.4, seed)
    return cut_clusters(nuc, n, 1, field_tesla=9.4, experiments=(EXP,), offsets_hz=off)[0]


def _dense_sum(n, qubits, axis):
    """sum_(k in qubits) I_axis,k as a dense matrix (qiskit little-endian: qubit k = bit k)."""
    op = SparsePauliOp.from_sparse_list([(axis, [k], 0.5) for k in qubits], num_qubits=n)
    return op.to_matrix()


@pytest.mark.parametrize("observed", [(0, 1, 2, 3, 4), (1, 3, 4)])
def test_start_states_are_sqrt_positive_part_times_rotated_vector(observed):
    # psi = sqrt(rho0+) Q r for every r, rho0 = sum_(observed) Ix, Q = exp(-i pi/2 sum_(observed) Iy)
    # (dense eigh / expm references; the engine builds psi = Q D r with bit operations)
    n = 5
    iso = tuple("1H" if k in observed else "13C" for k in range(n))
    spins = tuple(Spin(f"S{k}", iso[k], (float(k), 0.3 * k, 0.0), 100.0 * k) for k in range(n))
    c = Cluster(9.4, "1H", spins, (), (Experiment("x", 1e-4, 4),))
    eng = TypicalEngine(build_model(c), replicas=3, seed=4)
    assert tuple(eng.observed) == observed
    r = np.random.default_rng(1).standard_normal((2**n, 3))
    psi = eng._positive_start(r)
    ix = _dense_sum(n, observed, "X").real
    w, v = np.linalg.eigh(ix)
    sqrt_pos = (v * np.sqrt(np.maximum(w, 0.0))) @ v.T
    q = sla.expm(-1j * np.pi / 2 * _dense_sum(n, observed, "Y")).real
    np.testing.assert_allclose(psi, sqrt_pos @ q @ r, atol=1e-12)


@pytest.mark.parametrize("n", [8, 10])
def test_schemes_agree_within_their_stated_errors(n):
    # both schemes unbiased for the exact engine's signal; R = 32 replicas each: a correct engine
    # exceeds 6 standard errors at one point with probability P(|t_31| > 6) ~ 1e-6, < 1e-4 over
    # 23 times x 2 parts x 2 schemes
    c = invented_cluster(n)
    m = build_model(c)
    ex = c.experiments[0]
    exact = ExactEngine(m).signal(ex)
    spread = {}
    for scheme in ("positive", "pairs"):
        est = TypicalEngine(m, replicas=32, seed=n, scheme=scheme).estimate(ex)
        assert est.scheme == scheme
        zr = np.abs(est.signal.real - exact.real)[1:] / est.signal_stderr_real[1:]
        zi = np.abs(est.signal.imag - exact.imag)[1:] / est.signal_stderr_imag[1:]
        assert max(zr.max(), zi.max()) < 6.0
        spread[scheme] = est.signal_stderr_real
    # one propagation: S(0) = 1 exactly for every random vector (zero spread at t = 0) and a far
    # smaller spread at the first point than the pair scheme's (the test can fail: measured 7x)
    est = TypicalEngine(m, replicas=2, seed=n).estimate(ex)
    assert est.scheme == "positive"
    assert abs(est.signal[0] - 1.0) < 1e-12 and spread["positive"][0] < 1e-12
    assert spread["positive"][1] < 0.5 * spread["pairs"][1]


def test_gradients_of_the_schemes_agree_with_the_exact_engine():
    # exact Daleckii-Krein gradients (qhl.exact.engine); R = 16: P(|t_15| > 6) = 2.4e-5 per point,
    # < 4e-3 over 23 times x 2 parts x 3 parameters x 2 schemes
    c = invented_cluster(8)
    m = build_model(c)
    ex = c.experiments[0]
    names = [m.free[0], m.free[4], m.free[-1]]
    _, g = ExactEngine(m).gradient(ex, parameters=names)
    for scheme in ("positive", "pairs"):
        est = TypicalEngine(m, replicas=16, seed=7, scheme=scheme).estimate(ex, gradient=True, parameters=names)
        zr = np.abs(est.gradient.real - g.real)[:, 1:] / est.gradient_stderr_real[:, 1:]
        zi = np.abs(est.gradient.imag - g.imag)[:, 1:] / est.gradient_stderr_imag[:, 1:]
        assert max(zr.max(), zi.max()) < 6.0, scheme


def test_positive_scheme_gradient_is_the_derivative_of_its_estimate():
    # central differences of the estimate itself (same random states); no quadrature error
    c = invented_cluster(6)
    m = build_model(c)
    ex = c.experiments[0]
    eng = TypicalEngine(m, replicas=2, seed=5, scheme="positive")
    names = [m.free[2], m.free[-2]]
    est = eng.estimate(ex, gradient=True, parameters=names)
    v = m.free_values_hz
    for row, nm in enumerate(names):
        j = list(m.free).index(nm)
        vp, vm = v.copy(), v.copy()
        vp[j] += 1e-3
        vm[j] -= 1e-3
        fd = (eng.signal(ex, free_values_hz=vp) - eng.signal(ex, free_values_hz=vm)) / 2e-3
        np.testing.assert_allclose(est.gradient[row], fd, atol=1e-7 * np.abs(fd).max())


def test_heteronuclear_observed_carbon_positive_scheme():
    # 13C observed among protons: the rotation and weights act on the carbons only; the sectors
    # are products over isotopes and the chain order must pair every carbon sector with the next.
    # Exact engine reference; R = 32, 6 sigma (< 1e-4 over the points checked)
    rng = np.random.default_rng(2)
    spins = tuple(Spin(f"H{i}", "1H", tuple(rng.uniform(0, 4, 3)), float(rng.normal(0, 500))) for i in range(4)) \
        + tuple(Spin(f"C{i}", "13C", tuple(rng.uniform(0, 4, 3)), float(rng.normal(0, 500))) for i in range(3))
    c = Cluster(9.4, "13C", spins, (Pair(("H0", "C0"), j_hz=140.0), Pair(("C1", "C2"), j_hz=35.0)),
                (Experiment("x", 2e-4, 16),))
    m = build_model(c)
    ex = c.experiments[0]
    est = TypicalEngine(m, replicas=32, seed=3).estimate(ex)
    assert est.scheme == "positive"
    s = ExactEngine(m).signal(ex)
    assert np.max(np.abs(est.signal.real - s.real)[1:] / est.signal_stderr_real[1:]) < 6
    assert np.max(np.abs(est.signal.imag - s.imag)[1:] / est.signal_stderr_imag[1:]) < 6
    assert abs(est.signal[0] - 1.0) < 1e-12


def test_windows_change_the_positive_estimate_only_by_rounding():
    # several Chebyshev windows (every sector's restart state kept) against one window, same seeds
    c = invented_cluster(8)
    m = build_model(c)
    ex = c.experiments[0]
    one = TypicalEngine(m, replicas=2, seed=9, scheme="positive").estimate(ex, gradient=True,
                                                                             parameters=[m.free[1]])
    eng = TypicalEngine(m, replicas=2, seed=9, scheme="positive", window_bytes=5.0e4)
    assert eng._window(max(eng.space.dims[s] + eng.space.dims[p] for s, p in eng.blocks), 4, 24) < 24
    many = eng.estimate(ex, gradient=True, parameters=[m.free[1]])
    np.testing.assert_allclose(many.signal, one.signal, atol=1e-9)
    np.testing.assert_allclose(many.gradient, one.gradient, atol=1e-9 * np.abs(one.gradient).max())


def test_scheme_choice_and_bad_scheme():
    m = build_model(invented_cluster(6))
    with pytest.raises(QhlInputError, match="scheme"):
        TypicalEngine(m, scheme="single")
    rf = m.with_rf_term("1H", 3000.0)        # mixes sectors: Pi no longer commutes with H
    with pytest.raises(QhlInputError, match="positive"):
        TypicalEngine(rf, scheme="positive")
    est = TypicalEngine(rf, replicas=2).estimate(EXP)
    assert est.scheme == "pairs"


def test_auto_takes_pairs_when_the_start_states_do_not_fit(monkeypatch):
    # available memory between the two schemes' estimates: auto must take the leaner one
    import qhl.exact.typicality as typ
    m = build_model(invented_cluster(8))
    eng = TypicalEngine(m, replicas=2)
    pos = eng.memory_bytes(24, 2, 0, scheme="positive")
    pairs = eng.memory_bytes(24, 2, 0, scheme="pairs")
    assert pos > pairs
    monkeypatch.setitem(typ.require_memory.__globals__, "available_memory_bytes",
                        lambda: (pos + pairs) / 2 / 0.8)
    monkeypatch.setattr(typ, "available_memory_bytes", lambda: (pos + pairs) / 2 / 0.8)
    assert eng._scheme_for(24, 2, 0) == "pairs"
    monkeypatch.setattr(typ, "available_memory_bytes", lambda: 4 * pos)
    assert eng._scheme_for(24, 2, 0) == "positive"
