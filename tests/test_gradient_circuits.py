"""Signal, gradient and Hessian circuit families against the dense Trotter product unitary.

Every family's exact expectation (qiskit.quantum_info density-matrix / statevector simulation,
no shots, summed over inputs and insertion rows with their weights) must equal the derivative
of the Trotterised signal computed independently: five-point central finite differences of
Tr[O U_trot rho0 U_trot^dag] with U_trot from scipy.linalg.expm of each term, and the
product-rule gradient with scipy.linalg.expm_frechet (tests/reference_trotter.py). The
stochastic parameter-shift rule is that of Banchi and Crooks, Quantum 5, 386 (2021).
Values are in Hz-scale units with t = 0.3 s, so S, dS/dh (1/Hz) and d2S (1/Hz^2) are O(1) and the
absolute tolerances 1e-9 (gradient) and 1e-7 (Hessian) are also relative ones.
"""

import numpy as np
import pytest
from qiskit.quantum_info import Statevector

from qhl import QhlInputError
from qhl.circuits.circuit_counts import circuit_counts, family_counts, is_clifford_angle
from qhl.circuits.circuit_family import circuit_builds, exact_expectation
from qhl.spins.cluster import Experiment
from qhl.circuits.gradient_circuits import gradient_circuit, hessian_circuit, signal_circuit
from qhl.circuits.state_prep import input_ensemble

from made_up_clusters import small_model
from reference_trotter import five_point, trotter_gradient, trotter_signal

T = 0.3
FD_STEP = 1e-3


def _fd_gradient(model, ex, name, steps, order, **kw):
    k = model.names.index(name)
    v0 = model.values_hz

    def signal_at(x):
        v = v0.copy()
        v[k] = x
        return trotter_signal(model, ex, T, steps, order, v, **kw)
    return five_point(signal_at, v0[k], FD_STEP)


# ---------------------------------------------------------------- inputs
@pytest.mark.parametrize("hetero", [False, True])
@pytest.mark.parametrize("scheme", ["product", "marked"])
def test_input_ensemble_reproduces_rho0(hetero, scheme):
    # rho0 / Tr[O rho0] as a signed mixture of product states (derivation in qhl.circuits.state_prep)
    model, _ = small_model(hetero, n=3)
    rho = model.initial_operator().to_matrix()
    norm = np.trace(model.detection_operator().to_matrix() @ rho).real
    ens = input_ensemble(model, scheme)
    np.testing.assert_allclose(ens.operator(), rho / norm, atol=1e-14)


@pytest.mark.parametrize("scheme", ["product", "marked"])
def test_sampled_inputs_are_unbiased(scheme):
    # E[w <sum_j X_j / 2>] = Tr[rho0 rho0] / Tr[O rho0] = 1 (O = I+: Tr[I+ Ix] = Tr[Ix Ix]).
    # For ry(theta)|0>, <X> = sin(theta). 20000 draws, 4.5 sigma: false failure ~1e-5.
    model, _ = small_model(True, n=4)
    ens = input_ensemble(model, scheme)
    angles, w = ens.sample(np.random.default_rng(5), 20000)
    obs = np.array(model.observed)
    values = w * 0.5 * np.sin(angles[:, obs]).sum(axis=1)
    assert abs(values.mean() - 1.0) < 4.5 * values.std() / np.sqrt(values.size)
    assert np.max(np.abs(values)) <= ens.n_observed + 1e-12      # single-shot range +-N_obs


def test_prep_angles_follow_qiskit_ry():
    # the ensemble's states are qiskit's ry(theta)|0> (checked against Statevector)
    model, _ = small_model(False, n=3)
    fam = signal_circuit(model, None, T, 1, 1)
    assert exact_expectation(fam, method="statevector") == pytest.approx(exact_expectation(fam), abs=1e-12)


def test_exact_expectation_methods_agree():
    # density-matrix evolution of every bound member and per-input statevectors (qiskit.quantum_info)
    # simulate the circuit; 'reference' recomputes X without it (qhl.circuits.trotter_reference:
    # analytic gradient, Hessian by five-point differences, ~1e-10 relative)
    model, ex = small_model(True, n=3)
    for fam, ref_tol in ((gradient_circuit(model, ex, "dipolar:S0-S1", T, 2, 2), 1e-12),
                         (hessian_circuit(model, ex, ("j:S0-S1", "offset:S1"), T, 1, 2), 1e-8)):
        ref = exact_expectation(fam, method="statevector")
        assert abs(exact_expectation(fam, method="density") - ref) < 1e-13
        assert abs(exact_expectation(fam, method="reference") - ref) < ref_tol


# ---------------------------------------------------------------- signal
@pytest.mark.parametrize("hetero", [False, True])
@pytest.mark.parametrize("order", [1, 2])
@pytest.mark.parametrize("scheme", ["product", "marked"])
def test_signal_family_equals_product_unitary(hetero, order, scheme):
    model, ex = small_model(hetero, n=3)
    fam = signal_circuit(model, ex, T, 3, order, scheme=scheme)
    assert exact_expectation(fam, method="density") == pytest.approx(trotter_signal(model, ex, T, 3, order), abs=1e-12)


# ---------------------------------------------------------------- gradient
@pytest.mark.parametrize("hetero", [False, True])
@pytest.mark.parametrize("order", [1, 2])
@pytest.mark.parametrize("name", ["offset:S0", "offset:S2", "dipolar:S0-S1", "j:S0-S1", "dipolar:S1-S2"])
def test_gradient_families_match_finite_differences(hetero, order, name):
    model, ex = small_model(hetero, n=3)
    steps = 3
    fd = _fd_gradient(model, ex, name, steps, order)
    frechet = trotter_gradient(model, ex, T, steps, order, name)
    assert abs(fd - frechet) < 1e-9
    # a real, non-zero derivative, except the unobserved 13C offset: Iz of that spin commutes
    # with every heteronuclear (Iz Sz) term and with rho0 and O, so S cannot depend on it
    silent = hetero and name == "offset:S2"
    assert abs(frechet) < 1e-12 if silent else abs(frechet) > 1e-3
    for method in ("hadamard", "shift"):
        fam = gradient_circuit(model, ex, name, T, steps, order, method=method)
        value = exact_expectation(fam, method="density")
        assert abs(value - fd) < 1e-9, method
        assert abs(value - frechet) < 1e-11, method


def test_gradient_with_layers_grouping_and_dipolar_scale():
    model, _ = small_model(True, n=4)
    ex = Experiment("scaled", 0.3, 4, dipolar_scale=0.35)
    kw = dict(grouping="layers", ordering="offsets-last")
    for name in ("dipolar:S2-S3", "j:S0-S3"):
        fd = _fd_gradient(model, ex, name, 2, 2, **kw)
        for method, scheme in (("hadamard", "marked"), ("shift", "product")):
            fam = gradient_circuit(model, ex, name, T, 2, 2, method=method, scheme=scheme, **kw)
            assert abs(exact_expectation(fam, method="density") - fd) < 1e-9


# ---------------------------------------------------------------- Hessian
@pytest.mark.parametrize("order", [1, 2])
@pytest.mark.parametrize("pair", [("dipolar:S0-S1", "offset:S1"), ("dipolar:S0-S1", "j:S0-S1"),
                                  ("offset:S0", "offset:S0"), ("dipolar:S1-S2", "dipolar:S0-S2")])
def test_hessian_matches_finite_differences_of_gradient(order, pair):
    model, ex = small_model(False, n=3)
    m, n = pair
    steps = 2
    km = model.names.index(m)
    v0 = model.values_hz

    def grad_at(x):
        v = v0.copy()
        v[km] = x
        return trotter_gradient(model, ex, T, steps, order, n, v)
    ref = five_point(grad_at, v0[km], FD_STEP)
    assert abs(ref) > 1e-3
    fam = hessian_circuit(model, ex, pair, T, steps, order)
    assert abs(exact_expectation(fam, method="density") - ref) < 1e-7


def test_hessian_is_symmetric():
    model, ex = small_model(True, n=3)
    a = exact_expectation(hessian_circuit(model, ex, ("offset:S0", "dipolar:S1-S2"), T, 2, 1), method="density")
    b = exact_expectation(hessian_circuit(model, ex, ("dipolar:S1-S2", "offset:S0"), T, 2, 1), method="density")
    assert abs(a - b) < 1e-12


# ---------------------------------------------------------------- sampling and binding
def test_sampling_binds_without_rebuilding_and_is_unbiased():
    # Importance sampling of insertion rows by |w| and of inputs (qhl.circuits.circuit_family); each
    # setting's exact expectation stands in for its shots, so only the setting draw is random.
    # 3000 draws, 4.5 sigma: false-failure rate ~1e-5 (normal approximation).
    model, ex = small_model(False, n=2)
    fam = gradient_circuit(model, ex, "dipolar:S0-S1", T, 2, 1)
    exact = exact_expectation(fam).real
    builds = circuit_builds()
    shots = fam.sample(np.random.default_rng(11), 3000, "re")
    cache = {}
    values = np.empty(len(shots.scale))
    for s, (vals, scale) in enumerate(zip(shots.values, shots.scale)):
        key = vals.tobytes()
        if key not in cache:
            bound = fam.circuit.assign_parameters(vals)
            cache[key] = float(np.real(Statevector(bound).expectation_value(fam.observable)))
        values[s] = scale * cache[key]
    assert circuit_builds() == builds
    # single-shot range (qhl.circuits.gradient_circuits): |scale * outcome| <= 2 W N_obs, W = sum |beta|,
    # outcomes of Z_anc sum_j Z_j / 2 lie in +-N_obs / 2
    n_obs, w_beta = fam.inputs.n_observed, fam.insertions.total_weight / 2
    assert np.max(np.abs(shots.scale)) * n_obs / 2 <= 2 * w_beta * n_obs * (1 + 1e-12)
    assert abs(values.mean() - exact) < 4.5 * values.std() / np.sqrt(values.size)
    one, two = fam.bind(np.full(2, np.pi / 2), 0), fam.bind(np.zeros(2), 3, "im")
    assert len(one.data) == len(two.data) == len(fam.circuit.data)


def test_family_tables_describe_insertions():
    model, ex = small_model(False, n=3)
    fam = gradient_circuit(model, ex, "j:S0-S1", T, 2, 2)
    # second order, 2 steps, the pair S0-S1 is not the middle group: 4 slots, 3 Paulis each
    assert len(fam.insertions) == 12
    assert {row["pauli"] for row in fam.insertions.rows} == {"XX", "YY", "ZZ"}
    assert sum(abs(row["beta"]) for row in fam.insertions.rows) == pytest.approx(
        fam.insertions.total_weight / 2)
    # sum over slots of |beta| = 2 pi s t ||g||_1 (durations add up to t); ||g||_1 = 3/4 for
    # (XX+YY+ZZ)/4 and 1 for (2ZZ-XX-YY)/4 (REFERENCES.md, derived); Hadamard weights are 2 beta
    assert fam.insertions.total_weight == pytest.approx(2 * 2 * np.pi * T * 0.75, rel=1e-12)
    dip = gradient_circuit(model, ex, "dipolar:S0-S1", T, 2, 2)
    assert dip.insertions.total_weight == pytest.approx(2 * 2 * np.pi * ex.dipolar_scale * T * 1.0, rel=1e-12)
    shift = gradient_circuit(model, ex, "j:S0-S1", T, 2, 2, method="shift")
    assert shift.circuit.num_qubits == 3 and len(shift.insertions) == 24
    assert fam.circuit.num_qubits == 4
    assert hessian_circuit(model, ex, ("j:S0-S1", "offset:S2"), T, 2, 2).circuit.num_qubits == 5


# ---------------------------------------------------------------- counts
def test_counts_of_known_circuits():
    # common practice: exp(-i theta ZZ / 2) = CX . RZ(theta) . CX, one arbitrary rotation
    from qiskit import QuantumCircuit
    qc = QuantumCircuit(2)
    qc.rzz(0.37, 0, 1)
    c = circuit_counts(qc)
    assert (c.qubits, c.cx, c.rotations) == (2, 2, 1)
    qc = QuantumCircuit(1)
    qc.rz(np.pi / 2, 0)
    qc.rz(np.pi, 0)
    assert circuit_counts(qc).rotations == 0   # rz(3 pi/2) is Clifford
    assert is_clifford_angle(-np.pi / 2) and not is_clifford_angle(0.1)


def test_inactive_gadgets_are_removed_from_counts():
    model, ex = small_model(False, n=3)
    sig = family_counts(signal_circuit(model, ex, T, 4, 2))
    grad = family_counts(gradient_circuit(model, ex, "dipolar:S0-S1", T, 4, 2))
    assert grad["qubits"] == sig["qubits"] + 1
    # one active controlled Pauli: a couple of CX, not one gadget per insertion point (12 here)
    assert sig["cx"] < grad["cx"] <= sig["cx"] + 4
    assert sig["steps"] == 4 and sig["per_step"]["qubits"] == 3
    assert sig["per_step"]["cx"] <= sig["cx"]


# ---------------------------------------------------------------- bad input
def test_bad_inputs_raise_one_line_errors():
    model, ex = small_model(False, n=3)
    cases = [
        lambda: gradient_circuit(model, ex, "offset:nope", T, 2, 1),
        lambda: gradient_circuit(model, ex, "offset:S0", 0.0, 2, 1),
        lambda: gradient_circuit(model, ex, "offset:S0", T, 0, 1),
        lambda: gradient_circuit(model, ex, "offset:S0", T, 2, 3),
        lambda: gradient_circuit(model, ex, "offset:S0", T, 2, 1, method="finite"),
        lambda: gradient_circuit(model, Experiment("dec", 1.0, 2, 0.0), "dipolar:S1-S2", T, 2, 1),
        lambda: hessian_circuit(model, ex, ("offset:S0",), T, 2, 1),
        lambda: signal_circuit(model, ex, T, 2, 1, scheme="purified"),
    ]
    for make in cases:
        with pytest.raises(QhlInputError) as err:
            make()
        assert "\n" not in str(err.value)


# ---------------------------------------------------------------- shots on qiskit-aer
def _aer_estimates(fam, part, size, seed):
    from qiskit_aer import AerSimulator
    qc = fam.with_measurements(fam.circuit)
    shots = fam.sample(np.random.default_rng(seed), size, part)
    binds = [{p: shots.values[:, k].tolist() for k, p in enumerate(qc.parameters)}]
    res = AerSimulator(seed_simulator=seed).run(qc, parameter_binds=binds, shots=1, memory=True).result()
    bits = np.array([[int(ch) for ch in res.get_memory(i)[0][::-1]] for i in range(size)])
    return shots.scale * fam.outcome_values(bits)


def _z_score(est, ref):
    return (est.mean() - ref) / (est.std() / np.sqrt(est.size))


def test_single_shot_estimates_on_aer_are_unbiased():
    # One shot per sampled setting, all bound through Aer's parameter_binds (no rebuilds).
    # 3000 shots per part, |z| < 4.5: false-failure rate ~7e-6 per check (normal approximation).
    model, ex = small_model(False, n=2)
    fam = gradient_circuit(model, ex, "dipolar:S0-S1", T, 2, 1)
    exact = exact_expectation(fam)
    for part, ref, seed in (("re", exact.real, 1), ("im", exact.imag, 2)):
        assert abs(_z_score(_aer_estimates(fam, part, 3000, seed), ref)) < 4.5


@pytest.mark.slow
@pytest.mark.parametrize("kind", ["signal", "hadamard", "shift", "hessian"])
def test_every_family_on_aer_is_unbiased(kind):
    # 20000 single shots per part, |z| < 4.5 (false-failure rate ~7e-6 per check)
    model, ex = small_model(True, n=3)
    fam = {"signal": lambda: signal_circuit(model, ex, T, 2, 2),
           "hadamard": lambda: gradient_circuit(model, ex, "j:S0-S1", T, 2, 2),
           "shift": lambda: gradient_circuit(model, ex, "j:S0-S1", T, 2, 2, method="shift"),
           "hessian": lambda: hessian_circuit(model, ex, ("dipolar:S0-S1", "offset:S0"), T, 2, 2)}[kind]()
    exact = exact_expectation(fam)
    for part, ref, seed in (("re", exact.real, 3), ("im", exact.imag, 4)):
        assert abs(_z_score(_aer_estimates(fam, part, 20000, seed), ref)) < 4.5
