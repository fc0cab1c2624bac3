"""Shot-based emulated signals, gradients and Hessians (qhl.emulation) against exact references.

References: the dense Trotter product formula (tests/reference_trotter.py: scipy.linalg.expm and
expm_frechet, Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 30, 1639 (2009)), the circuit
families' exact expectations (qiskit.quantum_info), the continuous-time exact engine, numpy's
sample statistics and qiskit Statevector expectation values. Statistics: the central limit
theorem for means of i.i.d. shots (common practice); each test states its tolerance and
false-failure rate (the probability that a random seed choice fails; seeds are fixed, so every
run gives the same numbers).
"""


import numpy as np
import pytest
from qiskit.quantum_info import Statevector

from qhl.circuits.circuit_family import exact_expectation
from qhl.base.errors import QhlInputError
from qhl.circuits.gradient_circuits import gradient_circuit, hessian_circuit, signal_circuit
from qhl.emulation import (ComplexEstimate, Estimate, FamilyRunner, NoiseSpec, emulate_gradient, emulate_hessian,
                          estimate_family, gradient_provider, neyman_allocation, nll_gradient, outcome_values,
                          predicted_shrink)
from qhl.circuits.trotter_reference import trotter_gradient_exact, trotter_hessian_exact, trotter_signal_exact

from made_up_clusters import small_model
from reference_trotter import trotter_gradient

T, R = 0.3, 3


@pytest.fixture(scope="module")
def small():
    model, ex = small_model(False, 3)
    return model, ex, list(model.free)


# ---------------------------------------------------------------- estimates and outcomes
def test_estimate_statistics_and_merge_match_numpy():
    x = np.random.default_rng(0).normal(0.3, 2.0, 1001)
    a = Estimate(float(x[:400].sum()), float((x[:400] ** 2).sum()), 400, 3, 0.5)
    b = Estimate(float(x[400:].sum()), float((x[400:] ** 2).sum()), 601, 4, 0.25)
    c = a + b
    assert c.shots == 1001 and c.circuits_run == 7 and c.seconds == 0.75
    np.testing.assert_allclose(c.value, np.mean(x), rtol=1e-12)
    np.testing.assert_allclose(c.variance, np.var(x, ddof=1), rtol=1e-10)
    np.testing.assert_allclose(c.stderr, np.std(x, ddof=1) / np.sqrt(1001), rtol=1e-10)
    z = ComplexEstimate(a, b) + ComplexEstimate(b, a)
    assert z.shots == 2002 and z.value == pytest.approx(complex(c.value, c.value))


def test_outcome_values_are_observable_eigenvalues(small):
    # qiskit Statevector.from_int(k) is the basis state |k>; measured qubit list order = clbits
    model, ex, names = small
    fam = hessian_circuit(model, ex, (names[0], names[3]), T, 1)
    vals = outcome_values(fam)
    nq = fam.circuit.num_qubits
    for o in range(2 ** len(fam.measured_qubits)):
        k = sum(((o >> c) & 1) << q for c, q in enumerate(fam.measured_qubits))
        ref = np.real(Statevector.from_int(k, 2 ** nq).expectation_value(fam.observable))
        assert vals[o] == pytest.approx(ref, abs=1e-14)


def test_same_seed_same_numbers_and_grouping(small):
    model, ex, names = small
    a = emulate_gradient(model, ex, names[3], T, R, 3000, seed=11)
    b = emulate_gradient(model, ex, names[3], T, R, 3000, seed=11)
    c = emulate_gradient(model, ex, names[3], T, R, 3000, seed=12)
    assert a.value == b.value and a.stderr == b.stderr
    assert a.value != c.value
    # 3 spins, 3 steps: 9 insertion points x 8 inputs = 72 possible settings per part; 3000 shots
    # cover them all (P(missing one) < 72 (1 - 1/72 * 0.1)^3000 ~ 1e-16 for weights >= 0.1 of uniform)
    assert a.circuits_run <= 2 * 72 and a.shots == 6000


def test_bad_input_is_a_one_line_error(small):
    model, ex, names = small
    fam = gradient_circuit(model, ex, names[0], T, 1)
    for bad in (0, -3, 2.5):
        with pytest.raises(QhlInputError, match="shots"):
            estimate_family(fam, bad, 0)
    for rate in (-0.1, 1.0, float("nan")):
        with pytest.raises(QhlInputError, match=r"\[0, 1\)"):
            NoiseSpec(rate)


# ---------------------------------------------------------------- dense Trotter reference
def test_trotter_reference_matches_dense_frechet_and_circuits(small):
    model, ex, names = small
    for order in (1, 2):
        s, g = trotter_gradient_exact(model, ex, T, R, order, names)
        for k, nm in enumerate(names):
            np.testing.assert_allclose(g[k], trotter_gradient(model, ex, T, R, order, nm), atol=1e-10)
        assert s == pytest.approx(trotter_signal_exact(model, ex, T, R, order), abs=1e-12)
    fam = hessian_circuit(model, ex, (names[0], names[3]), T, 2)
    h = trotter_hessian_exact(model, ex, T, 2, 1, [names[0], names[3]])
    assert abs(h[0, 1] - exact_expectation(fam)) < 1e-7


def test_trotter_reference_tends_to_the_exact_engine(small):
    # first-order Trotter error of the gradient ~ 1/r: r = 400 within 1e-2 of continuous time
    from qhl import ExactEngine
    model, ex, names = small
    _, g_exact = ExactEngine(model).gradient(ex, [T])
    _, g = trotter_gradient_exact(model, ex, T, 400, 2, names)
    np.testing.assert_allclose(g, g_exact[:, 0], atol=1e-4)


# ---------------------------------------------------------------- statistics
def calibration(small, **runner_options):
    """(coverage of the 95 % intervals, mean z) over 200 seeds x 2 parameters x Re/Im, 400 shots each,
    against the Trotterised reference."""
    model, ex, names = small
    picks = [names[0], names[3]]
    _, g = trotter_gradient_exact(model, ex, T, R, 1, picks)
    runners = [FamilyRunner(gradient_circuit(model, ex, nm, T, R), **runner_options) for nm in picks]
    z = []
    for seed in range(200):
        for k, r in enumerate(runners):
            e = estimate_family(r.family, 400, seed, runner=r)
            z += [(e.re.value - g[k].real) / e.re.stderr, (e.im.value - g[k].imag) / e.im.stderr]
    z = np.array(z)
    cover = float(np.mean(np.abs(z) < 1.959964))
    print(f"\n  coverage {cover:.4f}, mean z {z.mean():+.4f}")
    return cover, float(z.mean())


@pytest.mark.slow
def test_calibration_over_200_seeds(small):
    """95% intervals cover the exact Trotterised value in 93-97% of 800 intervals (200 seeds x 2
    parameters x Re/Im, 400 shots each); mean z within 0.15 of 0. Binomial(800, 0.95): sd 0.77%,
    so the band is +-2.6 sd (false failure ~1%); the mean z has sd 1/sqrt(800) = 0.035 (0.15 is
    4.2 sd, false failure < 1e-4). The i.i.d. scheme (rows drawn per shot); the stratified default
    is calibrated in test_emulator_fast.py."""
    cover, mean_z = calibration(small, sampling="iid")
    assert 0.93 <= cover <= 0.97
    assert abs(mean_z) < 0.15


def test_calibration_quick(small):
    """Fast version: 60 seeds x 2 parts, 300 shots; |z| < 4 for all (false failure 120 x 6e-5 ~ 1%)
    and the mean z within 4/sqrt(120) = 0.37 of 0 (false failure 6e-5)."""
    model, ex, names = small
    _, g = trotter_gradient_exact(model, ex, T, R, 1, [names[3]])
    r = FamilyRunner(gradient_circuit(model, ex, names[3], T, R))
    z = []
    for seed in range(60):
        e = estimate_family(r.family, 300, seed, runner=r)
        z += [(e.re.value - g[0].real) / e.re.stderr, (e.im.value - g[0].imag) / e.im.stderr]
    z = np.array(z)
    assert np.all(np.abs(z) < 4) and abs(z.mean()) < 0.37


def test_results_do_not_depend_on_aer_threads(small):
    """Aer seeds each bound setting from seed_simulator and its index, so running the distinct
    settings in parallel (2 threads) gives the same counts as one thread (Aer documentation)."""
    model, ex, names = small
    fam = gradient_circuit(model, ex, names[3], T, R)
    one = FamilyRunner(fam, threads=1).run(2000, np.random.default_rng(5), "re")
    two = FamilyRunner(fam, threads=2).run(2000, np.random.default_rng(5), "re")
    assert (one.total, one.total_sq, one.circuits_run) == (two.total, two.total_sq, two.circuits_run)


def test_stderr_scales_as_one_over_sqrt_shots(small):
    """Log-log slope of stderr against shots over a decade (1000..10000): -0.5 +- 0.05. The
    stderr estimate has relative sd ~ sqrt(kappa - 1) / (2 sqrt(N)) ~ 2% at N = 1000, so the
    fitted slope has sd ~ 0.012 (0.05 is 4 sd: false failure ~1e-4)."""
    model, ex, names = small
    r = FamilyRunner(gradient_circuit(model, ex, names[3], T, R))
    shots = np.array([1000, 2000, 5000, 10000])
    se = [r.run(int(n), np.random.default_rng(100 + k), "re").stderr for k, n in enumerate(shots)]
    slope = np.polyfit(np.log(shots), np.log(se), 1)[0]
    print(f"\n  stderr slope {slope:.4f}")
    assert abs(slope + 0.5) < 0.05


def test_hessian_estimates_within_4_stderr(small):
    """Entries (0, 0), (0, 3), (3, 3) of d2S_trot, Re and Im, 3000 shots: |z| < 4 each
    (six comparisons, false failure 6 x 6.3e-5 = 4e-4)."""
    model, ex, names = small
    pairs = [(names[0], names[0]), (names[0], names[3]), (names[3], names[3])]
    h = trotter_hessian_exact(model, ex, T, 2, 1, [names[0], names[3]])
    idx = {names[0]: 0, names[3]: 1}
    for k, (a, b) in enumerate(pairs):
        e = emulate_hessian(model, ex, (a, b), T, 2, 3000, seed=20 + k)
        ref = h[idx[a], idx[b]]
        assert abs(e.re.value - ref.real) < 4 * e.re.stderr
        assert abs(e.im.value - ref.imag) < 4 * e.im.stderr


# ---------------------------------------------------------------- noise
def test_readout_error_shrinks_by_one_minus_2q_per_measured_z(small):
    """Symmetric readout flips with probability q multiply a product of w Z outcomes by
    (1 - 2q)^w exactly (common practice); w = 2 for the Hadamard-test observable Z_j Z_anc.
    Signal family (w = 1), q = 0.1, 20000 shots: |f - 0.8| < 4 sd (false failure 6e-5)."""
    model, ex, names = small
    fam = signal_circuit(model, ex, 0.1, R)
    s = trotter_signal_exact(model, ex, 0.1, R)
    r = FamilyRunner(fam, NoiseSpec(0.0, 0.1))
    assert r.observable_weight == 1 and predicted_shrink(r.noise, 0, 1) == pytest.approx(0.8)
    e = r.run(20000, np.random.default_rng(7), "re")
    f, sf = e.value / s.real, e.stderr / abs(s.real)
    print(f"\n  readout q = 0.1: measured factor {f:.4f} +- {sf:.4f}, predicted 0.8")
    assert abs(f - 0.8) < 4 * sf


def test_depolarising_noise_shrinks_gradient_towards_zero(small):
    """Depolarising p = 0.01 on sx, x, cx (transpiled to rz, sx, x, cx): the Re dS/dh estimate
    is multiplied by f, compared with (1 - p)^L, L = noisy layers (depth counting sx, x, cx only;
    qhl.emulation.noise; common practice). Exact density-matrix runs of this family give
    f = 0.55 against (1-p)^L = 0.556 at p = 0.005. Tolerance |f - (1-p)^L| < 4 sd + 0.05 (model),
    and f < 1 - 4 sd (shrinks towards zero); false failure ~1e-4."""
    model, ex, names = small
    _, g = trotter_gradient_exact(model, ex, 0.1, 2, 1, [names[3]])
    r = FamilyRunner(gradient_circuit(model, ex, names[3], 0.1, 2), NoiseSpec(0.01, 0.0))
    e = r.run(3000, np.random.default_rng(3), "re")
    f, sf = e.value / g[0].real, e.stderr / abs(g[0].real)
    pred = predicted_shrink(r.noise, r.layers, 2)
    print(f"\n  depolarising p = 0.01: L = {r.layers}, measured factor {f:.3f} +- {sf:.3f}, (1-p)^L = {pred:.3f}")
    assert abs(f - pred) < 4 * sf + 0.05
    assert f < 1 - 4 * sf


# ---------------------------------------------------------------- NLL gradient and allocation
def test_neyman_allocation_is_proportional():
    n = neyman_allocation([1.0, -3.0, 0.0, 6.0], [1.0, 1.0, 5.0, 0.5], 1000)
    assert n.sum() == 1000 and n[2] == 0
    np.testing.assert_allclose(n[[0, 1, 3]] / 1000, np.array([1, 3, 3]) / 7, atol=2e-3)


def test_nll_gradient_optimal_vs_uniform(small):
    """g_n = sum_t Re[conj(r_t) dS_n(t)] / sigma^2 with fixed residuals, against the dense Trotter
    gradient: |g - g_ref| < 4 stderr for both allocations (false failure 2.5e-4); optimal saves shots."""
    from qhl.exact.likelihood import Dataset
    model, ex, names = small
    times = np.array([0.1, 0.2, 0.3])
    rng = np.random.default_rng(1)
    resid = rng.normal(0, 0.05, 3) + 1j * rng.normal(0, 0.05, 3)
    resid[0] *= 10
    data = Dataset(signals={ex.name: (times, np.zeros(3, complex), 0.05)})
    ref = sum(np.real(np.conj(resid[k]) * trotter_gradient_exact(model, ex, t, 2, 2, [names[3]])[1][0])
              for k, t in enumerate(times)) / 0.05 ** 2
    out = {}
    for alloc in ("optimal", "uniform"):
        res = nll_gradient(model, [ex], data, 6000, 2, seed=4, allocation=alloc, residuals={ex.name: resid},
                           parameters=[names[3]])
        assert abs(res.gradient[0] - ref) < 4 * res.stderr[0], (alloc, res.gradient, ref, res.stderr)
        out[alloc] = res
    assert out["optimal"].shots == out["uniform"].shots == 6000
    assert out["optimal"].shots_saved > 0 and out["optimal"].uniform_equivalent > 6000


# ---------------------------------------------------------------- learning
def test_provider_is_noisy_and_shapes(small):
    model, ex, names = small
    p = gradient_provider(model, [ex], shots=200, seed=0, steps=2)
    assert p.noisy is True and p.parameter_names == tuple(model.free)
    s, g = p.signals_and_gradients(model.free_values_hz, {ex.name: [0.0, 0.2]})[ex.name]
    assert s.shape == (2,) and g.shape == (len(names), 2)
    assert s[0] == 1 and np.all(g[:, 0] == 0)
    with pytest.raises(QhlInputError):
        gradient_provider(model, [ex], shots=0)


@pytest.mark.slow
def test_emulated_fit_converges_within_3_cramer_rao_errors():
    """3-spin invented cluster, the 3 offsets free, 6 time points to 1.2 ms, sigma 0.05, start 200 Hz off on
    each offset (> 3 CR errors); emulated S and dS/dh with 2000 shots per part (per-point shot
    noise ~ 0.01 < sigma) and r = 8 second-order steps (Trotter bias <= 2e-3, far below sigma). The fit lands within
    3 Cramer-Rao errors of the truth on every offset (chi-square of 3 dof plus shot noise; at
    most 0.5% for an efficient estimator per component)."""
    from qhl import ExactEngine, build_model
    from qhl.spins.cluster import Cluster, Experiment, Spin
    from qhl.learning import fit
    from qhl.exact.likelihood import Dataset
    spins = (Spin("A", "1H", (0.0, 0.0, 0.0), -300.0), Spin("B", "1H", (6.0, 0.0, 0.0), 250.0),
             Spin("C", "1H", (1.5, 6.9, 1.8), 700.0))   # 6-7 A apart: sub-kHz couplings, small Trotter bias
    c = Cluster(9.4, "1H", spins, (), (Experiment("static", 6e-4, 6, 1.0, 0.02),), name="three")
    model = build_model(c, free=("offset:*",))
    ex = c.experiments[0]
    times = np.linspace(2e-4, 1.2e-3, 6)
    exact = ExactEngine(model).signal(ex, times)
    rng = np.random.default_rng(2)
    data = exact + 0.05 * (rng.normal(size=6) + 1j * rng.normal(size=6))
    ds = Dataset(signals={ex.name: (times, data, 0.05)})
    truth = model.free_values_hz
    prov = gradient_provider(model, [ex], shots=6000, seed=5, steps=8, order=2)
    res = fit(prov, ds, truth + 200.0, method="gn", max_iter=10)
    z = (res.values_hz - truth) / res.stderr_hz
    print(f"\n  emulated fit: {res.iterations} iterations, z = {np.round(z, 2)}, CR = {np.round(res.stderr_hz, 2)} Hz")
    # the start is > 3 Cramer-Rao errors off, judged at the truth (exact Jacobian): the fitted CR
    # depends on where the fit lands (the noise-free fit of these data lands 93 Hz off on B, CR 82 Hz)
    _, g = ExactEngine(model).gradient(ex, times)
    jac = np.concatenate([g.real, g.imag], axis=1).T
    cr_truth = 0.05 * np.sqrt(np.diag(np.linalg.inv(jac.T @ jac)))
    assert np.all(200.0 / cr_truth > 3)
    assert np.all(np.abs(z) < 3)
