"""Named sequences: their average-Hamiltonian scaling, measured numerically.

The cycle propagator W and the net pulse rotation R come from tests/reference_pulses.py (dense
expm and Kronecker pulse matrices; imports nothing of qhl) applied to the steps
qhl.spins.sequences builds; W = R exp(-i H_avg t_cycle) defines the toggling-frame average
Hamiltonian H_avg = i logm(R^dag W) / t_cycle (U. Haeberlen and J. S. Waugh, Phys. Rev. 175, 453
(1968), average Hamiltonian theory). The stroboscopic checks use qhl's engine.
"""

import numpy as np
import pytest
import scipy.linalg as sla

from qhl import ExactEngine, build_model
from qhl.spins.cluster import Cluster, Experiment, Pair, Spin
from qhl.spins.sequences import CYCLE_TAUS, named_block

from reference_dense import all_values, hamiltonian_matrix, spin_matrix
from reference_pulses import dense_cycle_propagator, net_rotation

FREE = ["offset:*", "dipolar:*"]


def _pair(d_hz, offsets=(0.0, 0.0), steps=()):
    spins = (Spin("A", "1H", None, offsets[0]), Spin("B", "1H", None, offsets[1]))
    ex = Experiment("x", 1e-4, 2, steps=steps)
    return Cluster(9.4, "1H", spins, (Pair(("A", "B"), dipolar_hz=d_hz),), (ex,))


def _single(offset_hz, steps=()):
    ex = Experiment("x", 1e-4, 2, steps=steps)
    return Cluster(9.4, "1H", (Spin("A", "1H", None, offset_hz),), (), (ex,))


def _average_hamiltonian(cluster, name, tau):
    model = build_model(cluster, free=FREE)
    ex = Experiment("c", 1e-4, 2, steps=(named_block(name, tau),))
    w = net_rotation(model, ex).conj().T @ dense_cycle_propagator(model, ex)
    return 1j * sla.logm(w) / (CYCLE_TAUS[name] * tau)


def _dipolar(axis, d_hz):
    """2 pi d (3 I_a S_a - I.S) for the pair (qubits 0, 1) quantised along `axis` (rad/s)."""
    dot = sum(spin_matrix(x, 0, 2) @ spin_matrix(x, 1, 2) for x in "xyz")
    return 2 * np.pi * d_hz * (3 * spin_matrix(axis, 0, 2) @ spin_matrix(axis, 1, 2) - dot)


def test_solid_echo_average_dipolar_term_is_minus_half_along_x():
    # Powles and Mansfield, Phys. Lett. 2, 58 (1962): tau - 90_x - tau averages D_z and D_y, i.e.
    # -D_x / 2; for a pair of spins 1/2 the toggling-frame terms commute, so this holds exactly.
    d, tau = 3000.0, 2e-5
    h = _average_hamiltonian(_pair(d), "solid-echo", tau)
    np.testing.assert_allclose(h, -0.5 * _dipolar("x", d), atol=1e-7 * np.abs(_dipolar("z", d)).max())


@pytest.mark.parametrize("tau", [1e-5, 3.7e-5, 8e-5])
def test_solid_echo_refocuses_a_like_pair_but_the_hahn_echo_does_not(tau):
    # solid echo: Powles and Mansfield (1962); the pair's FID is cos(3 pi d t) (Pake doublet at
    # +-3d/2: G. E. Pake, J. Chem. Phys. 16, 327 (1948)) and a 180 pulse leaves the dipolar term
    # invariant, so the Hahn echo top is cos(3 pi d 2 tau) (Hahn 1950).
    d = 3000.0
    solid = _pair(d, steps=(named_block("solid-echo", tau),))
    hahn = _pair(d, steps=(named_block("hahn-echo", tau),))
    s_solid = ExactEngine(build_model(solid, free=FREE)).signal(solid.experiments[0])[0]
    s_hahn = ExactEngine(build_model(hahn, free=FREE)).signal(hahn.experiments[0])[0]
    assert s_solid == pytest.approx(1.0, abs=1e-12)
    assert s_hahn == pytest.approx(np.cos(3 * np.pi * d * 2 * tau), abs=1e-12)


def test_wahuha_zeroth_order_dipolar_average_vanishes():
    # Waugh, Huber and Haeberlen, PRL 20, 180 (1968): (D_x + D_y + D_z) / 3 = 0. The cycle is
    # symmetric in time, so the first order vanishes too (Haeberlen and Waugh 1968): what is left of
    # the dipolar term of three coupled protons falls as t_c^2 (measured: 3.4e-6 of ||H_D|| at
    # t_c = 6 us, 8.4e-7 at 3 us; unsuppressed: 1).
    spins = tuple(Spin(x, "1H", None, 0.0) for x in "ABC")
    pairs = (Pair(("A", "B"), dipolar_hz=1000.0), Pair(("B", "C"), dipolar_hz=-700.0),
             Pair(("A", "C"), dipolar_hz=400.0))
    c = Cluster(9.4, "1H", spins, pairs, (Experiment("x", 1e-4, 2),))
    model = build_model(c, free=FREE)
    h_d = hamiltonian_matrix(model, None, all_values(model))
    left = [np.linalg.norm(_average_hamiltonian(c, "wahuha", tau), 2) / np.linalg.norm(h_d, 2)
            for tau in (1e-6, 5e-7)]
    assert left[0] < (2 * np.pi * 1000.0 * 6e-6) ** 2                 # 1.4e-3
    assert left[0] / left[1] == pytest.approx(4.0, rel=0.1)           # second order: t_c^2
    sum_xyz = _dipolar("x", 1.0) + _dipolar("y", 1.0) + _dipolar("z", 1.0)
    assert np.abs(sum_xyz).max() < 1e-12                              # the identity behind it
    cycle = Experiment("c", 1e-4, 2, steps=(named_block("wahuha", 1e-6),))
    np.testing.assert_allclose(net_rotation(model, cycle), np.eye(8), atol=1e-12)   # pulses multiply to 1


def test_wahuha_scales_the_chemical_shift_by_one_over_root_three():
    # Waugh, Huber and Haeberlen (1968): average offset term Omega (+-Ix +-Iy +-Iz) / 3, a rotation
    # at Omega / sqrt(3) about a body diagonal; corrections O((Omega t_c)^2) = 1.4e-3 here.
    omega, tau = 1000.0, 1e-6
    h = _average_hamiltonian(_single(omega), "wahuha", tau)
    comps = np.array([np.trace(h @ (2 * spin_matrix(a, 0, 1))).real for a in "xyz"])   # h = sum c_a I_a
    freq = np.linalg.norm(comps) / (2 * np.pi)
    assert freq / omega == pytest.approx(1 / np.sqrt(3), rel=2e-3)
    np.testing.assert_allclose(np.abs(comps) / np.linalg.norm(comps), np.full(3, 1 / np.sqrt(3)), atol=3e-3)


@pytest.mark.parametrize("cycles", [5, 17, 40])
def test_wahuha_stroboscopic_signal_precesses_at_the_scaled_shift(cycles):
    # qhl's engine, sampled after each whole cycle: Ix rotated about a body diagonal by
    # alpha = 2 pi Omega N t_c / sqrt(3) keeps x-component 1/3 + 2/3 cos(alpha) (Waugh et al. 1968)
    omega, tau = 1000.0, 1e-6
    c = _single(omega, steps=(named_block("wahuha", tau, cycles),))
    s0 = ExactEngine(build_model(c, free=FREE)).signal(c.experiments[0])[0]
    alpha = 2 * np.pi * omega * cycles * 6 * tau / np.sqrt(3)
    assert s0.real == pytest.approx(1 / 3 + 2 / 3 * np.cos(alpha), abs=2e-3)


def test_wahuha_holds_the_magnetisation_of_a_strongly_coupled_pair():
    # Waugh et al. (1968): dipolar evolution suppressed. Free pair after 168 us: cos(3 pi d t) = -1
    # (Pake 1948); under 28 cycles of 6 us the signal stays at 1 up to O((2 pi d t_c)^2 2 pi d t).
    d, tau, cycles = 2000.0, 1e-6, 28
    c = _pair(d, steps=(named_block("wahuha", tau, cycles),))
    eng = ExactEngine(build_model(c, free=FREE))
    s_wahuha = eng.signal(c.experiments[0])[0]
    s_free = eng.signal(Experiment("f", 1e-4, 2), times=[cycles * 6 * tau])[0]
    assert s_free.real < -0.99
    assert s_wahuha.real > 0.99


def _hetero_pair(offset_h, offset_c, j_hz, d_hz, steps=()):
    spins = (Spin("H", "1H", None, offset_h), Spin("C", "13C", None, offset_c))
    ex = Experiment("x", 1e-4, 2, steps=steps)
    return Cluster(9.4, "1H", spins, (Pair(("H", "C"), j_hz=j_hz, dipolar_hz=d_hz),), (ex,))


@pytest.mark.parametrize("tau", [5e-6, 2.3e-5])
def test_mlev4_on_carbon_decouples_the_heteronuclear_pair(tau):
    # Levitt, Freeman and Frenkiel, J. Magn. Reson. 47, 328 (1982): MLEV-4 (R R Rbar Rbar) on 13C. With
    # ideal 180-degree pulses every window flips Sz, so 2 pi J IzSz, the heteronuclear dipolar 2 IzSz
    # term and the carbon offset average to zero; the proton offset stays. The terms commute, so the
    # toggling-frame average over one cycle is exactly 2 pi offset_H Iz_H.
    c = _hetero_pair(410.0, -1250.0, 140.0, 2300.0)
    model = build_model(c, free=["offset:*", "dipolar:*", "j:*"])
    ex = Experiment("c", 1e-4, 2, steps=(named_block("mlev-4", tau, 1, "13C"),))
    w = net_rotation(model, ex).conj().T @ dense_cycle_propagator(model, ex)
    np.testing.assert_allclose(net_rotation(model, ex), np.eye(4), atol=1e-12)
    h = 1j * sla.logm(w) / (CYCLE_TAUS["mlev-4"] * tau)
    iz_h = spin_matrix("z", 0, 2)          # qubit 0 = the proton
    np.testing.assert_allclose(h, 2 * np.pi * 410.0 * iz_h, atol=1e-6 * 2 * np.pi * 2300.0)


@pytest.mark.parametrize("cycles", [1, 3, 6])
def test_mlev4_stroboscopic_proton_signal_has_no_j_modulation(cycles):
    # the proton magnetisation at the end of N cycles is exp(2 pi i offset_H N 8 tau): no cos(pi J t)
    # modulation (common practice: heteronuclear decoupling collapses the doublet), from qhl's engine
    tau = 1.1e-5
    c = _hetero_pair(410.0, -1250.0, 140.0, 2300.0)
    ex = Experiment("d", 1e-6, 2, steps=(named_block("mlev-4", tau, cycles, "13C"),))
    s0 = ExactEngine(build_model(c, free=FREE)).signal(ex, times=[0.0])[0]
    assert s0 == pytest.approx(np.exp(2j * np.pi * 410.0 * cycles * 8 * tau), abs=1e-10)
    # without the train, the same total delay leaves the J/dipolar modulation
    free = Experiment("f", 1e-6, 2)
    s_free = ExactEngine(build_model(c, free=FREE)).signal(free, times=[cycles * 8 * tau])[0]
    assert abs(abs(s_free) - 1) > 1e-3
