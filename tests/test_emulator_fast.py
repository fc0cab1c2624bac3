"""The numpy fast path and stratified insertion rows of the emulator (qhl.emulation.fast_path, runner).

References: qiskit.quantum_info.Statevector probabilities and expectation values of the bound
family circuits (qiskit documentation), qiskit-aer's statevector method (save_probabilities;
qiskit-aer documentation), the one Trotterised reference (qhl.circuits.trotter_reference, itself
checked against scipy in tests/test_emulator.py), and stratified sampling (Cochran, "Sampling
Techniques", 3rd ed. (1977), ch. 5; from memory): the estimate sum_j w_j ybar_j is unbiased and
has variance sum_j w_j^2 sigma_j^2 / n_j. Statistical tests use fixed seeds and state their
tolerance and false-failure rate.
"""

import numpy as np
import pytest
from qiskit.quantum_info import Statevector

from qhl.base.errors import QhlInputError
from qhl.circuits.circuit_family import stratified_counts
from qhl.circuits.gradient_circuits import gradient_circuit, hessian_circuit, signal_circuit
from qhl.circuits.trotter_reference import family_reference_value, trotter_gradient_exact
from qhl.emulation import Estimate, FamilyRunner, NoiseSpec, emulate_gradients, estimate_family
from qhl.emulation.fast_path import FastFamily
from qhl.emulation.runner import outcome_values
from qhl.emulation.stratified import row_moments, stratified_shot_variance
from qhl.emulation.variance import family_moments

from made_up_clusters import small_model

T, R = 0.3, 3


@pytest.fixture(scope="module")
def small():
    model, ex = small_model(False, 3)
    return model, ex, list(model.free)


@pytest.fixture(scope="module")
def hetero():
    model, ex = small_model(True, 3)     # S2 is 13C: not observed, so the read-out marginalises it
    return model, ex, list(model.free)


def _families(model, ex, names):
    return [signal_circuit(model, ex, T, R), signal_circuit(model, ex, T, 2, scheme="marked"),
            gradient_circuit(model, ex, names[0], T, R), gradient_circuit(model, ex, names[3], T, 2, order=2),
            hessian_circuit(model, ex, (names[0], names[3]), T, 2),
            hessian_circuit(model, ex, (names[3], names[3]), T, 1)]


def _statevector_probabilities(fam, angles, row, part):
    """qiskit Statevector of the bound circuit; probabilities(qargs) has qargs[0] least significant."""
    return Statevector(fam.bind(angles, row, part)).probabilities(list(fam.measured_qubits))


# ---------------------------------------------------------------- exact probabilities
@pytest.mark.parametrize("which", ["small", "hetero"])
def test_fast_probabilities_equal_statevector_and_aer(which, request):
    """Every (row, input, part) of six families: fast path = qiskit Statevector to 1e-10; a random
    subset of 12 settings per family and part also = Aer's statevector probabilities to 1e-10."""
    model, ex, names = request.getfixturevalue(which)
    rng = np.random.default_rng(3)
    for fam in _families(model, ex, names):
        fast = FastFamily(fam)
        runner = FamilyRunner(fam)
        angles, _ = fam.inputs.enumerate()
        rows = np.repeat(np.arange(len(fam.insertions)), len(angles))
        inputs = np.tile(np.arange(len(angles)), len(fam.insertions))
        for part in ("re", "im"):
            p = fast.probabilities(angles, rows, inputs, part)
            ref = np.array([_statevector_probabilities(fam, angles[k], j, part) for j, k in zip(rows, inputs)])
            np.testing.assert_allclose(p, ref, atol=1e-10, rtol=0)
            pick = rng.choice(len(rows), size=min(12, len(rows)), replace=False)
            values = np.array([fam.parameter_values(angles[inputs[g]], rows[g], part) for g in pick])
            np.testing.assert_allclose(runner.aer_probabilities(values), p[pick], atol=1e-10, rtol=0)


def test_audit_runs_on_aer_and_records_the_difference(small):
    model, ex, names = small
    r = FamilyRunner(gradient_circuit(model, ex, names[3], T, R), audit=5)
    r.run(500, np.random.default_rng(0), "im")
    assert r.last_audit is not None and r.last_audit < 1e-10


# ---------------------------------------------------------------- stratified rows
def test_stratified_counts_are_proportional_with_a_floor_of_two():
    w = np.array([0.5, -0.5, 0.5, 0.0, 2.0, -1.0])
    n = stratified_counts(w, 1000)
    assert n.sum() == 1000 and n[3] == 0 and np.all(n[w != 0] >= 2)
    share = np.where(w != 0, 2, 0) + (1000 - 10) * np.abs(w) / np.abs(w).sum()   # largest remainder: within 1
    assert np.all(np.abs(n - share) < 1)
    assert n[0] == n[1] == n[2]                                  # equal |w| (one Pauli, each step): equal shots
    assert stratified_counts(w, 9) is None                       # fewer than 2 per live row: i.i.d. fallback


def _input_weight(fam, angles):
    """w_k of the product scheme from the ry angles (qhl.circuits.state_prep docstring):
    (2 / N_obs) sum over observed spins of sigma, sigma = +1 for |+> (pi/2), -1 for |-> (-pi/2)."""
    obs = np.array(fam.inputs.observed)
    sigma = np.where(np.isclose(angles[:, obs], np.pi / 2), 1.0, -1.0)
    return 2.0 / obs.sum() * sigma.sum(axis=1)


@pytest.mark.parametrize("kind", ["signal", "gradient1", "gradient2", "hessian"])
def test_stratified_estimator_is_unbiased(small, kind):
    """E[estimate] = sum_j (n_j / N) s_j m_j with the sampler's own row scales s_j and counts n_j and
    m_j = sum_k p_k w_k <O>_{jk} (Statevector) equals the Trotterised value to 1e-10; the same
    with the fast path's probabilities."""
    model, ex, names = small
    fam = {"signal": lambda: signal_circuit(model, ex, T, R),
           "gradient1": lambda: gradient_circuit(model, ex, names[1], T, R),
           "gradient2": lambda: gradient_circuit(model, ex, names[4], T, 2, order=2),
           "hessian": lambda: hessian_circuit(model, ex, (names[0], names[4]), T, 2)}[kind]()
    ref = family_reference_value(fam)
    angles, pw = fam.inputs.enumerate()
    fast = FastFamily(fam)
    vals = outcome_values(fam)
    N = 40 * len(fam.insertions) + 7
    for part, target in (("re", ref.real), ("im", ref.imag)):
        s = fam.sample(np.random.default_rng(1), N, part, "stratified")
        assert s.strata is not None and s.strata.sum() == N
        win = _input_weight(fam, s.values[:, fam._index["prep"]])
        live = win != 0
        row_scale = np.zeros(len(fam.insertions))
        row_scale[s.insertion_rows[live]] = s.scale[live] / win[live]
        np.testing.assert_allclose(s.scale, row_scale[s.insertion_rows] * win, rtol=1e-12, atol=0)
        rows = np.repeat(np.arange(len(fam.insertions)), len(angles))
        inputs = np.tile(np.arange(len(angles)), len(fam.insertions))
        p = fast.probabilities(angles, rows, inputs, part)
        m_sv = np.zeros(len(fam.insertions))
        m_fast = np.zeros(len(fam.insertions))
        for g, (j, k) in enumerate(zip(rows, inputs)):
            ev = float(np.real(Statevector(fam.bind(angles[k], j, part)).expectation_value(fam.observable)))
            m_sv[j] += pw[k] * ev
            m_fast[j] += pw[k] * float(p[g] @ vals)
        frac = s.strata / N
        assert np.sum(frac * row_scale * m_sv) == pytest.approx(target, abs=1e-10)
        assert np.sum(frac * row_scale * m_fast) == pytest.approx(target, abs=1e-10)


def test_row_moments_match_statevector(small):
    """mu_j = sum_k p_k w_k <O>, m2_j = sum_k p_k w_k^2 <O^2> (qiskit Statevector) to 1e-10."""
    model, ex, names = small
    fam = gradient_circuit(model, ex, names[3], T, R)
    angles, pw = fam.inputs.enumerate()
    p = 2.0 ** -fam.inputs.n_qubits                       # product scheme: uniform inputs
    o2 = fam.observable.compose(fam.observable).simplify()
    for part in ("re", "im"):
        mo = row_moments(fam, part)
        for j in range(len(fam.insertions)):
            mu = m2 = 0.0
            for a, c in zip(angles, pw):
                sv = Statevector(fam.bind(a, j, part))
                mu += c * float(np.real(sv.expectation_value(fam.observable)))
                m2 += p * (c / p) ** 2 * float(np.real(sv.expectation_value(o2)))
            assert mo.mean[j] == pytest.approx(mu, abs=1e-10) and mo.second[j] == pytest.approx(m2, abs=1e-10)
        assert mo.value == pytest.approx(getattr(family_reference_value(fam), "real" if part == "re" else "imag"),
                                         abs=1e-10)


def test_stratified_variance_per_shot_matches_the_exact_formula(small):
    """Measured effective per-shot variance N * Var-hat (2e5 shots, relative sd ~0.5%) within 10% of
    N sum_j w_j^2 sigma_j^2 / n_j (Cochran ch. 5); the spread of 300 seeded 400-shot estimates
    within 25% of it (sd of a sample variance sqrt(2/299) = 8%: 3 sd, false failure ~0.3%); and
    never above the i.i.d. per-shot variance of qhl.emulation.variance (between-row term >= 0)."""
    model, ex, names = small
    fam = gradient_circuit(model, ex, names[3], T, R)
    r = FamilyRunner(fam)
    for part in ("re", "im"):
        mo = row_moments(fam, part)
        big = 200_000
        pred_big = stratified_shot_variance(fam, big, part, mo)
        e = r.run(big, np.random.default_rng(7), part)
        assert abs(e.variance / pred_big - 1) < 0.10
        assert pred_big <= family_moments(fam, part).variance + 1e-12
        n = 400
        pred = stratified_shot_variance(fam, n, part, mo)
        x = np.array([r.run(n, np.random.default_rng(1000 + s), part).value for s in range(300)])
        assert abs(n * np.var(x, ddof=1) / pred - 1) < 0.25


@pytest.mark.slow
def test_calibration_stratified_fast_path(small):
    """95% intervals of the stratified fast path cover the Trotterised value in 93-97% of 800
    intervals (200 seeds x 2 parameters x Re/Im, 400 shots). Binomial(800, 0.95): sd 0.77%, so
    the band is +-2.6 sd (false failure ~1%)."""
    from test_emulator import calibration
    cover, mean_z = calibration(small, method="fast", sampling="stratified")
    assert 0.93 <= cover <= 0.97
    assert abs(mean_z) < 0.15


# ---------------------------------------------------------------- paths and options
def test_fast_and_aer_paths_agree_statistically(small):
    """Same family, 3000 shots each (Aer path with i.i.d. rows, fast path stratified): the two
    estimates differ by less than 4 combined standard errors (false failure 6e-5 per part)."""
    model, ex, names = small
    fam = gradient_circuit(model, ex, names[3], T, R)
    a = estimate_family(fam, 3000, 1, method="aer", sampling="iid")
    f = estimate_family(fam, 3000, 2)
    for part in ("re", "im"):
        ea, ef = a.part(part), f.part(part)
        assert abs(ea.value - ef.value) < 4 * np.hypot(ea.stderr, ef.stderr)
    assert FamilyRunner(fam, method="aer").uses_fast_path is False and FamilyRunner(fam).uses_fast_path


def test_fast_path_refuses_what_it_cannot_do(small):
    model, ex, names = small
    shift = gradient_circuit(model, ex, names[0], T, 1, method="shift")
    with pytest.raises(QhlInputError, match="fast path"):
        FamilyRunner(shift, method="fast")
    with pytest.raises(QhlInputError, match="fast path"):
        FamilyRunner(gradient_circuit(model, ex, names[0], T, 1), NoiseSpec(0.01), method="fast")
    assert FamilyRunner(shift).uses_fast_path is False
    with pytest.raises(QhlInputError, match="sampling"):
        FamilyRunner(shift, sampling="sobol")
    with pytest.raises(QhlInputError, match="method"):
        FamilyRunner(shift, method="gpu")


def test_stratified_estimates_merge_with_pooled_variance():
    a = Estimate(3.0, 10.0, 100, 5, 0.1, 0.04)
    b = Estimate(1.0, 2.0, 300, 7, 0.2, 0.01)
    c = a + b
    assert c.value == pytest.approx(4.0 / 400)
    assert c.stderr ** 2 == pytest.approx((100 ** 2 * 0.04 + 300 ** 2 * 0.01) / 400 ** 2)
    assert a.variance == pytest.approx(100 * 0.04) and a.stderr == pytest.approx(0.2)


def test_emulate_gradients_batches_parameters_and_times(small):
    """Shape (P, T), reproducible per seed, each entry within 4 stderr of the Trotterised value
    (12 comparisons: false failure 8e-4)."""
    model, ex, names = small
    picks, times = [names[0], names[3]], [0.2, T]
    seen = []
    out = emulate_gradients(model, ex, picks, times, R, 2000, seed=4, progress=lambda d, t, s: seen.append(d))
    again = emulate_gradients(model, ex, picks, times, R, 2000, seed=4)
    assert out.shape == (2, 2) and seen == [1, 2, 3, 4]
    for k, t in enumerate(times):
        _, g = trotter_gradient_exact(model, ex, t, R, 1, picks)
        for p in range(2):
            e = out[p, k]
            assert e.value == again[p, k].value
            assert abs(e.re.value - g[p].real) < 4 * e.re.stderr and abs(e.im.value - g[p].imag) < 4 * e.im.stderr


def test_uncached_sweeps_give_the_same_probabilities(small, monkeypatch):
    """With no cache budget the forward states and suffixes are recomputed per call for the
    positions asked only (the large-cluster path): same probabilities to 1e-12."""
    from qhl.emulation import fast_path
    model, ex, names = small
    fam = hessian_circuit(model, ex, (names[1], names[4]), T, 2)
    angles, _ = fam.inputs.enumerate()
    rows = np.repeat(np.arange(len(fam.insertions)), len(angles))
    inputs = np.tile(np.arange(len(angles)), len(fam.insertions))
    fast_path.clear_cache()
    cached = FastFamily(fam).probabilities(angles, rows, inputs, "im")
    fast_path.clear_cache()
    monkeypatch.setattr(fast_path, "_CACHE_BYTES", 0.0)
    fresh = FastFamily(fam)
    np.testing.assert_allclose(fresh.probabilities(angles, rows, inputs, "im"), cached, atol=1e-12, rtol=0)
    assert fresh.tables._states is None
    fast_path.clear_cache()


def test_matrix_product_state_method_estimates_the_same_gradient(small):
    """Aer's matrix_product_state method (untruncated: exact up to rounding, qiskit-aer
    documentation) on a 3-spin gradient, 2000 shots: within 4 stderr of the Trotterised value
    (two comparisons, false failure 1.3e-4)."""
    model, ex, names = small
    fam = gradient_circuit(model, ex, names[3], T, R)
    r = FamilyRunner(fam, method="mps")
    assert not r.uses_fast_path and r.simulator.options.method == "matrix_product_state"
    e = estimate_family(fam, 2000, 3, runner=r)
    ref = family_reference_value(fam)
    assert abs(e.re.value - ref.real) < 4 * e.re.stderr and abs(e.im.value - ref.imag) < 4 * e.im.stderr


def test_outcome_values_without_a_table_match_qiskit(small):
    """values_of_outcomes (bit masks, no 2^m table) = <k|O|k> from qiskit Statevector.from_int
    for every outcome of a two-ancilla family (qiskit documentation)."""
    from qhl.emulation.runner import observable_masks, values_of_outcomes
    model, ex, names = small
    fam = hessian_circuit(model, ex, (names[0], names[3]), T, 1)
    nq = fam.circuit.num_qubits
    outcomes = np.arange(2 ** len(fam.measured_qubits))
    vals = values_of_outcomes(observable_masks(fam), outcomes)
    for o in outcomes:
        k = sum(((int(o) >> c) & 1) << q for c, q in enumerate(fam.measured_qubits))
        ref = np.real(Statevector.from_int(k, 2 ** nq).expectation_value(fam.observable))
        assert vals[o] == pytest.approx(ref, abs=1e-14)
