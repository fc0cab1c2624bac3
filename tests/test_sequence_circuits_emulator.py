"""The emulator's fast path on pulse-sequence signal families (qhl.emulation.fast_path.sequence_tables).

References: qiskit.quantum_info.Statevector probabilities of the bound family circuits and
qiskit-aer's statevector probabilities (qiskit / qiskit-aer documentation); the exact sequence
signal of qhl.exact.sequence_engine (checked against tests/reference_pulses.py, which imports
nothing of qhl, in tests/test_sequences.py). Statistical checks use fixed seeds; tolerances and
false-failure rates are stated beside them.
"""

import numpy as np
import pytest
from qiskit.quantum_info import Statevector

from qhl import ExactEngine, build_model
from qhl.circuits.circuit_family import exact_expectation
from qhl.circuits.sequence_circuits import sequence_signal_circuit
from qhl.emulation import FamilyRunner, estimate_family
from qhl.emulation.fast_path import FastFamily, supports_fast_path
from qhl.spins.cluster import Block, Delay, Experiment, Pulse
from qhl.spins.sequences import named_block

from made_up_clusters import small_cluster

FREE = ["offset:*", "dipolar:*", "j:*"]


def _family(hetero, order=1, steps=3):
    model = build_model(small_cluster(hetero, 3), free=FREE)
    ex = Experiment("s", 0.3, 5, 0.8, steps=(Delay(0.11), Pulse(180, 90), Delay(0.07),
                                             Pulse(73, 33, "13C" if hetero else None),
                                             Block((Delay(0.02), Pulse(90, 45)), 2)))
    return model, ex, sequence_signal_circuit(model, ex, 0.17, steps, order, step_s=0.03)


@pytest.mark.parametrize("hetero,order", [(False, 1), (True, 2)])
def test_fast_probabilities_equal_statevector_and_aer(hetero, order):
    """Every input and part: fast path = qiskit Statevector to 1e-10; up to 8 settings per part = Aer to 1e-10."""
    _, _, fam = _family(hetero, order)
    assert supports_fast_path(fam)
    fast, runner = FastFamily(fam), FamilyRunner(fam)
    assert runner.uses_fast_path
    angles, _ = fam.inputs.enumerate()
    rows, inputs = np.zeros(len(angles), int), np.arange(len(angles))
    rng = np.random.default_rng(7)
    for part in ("re", "im"):
        p = fast.probabilities(angles, rows, inputs, part)
        ref = np.array([Statevector(fam.bind(a, 0, part)).probabilities(list(fam.measured_qubits)) for a in angles])
        np.testing.assert_allclose(p, ref, atol=1e-10, rtol=0)
        pick = rng.choice(len(angles), size=min(8, len(angles)), replace=False)
        values = np.array([fam.parameter_values(angles[g], 0, part) for g in pick])
        np.testing.assert_allclose(runner.aer_probabilities(values), p[pick], atol=1e-10, rtol=0)


def test_emulated_sequence_signal_matches_the_exact_sequence_signal():
    """Hahn echo then a 60-degree pulse, order 2, 32 steps (Trotter error ~1.5e-5, measured in
    tests/test_sequence_circuits.py): 20 seeds x 2 parts of 4000 shots; |z| < 4 against the exact
    sequence signal for all 40 (false failure ~ 40 x 6e-5 ~ 0.3%), mean z within 4/sqrt(40) of 0."""
    model = build_model(small_cluster(False, 3), free=FREE)
    ex = Experiment("hahn", 0.2, 3, 1.0, steps=(named_block("hahn-echo", 0.05), Pulse(60, 30)))
    t = 0.2
    exact = complex(ExactEngine(model).signal(ex, times=[t])[0])
    fam = sequence_signal_circuit(model, ex, t, 32, 2)
    assert abs(exact_expectation(fam, method="statevector") - exact) < 2e-5
    runner = FamilyRunner(fam)
    z = []
    for seed in range(20):
        e = estimate_family(fam, 4000, seed, runner=runner)
        z += [(e.re.value - exact.real) / e.re.stderr, (e.im.value - exact.imag) / e.im.stderr]
    z = np.array(z)
    assert np.all(np.abs(z) < 4) and abs(z.mean()) < 4 / np.sqrt(40)
