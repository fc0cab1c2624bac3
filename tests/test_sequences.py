"""Pulse-sequence experiments: the exact engine against a dense reference, echoes, cluster files."""

import dataclasses

import numpy as np
import pytest

from qhl import ExactEngine, build_model
from qhl.base.errors import QhlInputError
from qhl.exact import sequence_engine
from qhl.exact.likelihood import fisher_information
from qhl.spins.cluster import Block, Cluster, Delay, Experiment, Pair, Pulse, Spin
from qhl.spins.cluster_file import parse_cluster_toml
from qhl.spins.sequences import named_block

from made_up_clusters import random_cluster, small_cluster
from reference_dense import central_difference, dense_signal
from reference_pulses import dense_sequence_signal

FREE = ["offset:*", "dipolar:*", "j:*"]


def _steps(hetero):
    return (Delay(0.11), Pulse(180, 90), Delay(0.07), Pulse(73, 33, "13C" if hetero else None),
            Block((Delay(0.02), Pulse(90, 45)), 2), named_block("wahuha", 0.01, 2))


@pytest.mark.parametrize("hetero", [False, True])
def test_signal_and_gradient_equal_dense_reference_with_explicit_pulse_matrices(hetero):
    # reference: tests/reference_pulses.py (Kronecker pulse matrices, scipy expm; imports nothing of qhl)
    c = small_cluster(hetero, 3)
    model = build_model(c, free=FREE)
    ex = Experiment("s", 0.3, 5, 0.8, steps=_steps(hetero))
    eng = ExactEngine(model)
    t = ex.times_s
    ref = dense_sequence_signal(model, ex, t)
    np.testing.assert_allclose(eng.signal(ex), ref, atol=1e-12)
    sig, grad = eng.gradient(ex)
    np.testing.assert_allclose(sig, ref, atol=1e-12)
    fd = central_difference(lambda v: dense_sequence_signal(model, ex, t, v), model.free_values_hz, 1e-5)
    # central differences of step 1e-5 Hz: truncation ~ h^2 S''' ~ 1e-10 * (2 pi 0.5 s)^3, round-off ~ 1e-11
    np.testing.assert_allclose(grad, fd, atol=1e-8)


@pytest.mark.parametrize("seed", [1, 2])
def test_random_four_spin_cluster_with_complex_phases_and_both_isotopes(seed):
    # reference: tests/reference_pulses.py; kHz couplings, microsecond steps
    rng = np.random.default_rng(seed)
    c = random_cluster(rng, 4, hetero=True)
    steps = (Delay(3e-5), Pulse(rng.uniform(0, 360), rng.uniform(0, 360)), Delay(1e-5),
             Pulse(rng.uniform(0, 360), rng.uniform(0, 360), "13C"), Delay(2e-5))
    ex = Experiment("r", 1e-4, 4, 1.0, steps=steps)
    model = build_model(c, free=FREE)
    eng = ExactEngine(model)
    sig, grad = eng.gradient(ex)
    np.testing.assert_allclose(sig, dense_sequence_signal(model, ex, ex.times_s), atol=1e-11)
    fd = central_difference(lambda v: dense_sequence_signal(model, ex, ex.times_s, v), model.free_values_hz, 1e-3)
    np.testing.assert_allclose(grad, fd, atol=1e-9 * max(1.0, np.abs(grad).max()) + 1e-10)


def test_rf_term_full_space_gradient():
    # complex H in the full space (no sectors); reference: tests/reference_pulses.py + central differences
    c = small_cluster(False, 3)
    model = build_model(c, free=FREE).with_rf_term("1H", 0.4, "y").with_free(["offset:*", "dipolar:*", "rf:*"])
    ex = Experiment("s", 0.3, 5, 0.8, steps=(Delay(0.11), Pulse(180, 30), Delay(0.07)))
    eng = ExactEngine(model)
    assert not eng.symmetric and not eng.real
    sig, grad = eng.gradient(ex)
    np.testing.assert_allclose(sig, dense_sequence_signal(model, ex, ex.times_s), atol=1e-12)
    fd = central_difference(lambda v: dense_sequence_signal(model, ex, ex.times_s, v), model.free_values_hz, 1e-5)
    np.testing.assert_allclose(grad, fd, atol=1e-8)


def test_no_steps_is_the_plain_fid():
    # reference: tests/reference_dense.py (the FID of the engine without steps is unchanged)
    c = small_cluster(False, 3)
    model = build_model(c, free=FREE)
    ex = c.experiments[0]
    assert ex.steps == ()
    np.testing.assert_allclose(ExactEngine(model).signal(ex), dense_signal(model, ex, ex.times_s), atol=1e-12)


def _offsets_cluster(tau, t_after, points=41):
    """Four uncoupled protons at spread offsets: pure inhomogeneous dephasing."""
    spins = tuple(Spin(f"H{i}", "1H", None, off) for i, off in enumerate((-730.0, -110.0, 260.0, 905.0)))
    ex = Experiment("hahn", 2 * t_after, points, steps=(Delay(tau), Pulse(180, 90), Delay(tau - t_after)))
    return Cluster(9.4, "1H", spins, (), (ex,))


def test_hahn_echo_refocuses_offsets_at_two_tau():
    # E. L. Hahn, "Spin echoes", Phys. Rev. 80, 580 (1950): after tau - 180 - tau every offset is
    # refocused; a 180 about y turns Ix into -Ix, so the echo top is S = -1 at 2 tau.
    tau, t_after = 7e-3, 1e-3
    c = _offsets_cluster(tau, t_after)
    ex = c.experiments[0]
    s = ExactEngine(build_model(c)).signal(ex)
    k = int(np.argmin(np.abs(ex.times_s - t_after)))
    assert ex.times_s[k] == pytest.approx(t_after)
    assert s[k] == pytest.approx(-1.0, abs=1e-12)
    far = np.abs(ex.times_s - t_after) >= 3e-4
    assert np.max(np.abs(s[far])) < 0.95              # 0.3 ms away from 2 tau the offsets are spread out


@pytest.mark.parametrize("tau", [4e-3, 11e-3, 23e-3, 37e-3])
def test_hahn_echo_top_modulated_by_j_in_weak_coupling(tau):
    # E. L. Hahn and D. E. Maxwell, "Spin echo measurements of nuclear spin coupling in molecules",
    # Phys. Rev. 88, 1070 (1952): the 180 pulse flips both coupled spins, so J is not refocused and the
    # echo top is cos(pi J 2 tau) when J << |offset difference| (here J / delta = 5e-4: error ~ 1e-6).
    j = 10.0
    spins = (Spin("A", "1H", None, 0.0), Spin("B", "1H", None, 20000.0))
    ex = Experiment("hm", 1e-3, 2, steps=(Delay(tau), Pulse(180, 0), Delay(tau)))
    c = Cluster(9.4, "1H", spins, (Pair(("A", "B"), j_hz=j),), (ex,))
    s0 = ExactEngine(build_model(c)).signal(ex)[0]
    assert s0.real == pytest.approx(np.cos(np.pi * j * 2 * tau), abs=1e-4)
    assert abs(s0.imag) < 1e-4


@pytest.mark.parametrize("pulse_carbon", [False, True])
def test_heteronuclear_j_refocused_unless_both_isotopes_are_pulsed(pulse_carbon):
    # common practice (Levitt, "Spin Dynamics", 2nd ed. 2008, ch. 15 on heteronuclear echoes): a 180 on
    # 1H alone refocuses the 1H-13C J coupling; 180s on both isotopes keep cos(pi J 2 tau) (exact here,
    # the heteronuclear coupling is Iz Sz).
    j, tau = 140.0, 1.3e-3
    spins = (Spin("H", "1H", None, 310.0), Spin("C", "13C", None, -45.0))
    steps = (Delay(tau), Pulse(180, 0)) + ((Pulse(180, 0, "13C"),) if pulse_carbon else ()) + (Delay(tau),)
    ex = Experiment("het", 1e-3, 2, steps=steps)
    c = Cluster(9.4, "1H", spins, (Pair(("H", "C"), j_hz=j),), (ex,))
    s0 = ExactEngine(build_model(c, free=FREE)).signal(ex)[0]
    want = np.cos(np.pi * j * 2 * tau) if pulse_carbon else 1.0
    assert s0 == pytest.approx(want, abs=1e-12)


def test_fisher_information_of_a_sequence_experiment_from_dense_differences():
    # Kay, "Estimation Theory" (1993) ch. 3: F = sum Re[dS^* dS] / sigma^2, dS from the dense reference
    c = small_cluster(False, 3)
    model = build_model(c, free=FREE)
    ex = Experiment("s", 0.3, 5, 0.8, noise=0.01, steps=_steps(False))
    fd = central_difference(lambda v: dense_sequence_signal(model, ex, ex.times_s, v), model.free_values_hz, 1e-5)
    want = np.real(np.conj(fd) @ fd.T) / 0.01**2
    got = fisher_information(ExactEngine(model), [ex])
    np.testing.assert_allclose(got, want, rtol=1e-7, atol=1e-6 * np.abs(want).max())


def test_line_list_refuses_sequence_experiments():
    # (their Hessians are covered: tests/test_sequence_hessian.py)
    c = small_cluster(False, 3)
    eng = ExactEngine(build_model(c, free=FREE))
    ex = Experiment("s", 0.3, 5, steps=(Delay(0.1), Pulse(180)))
    with pytest.raises(QhlInputError, match="pulse-sequence steps"):
        eng.transitions(ex)


def test_size_limit_refused_with_the_memory_estimate(monkeypatch):
    monkeypatch.setattr(sequence_engine, "MAX_SEQUENCE_SPINS", 2)
    c = small_cluster(False, 3)
    eng = ExactEngine(build_model(c, free=FREE))
    ex = Experiment("s", 0.3, 5, steps=(Delay(0.1), Pulse(180)))
    with pytest.raises(QhlInputError, match=r"3 spins: .*GiB.*at most 2 spins"):
        eng.signal(ex)
    assert sequence_engine.sequence_memory_bytes(12) == pytest.approx(16 * 4.0**12 * 6 + 8 * 4.0**12
                                                                      + 48 * 4096 * 64)


ISSUE_LAYOUT = """
field_tesla = 9.4
observe = "1H"
[[spin]]
label = "H1"
isotope = "1H"
offset_hz = 120.0
[[spin]]
label = "C1"
isotope = "13C"
[[experiment]]
name = "hahn"
t_max_s = 4e-3
points = 64
[[experiment.step]]
delay_s = 0.01
[[experiment.step]]
pulse_deg = 180
phase_deg = 90
isotope = "1H"
[[experiment.step]]
delay_s = 0.01
[[experiment.step]]
sequence = "solid-echo"
tau_s = 2e-5
repeat = 3
[[experiment.step]]
repeat = 2
steps = [{delay_s = 1e-5}, {pulse_deg = 90, isotope = "13C"}]
"""


def test_cluster_file_layout_of_the_issue():
    c = parse_cluster_toml(ISSUE_LAYOUT, "x.toml")
    st = c.experiments[0].steps
    assert st[:3] == (Delay(0.01), Pulse(180.0, 90.0, "1H"), Delay(0.01))
    assert st[3] == named_block("solid-echo", 2e-5, 3)
    assert st[4] == Block((Delay(1e-5), Pulse(90.0, 0.0, "13C")), 2)
    plain = parse_cluster_toml(ISSUE_LAYOUT.split("[[experiment.step]]")[0], "x.toml")
    assert plain.experiments[0].steps == ()


@pytest.mark.parametrize("step,key,expect", [
    ("delay_s = 0", "step[0].delay_s", "positive"),
    ("delay_s = true", "step[0].delay_s", "number"),
    ("pulse_deg = 1e9", "step[0].pulse_deg", "36000"),
    ("pulse_deg = 90\nphase_deg = 'x'", "step[0].phase_deg", "number"),
    ("pulse_deg = 90\nisotope = '2H'", "step[0].isotope", ""),
    ("pulse_deg = 90\nisotope = '15N'", "step.isotope", "no spin has that isotope"),
    ("pulse_deg = 90\nwidth_s = 1", "step[0]", "unknown key 'width_s'"),
    ("delay_s = 1\npulse_deg = 90", "step[0]", "exactly one of"),
    ("phase_deg = 90", "step[0]", "exactly one of"),
    ("sequence = 'nope'\ntau_s = 1e-5", "step[0].sequence", "solid-echo"),
    ("sequence = 'wahuha'", "step[0].tau_s", "missing"),
    ("sequence = 'wahuha'\ntau_s = 1e-5\nrepeat = 1.5", "step[0].repeat", "integer"),
    ("repeat = 0\nsteps = [{delay_s = 1}]", "step[0].repeat", "integer"),
    ("repeat = 2\nsteps = []", "step[0].steps", "non-empty"),
    ("repeat = 2\nsteps = [{delay_s = -1}]", "step[0].steps[0].delay_s", "positive"),
    ("repeat = 100000\nsteps = [{delay_s = 1e-9}, {pulse_deg = 1}]", "step", "at most 100,000"),
    ("sequence = 'wahuha'\ntau_s = 1\nrepeat = 1000", "step", "1000 s"),
])
def test_bad_steps_are_one_line_errors_naming_file_and_key(step, key, expect):
    text = ISSUE_LAYOUT.split("[[experiment.step]]")[0] + "[[experiment.step]]\n" + step + "\n"
    with pytest.raises(QhlInputError) as err:
        parse_cluster_toml(text, "bad.toml")
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith("bad.toml") and f"experiment[0].{key}" in msg and expect in msg


def test_replace_keeps_steps_and_experiments_stay_hashable():
    ex = Experiment("s", 1e-3, 4, steps=(Delay(1e-3), Block((Pulse(90),), 3)))
    assert dataclasses.replace(ex, dipolar_scale=0.5).steps == ex.steps
    assert hash(ex) == hash(Experiment("s", 1e-3, 4, steps=(Delay(1e-3), Block((Pulse(90),), 3))))


def test_circuits_and_typical_engine_refuse_rather_than_ignore_the_steps():
    from qhl.circuits.trotter import trotter_terms
    from qhl.exact.typicality import TypicalEngine

    c = small_cluster(False, 3)
    model = build_model(c, free=FREE)
    ex = Experiment("s", 0.3, 5, steps=(Delay(0.1), Pulse(180)))
    with pytest.raises(QhlInputError, match="experiment.step: .*not covered yet by the Trotter circuits"):
        trotter_terms(model, ex)
    with pytest.raises(QhlInputError, match="typical engine"):
        TypicalEngine(model).estimate(ex)


def test_emulated_provider_takes_sequences_and_plans_their_time_zero():
    # the emulator covers sequences (values checked in tests/test_sequence_gradients.py); after a
    # preparation S(0) is not fixed by the normalisation, so t = 0 is planned for it, not for the FID
    from qhl.emulation.provider import EmulatedGradientProvider

    c = small_cluster(False, 3)
    ex = Experiment("s", 0.3, 5, steps=(Delay(0.1), Pulse(180)))
    prov = EmulatedGradientProvider(build_model(c, free=FREE), [c.experiments[0], ex], shots=10, steps=2)
    plan = prov.step_plan({c.experiments[0].name: [0.0, 0.1], "s": [0.0, 0.1]})
    assert sorted(plan) == sorted([(c.experiments[0].name, 0.1), ("s", 0.0), ("s", 0.1)])


def test_example_cluster_file_gives_the_hahn_maxwell_echo_top():
    # Hahn and Maxwell (1952): echo top -cos(pi J 2 tau) for the weakly coupled pair (J / delta = 2.9e-3,
    # corrections of that order); the 1H-13C coupling is refocused by the 1H-only 180 (Levitt 2008)
    from pathlib import Path
    from qhl import load_cluster

    c = load_cluster(Path(__file__).resolve().parent.parent / "examples" / "hahn_echo.toml")
    hahn = c.experiment("hahn")
    s0 = ExactEngine(build_model(c)).signal(hahn)[0]
    assert s0.real == pytest.approx(-np.cos(np.pi * 6.5 * 2 * 0.02), abs=3e-3)


@pytest.mark.parametrize("tail,key,expect", [
    ("step = 5", "experiment[0].step", "[[experiment.step]]"),
    ("step = [[1, 2]]", "experiment[0].step[0]", "expected a table"),
    ("step = [{repeat = 2, steps = 'abc'}]", "experiment[0].step[0].steps", "non-empty list"),
    ("step = [" + "{steps = [" * 10 + "{delay_s = 1}" + "]}" * 10 + "]", "experiment[0].step[0]", "nested deeper"),
])
def test_malformed_step_lists_are_one_line_errors(tail, key, expect):
    text = ISSUE_LAYOUT.split("[[experiment.step]]")[0] + tail + "\n"
    with pytest.raises(QhlInputError) as err:
        parse_cluster_toml(text, "bad.toml")
    msg = str(err.value)
    assert "\n" not in msg and key in msg and expect in msg


def _toml_inline(v):
    if isinstance(v, dict):
        return "{" + ", ".join(f"{k} = {_toml_inline(x)}" for k, x in v.items()) + "}"
    if isinstance(v, list):
        return "[" + ", ".join(_toml_inline(x) for x in v) + "]"
    return f'"{v}"' if isinstance(v, str) else repr(v)


def test_signal_json_lists_the_steps_as_file_tables():
    # round trip: the tables of `qhl signal --json` parse back into the same steps (common practice)
    import json
    from qhl.exact.signals import compute_signals
    from qhl.spins.cluster_file import step_tables

    c = parse_cluster_toml(ISSUE_LAYOUT, "x.toml")
    rows = compute_signals(c).to_json()["experiments"]
    tables = rows[0]["steps"]
    assert tables[0] == {"delay_s": 0.01}
    assert tables[3]["sequence_name"] == "solid-echo" and tables[3]["repeat"] == 3
    json.dumps(tables)
    plain = [t for t in step_tables(c.experiments[0].steps) if "sequence_name" not in t]
    head = ISSUE_LAYOUT.split("[[experiment.step]]")[0]
    text = head + "step = " + _toml_inline(plain) + "\n"
    again = parse_cluster_toml(text, "y.toml").experiments[0].steps
    want = tuple(st for st in c.experiments[0].steps if getattr(st, "name", None) is None)
    assert again == want


@pytest.mark.parametrize("n", [6, 7])
def test_memory_estimate_bounds_the_measured_peak(n):
    # tracemalloc peak of the gradient (common practice); the model should be an upper bound within 2x
    import tracemalloc

    c = random_cluster(np.random.default_rng(0), n, with_j=False)
    eng = ExactEngine(build_model(c))
    ex = Experiment("s", 1e-4, 64, steps=(Delay(1e-5), Pulse(90, 0), Delay(1e-5), Pulse(180, 90), Delay(1e-5)))
    eng.signal(ex)                      # spectrum cached, as the estimate assumes
    tracemalloc.start()
    try:
        eng.gradient(ex)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    est = sequence_engine.sequence_memory_bytes(n, len(eng.model.free), 64)
    assert peak <= est <= 2 * peak
