"""The exact single-shot variance of a compiled estimator against Born probabilities and the emulator.

References: qiskit.quantum_info.Statevector Born probabilities of every bound member (an
independent computation of the estimator's exact outcome distribution), the circuit families'
the Trotterised reference (qhl.circuits.trotter_reference), and qiskit-aer shots (qhl.emulation).
Statistics: the central limit theorem for means of i.i.d. shots and the asymptotic spread of a
sample variance, sd(v) = sqrt((mu_4 - sigma^4) / N), and of a sample standard error,
sd(s) / s = sqrt(kurtosis - 1) / (2 sqrt(N)) (common practice). Seeds are fixed, so every run
gives the same numbers; each test states its false-failure rate (the chance that another seed
would fail).
"""

import math

import numpy as np
import pytest
from qiskit.quantum_info import Statevector

from qhl.circuits.circuit_family import exact_expectation
from qhl.costing import BudgetModel, BudgetSettings
from qhl.costing.family_variance import circuit_variance_shots, component_circuit_variance
from qhl.costing.shots import gradient_shot_range, two_valued_variance
from qhl.emulation.variance import family_moments, input_moment_operator
from qhl.emulation import FamilyRunner
from qhl.circuits.gradient_circuits import gradient_circuit, hessian_circuit, signal_circuit
from qhl.circuits.state_prep import input_ensemble

from made_up_clusters import small_cluster, small_model

T = 0.3


def _born_moments(fam, part):
    """E[x^m], m = 1..4, from the exact outcome distribution of every (row, input, bit string).

    The draw is that of CircuitFamily.sample: row j with |w_j| / W, each of the ensemble's
    2^n ('product') or N_obs 2^n ('marked') inputs with equal probability (qhl.circuits.state_prep).
    """
    ens = fam.inputs
    choices = 2 ** ens.n_qubits * (1 if ens.scheme == "product" else ens.n_observed)
    angles, pw = ens.enumerate()
    w_in = pw * choices                                  # enumerate gives p_k w_k with p_k = 1/choices
    m = len(fam.measured_qubits)
    bits = (np.arange(2 ** m)[:, None] >> np.arange(m)[None, :]) & 1
    a = fam.outcome_values(bits)
    w = fam.insertions.weights
    total = fam.insertions.total_weight
    values, probs = [], []
    for j, wj in enumerate(w):
        for ang, wk in zip(angles, w_in):
            p_bits = Statevector(fam.bind(ang, j, part)).probabilities(list(fam.measured_qubits))
            values.append(total * np.sign(wj) * wk * a)
            probs.append(abs(wj) / total / choices * p_bits)
    x, p = np.concatenate(values), np.concatenate(probs)
    return np.array([np.sum(p * x ** k) for k in (1, 2, 3, 4)])


def _cases():
    homo, ex = small_model(False, 3)
    hetero, exh = small_model(True, 3)
    return {
        "hadamard": gradient_circuit(homo, ex, "dipolar:S0-S1", T, 3, 1),
        "hadamard-hetero-marked": gradient_circuit(hetero, exh, "offset:S0", T, 2, 2, scheme="marked"),
        "shift": gradient_circuit(homo, ex, "j:S0-S2", T, 2, 2, method="shift"),
        "hessian": hessian_circuit(homo, ex, ("offset:S1", "dipolar:S1-S2"), T, 1, 1),
        "signal": signal_circuit(homo, ex, T, 2, 2),
    }


@pytest.fixture(scope="module")
def cases():
    return _cases()


@pytest.fixture(scope="module")
def hadamard():
    model, ex = small_model(False, 3)
    return model, ex


@pytest.mark.parametrize("scheme", ["product", "marked"])
def test_first_input_moment_operator_is_rho0(scheme):
    # power 1: sum_k p_k w_k |psi_k><psi_k| = rho0 / Tr[O rho0] (derivation in qhl.circuits.state_prep)
    model, _ = small_model(True, 3)
    rho = model.initial_operator().to_matrix()
    norm = np.trace(model.detection_operator().to_matrix() @ rho).real
    np.testing.assert_allclose(input_moment_operator(input_ensemble(model, scheme), 1), rho / norm, atol=1e-14)


@pytest.mark.parametrize("name", ["hadamard", "hadamard-hetero-marked", "shift", "hessian", "signal"])
@pytest.mark.parametrize("part", ["re", "im"])
def test_exact_moments_equal_born_probability_moments(cases, name, part):
    # moments 1..4 against qiskit Statevector Born probabilities per bound member (independent);
    # the mean also against the Trotterised reference (qhl.circuits.trotter_reference)
    fam = cases[name]
    mo = family_moments(fam, part)
    ref = _born_moments(fam, part)
    np.testing.assert_allclose(mo.raw, ref, rtol=1e-10, atol=1e-12 * max(1.0, abs(ref[3])))
    x = exact_expectation(fam, parts=(part,))
    assert mo.mean == pytest.approx(x.real if part == "re" else x.imag, abs=1e-12 * max(1.0, mo.value_range))
    # every shot lies in [-R, R], so Var <= R^2 - mu^2 (Bhatia and Davis, Amer. Math. Monthly 107,
    # 353 (2000), from memory) <= R^2
    assert mo.variance <= float(two_valued_variance(mo.value_range, mo.mean)) * (1 + 1e-12) <= mo.value_range ** 2


def test_family_range_is_the_costing_range(hadamard):
    # the +-R of the Hadamard-test family is the range qhl.costing.shots bounds with
    # (R = 2 t ||c||_1 2 pi s kappa; Banchi and Crooks, Quantum 5, 386 (2021))
    model, ex = hadamard
    name = "dipolar:S1-S2"
    fam = gradient_circuit(model, ex, name, T, 3, 1)
    l1 = float(np.sum(np.abs(model.parameter(name).generator.coeffs)))
    s = model.scale_factors(ex)[model.names.index(name)]
    r = gradient_shot_range(T, l1, s, sum(model.observed), unit_hz=1.0)
    assert family_moments(fam).value_range == pytest.approx(float(r), rel=1e-12)


@pytest.mark.parametrize("part", ["re", "im"])
def test_exact_variance_equals_the_emulated_per_shot_variance(hadamard, part):
    # 100,000 emulated shots: sample mean within 4.5 standard errors and sample variance within
    # 4.5 sd(v) = 4.5 sqrt((mu_4 - Var^2) / N) of the exact values (central limit theorem,
    # common practice); false-failure rate about 7e-6 per assertion
    model, ex = hadamard
    fam = gradient_circuit(model, ex, "dipolar:S0-S1", T, 3, 1)
    mo = family_moments(fam, part)
    n = 100_000
    est = FamilyRunner(fam, threads=1, sampling="iid").run(n, np.random.default_rng(11), part)
    assert abs(est.value - mo.mean) < 4.5 * math.sqrt(mo.variance / n)
    sd_v = math.sqrt((mo.fourth_central_moment - mo.variance ** 2) / n)
    assert abs(est.variance - mo.variance) < 4.5 * sd_v
    assert sd_v < 0.02 * mo.variance                    # the check resolves the variance to 2%


@pytest.mark.parametrize("steps, part, seed", [(1, "re", 1), (2, "re", 2), (4, "re", 3), (2, "im", 4)])
def test_predicted_shots_reach_the_target_standard_error(hadamard, steps, part, seed):
    # the check: N = Var / eps^2 shots from the exact variance, run on the emulator at N,
    # give a standard error within 10% of eps. eps is chosen so that N is about 20,000; the
    # relative sd of a sample standard error is sqrt(kurtosis - 1) / (2 sqrt N) (common practice),
    # asserted below 1/6 of the 10% tolerance: false-failure rate under 2e-9.
    model, ex = hadamard
    fam = gradient_circuit(model, ex, "dipolar:S0-S1", T, steps, 1)
    mo = family_moments(fam, part)
    eps = math.sqrt(mo.variance / 20_000)
    n = math.ceil(circuit_variance_shots(fam, eps, part))
    assert 19_999 <= n <= 20_001
    assert math.sqrt(mo.kurtosis - 1) / (2 * math.sqrt(n)) < 0.10 / 6
    est = FamilyRunner(fam, threads=1, sampling="iid").run(n, np.random.default_rng(seed), part)
    assert abs(est.stderr / eps - 1) < 0.10
    # the range-based counts never fall below the exact-variance count
    assert mo.value_range ** 2 / eps ** 2 >= n - 1
    assert float(two_valued_variance(mo.value_range, mo.mean)) / eps ** 2 >= n - 1


def test_budget_uses_the_circuit_variance_on_small_clusters():
    cluster = small_cluster(False, 3)
    t, eps = 0.2, 0.05
    bm = BudgetModel(cluster, settings=BudgetSettings(unit_hz=1.0, empirical_trotter=False))
    nt = bm.budget(t, eps).near_term
    assert nt["exact_variance_method"] == "circuit"
    # the bound is never below the exact-variance count; the circuit count is the tightest
    assert 0 < nt["shots_per_component_circuit"] <= nt["shots_per_component"] <= nt["shots_per_component_bound"]
    # the same number from a family compiled here (worst-range component, 8 steps, order 2)
    x, n = bm.near.worst_range_index()
    var, r, _ = component_circuit_variance(bm.model, bm.experiments[x], bm.near.names[n], t, 8, 2, unit_hz=1.0)
    assert nt["shots_per_component_circuit"] == math.ceil(var / eps ** 2)
    assert r == pytest.approx(nt["component_range"], rel=1e-12)
    off = BudgetModel(cluster, settings=BudgetSettings(unit_hz=1.0, empirical_trotter=False,
                                                       circuit_variance_max_spins=2)).budget(t, eps)
    assert off.near_term["exact_variance_method"] == "two-valued"
    assert off.near_term["shots_per_component_circuit"] is None
    assert "two-valued" in off.assumptions["exact_variance_used"]
