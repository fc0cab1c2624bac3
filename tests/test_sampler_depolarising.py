"""Depolarising check: the attenuation of emulated signals against the predicted circuit fidelity.

Noise model built here, independently of qhl's NoiseSpec: qiskit_aer.noise.depolarizing_error(p, k)
after every sx, x (k = 1) and cx (k = 2) of circuits transpiled to rz, sx, x, cx (rz is a frame
change and noiseless; common practice). The channel is Nielsen & Chuang, Quantum Computation and
Quantum Information (2000), sec. 8.3.4 (depolarising channel), whose average gate infidelity is
r = p (d - 1) / d. Prediction (qhl.emulation.device_fidelity over qhl.circuits.circuit_fidelity,
global-depolarising approximation): F = prod_g (1 - p_g), which for depolarising (unital) noise is a
pessimistic bound: each gate damps exactly the Pauli components it touches by (1 - p_g), paths that
avoid it are not damped. Runs use Aer's density-matrix method (exact noisy states for n <= 5 qubits).
The tests check the bound (true shrink >= F) and its looseness: with p on every sx, x and cx (single-
qubit gates as noisy as cx) the true shrink measured 1.32-1.42 F on these circuits, so they allow
true <= LOOSENESS F, LOOSENESS = 1.6.
"""

import numpy as np
import pytest

from qhl.circuits.gradient_circuits import gradient_circuit, signal_circuit
from qhl.circuits.trotter_reference import trotter_signal_exact
from qhl.emulation.device_fidelity import depolarising_infidelity, uniform_depolarising_attenuation
from qhl.emulation.runner import values_of_outcomes
from qhl.emulation.sampler_path import SamplerRunner

from made_up_clusters import small_model

LOOSENESS = 1.6


def _noise_model(p):
    from qiskit_aer.noise import NoiseModel, depolarizing_error
    nm = NoiseModel(basis_gates=["rz", "sx", "x", "cx"])
    nm.add_all_qubit_quantum_error(depolarizing_error(p, 1), ["sx", "x"])
    nm.add_all_qubit_quantum_error(depolarizing_error(p, 2), ["cx"])
    return nm


def test_depolarising_infidelity_matches_qiskit_average_gate_fidelity():
    """r = p (d - 1) / d against qiskit.quantum_info.average_gate_fidelity of the Aer channel."""
    from qiskit.quantum_info import average_gate_fidelity
    from qiskit_aer.noise import depolarizing_error
    for k in (1, 2):
        r = 1 - average_gate_fidelity(depolarizing_error(0.03, k).to_quantumchannel())
        assert depolarising_infidelity(0.03, k) == pytest.approx(r, rel=1e-12)


def test_emulated_signal_attenuation_matches_predicted_fidelity():
    """S_trot(t) of the 3-spin cluster (t = 1 s, r = 2, 81 noisy gates) under p = 0.01, 60000
    shots through Aer's SamplerV2 (passed from Python, density-matrix method): the measured factor
    f = S_noisy / S (measured 0.587 +- 0.019 against F = 0.443) respects the bound, f > F - 4 sd
    (false failure 3.2e-5), is within its stated looseness, f < LOOSENESS F + 4 sd, and is far from
    the noiseless 1 (|f - 1| > 4 sd)."""
    from qiskit_aer.primitives import SamplerV2
    p = 0.01
    model, ex = small_model(False, 3)
    family = signal_circuit(model, ex, 1.0, 2)
    s = trotter_signal_exact(model, ex, 1.0, 2).real
    sampler = SamplerV2(seed=4, options={"backend_options": {"noise_model": _noise_model(p),
                                                             "method": "density_matrix"}})
    runner = SamplerRunner(family, sampler=sampler)
    e = runner.run(60000, np.random.default_rng(1), "re")
    a = uniform_depolarising_attenuation(runner.transpiled, runner.measured_physical_qubits(), runner.masks, p)
    f, sf = e.value / s, e.stderr / abs(s)
    print(f"\n  measured f = {f:.4f} +- {sf:.4f}, predicted F = {a.total:.4f} ({a.one_qubit_gates} 1q, "
          f"{a.two_qubit_gates} 2q gates)")
    assert a.total == pytest.approx((1 - p) ** (a.one_qubit_gates + a.two_qubit_gates), rel=1e-12)
    assert a.total - 4 * sf < f < LOOSENESS * a.total + 4 * sf
    assert abs(f - 1.0) > 4 * sf


def _exact_value(runner, noise_model):
    """sum over every input and insertion row of w * <observable> from Aer density matrices."""
    from qiskit_aer import AerSimulator
    fam = runner.family
    angles, win = fam.inputs.enumerate()
    rows = np.array([fam.parameter_values(angles[k], j, "re") for k in range(len(win))
                     for j in range(len(fam.insertions.weights))])
    weights = np.array([win[k] * w for k in range(len(win)) for w in fam.insertions.weights])
    qc = runner.transpiled.remove_final_measurements(inplace=False)
    qc.save_probabilities(runner.measured_physical_qubits())
    order = {p: k for k, p in enumerate(fam.circuit.parameters)}
    binds = {p: rows[:, order[p]].tolist() for p in qc.parameters}
    res = AerSimulator(method="density_matrix", noise_model=noise_model).run(qc, parameter_binds=[binds]).result()
    probs = np.array([res.data(i)["probabilities"] for i in range(len(rows))])
    return float(weights @ (probs @ values_of_outcomes(runner.masks, np.arange(probs.shape[1]))))


@pytest.mark.parametrize("n, p, steps, name, t", [(3, 0.01, 2, "offset:S0", 1.0),
                                                 (4, 0.005, 2, "dipolar:S0-S2", 0.3)])
def test_exact_density_matrix_attenuation_of_gradients_within_model_accuracy(n, p, steps, name, t):
    """Hadamard-test gradient families (3-4 spins + ancilla, 80-170 noisy gates): the exact
    density-matrix attenuation (no shots) is at least F (the bound) and at most LOOSENESS F (measured
    1.335 F and 1.417 F), and the
    noiseless density-matrix value equals the Trotterised reference to 1e-9 (qiskit-aer vs the
    dense product formula)."""
    from qhl.circuits.trotter_reference import trotter_gradient_exact
    model, ex = small_model(False, n)
    family = gradient_circuit(model, ex, name, t, steps)
    runner = SamplerRunner(family, sampler=object())        # transpiles to rz, sx, x, cx; nothing is run
    clean, noisy = _exact_value(runner, None), _exact_value(runner, _noise_model(p))
    _, g = trotter_gradient_exact(model, ex, t, steps, 1, [name])
    assert clean == pytest.approx(g[0].real, abs=1e-9)
    a = uniform_depolarising_attenuation(runner.transpiled, runner.measured_physical_qubits(), runner.masks, p)
    print(f"\n  {name}: exact attenuation {noisy / clean:.4f}, predicted {a.total:.4f}")
    assert a.total * (1 - 1e-9) <= noisy / clean <= LOOSENESS * a.total
    assert noisy / clean < 0.9


def test_attenuation_arithmetic_on_a_hand_counted_circuit():
    """Two sx on qubit 0, one cx (0, 1), one rz (free), measuring qubit 1 into clbit 0 and qubit 0
    into clbit 1; observable Z on both clbits. Infidelities e = 0.01 (sx), 0.02 (cx) as depolarising
    parameters p = e d/(d-1): 0.02 and 0.08/3, so F = (1 - 0.02)^2 (1 - 0.08/3), R = (1 - 2 * 0.03)(1 - 2 * 0.05)
    (hand-computed from the module's stated model)."""
    from qiskit import QuantumCircuit
    from qhl.emulation.device_fidelity import global_depolarising_attenuation
    qc = QuantumCircuit(2, 2)
    qc.sx(0)
    qc.sx(0)
    qc.rz(0.3, 1)
    qc.cx(0, 1)
    qc.measure([1, 0], [0, 1])
    a = global_depolarising_attenuation(qc, [1, 0], [(1.0, 0b11)],
                                        lambda name, qs: {"sx": 0.01, "cx": 0.02}.get(name, 0.5),
                                        lambda q: {0: 0.05, 1: 0.03}[q])
    assert (a.one_qubit_gates, a.two_qubit_gates) == (2, 1)
    assert a.gates == pytest.approx(0.98 ** 2 * (1 - 0.08 / 3), rel=1e-12)
    assert a.readout == pytest.approx(0.94 * 0.90, rel=1e-12)
