"""Hadamard-test gradient families of pulse-sequence experiments (qhl.circuits.sequence_circuits).

References: a dense Trotterised sequence signal built here from tests/reference_trotter.py (product
formula and groups, H_g = sum_n h_n 2 pi s_n G_n) and tests/reference_pulses.py (Kronecker pulse
matrices), both importing nothing of qhl, differentiated by the five-point central stencil
(reference_trotter.five_point; error O(step^4), common practice); scipy.linalg.expm (Al-Mohy and
Higham, SIAM J. Matrix Anal. Appl. 31, 970 (2009)); the exact sequence gradient of
qhl.exact.sequence_engine (checked against reference_pulses.py in tests/test_sequences.py); the
convergence order of p-th order product formulas, error ~ dt^p (Childs, Su, Tran, Wiebe, Zhu,
Phys. Rev. X 11, 011020 (2021)).
"""

import numpy as np
import pytest

from qhl import ExactEngine, build_model
from qhl.base.errors import QhlInputError
from qhl.circuits.circuit_family import exact_expectation
from qhl.circuits.gradient_circuits import gradient_circuit
from qhl.circuits.sequence_circuits import PlannedDelay, sequence_gradient_circuit
from qhl.spins.cluster import Cluster, Delay, Experiment, Pair, Pulse, Spin
from qhl.spins.sequences import named_block

from made_up_clusters import small_cluster
from reference_pulses import dense_trotter_sequence_signal
from reference_trotter import _values, five_point

FREE = ["offset:*", "dipolar:*", "j:*"]


def other_cluster():
    """A third invented three-proton cluster (Hz-scale couplings, all pairs coupled)."""
    spins = (Spin("A", "1H", None, -0.9), Spin("B", "1H", None, 0.35), Spin("C", "1H", None, 1.1))
    pairs = (Pair(("A", "B"), j_hz=-0.5, dipolar_hz=0.7), Pair(("B", "C"), j_hz=0.2, dipolar_hz=-1.1),
             Pair(("A", "C"), dipolar_hz=0.45))
    return Cluster(9.4, "1H", spins, pairs, (Experiment("x", 0.3, 4, 1.0),))




def fd_gradient(model, experiment, name, time, steps, order, delay_steps):
    k = [p.name for p in model.parameters].index(name)
    base = _values(model, None)

    def s(x):
        v = base.copy()
        v[k] = x
        return dense_trotter_sequence_signal(model, experiment, v, time, steps, order, delay_steps)

    return five_point(s, base[k], 1e-3)


def hahn_phased():
    """A Hahn echo (delay, 180_y, delay) then a phased 73-degree pulse and a short delay."""
    return (Delay(0.08), Pulse(180, 90), Delay(0.08), Pulse(73, 33), Delay(0.03))


CASES = [  # cluster, order, parameter, acquisition time
    (lambda: small_cluster(False, 3), 1, "dipolar:S0-S1", 0.17),
    (lambda: small_cluster(False, 3), 2, "offset:S1", 0.17),
    (lambda: small_cluster(True, 3), 2, "j:S0-S2", 0.12),
    (lambda: small_cluster(True, 3), 1, "dipolar:S1-S2", 0.12),
    pytest.param(other_cluster, 2, "dipolar:A-C", 0.2, marks=pytest.mark.slow),   # ~30 s: CI's slow pass
    (other_cluster, 1, "dipolar:B-C", 0.0),          # acquisition at t = 0: only the delays depend on h
]


@pytest.mark.parametrize("make,order,name,t", CASES)
def test_family_equals_finite_differences_of_dense_trotterised_sequence(make, order, name, t):
    # reference: five-point differences of dense_trotter_sequence_signal (reference_trotter +
    # reference_pulses, no qhl); the family's statevector expectation is exact for U_trot, so the
    # only difference is the stencil's O(step^4) and round-off (~1e-12 here): allowed 1e-9
    # (measured 2e-14..4e-13 on these six cases).
    c = make()
    model = build_model(c, free=FREE)
    ex = Experiment("s", 0.3, 5, 0.8, steps=hahn_phased())
    fam = sequence_gradient_circuit(model, ex, name, t, 2, order, step_s=0.05)
    delays = [p.steps for p in fam.preparation if isinstance(p, PlannedDelay)]
    assert delays == [2, 2, 1]                  # ceil(0.08/0.05), ceil(0.08/0.05), ceil(0.03/0.05)
    got = exact_expectation(fam, method="statevector")
    ref = fd_gradient(model, ex, name, t, 2, order, delays)
    assert abs(ref) > 1e-3                      # a derivative that is really there
    assert abs(got - ref) < 1e-9
    kinds = {r["segment_kind"] for r in fam.insertions.rows}
    assert kinds == ({"delay"} if t == 0 else {"delay", "acquisition"})


def test_density_method_agrees_on_a_heteronuclear_pulse():
    # the 'density' path of exact_expectation (one input operator) against the statevector one
    # (linearity, common practice), with a pulse on the 13C only
    model = build_model(small_cluster(True, 3), free=FREE)
    ex = Experiment("s", 0.3, 5, 1.0, steps=(Delay(0.06), Pulse(90, 0, "13C"), Pulse(180, 90), Delay(0.06)))
    fam = sequence_gradient_circuit(model, ex, "j:S0-S2", 0.1, 2, 2, step_s=0.05)
    a = exact_expectation(fam, method="statevector")
    b = exact_expectation(fam, method="density")
    ref = fd_gradient(model, ex, "j:S0-S2", 0.1, 2, 2, [2, 2])
    assert abs(a - b) < 1e-10 and abs(a - ref) < 1e-7


@pytest.mark.parametrize("order,ratio", [(1, 2.0), (2, 4.0)])
def test_converges_to_exact_sequence_gradient(order, ratio):
    # exact: qhl.exact.sequence_engine gradient. Halving every step length divides the error of a
    # p-th order formula by ~2^p (Childs et al. 2021); allowed 0.7x..1.4x of that ratio.
    model = build_model(small_cluster(False, 3), free=FREE)
    ex = Experiment("hahn", 0.2, 3, 1.0, steps=(named_block("hahn-echo", 0.05), Pulse(60, 30)))
    t, name = 0.1, "offset:S0"
    _, grad = ExactEngine(model).gradient(ex, times=[t], parameters=[name])
    exact = complex(grad[0, 0])
    errors = []
    for r in (4, 8):                 # measured ratios 2.26 (order 1) and 4.02 (order 2); 16 steps: 2.12, 4.01
        fam = sequence_gradient_circuit(model, ex, name, t, r, order)
        errors.append(abs(exact_expectation(fam, method="statevector") - exact))
    assert errors[-1] < (2e-2 if order == 1 else 2e-3) * abs(exact)
    assert 0.7 * ratio < errors[0] / errors[1] < 1.4 * ratio


def test_no_steps_is_the_plain_gradient_circuit():
    model, ex = build_model(small_cluster(False, 3), free=FREE), Experiment("x", 0.3, 4, 0.8)
    a = exact_expectation(sequence_gradient_circuit(model, ex, "dipolar:S0-S2", 0.2, 3, 2), method="statevector")
    b = exact_expectation(gradient_circuit(model, ex, "dipolar:S0-S2", 0.2, 3, 2))
    assert abs(a - b) < 1e-12


def test_parameter_that_does_not_act_is_a_one_line_error():
    model = build_model(small_cluster(False, 3), free=FREE)
    ex = Experiment("s", 0.3, 5, 0.0, steps=(Delay(0.1), Pulse(180)))      # dipolar scale 0
    with pytest.raises(QhlInputError, match="does not act"):
        sequence_gradient_circuit(model, ex, "dipolar:S0-S1", 0.1, 2, 1)
    with pytest.raises(QhlInputError):
        sequence_gradient_circuit(model, ex, "nope", 0.1, 2, 1)


# ---------------------------------------------------------------- emulator fast path
def _emulator_family(hetero, order):
    model = build_model(small_cluster(hetero, 3), free=FREE)
    ex = Experiment("s", 0.3, 5, 0.8, steps=(Delay(0.08), Pulse(180, 90), Delay(0.05),
                                             Pulse(73, 33, "13C" if hetero else None), Delay(0.03)))
    return sequence_gradient_circuit(model, ex, "dipolar:S0-S1", 0.12, 2, order, step_s=0.05)


@pytest.mark.parametrize("hetero,order", [(False, 1), (True, 2)])
def test_fast_probabilities_equal_statevector_and_aer(hetero, order):
    """Every input, insertion row and part: fast path = qiskit Statevector probabilities of the bound
    circuit to 1e-10; 8 settings per part against Aer's statevector probabilities to 1e-10."""
    from qiskit.quantum_info import Statevector

    from qhl.emulation import FamilyRunner
    from qhl.emulation.fast_path import FastFamily, supports_fast_path

    fam = _emulator_family(hetero, order)
    assert supports_fast_path(fam)
    fast, runner = FastFamily(fam), FamilyRunner(fam)
    assert runner.uses_fast_path
    angles, _ = fam.inputs.enumerate()
    rows = np.repeat(np.arange(len(fam.insertions)), len(angles))
    inputs = np.tile(np.arange(len(angles)), len(fam.insertions))
    rng = np.random.default_rng(11)
    for part in ("re", "im"):
        p = fast.probabilities(angles, rows, inputs, part)
        ref = np.array([Statevector(fam.bind(angles[k], j, part)).probabilities(list(fam.measured_qubits))
                        for j, k in zip(rows, inputs)])
        np.testing.assert_allclose(p, ref, atol=1e-10, rtol=0)
        pick = rng.choice(len(rows), size=8, replace=False)
        values = np.array([fam.parameter_values(angles[inputs[g]], rows[g], part) for g in pick])
        np.testing.assert_allclose(runner.aer_probabilities(values), p[pick], atol=1e-10, rtol=0)


def test_emulated_sequence_gradient_matches_the_exact_sequence_gradient():
    """Hahn echo then a 60-degree pulse, order 2, 8 acquisition steps: the family's own value is within
    5e-5 of qhl.exact's gradient (measured 2.8e-5 in test_converges_to_exact_sequence_gradient), far
    below one shot-noise standard error. Statistical check (fixed seeds 0..19): 20 seeds x 2 parts of
    4000 shots, z against the exact gradient; |z| < 4 for all 40 (false failure ~ 40 x 6e-5 ~ 0.3%),
    mean z within 4/sqrt(40) of 0 (false failure ~ 6e-5)."""
    from qhl.emulation import FamilyRunner, estimate_family

    model = build_model(small_cluster(False, 3), free=FREE)
    ex = Experiment("hahn", 0.2, 3, 1.0, steps=(named_block("hahn-echo", 0.05), Pulse(60, 30)))
    t, name = 0.1, "offset:S0"
    _, grad = ExactEngine(model).gradient(ex, times=[t], parameters=[name])
    exact = complex(grad[0, 0])
    fam = sequence_gradient_circuit(model, ex, name, t, 8, 2)
    assert abs(exact_expectation(fam, method="statevector") - exact) < 5e-5
    runner = FamilyRunner(fam)
    assert runner.uses_fast_path
    z = []
    for seed in range(20):
        e = estimate_family(fam, 4000, seed, runner=runner)
        z += [(e.re.value - exact.real) / e.re.stderr, (e.im.value - exact.imag) / e.im.stderr]
    z = np.array(z)
    assert np.all(np.abs(z) < 4) and abs(z.mean()) < 4 / np.sqrt(40)


# ---------------------------------------------------------------- the emulated provider
def test_emulated_provider_estimates_sequence_signals_and_gradients():
    """EmulatedGradientProvider on a Hahn-echo experiment (fixed 8 steps per segment, order 2), at
    t = 0 (after the echo S(0) != 1) and t = 0.1 s: every S and dS/dh within 5 standard errors of
    qhl.exact's values (the Trotter error, <= 1e-4 here, is far below one standard error ~2e-2; the
    standard error of each family from a separate estimate with the same shots). Fixed seeds;
    false failure per value ~ 6e-7, 2 x 2 x 4 values."""
    from qhl.emulation import estimate_family
    from qhl.emulation.provider import EmulatedGradientProvider

    model = build_model(small_cluster(False, 3), free=["offset:S0", "dipolar:S0-S1"])
    ex = Experiment("hahn", 0.2, 3, 1.0, steps=(named_block("hahn-echo", 0.05), Pulse(60, 30)))
    prov = EmulatedGradientProvider(model, [ex], shots=4000, seed=3, steps=8, order=2)
    times = np.array([0.0, 0.1])
    assert prov.delay_steps_for(ex) == [8, 8]
    assert prov.step_plan({"hahn": times}) == {("hahn", 0.0): 8, ("hahn", 0.1): 8}
    sig, grad = prov.signals_and_gradients(model.values_hz[model.free_indices], {"hahn": times})["hahn"]
    ref_sig, ref_grad = ExactEngine(model).gradient(ex, times=times)
    assert abs(ref_sig[0] - 1) > 0.1                 # the preparation moves S(0) away from 1
    for k, t in enumerate(times):
        fams = [prov.signal_family(ex, t, 8)] + [prov.gradient_family(ex, nm, t, 8) for nm in model.free]
        for got, ref, fam in zip([sig[k], *grad[:, k]], [ref_sig[k], *ref_grad[:, k]], fams):
            e = estimate_family(fam, 4000, 99)
            assert abs(got.real - ref.real) < 5 * e.re.stderr and abs(got.imag - ref.imag) < 5 * e.im.stderr
    assert prov.circuits_run > 0 and prov.shots_used > 0


def test_emulated_provider_bound_steps_for_the_delays():
    """Without fixed steps each delay tau_d is held to eps tau_d / sum tau by the commutator bound
    (qhl.circuits.trotter_bounds.trotter_steps_for, itself checked in tests/test_trotter.py)."""
    from qhl.circuits.sequence_circuits import acquisition_terms
    from qhl.circuits.trotter_bounds import trotter_steps_for
    from qhl.emulation.provider import EmulatedGradientProvider

    model = build_model(small_cluster(False, 3), free=FREE)
    ex = Experiment("s", 0.3, 5, 0.8, steps=(Delay(0.08), Pulse(180, 90), Delay(0.02)))
    prov = EmulatedGradientProvider(model, [ex], shots=10, eps=1e-2, order=2)
    terms = acquisition_terms(model, ex)
    got = prov.delay_steps_for(ex)
    assert got == [trotter_steps_for(terms, 0.08, 0.8e-2, 2), trotter_steps_for(terms, 0.02, 0.2e-2, 2)]
    assert got[0] > got[1] >= 1


def test_estimator_weight_counts_every_segment():
    # W = sum_a |2 beta_a| of the Hadamard estimator: for an offset (H term 2 pi h Iz, Iz = Z/2, one
    # Pauli per slot) W = 2 * 2 pi * (1/2) * (total Trotterised time) = 2 pi (t + sum of delays), the
    # range the shot budget of a sequence gradient needs (common practice: the derivative of
    # exp(-i 2 pi h Iz tau) is -i 2 pi Iz tau times it)
    model = build_model(small_cluster(False, 3), free=FREE)
    ex = Experiment("s", 0.3, 5, 0.8, steps=hahn_phased())
    fam = sequence_gradient_circuit(model, ex, "offset:S2", 0.12, 3, 2, step_s=0.05)
    assert abs(fam.insertions.total_weight - 2 * np.pi * (0.12 + 0.08 + 0.08 + 0.03)) < 1e-12
    assert fam.circuit.num_qubits == 4 and fam.measured_qubits == (0, 1, 2, 3)
