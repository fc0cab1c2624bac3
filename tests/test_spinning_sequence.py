"""Spinning experiments with rotor-synchronised pulse sequences (qhl.exact.spinning_sequence).

References, beside each check:
  * a dense time-ordered reference built here (dense_reference below): numpy/scipy only, H(t) from
    tests/reference_spinning.py (the rotor rotation rebuilt with scipy.spatial.transform.Rotation)
    and tests/reference_dense.py (generator matrices), explicit pulse matrices from
    tests/reference_pulses.py; it imports nothing of qhl and runs the rotor on a physical clock
    (no assumption about the rotor phase at the acquisition);
  * E. L. Hahn, "Spin echoes", Phys. Rev. 80, 580 (1950): a 180-degree pulse between equal delays
    refocuses the offsets;
  * common practice: a 360-degree pulse or no pulse leaves the free evolution; the engine's
    gradient equals central differences of its own signal.
"""

import dataclasses

import numpy as np
import pytest

from qhl.base.errors import QhlInputError
from qhl.exact import spinning_sequence
from qhl.exact.engine import ExactEngine
from qhl.exact.likelihood import fisher_information
from qhl.spins.cluster import Delay, Pulse
from qhl.spins.cluster_file import parse_cluster_toml
from qhl.spins.model import build_model

from reference_dense import all_values, generator_matrix, initial_and_detection
from reference_pulses import pulse_matrix, unrolled
from reference_spinning import dipolar_factor

RATE = 12500.0
TR = 1.0 / RATE
# invented cluster (made-up geometry and shifts)
HEADER = """field_tesla = 9.4
observe = "1H"
field_direction = [0.3, 0.2, 1.0]
"""
SPIN = """[[spin]]
label = "{label}"
isotope = "{iso}"
{pos}shift_ppm = {shift}
"""
THREE = [("A", "1H", [0.0, 0.0, 0.0], 1.0), ("B", "1H", [1.2, 0.4, 1.0], 3.0),
         ("C", "13C", [-0.9, 1.1, 0.3], 0.0)]
FOUR = THREE + [("D", "1H", [0.5, -1.6, 0.8], 2.2)]
HAHN = ((Delay(2 * TR), Pulse(180.0), Delay(2 * TR)))
MIXED = (Delay(2 * TR), Pulse(90.0, 30.0), Pulse(180.0, 0.0, "13C"), Delay(TR))


def _setup(spins, steps, points=16, t_max=2.4 * TR, positions=True):
    text = HEADER + "".join(SPIN.format(label=a, iso=b, pos=f"position_angstrom = {list(c)}\n" if positions else "",
                                        shift=d) for a, b, c, d in spins)
    text += f'[[experiment]]\nname = "mas"\nt_max_s = {t_max!r}\npoints = {points}\nspinning_hz = {RATE!r}\n'
    c = parse_cluster_toml(text, "made_up_spinning_echo.toml")
    c = dataclasses.replace(c, experiments=(dataclasses.replace(c.experiments[0], steps=tuple(steps)),))
    m = build_model(c)
    return c, m, ExactEngine(m), c.experiments[0]


def dense_reference(cluster, model, ex, times, free_values=None, slices_per_period=400):
    """S(t) = Tr[O U(t) W rho0 W^dag U(t)^dag] / Tr[O rho0]: every delay and the acquisition are
    time-ordered products of exp(-i H(t_mid) dt) over `slices_per_period` midpoint slices per rotor
    period on one clock from the first step (error O(dt^2), even in dt), pulses as explicit matrices."""
    values = all_values(model, free_values)
    labels, isotopes = list(model.labels), list(model.isotopes)
    gens = [2 * np.pi * v * generator_matrix(p, labels, isotopes) for p, v in zip(model.parameters, values)]
    rho, det = initial_and_detection(model)
    dt = 1.0 / (ex.spinning_hz * slices_per_period)

    def evolve(u, t0, t1):
        n = int(np.ceil((t1 - t0) / dt - 1e-9)) if t1 > t0 else 0
        if n == 0:
            return u
        edges = np.linspace(t0, t1, n + 1)
        mid = 0.5 * (edges[:-1] + edges[1:])
        scale = [dipolar_factor(cluster, ex, p.spins, mid) if p.kind == "dipolar" else np.ones(n)
                 for p in model.parameters]
        h = np.einsum("nk,nab->kab", np.array(scale), np.array(gens))
        e, v = np.linalg.eigh(h)                                       # H(t_mid) is Hermitian
        steps = (v * np.exp(-1j * e * (edges[1] - edges[0]))[:, None, :]) @ v.conj().transpose(0, 2, 1)
        for s in steps:
            u = s @ u
        return u

    u = np.eye(rho.shape[0], dtype=complex)
    clock = 0.0
    for st in unrolled(ex.steps):
        if hasattr(st, "seconds"):
            u = evolve(u, clock, clock + st.seconds)
            clock += st.seconds
        else:
            u = pulse_matrix(model, st.angle_deg, st.phase_deg, st.isotope) @ u
    rho_p = u @ rho @ u.conj().T
    out = np.empty(len(times), complex)
    v, now = np.eye(rho.shape[0], dtype=complex), clock
    for k in np.argsort(times):
        v = evolve(v, now, clock + times[k])
        now = clock + times[k]
        out[k] = np.trace(det @ v @ rho_p @ v.conj().T)
    return out / np.trace(det @ rho)


def richardson_reference(cluster, model, ex, times, free_values=None):
    """(4 S_400 - S_200) / 3: the midpoint error is even in dt, so this removes its dt^2 term."""
    return (4 * dense_reference(cluster, model, ex, times, free_values, 400)
            - dense_reference(cluster, model, ex, times, free_values, 200)) / 3


# ------------------------------------------------------------------ the dense reference
@pytest.mark.parametrize("steps", [HAHN, MIXED], ids=["hahn", "mixed"])
def test_signal_equals_dense_reference(steps):
    # Source: dense_reference (above; numpy/scipy only). Measured against the Richardson reference:
    # 1.9e-8 (hahn) and 7.3e-9 (mixed) at 128 slices per period, 16 times less per doubling from 32
    # slices (the engine's fourth order: 5.0e-6, 3.2e-7, 1.9e-8 for hahn); the engine's default
    # (16 slices here): 7.9e-5 (hahn) and 3.1e-5 (mixed), the spinning engine's accuracy class
    # (qhl.exact.spinning_engine docstring). The reference's own 400 vs 200 slices differ by 5e-5-7e-5.
    c, m, eng, ex = _setup(THREE, steps)
    t = ex.times_s
    ref = richardson_reference(c, m, ex, t)
    eng.spinning_slices_per_period = 128
    assert np.abs(eng.signal(ex) - ref).max() < 1e-7
    eng.spinning_slices_per_period = None
    assert np.abs(eng.signal(ex) - ref).max() < 2e-4
    # the echo is not trivial: the sequence changes the signal (the free experiment differs)
    free = dataclasses.replace(ex, steps=())
    assert np.abs(eng.signal(free) - ref).max() > 1e-2


def test_gradient_equals_central_differences_of_the_dense_reference():
    # Source: dense_reference (above), central differences with step 0.01 Hz (truncation ~ (2 pi h T)^2
    # ~ 1e-10 relative; rounding ~ 1e-14 / 0.01); engine at 128 slices per period. Measured 6.6e-12
    # against entries up to 4.5e-4 (1.5e-8 relative).
    c, m, eng, ex = _setup(THREE, MIXED, points=6)
    eng.spinning_slices_per_period = 128
    t = ex.times_s
    _, g = eng.gradient(ex)
    base = m.free_values_hz
    step = 1e-2
    num = []
    for k in range(base.size):
        up, down = base.copy(), base.copy()
        up[k] += step
        down[k] -= step
        num.append((richardson_reference(c, m, ex, t, up) - richardson_reference(c, m, ex, t, down)) / (2 * step))
    num = np.array(num)
    assert np.abs(num).max() > 1e-5
    assert np.abs(g - num).max() < 1e-7 * np.abs(num).max()


# ------------------------------------------------------------------ Hahn echo
def test_hahn_echo_refocuses_offsets_under_spinning():
    # Source: E. L. Hahn, Phys. Rev. 80, 580 (1950): offsets only (no positions: no dipolar terms), a
    # 180-degree x pulse between two equal delays of 3 rotor periods gives S(0) = 1; without the pulse
    # the offsets (hundreds of Hz) dephase over the same time. Measured |S(0) - 1| = 7e-15 (1.5 without
    # the pulse).
    c, m, eng, ex = _setup(THREE[:2] + [("D", "1H", None, 2.2)], (Delay(3 * TR), Pulse(180.0), Delay(3 * TR)),
                           points=8, positions=False)
    assert all(p.kind == "offset" for p in m.parameters)
    s = eng.signal(ex)
    assert abs(s[0] - 1) < 1e-12
    free = eng.signal(dataclasses.replace(ex, steps=(Delay(6 * TR),)))
    assert abs(free[0] - 1) > 1e-2
    # after the echo the offsets evolve freely: S(t) is the plain FID (offsets are not modulated)
    assert np.abs(s - eng.signal(dataclasses.replace(ex, steps=(), spinning_hz=0.0))).max() < 1e-12


# ------------------------------------------------------------------ no pulse / a 360-degree pulse
@pytest.mark.parametrize("steps", [(Delay(3 * TR),), (Delay(TR), Pulse(360.0, 45.0), Delay(2 * TR)),
                                   (Pulse(360.0, 0.0, "13C"), Delay(3 * TR), Pulse(360.0, 90.0))],
                         ids=["delay", "360-inside", "360-both-isotopes"])
def test_no_net_pulse_equals_free_spinning_over_the_same_time(steps):
    # common practice: rho -> rho under a 360-degree pulse (R = -1 for spin 1/2), so the sequence
    # is the free spinning experiment sampled at t + 3 T_R (same slices: the same period propagator).
    # Measured: signal 2e-15, gradient 5e-18 against entries up to 4.6e-4.
    c, m, eng, ex = _setup(FOUR, steps)
    eng.spinning_slices_per_period = 24
    t = ex.times_s
    free = eng.signal(dataclasses.replace(ex, steps=()), t + 3 * TR)
    assert np.abs(eng.signal(ex) - free).max() < 1e-11
    _, g = eng.gradient(ex)
    _, gf = eng.gradient(dataclasses.replace(ex, steps=()), t + 3 * TR)
    assert np.abs(g - gf).max() < 1e-11 * np.abs(gf).max()


# ------------------------------------------------------------------ gradient, Fisher information
def test_gradient_equals_central_differences_of_its_own_signal():
    # common practice: central differences (step 1e-3 Hz) of the engine's signal; measured 2.5e-12
    # against gradient entries up to 2.2e-4 (4 spins, default slices).
    c, m, eng, ex = _setup(FOUR, MIXED + (Pulse(45.0, 120.0), Delay(2 * TR)), points=12)
    sig, g = eng.gradient(ex)
    assert np.abs(sig - eng.signal(ex)).max() < 1e-13
    base = m.free_values_hz
    step = 1e-3
    num = np.array([(eng.signal(ex, free_values_hz=base + step * e) - eng.signal(ex, free_values_hz=base - step * e))
                    / (2 * step) for e in np.eye(base.size)])
    assert np.abs(num).max() > 1e-5
    assert np.abs(g - num).max() < 1e-7 * np.abs(num).max()


def test_fisher_information_and_provider_take_spinning_sequences():
    # common practice: F = Re[g^dag g] / sigma^2 is symmetric positive semi-definite; the provider returns
    # the engine's own signal and gradient.
    from qhl.exact.provider import ExactGradientProvider

    c, m, eng, ex = _setup(THREE, HAHN)
    f = fisher_information(eng, [ex], sigma=1e-3)
    assert f.shape == (len(m.free), len(m.free)) and np.allclose(f, f.T)
    assert np.linalg.eigvalsh(f).min() > -1e-9 * np.abs(f).max() and np.abs(f).max() > 0
    prov = ExactGradientProvider(eng, [ex])
    s, g = prov.signals_and_gradients(m.free_values_hz, {"mas": ex.times_s})["mas"]
    s2, g2 = eng.gradient(ex)
    assert np.array_equal(s, s2) and np.array_equal(g, g2)


def test_hessian_diagonal_equals_second_differences_of_the_signal():
    # common practice: second central differences (step 0.05 Hz) of the engine's signal against the
    # Hessian (Richardson differences of the exact gradients, qhl.exact.gradient_differences); measured
    # at most 2.3e-12 against entries up to 7.7e-7; the Hessian is symmetric.
    c, m, eng, ex = _setup(THREE, MIXED, points=6)
    _, _, h = eng.hessian(ex)
    assert np.abs(h - h.transpose(1, 0, 2)).max() == 0 and np.abs(h).max() > 1e-7
    base, step, s0 = m.free_values_hz, 0.05, eng.signal(ex)
    for k, e in enumerate(np.eye(base.size)):
        d2 = (eng.signal(ex, free_values_hz=base + step * e) - 2 * s0
              + eng.signal(ex, free_values_hz=base - step * e)) / step**2
        assert np.abs(h[k, k] - d2).max() < 1e-5 * np.abs(h).max()


def test_powder_average_of_a_delay_only_sequence_is_the_later_free_powder():
    # common practice: with whole-period delays only, every crystallite's sequence is its free spinning
    # experiment sampled 3 T_R later, so the orientation averages agree (qhl.exact.powder).
    from qhl.exact.powder import powder_signal

    c, m, eng, ex = _setup(THREE, (Delay(TR), Delay(2 * TR)), points=8)
    t = ex.times_s
    got = powder_signal(c, ex, order=3, gamma_points=3, slices_per_period=24)
    free = powder_signal(c, dataclasses.replace(ex, steps=()), order=3, times=t + 3 * TR, gamma_points=3,
                         slices_per_period=24)
    assert np.abs(got - free).max() < 1e-12 and np.abs(got - got[0]).max() > 1e-3


def test_memory_estimates_cover_the_measured_peak():
    # common practice: the stated peak-memory models (this module's dense part, checked by _require, and
    # the spinning engine's model of its two runs) against tracemalloc's peak of a full gradient on the
    # six-proton demo at 20 kHz; measured 22 MiB peak against 77 MiB estimated.
    import tracemalloc

    from qhl import demo_cluster
    from qhl.exact.sequence_engine import sequence_memory_bytes
    from qhl.exact.spinning_engine import default_slices_per_period, spinning_memory_bytes

    c = demo_cluster()
    m = build_model(c)
    eng = ExactEngine(m)
    tr = 1 / 20000.0
    ex = dataclasses.replace(c.experiments[0], spinning_hz=20000.0, t_max_s=10 * tr, points=64,
                             steps=(Delay(4 * tr), Pulse(90.0, 30.0), Delay(tr), Pulse(180.0), Delay(3 * tr)))
    eng.gradient(ex)
    tracemalloc.start()
    eng.gradient(ex)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    dims, n_rows, n_t = eng._dims, len(m.free), 64
    k = default_slices_per_period(eng, ex)
    used = sorted({b.s for b in eng._blocks} | {b.p for b in eng._blocks})
    est = (sequence_memory_bytes(m.n_spins, n_rows, n_t) + 16.0 * n_t * sum(dims[b.s] * dims[b.p] for b in eng._blocks)
           + 2 * 16.0 * n_rows * sum(d * d for d in dims)
           + spinning_memory_bytes([dims[s] for s in used], k, n_rows, n_t) + spinning_memory_bytes(dims, k, n_rows, 1))
    assert peak < est < 10 * peak


# ------------------------------------------------------------------ refusals
def _one_line(err):
    msg = str(err.value)
    assert "\n" not in msg
    return msg


def test_unsynchronised_delay_is_refused_naming_step_delay_and_period():
    c, m, eng, ex = _setup(THREE, (Delay(2 * TR), Pulse(180.0), Delay(1.5 * TR)))
    for call in (lambda: eng.signal(ex), lambda: eng.gradient(ex)):
        with pytest.raises(QhlInputError) as err:
            call()
        msg = _one_line(err)
        assert "step 3" in msg and "0.00012 s" in msg and "T_R = 8e-05 s" in msg and "experiment.step" in msg


def test_delay_far_shorter_than_a_period_is_refused_not_dropped():
    # common practice: a delay is a whole number of periods only when that number is at least 1;
    # 1e-9 periods used to round to zero periods (within the 1e-9 tolerance) and vanish silently
    c, m, eng, ex = _setup(THREE, (Delay(1e-9 * TR), Pulse(180.0), Delay(1e-9 * TR)))
    with pytest.raises(QhlInputError) as err:
        eng.signal(ex)
    assert "step 1" in _one_line(err) and "whole number of rotor periods" in _one_line(err)


def test_finite_pulse_is_refused():
    c, m, eng, ex = _setup(THREE, (Delay(TR), Pulse(90.0, duration_s=2e-6), Delay(TR)))
    with pytest.raises(QhlInputError) as err:
        eng.signal(ex)
    msg = _one_line(err)
    assert "step 2" in msg and "finite pulse" in msg and "duration_s" in msg


def test_size_limit_is_refused_with_the_memory_estimate(monkeypatch):
    c, m, eng, ex = _setup(THREE, HAHN)
    monkeypatch.setattr(spinning_sequence, "MAX_SEQUENCE_SPINS", 2)
    with pytest.raises(QhlInputError) as err:
        eng.gradient(ex)
    msg = _one_line(err)
    assert "3 spins" in msg and "GiB" in msg and "at most 2 spins" in msg


def test_static_only_paths_refuse_with_one_line():
    from qhl.circuits.spinning_circuits import spinning_evolution
    from qhl.exact.typicality import TypicalEngine

    c, m, eng, ex = _setup(THREE, HAHN)
    calls = [lambda: eng.transitions(ex), lambda: eng.gradient_weighted(ex, np.ones(ex.points)),
             lambda: TypicalEngine(m).estimate(ex), lambda: spinning_evolution(m, ex, 1e-4, 2)]
    for call in calls:
        with pytest.raises(QhlInputError) as err:
            call()
        _one_line(err)
