"""Finite pulses (duration_s): evolution under H plus the RF term during the pulse.

References: tests/reference_pulses.py (dense expm of H + H_rf, imports nothing of qhl) with central
differences for gradients; the Bloch rotation of one off-resonance spin (F. Bloch, Phys. Rev. 70,
460 (1946); I. I. Rabi, Phys. Rev. 51, 652 (1937)): in the rotating frame the field
(nu1 cos phi, nu1 sin phi, offset) turns the magnetisation by beta = 2 pi nu_eff tau about its
direction n, nu_eff = sqrt(nu1^2 + offset^2).
"""

import numpy as np
import pytest

from qhl import ExactEngine, build_model
from qhl.base.errors import QhlInputError
from qhl.spins.cluster import Cluster, Delay, Experiment, Pulse, Spin
from qhl.spins.cluster_file import parse_cluster_toml, step_tables

from made_up_clusters import random_cluster, small_cluster
from reference_dense import central_difference
from reference_pulses import dense_sequence_signal

FREE = ["offset:*", "dipolar:*", "j:*"]


@pytest.mark.parametrize("hetero", [False, True])
def test_signal_and_gradient_equal_dense_reference(hetero):
    c = small_cluster(hetero, 3)
    model = build_model(c, free=FREE)
    steps = (Delay(0.05), Pulse(180, 90, None, 0.02), Delay(0.03), Pulse(75, 20, "13C" if hetero else None, 0.01),
             Pulse(90, 0))
    ex = Experiment("f", 0.2, 5, 0.8, steps=steps)
    eng = ExactEngine(model)
    ref = dense_sequence_signal(model, ex, ex.times_s)
    np.testing.assert_allclose(eng.signal(ex), ref, atol=1e-12)
    sig, grad = eng.gradient(ex)
    np.testing.assert_allclose(sig, ref, atol=1e-12)
    fd = central_difference(lambda v: dense_sequence_signal(model, ex, ex.times_s, v), model.free_values_hz, 1e-5)
    np.testing.assert_allclose(grad, fd, atol=1e-8)


def test_four_spins_khz_couplings_microsecond_pulses():
    rng = np.random.default_rng(5)
    c = random_cluster(rng, 4, hetero=True)
    steps = (Delay(2e-5), Pulse(90, 0, None, 2.5e-6), Delay(1e-5), Pulse(180, 90, "13C", 5e-6), Delay(1e-5))
    ex = Experiment("r", 1e-4, 4, 1.0, steps=steps)
    model = build_model(c, free=FREE)
    sig, grad = ExactEngine(model).gradient(ex)
    np.testing.assert_allclose(sig, dense_sequence_signal(model, ex, ex.times_s), atol=1e-11)
    fd = central_difference(lambda v: dense_sequence_signal(model, ex, ex.times_s, v), model.free_values_hz, 1e-3)
    np.testing.assert_allclose(grad, fd, atol=1e-9 * max(1.0, np.abs(grad).max()) + 1e-10)


@pytest.mark.parametrize("offset,angle,phase", [(0.0, 180, 90), (3e3, 180, 90), (-2e3, 90, 90), (5e3, 270, 90)])
def test_off_resonance_bloch_rotation(offset, angle, phase):
    # one spin, rho0 = Ix; field (0, nu1, offset) for phase 90: <Ix> -> cos beta, <Iy> -> n_z sin beta
    tau = 1e-4
    c = Cluster(9.4, "1H", (Spin("A", "1H", None, offset),))
    ex = Experiment("b", 1e-6, 2, steps=(Pulse(angle, phase, None, tau),))
    s0 = ExactEngine(build_model(c, free=["offset:*"])).signal(ex, times=[0.0])[0]
    nu1 = angle / 360 / tau
    nu_eff = np.hypot(nu1, offset)
    beta = 2 * np.pi * nu_eff * tau
    assert s0.real == pytest.approx(np.cos(beta), abs=1e-12)
    assert s0.imag == pytest.approx(offset / nu_eff * np.sin(beta), abs=1e-12)


def test_short_pulse_tends_to_the_ideal_pulse():
    # common practice: a hard pulse much shorter than 1/|H| acts as the ideal rotation; the gap falls ~ tau
    c = small_cluster(False, 3)
    model = build_model(c, free=FREE)
    eng = ExactEngine(model)
    ideal = eng.signal(Experiment("i", 0.2, 5, steps=(Delay(0.05), Pulse(120, 30), Delay(0.03))))
    gaps = []
    for tau in (1e-4, 1e-5, 1e-6):
        s = eng.signal(Experiment("f", 0.2, 5, steps=(Delay(0.05), Pulse(120, 30, None, tau), Delay(0.03))))
        gaps.append(np.abs(s - ideal).max())
    assert gaps[0] > gaps[1] > gaps[2]
    assert gaps[1] / gaps[2] == pytest.approx(10, rel=0.2)
    assert gaps[2] < 1e-4


def test_cluster_file_key_and_bad_values():
    text = """field_tesla = 9.4
observe = "1H"
[[spin]]
label = "A"
isotope = "1H"
offset_hz = 100.0
[[experiment]]
name = "e"
t_max_s = 1e-3
points = 4
[[experiment.step]]
pulse_deg = 90
duration_s = 2.5e-6
"""
    c = parse_cluster_toml(text, "made_up.toml")
    assert c.experiments[0].steps[0].duration_s == 2.5e-6
    assert step_tables(c.experiments[0].steps)[0]["duration_s"] == 2.5e-6
    for bad in ("0.0", "-1e-6", '"long"', "2e3"):
        with pytest.raises(QhlInputError, match=r"made_up.toml.*duration_s"):
            parse_cluster_toml(text.replace("duration_s = 2.5e-6", f"duration_s = {bad}"), "made_up.toml")


def test_circuits_refuse_and_budget_leaves_finite_pulse_experiments_out():
    # the circuits compile ideal pulses only: a finite pulse is refused by name, never compiled as ideal
    from qhl.circuits.sequence_circuits import sequence_plan
    from qhl.costing.budget import BudgetModel, BudgetSettings
    c = small_cluster(False, 3)
    model = build_model(c, free=FREE)
    fin = Experiment("finite", 0.2, 4, steps=(Delay(0.05), Pulse(180, 90, None, 0.01), Delay(0.05)))
    with pytest.raises(QhlInputError, match="finite pulses"):
        sequence_plan(model, fin, 0.2, 4)
    settings = BudgetSettings(empirical_trotter=False, classical_meter=False, hessian_exact=False)
    mixed = Cluster(c.field_tesla, c.observe, c.spins, c.pairs, (c.experiments[0], fin), name="mixed")
    b = BudgetModel(mixed, free=FREE, settings=settings).budget(0.2, 0.05)
    assert any("finite pulses (finite) are left out" in n for n in b.notes)
    assert not b.sequences
    only = Cluster(c.field_tesla, c.observe, c.spins, c.pairs, (fin,), name="only")
    with pytest.raises(QhlInputError, match="every experiment of 'only' has finite pulses"):
        BudgetModel(only, free=FREE, settings=settings)
