"""Time-dependent Trotter circuits of spinning FIDs (qhl.circuits.spinning_circuits).

References (none imports qhl's computing code):
  * tests/reference_spinning.py: dense_spinning_signal / dense_spinning_gradient, the time-ordered
    propagator of H(t) rebuilt with scipy.spatial.transform.Rotation and scipy.linalg.expm
    (Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 31, 970 (2009)); dense_trotter_spinning_signal,
    the step-averaged product formula from dense matrices and scipy.integrate.quad;
  * the order of the product formulas: Childs, Su, Tran, Wiebe, Zhu, "Theory of Trotter error with
    commutator scaling", Phys. Rev. X 11, 011020 (2021) (second order: error ~ tau^2 over a fixed t);
    the step-averaged (first Magnus term) error O(tau^3) per step: Blanes, Casas, Oteo and Ros,
    Phys. Rep. 470, 151 (2009);
  * signals of the circuits: qiskit.quantum_info.Operator / Statevector / DensityMatrix on the built
    circuits; gate counts: qiskit.transpile.
The clusters are invented (positions, offsets, J).
"""

import functools

import numpy as np
import pytest
from qiskit import transpile
from qiskit.quantum_info import Operator

from qhl.base.errors import QhlInputError
from qhl.circuits.circuit_family import exact_expectation
from qhl.circuits.spinning_circuits import (STEPS_PER_ROTOR_PERIOD, spinning_evolution, spinning_evolution_circuit,
                                            spinning_gradient_circuit, spinning_signal_circuit, steps_rule)
from qhl.spins.cluster_file import parse_cluster_toml
from qhl.spins.model import build_model

from reference_dense import initial_and_detection
from reference_spinning import dense_spinning_gradient, dense_spinning_signal, dense_trotter_spinning_signal

SPINS = [("A", "1H", (0.0, 0.0, 0.0), 1500.0), ("B", "1H", (2.2, 0.6, 1.4), -900.0),
         ("C", "13C", (-1.6, 1.5, 0.5), 300.0), ("D", "1H", (0.4, 2.6, -1.1), 200.0)]
NU_R = 12500.0
T = 1 / NU_R            # one rotor period


def _text(n, spinning_hz=NU_R, offsets=None):
    out = ['name = "made-up-rotor"', "field_tesla = 9.4", 'observe = "1H"', "field_direction = [0.3, 0.2, 1.0]"]
    for k, (label, iso, pos, off) in enumerate(SPINS[:n]):
        off = off if offsets is None else offsets[k]
        out += ["[[spin]]", f'label = "{label}"', f'isotope = "{iso}"', f"position_angstrom = {list(pos)}",
                f"offset_hz = {off}"]
    out += ["[[pair]]", 'spins = ["A", "B"]', "j_hz = 7.0"]
    out += ["[[experiment]]", 'name = "mas"', f"t_max_s = {T}", "points = 16", f"spinning_hz = {spinning_hz}"]
    return "\n".join(out) + "\n"


def _cluster(n, **kw):
    return parse_cluster_toml(_text(n, **kw), "made_up.toml")


def _operator_signal(model, evo):
    """S from the compiled evolution circuit: Operator of the circuit, rho0 and O built in reference_dense."""
    u = Operator(spinning_evolution_circuit(evo)).data
    rho, det = initial_and_detection(model)
    return np.trace(det @ u @ rho @ u.conj().T) / np.trace(det @ rho)


@pytest.mark.parametrize("order", [1, 2])
def test_circuit_equals_dense_step_averaged_product_formula(order):
    c = _cluster(3)
    m = build_model(c)
    evo = spinning_evolution(m, c.experiments[0], T, 5, order)
    ref = dense_trotter_spinning_signal(c, m, c.experiments[0], T, 5, order)
    assert abs(_operator_signal(m, evo) - ref) < 1e-10


def test_family_signal_equals_the_evolution_circuit():
    # the family adds input preparation and read-out: its exact expectation (qiskit Statevector over every
    # input and both parts) equals Tr[O U rho0 U^dag] / Tr[O rho0] of the bare evolution circuit
    c = _cluster(3)
    m = build_model(c)
    fam = spinning_signal_circuit(m, c.experiments[0], T, 6, 2)
    got = exact_expectation(fam, method="statevector")
    assert abs(got - _operator_signal(m, fam.spinning["evolution"])) < 1e-10


def test_second_order_signal_converges_to_time_ordered_reference_with_order_two():
    # 4 spins, one rotor period; error of the compiled circuits against the dense time-ordered propagator at
    # r = 8, 16, 32, 64; fitted log-log slope must be 2 +- 0.2 (measured 1.96 with this cluster)
    c = _cluster(4)
    m = build_model(c)
    ex = c.experiments[0]
    ref = dense_spinning_signal(c, m, ex, [T])[0]
    rs = np.array([8, 16, 32, 64])
    errs = np.array([abs(_operator_signal(m, spinning_evolution(m, ex, T, r, 2)) - ref) for r in rs])
    slope = -np.polyfit(np.log(rs), np.log(errs), 1)[0]
    assert 1.8 < slope < 2.2, (errs, slope)
    assert errs[-1] < 1e-5
    # the steps rule (8 per rotor period) gives r = 8 here: error 2.7e-4 (measured) on |S| ~ 0.6
    assert steps_rule(NU_R, T) == STEPS_PER_ROTOR_PERIOD
    assert errs[0] < 5e-4


def test_first_order_converges_at_least_linearly():
    c = _cluster(3)
    m = build_model(c)
    ex = c.experiments[0]
    ref = dense_spinning_signal(c, m, ex, [T])[0]
    rs = np.array([8, 16, 32])
    errs = np.array([abs(_operator_signal(m, spinning_evolution(m, ex, T, r, 1)) - ref) for r in rs])
    assert -np.polyfit(np.log(rs), np.log(errs), 1)[0] > 0.9, errs


@functools.lru_cache(maxsize=None)
def _pair_reference(offsets, slices):
    c = _cluster(2, offsets=list(offsets))
    m = build_model(c)
    return c, m, dense_spinning_signal(c, m, c.experiments[0], [1.37 * T], slices_per_period=slices)[0]


@pytest.mark.parametrize("order,steps", [(1, 1), (2, 1), (2, 3), (1, 7)])
def test_homonuclear_pair_with_equal_offsets_is_exact_at_any_r(order, steps):
    # H(t) at all times commute (Z_A + Z_B commutes with the pair's XX, YY, ZZ): U = exp(-i int H), and the
    # exact step averages make the product formula exact; reference slices 4000 per period (midpoint error
    # O(slice^2), about 1e-7 here)
    c, m, ref = _pair_reference((640.0, 640.0), 4000)
    got = _operator_signal(m, spinning_evolution(m, c.experiments[0], 1.37 * T, steps, order))
    assert abs(got - ref) < 1e-6
    # with unequal offsets one step is not exact (the check can fail)
    c2, m2, ref2 = _pair_reference((640.0, -300.0), 400)
    assert abs(_operator_signal(m2, spinning_evolution(m2, c2.experiments[0], 1.37 * T, 1, order)) - ref2) > 1e-3


def _fd_circuit_gradient(m, ex, name, steps, order, h=1e-3):
    k = m.names.index(name)
    out = []
    for sign in (1, -1):
        v = np.array(m.values_hz, float)
        v[k] += sign * h
        out.append(_operator_signal(m, spinning_evolution(m, ex, T, steps, order, values_hz=v)))
    return (out[0] - out[1]) / (2 * h)


def test_gradient_family_is_the_exact_derivative_of_the_compiled_signal():
    # analytic average over the time sampling: the sum over every insertion row (qiskit DensityMatrix of
    # each bound Hadamard-test circuit), against central differences of the compiled signal circuit
    c = _cluster(3)
    m = build_model(c)
    ex = c.experiments[0]
    for name in ("offset:A", "dipolar:A-C", "dipolar:A-B"):
        fam = spinning_gradient_circuit(m, ex, name, T, 4, 2)
        got = exact_expectation(fam, method="density")
        want = _fd_circuit_gradient(m, ex, name, 4, 2)
        assert abs(got - want) < 1e-6 * max(abs(want), 1e-6), (name, got, want)


def _dense_gradient(names):
    c = _cluster(3)
    m = build_model(c, free=list(names))
    return m, c, dense_spinning_gradient(c, m, c.experiments[0], [T], slices_per_period=200)[:, 0]


def test_gradient_family_equals_dense_time_ordered_gradient():
    # offset (s = 1) and a heteronuclear dipolar term (s(t) from the rotor), r = 16, second order. Measured
    # relative errors at r = 8, 16, 32: offset 4.6e-5, 1.1e-5, 2.3e-6; dipolar:A-C 11 %, 2.9 %, 0.71 % (tau^2).
    # Tolerances: 5e-5 and 5 % at r = 16.
    m, c, ref = _dense_gradient(["offset:A", "dipolar:A-C"])
    ex = c.experiments[0]
    got = [exact_expectation(spinning_gradient_circuit(m, ex, nm, T, 16, 2), method="density") for nm in m.free]
    assert abs(got[0] - ref[0]) < 5e-5 * abs(ref[0])
    assert abs(got[1] - ref[1]) < 5e-2 * abs(ref[1])


@pytest.mark.slow
def test_gradient_converges_with_order_two():
    m, c, ref = _dense_gradient(["dipolar:A-C"])
    ex = c.experiments[0]
    errs = [abs(exact_expectation(spinning_gradient_circuit(m, ex, "dipolar:A-C", T, r, 2), method="density")
                - ref[0]) for r in (8, 16, 32)]
    assert 3.0 < errs[0] / errs[1] < 5.0 and 3.0 < errs[1] / errs[2] < 5.0, errs


def test_refuses_static_experiment_and_bad_arguments():
    c = _cluster(3, spinning_hz=0.0)
    m = build_model(c)
    with pytest.raises(QhlInputError, match="does not spin"):
        spinning_signal_circuit(m, c.experiments[0], T, 4)
    c = _cluster(3)
    m = build_model(c)
    with pytest.raises(QhlInputError, match="steps"):
        spinning_signal_circuit(m, c.experiments[0], T, 0)
    with pytest.raises(QhlInputError, match="time"):
        spinning_gradient_circuit(m, c.experiments[0], "offset:A", 0.0, 4)


def test_steps_rule():
    # 8 steps per rotor period, never fewer than requested
    assert steps_rule(10000.0, 1e-3) == 80
    assert steps_rule(10000.0, 1e-3, 200) == 200
    assert steps_rule(10000.0, 1.05e-4) == 9


@pytest.mark.parametrize("kind", ["signal", "gradient"])
def test_emulator_fast_path_matches_aer_and_the_exact_value(kind):
    # the numpy fast path (qhl.emulation.fast_path.spinning_tables) on a spinning family: every distinct
    # setting's probabilities are recomputed by Aer's statevector method (audit, tolerance 1e-10), and the
    # shot estimate (4000 shots per part, fixed seed) lies within 4 standard errors of the exact expectation
    # (false-failure rate about 6e-5 per part for a normal estimate); one run through Aer itself (method
    # 'aer') for the signal, same tolerance
    from qhl.emulation.derivatives import estimate_family
    from qhl.emulation.fast_path import supports_fast_path

    c = _cluster(3)
    m = build_model(c)
    ex = c.experiments[0]
    fam = (spinning_signal_circuit(m, ex, T, 8, 2) if kind == "signal"
           else spinning_gradient_circuit(m, ex, "dipolar:A-B", T, 8, 2))
    assert supports_fast_path(fam)
    exact = exact_expectation(fam, method="statevector" if kind == "signal" else "density")
    runs = [estimate_family(fam, 4000, seed=7, method="fast", audit=8)]
    if kind == "signal":
        runs.append(estimate_family(fam, 4000, seed=8, method="aer"))
    for est in runs:
        assert abs(est.value.real - exact.real) < 4 * est.stderr.real
        assert abs(est.value.imag - exact.imag) < 4 * est.stderr.imag
        assert est.stderr.real > 0


def test_emulated_provider_uses_the_spinning_families():
    # the learning loop's emulated provider: a spinning experiment gets the spinning families with the rotor
    # rule's steps (8 per rotor period here: r = 8 over one period; a fixed count above it wins)
    from qhl.emulation.provider import EmulatedGradientProvider

    c = _cluster(3)
    m = build_model(c, free=["offset:A", "dipolar:A-B"])
    ex = c.experiments[0]
    p = EmulatedGradientProvider(m, [ex], shots=200, seed=1)
    assert p.steps_for(ex, T, m.values_hz) == 8
    assert EmulatedGradientProvider(m, [ex], shots=200, seed=1, steps=12).steps_for(ex, T, m.values_hz) == 12
    fam = p.signal_family(ex, T, 8)
    assert fam.spinning["evolution"].steps == 8
    ref = dense_trotter_spinning_signal(c, m, ex, T, 8, 2)
    assert abs(exact_expectation(fam, method="statevector") - ref) < 1e-10
    g = p.gradient_family(ex, "dipolar:A-B", T, 8)
    assert g.kind == "gradient" and g.parameters == ("dipolar:A-B",)
