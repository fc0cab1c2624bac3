"""Signal circuits of pulse-sequence experiments (qhl.circuits.sequence_circuits).

References: scipy.linalg.expm for the pulse gate (Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 31,
970 (2009)); a dense Trotterised sequence built here from tests/reference_trotter.py (product
formula and groups) and tests/reference_pulses.py (Kronecker pulse matrices), which import nothing
of qhl; the exact sequence signal of qhl.exact.sequence_engine (itself checked against
tests/reference_pulses.py in tests/test_sequences.py).
"""

import numpy as np
import pytest
import scipy.linalg as sla
from qiskit.circuit.library import RGate
from qiskit.quantum_info import Operator

from qhl import ExactEngine, build_model
from qhl.base.errors import QhlInputError
from qhl.circuits.circuit_family import exact_expectation
from qhl.circuits.sequence_circuits import (PlannedDelay, PlannedPulse, sequence_plan,
                                            sequence_signal_circuit)
from qhl.spins.cluster import Block, Delay, Experiment, Pulse
from qhl.spins.sequences import named_block

from made_up_clusters import small_cluster
from reference_pulses import dense_trotter_sequence_signal

FREE = ["offset:*", "dipolar:*", "j:*"]




@pytest.mark.parametrize("theta,phi", [(np.pi, np.pi / 2), (1.234, 0.0), (0.4, 2.1), (2.5, -0.7)])
def test_rgate_is_the_ideal_pulse_with_angles_one_to_one(theta, phi):
    # R = exp(-i theta (cos phi Ix + sin phi Iy)), I = sigma/2, from scipy expm (independent of qiskit)
    sx = np.array([[0, 1], [1, 0]]) / 2
    sy = np.array([[0, -1j], [1j, 0]]) / 2
    ref = sla.expm(-1j * theta * (np.cos(phi) * sx + np.sin(phi) * sy))
    np.testing.assert_allclose(Operator(RGate(theta, phi)).data, ref, atol=1e-14)


def _steps(hetero):
    return (Delay(0.11), Pulse(180, 90), Delay(0.07), Pulse(73, 33, "13C" if hetero else None),
            Block((Delay(0.02), Pulse(90, 45)), 2))


@pytest.mark.parametrize("hetero,order", [(False, 1), (True, 2), (True, 1)])
def test_circuit_equals_dense_trotterised_reference(hetero, order):
    # reference: dense_trotter_sequence_signal above (reference_trotter + reference_pulses, no qhl)
    c = small_cluster(hetero, 3)
    model = build_model(c, free=FREE)
    ex = Experiment("s", 0.3, 5, 0.8, steps=_steps(hetero))
    fam = sequence_signal_circuit(model, ex, 0.17, 3, order, step_s=0.03)
    delays = [p.steps for p in fam.preparation if isinstance(p, PlannedDelay)]
    assert delays == [4, 3, 1, 1]            # ceil(0.11/0.03), ceil(0.07/0.03), ceil(0.02/0.03) twice
    got = exact_expectation(fam, method="statevector")
    ref = dense_trotter_sequence_signal(model, ex, None, 0.17, 3, order, delays)
    assert abs(got - ref) < 1e-10
    assert abs(got - exact_expectation(fam, method="density")) < 1e-10


def test_pulse_on_other_isotope_acts_only_there():
    c = small_cluster(True, 3)
    model = build_model(c, free=FREE)
    plan = sequence_plan(model, Experiment("s", 0.3, 5, steps=(Pulse(90, 0, "13C"), Pulse(45, 90))), 0.1, 2)
    assert plan == [PlannedPulse(np.pi / 2, 0.0, (2,)), PlannedPulse(np.pi / 4, np.pi / 2, (0, 1))]


@pytest.mark.parametrize("order,ratio", [(1, 2.0), (2, 4.0)])
def test_converges_to_exact_sequence_signal_with_the_order(order, ratio):
    # exact: qhl.exact.sequence_engine (checked against reference_pulses.py in test_sequences.py).
    # Error of a p-th order formula ~ dt^p (Childs et al., Phys. Rev. X 11, 011020 (2021)):
    # halving every step length divides it by ~2^p; allowed 0.75x..1.35x of that ratio.
    c = small_cluster(False, 3)
    model = build_model(c, free=FREE)
    ex = Experiment("hahn", 0.2, 3, 1.0, steps=(named_block("hahn-echo", 0.05), Pulse(60, 30)))
    t = 0.2
    exact = complex(ExactEngine(model).signal(ex, times=[t])[0])
    errors = []
    for r in (8, 16, 32):
        fam = sequence_signal_circuit(model, ex, t, r, order)
        errors.append(abs(exact_expectation(fam, method="statevector") - exact))
    assert errors[-1] < (5e-3 if order == 1 else 2e-4)
    for a, b in zip(errors, errors[1:]):
        assert 0.75 * ratio < a / b < 1.35 * ratio


def test_no_steps_is_the_plain_signal_circuit():
    from qhl.circuits.gradient_circuits import signal_circuit

    model, ex = build_model(small_cluster(False, 3), free=FREE), Experiment("x", 0.3, 4, 0.8)
    a = exact_expectation(sequence_signal_circuit(model, ex, 0.2, 3, 2), method="statevector")
    b = exact_expectation(signal_circuit(model, ex, 0.2, 3, 2), method="statevector")
    assert abs(a - b) < 1e-12


@pytest.mark.parametrize("kw,key", [({"delay_steps": [1, 2]}, "delay_steps"), ({"delay_steps": 0}, "delay_steps"),
                                    ({"step_s": -1.0}, "step_s")])
def test_bad_delay_steps_are_one_line_errors(kw, key):
    model = build_model(small_cluster(False, 3), free=FREE)
    ex = Experiment("s", 0.3, 5, steps=(Delay(0.1), Pulse(180), Delay(0.1), Delay(0.05)))
    with pytest.raises(QhlInputError, match=key):
        sequence_signal_circuit(model, ex, 0.1, 2, 1, **kw)


def test_time_zero_needs_a_step_length_for_the_delays():
    model = build_model(small_cluster(False, 3), free=FREE)
    ex = Experiment("s", 0.3, 5, steps=(Delay(0.1), Pulse(180)))
    with pytest.raises(QhlInputError, match="step_s"):
        sequence_signal_circuit(model, ex, 0.0, 1, 1)
    fam = sequence_signal_circuit(model, ex, 0.0, 1, 1, delay_steps=5)
    assert fam.preparation[0] == PlannedDelay(0.1, 5)
    with pytest.raises(QhlInputError, match="no evolution"):
        exact_expectation(fam)               # the free-evolution reference does not cover the preparation
