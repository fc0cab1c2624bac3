"""The typical (pure-state) engine against outside references.

References: the exact engine where it reaches (n <= 12; itself checked against dense expm in
test_engine_dense.py), qiskit's SparsePauliOp.to_matrix for the sector matrices, scipy's
expm_multiply for the Chebyshev propagator, central differences for the gradients (common
practice), and Pauli-algebra moments (tests/reference_moments.py; Van Vleck, Phys. Rev. 74,
1168 (1948)) at n = 14 and 18 where no exact engine reaches cheaply.

Statistics: fixed seeds, so each test is deterministic; the tolerances are chosen so that a
correct engine fails with the stated probability over seeds (Student t with R - 1 degrees of
freedom, union bound over the points checked).
"""

import numpy as np
import pytest
import scipy.sparse.linalg as spla
from scipy.stats import t as student_t

from qhl import Cluster, Experiment, ExactEngine, Spin, build_model
from qhl.base.errors import MemoryBudgetError, QhlInputError
from qhl.exact.chebyshev import chebyshev_window, lanczos_bounds
from qhl.exact.sector_operators import SectorSpace, pauli_groups, sector_matrix
from qhl.exact.typicality import TypicalEngine
from qhl.survey.structure import cut_clusters, demo_structure_path, invented_offsets_hz, read_structure

from reference_moments import signal_moments

EXP = Experiment("fid", 1.5e-4, 24, 1.0, 1e-3)


def invented_cluster(n, experiments=(EXP,), seed=0):
    """n protons cut from the invented demo structure, invented shifts over 8 ppm at 9.4 T."""
    nuc = read_structure(demo_structure_path(), ("1H",))
    off = invented_offsets_hz(nuc, 8.0, 9.4, seed)
    return cut_clusters(nuc, n, 1, field_tesla=9.4, experiments=experiments, offsets_hz=off)[0]


def test_single_spin_offset_convention():
    # README "Conventions": one spin at offset nu gives S(t) = exp(+2 pi i nu t) (from memory / Levitt 2008)
    c = Cluster(9.4, "1H", (Spin("A", "1H", None, 123.0),), experiments=(Experiment("x", 1e-2, 7),))
    est = TypicalEngine(build_model(c), replicas=2).estimate(c.experiments[0], gradient=True)
    t = c.experiments[0].times_s
    np.testing.assert_allclose(est.signal, np.exp(2j * np.pi * 123.0 * t), atol=1e-9)
    np.testing.assert_allclose(est.gradient[0], 2j * np.pi * t * np.exp(2j * np.pi * 123.0 * t), atol=1e-9)
    assert np.all(est.signal_stderr_real < 1e-12)     # one state per sector: no statistical error


def test_sector_matrix_matches_qiskit_dense():
    # qiskit SparsePauliOp.to_matrix, restricted to each sector (qiskit reference)
    c = invented_cluster(6)
    m = build_model(c)
    h = m.hamiltonian(c.experiments[0])
    dense = h.to_matrix()
    space = SectorSpace(m.isotopes)
    groups = pauli_groups(h)
    for k in range(len(space.labels)):
        st = space.states(k)
        mat, lo, hi = sector_matrix(space, k, groups, bounds=True)
        np.testing.assert_allclose(mat.toarray(), dense[np.ix_(st, st)].real, atol=1e-9)
        e = np.linalg.eigvalsh(dense[np.ix_(st, st)])
        assert lo <= e[0] + 1e-9 and e[-1] <= hi + 1e-9          # Gershgorin encloses the spectrum


def test_chebyshev_matches_scipy_expm_multiply():
    # scipy.sparse.linalg.expm_multiply (Al-Mohy and Higham 2011) as the reference propagator
    c = invented_cluster(8)
    m = build_model(c)
    space = SectorSpace(m.isotopes)
    mat = sector_matrix(space, 4, pauli_groups(m.hamiltonian(c.experiments[0])))
    rng = np.random.default_rng(1)
    psi = rng.standard_normal((mat.shape[0], 2)) + 1j * rng.standard_normal((mat.shape[0], 2))
    taus = np.array([0.0, 2e-5, 7e-5, 1.5e-4])
    lo, hi = lanczos_bounds(mat)
    x0 = np.concatenate([psi.real, psi.imag], axis=1)
    out = chebyshev_window(lambda y: mat @ y, x0, taus, lo, hi, tol=1e-12)
    ref = np.stack([spla.expm_multiply(-1j * tau * mat.astype(complex), psi) for tau in taus])
    np.testing.assert_allclose(out, ref, atol=1e-9 * np.abs(psi).max())


def test_chebyshev_real_start_matches_scipy_expm_multiply():
    # real start vectors (real=True: no imaginary half) and the signal-only cut (derivative=False)
    # against scipy.sparse.linalg.expm_multiply (Al-Mohy and Higham 2011), several windows
    c = invented_cluster(8)
    m = build_model(c)
    space = SectorSpace(m.isotopes)
    mat = sector_matrix(space, 3, pauli_groups(m.hamiltonian(c.experiments[0])))
    x = np.random.default_rng(4).standard_normal((mat.shape[0], 3))
    taus = np.array([0.0, 1e-5, 6e-5, 1.5e-4])
    lo, hi = lanczos_bounds(mat)
    out = chebyshev_window(lambda y: mat @ y, x, taus, lo, hi, tol=1e-12, real=True, derivative=False)
    ref = np.stack([spla.expm_multiply(-1j * tau * mat.astype(complex), x.astype(complex)) for tau in taus])
    np.testing.assert_allclose(out, ref, atol=1e-9 * np.abs(x).max())


@pytest.mark.parametrize("start", ["real", "phase"])
def test_start_vectors_unbiased_against_exact_engine(start):
    # both kinds of start vector against the exact engine (qhl.exact.engine) at 10 spins with
    # R = 64 replicas: a correct (unbiased) engine exceeds 5 standard errors at one point with
    # probability P(|t_63| > 5) = 4.6e-6; over 23 times x 2 parts the union bound gives < 2.2e-4.
    c = invented_cluster(10)
    m = build_model(c)
    ex = c.experiments[0]
    est = TypicalEngine(m, replicas=64, seed=101, start=start).estimate(ex)
    s = ExactEngine(m).signal(ex)
    zr = np.abs(est.signal.real - s.real)[1:] / est.signal_stderr_real[1:]
    zi = np.abs(est.signal.imag - s.imag)[1:] / est.signal_stderr_imag[1:]
    assert max(zr.max(), zi.max()) < 5.0
    if start == "real":
        # real vectors: the t = 0 estimate r^T rho0-part r / N is real (no imaginary spread)
        assert est.signal_stderr_imag[0] < 1e-12
    # the error bars are real error bars: the replica spread is far from zero (the test can fail)
    assert est.signal_stderr_real[1:].min() > 1e-5


def test_bad_start_is_input_error():
    with pytest.raises(QhlInputError, match="start"):
        TypicalEngine(build_model(invented_cluster(4)), start="complex")


@pytest.mark.parametrize("n", [8, 10, 12])
def test_signal_within_stated_error_of_exact_engine(n):
    # exact engine (qhl.exact.engine, checked against dense expm elsewhere). R = 16 replicas:
    # a correct engine exceeds 6 standard errors at one point with probability P(|t_15| > 6)
    # = 2.4e-5; over 24 times x 2 parts the union bound gives a false-failure rate < 0.2 %.
    c = invented_cluster(n)
    m = build_model(c)
    ex = c.experiments[0]
    est = TypicalEngine(m, replicas=16, seed=n).estimate(ex)
    s = ExactEngine(m).signal(ex)
    zr = np.abs(est.signal.real - s.real)[1:] / est.signal_stderr_real[1:]
    zi = np.abs(est.signal.imag - s.imag)[1:] / est.signal_stderr_imag[1:]
    assert max(zr.max(), zi.max()) < 6.0
    assert abs(est.signal[0].real - 1.0) <= 6 * est.signal_stderr_real[0] + 1e-12   # exact (zero spread) in the default scheme


def test_gradient_within_stated_error_of_exact_engine():
    # exact Daleckii-Krein gradients (qhl.exact.engine); same tolerance rule as the signal
    c = invented_cluster(8)
    m = build_model(c)
    ex = c.experiments[0]
    names = [m.free[0], m.free[3], "dipolar:" + m.free[-1].split(":")[1]]
    est = TypicalEngine(m, replicas=16, seed=3).estimate(ex, gradient=True, parameters=names)
    _, g = ExactEngine(m).gradient(ex, parameters=names)
    zr = np.abs(est.gradient.real - g.real)[:, 1:] / est.gradient_stderr_real[:, 1:]
    zi = np.abs(est.gradient.imag - g.imag)[:, 1:] / est.gradient_stderr_imag[:, 1:]
    assert max(zr.max(), zi.max()) < 6.0


def test_gradient_is_exact_derivative_of_the_estimate():
    # central differences of the estimate itself (same random states: common random numbers);
    # the Van Loan block exponential has no quadrature error, so they agree to the FD error
    c = invented_cluster(6)
    m = build_model(c)
    ex = c.experiments[0]
    eng = TypicalEngine(m, replicas=2, seed=5)
    names = [m.free[1], m.free[-1]]
    est = eng.estimate(ex, gradient=True, parameters=names)
    v = m.free_values_hz
    for row, nm in enumerate(names):
        j = list(m.free).index(nm)
        h = 1e-3
        vp, vm = v.copy(), v.copy()
        vp[j] += h
        vm[j] -= h
        fd = (eng.signal(ex, free_values_hz=vp) - eng.signal(ex, free_values_hz=vm)) / (2 * h)
        np.testing.assert_allclose(est.gradient[row], fd, atol=1e-7 * np.abs(fd).max())


def _moment_check(n, replicas, seed):
    c = invented_cluster(n, experiments=())
    m = build_model(c)
    params = [(p.kind, p.spins, p.value_hz) for p in m.parameters]      # the parameter list, as data
    mom = signal_moments(m.labels, m.isotopes, m.observed, params, 1.0)
    w2 = np.sqrt(mom[2].real)
    x = np.linspace(0.04, 0.6, 16)
    t = np.concatenate([[0.0], x / w2])
    est = TypicalEngine(m, replicas=replicas, seed=seed).estimate(None, t)
    # each replica is a smooth function of t: fit D(x) = X(x) - X(0) = sum_{k=1..9} b_k x^k
    d = (est.replicas[:, 1:] - est.replicas[:, :1]).T                       # (points, R)

    def fit(degree):
        vander = np.stack([x**k for k in range(1, degree + 1)], axis=1)
        return np.linalg.lstsq(vander, d, rcond=None)[0]                    # (degree, R)
    coef = fit(9)
    from math import factorial
    expect = np.array([(-1j) ** k * mom[k] / (factorial(k) * w2**k) for k in range(1, 5)])
    mean = coef[:4].mean(axis=1)
    se_r = coef[:4].real.std(axis=1, ddof=1) / np.sqrt(replicas)
    se_i = coef[:4].imag.std(axis=1, ddof=1) / np.sqrt(replicas)
    # truncation error of the fit (common practice: the change when the degree is raised by one),
    # twice. Real start vectors make the k-th coefficient of every replica exactly i^k x real, so
    # the other part is the fit's truncation alone (about 5e-5 for k = 3 at n = 12), with no
    # statistical spread to hide it.
    fit_err = 2 * np.abs(fit(10)[:4].mean(axis=1) - mean)
    # S(0) = 1 within its error; S'(0) ... S''''(0) within 6 standard errors plus 1e-6
    # (Chebyshev error) plus the fit's; P(|t_{R-1}| > 6) < 1e-3 for R >= 8: < 1 % over 9 checks
    assert abs(est.signal[0].real - 1) <= 6 * est.signal_stderr_real[0] + 1e-12
    np.testing.assert_array_less(np.abs(mean.real - expect.real), 6 * se_r + 1e-6 + fit_err)
    np.testing.assert_array_less(np.abs(mean.imag - expect.imag), 6 * se_i + 1e-6 + fit_err)
    # the check can fail: the fourth moment is resolved far beyond its error bar (15 times the
    # tolerance; real +-1 start vectors have a somewhat larger spread than random phases)
    assert abs(expect[3]) > 15 * (6 * se_r[3] + 1e-6 + fit_err[3])
    return mean, expect


def test_short_time_moments_n14():
    _moment_check(14, replicas=8, seed=14)


@pytest.mark.slow
def test_short_time_moments_n18():
    # n = 18: beyond the exact engine's comfortable reach; about 1 min here
    _moment_check(18, replicas=8, seed=18)


@pytest.mark.slow
def test_stated_95_percent_intervals_cover():
    # 200 seeded cases (8 spins, 4 replicas each); case i checks Re or Im at one time point.
    # Coverage must be 95 +- 3 %: for a calibrated interval the count is Binomial(200, 0.95),
    # sd 1.54 %, so a correct engine fails with probability about 5 % (fixed seeds: deterministic).
    c = invented_cluster(8)
    m = build_model(c)
    ex = Experiment("fid", 1.5e-4, 6, 1.0, 1e-3)
    exact = ExactEngine(m).signal(ex)
    q = student_t.ppf(0.975, 3)
    hits = 0
    for case in range(200):
        est = TypicalEngine(m, replicas=4, seed=1000 + case).estimate(ex)
        j = 1 + case % 5
        if case % 2 == 0:
            hits += abs(est.signal[j].real - exact[j].real) <= q * est.signal_stderr_real[j]
        else:
            hits += abs(est.signal[j].imag - exact[j].imag) <= q * est.signal_stderr_imag[j]
    assert 0.92 <= hits / 200 <= 0.98, hits


def test_memory_refusal_states_the_estimate(monkeypatch):
    import qhl.exact.typicality as typicality
    # patch the globals the engine's require_memory really reads (robust to duplicate module copies)
    monkeypatch.setitem(typicality.require_memory.__globals__, "available_memory_bytes", lambda: 1e3)
    with pytest.raises(MemoryBudgetError, match="GiB"):
        TypicalEngine(build_model(invented_cluster(8)))


def test_bad_replicas_is_input_error():
    with pytest.raises(QhlInputError, match="replicas"):
        TypicalEngine(build_model(invented_cluster(4)), replicas=1)


@pytest.mark.parametrize("observe", ["1H", "13C"])
def test_heteronuclear_within_stated_error(observe):
    # exact engine reference; sectors are products over isotopes. R = 32: P(|t_31| > 6) ~ 1e-6
    # per point, < 1e-4 over the 15 times x 2 parts x (signal + 2 gradients) checked.
    rng = np.random.default_rng(2)
    spins = tuple(Spin(f"H{i}", "1H", tuple(rng.uniform(0, 4, 3)), float(rng.normal(0, 500))) for i in range(5)) \
        + tuple(Spin(f"C{i}", "13C", tuple(rng.uniform(0, 4, 3)), float(rng.normal(0, 500))) for i in range(3))
    from qhl import Pair
    c = Cluster(9.4, observe, spins, (Pair(("H0", "C0"), j_hz=140.0),), (Experiment("x", 2e-4, 16),))
    m = build_model(c)
    ex = c.experiments[0]
    names = [m.free[0], m.free[-1]]
    est = TypicalEngine(m, replicas=32, seed=1).estimate(ex, gradient=True, parameters=names)
    s, g = ExactEngine(m).gradient(ex, parameters=names)
    for val, ref, er, ei in ((est.signal, s, est.signal_stderr_real, est.signal_stderr_imag),
                             (est.gradient, g, est.gradient_stderr_real, est.gradient_stderr_imag)):
        d, ref, er, ei = val[..., 1:], ref[..., 1:], er[..., 1:], ei[..., 1:]
        assert np.max(np.abs(d.real - ref.real) / er) < 6
        assert np.max(np.abs(d.imag - ref.imag) / ei) < 6


def test_rf_term_full_space_within_stated_error():
    # an x-axis RF term mixes the sectors: the engine works in the full space (one 'sector');
    # reference: the exact engine, which does the same (qhl.exact.engine). R = 32, 6 sigma.
    c = invented_cluster(6)
    m = build_model(c).with_rf_term("1H", 3000.0)
    ex = c.experiments[0]
    eng = TypicalEngine(m, replicas=32, seed=2)
    assert not eng.symmetric
    est = eng.estimate(ex)
    s = ExactEngine(m).signal(ex)
    assert np.max(np.abs(est.signal.real - s.real)[1:] / est.signal_stderr_real[1:]) < 6
    assert np.max(np.abs(est.signal.imag - s.imag)[1:] / est.signal_stderr_imag[1:]) < 6


def test_memory_model_function_matches_engine():
    from qhl.exact.typicality import typical_memory_bytes
    m = build_model(invented_cluster(8))
    assert typical_memory_bytes(m, 64, 4) == TypicalEngine(m, replicas=4).memory_bytes(64)
