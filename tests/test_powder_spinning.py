"""Powder averages of spinning samples (qhl.exact.powder).

Every cluster here is invented (made-up geometries and offsets). The independent reference at the
bottom imports nothing of qhl: it builds H(t) of one crystallite from the spin positions and
offsets (data read from the cluster), its own rotor axis (scipy.spatial.transform.Rotation) and the
dipolar constant from scipy.constants, and integrates the Liouville-von Neumann equation with
scipy.integrate.solve_ivp.
"""

import numpy as np
import pytest
import scipy.constants as const
from scipy.integrate import lebedev_rule, solve_ivp
from scipy.spatial.transform import Rotation

from qhl.base.errors import QhlInputError
from qhl.exact.engine import ExactEngine
from qhl.exact.powder import powder_lines, powder_signal, spinning_orientations
from qhl.spins.cluster_file import parse_cluster_toml
from qhl.exact.powder import crystallite_model
from qhl.spins.model import build_model
from qhl.spins.spinning import MAGIC_ANGLE_DEG

MAGIC = np.array([np.sqrt(2.0 / 3.0), 0.0, np.sqrt(1.0 / 3.0)])     # at the magic angle to z, a Lebedev direction


def _cluster(spins, rate, t_max, points, angle=MAGIC_ANGLE_DEG, field_direction=(0.2, -0.3, 1.0), pairs=""):
    text = f'field_tesla = 9.4\nobserve = "1H"\nfield_direction = {list(field_direction)}\n'
    for label, pos, off in spins:
        text += (f'[[spin]]\nlabel = "{label}"\nisotope = "1H"\nposition_angstrom = {list(map(float, pos))}\n'
                 f'offset_hz = {off}\n')
    text += pairs
    text += (f'[[experiment]]\nname = "mas"\nt_max_s = {t_max}\npoints = {points}\nspinning_hz = {rate}\n'
             f'spinning_angle_deg = {angle}\n')
    return parse_cluster_toml(text, "made_up_powder_spinning.toml")


# three protons; the pair A-B lies exactly at the magic angle to the Lebedev direction z
THREE = [("A", [0.0, 0.0, 0.0], 400.0), ("B", 1.9 * MAGIC, -300.0), ("C", [-0.8, 1.5, 0.6], 900.0)]
RATE = 12000.0


# ------------------------------------------------------------------ the crystallite parametrisation
def test_crystallite_model_at_the_cluster_orientation_is_the_single_crystal_model():
    # common practice: two parametrisations of the same H(t) (h = b P2(r.f) with s = P2(cos Theta)/P2(r.f),
    # or h = b with s = P2(cos Theta)) give the same signal, static and spinning, to rounding.
    c = _cluster(THREE, RATE, 2 / RATE, 9, field_direction=(0.2, -0.3, 1.0))
    ex = c.experiments[0]
    single, cryst = build_model(c, free="*"), crystallite_model(c)
    assert np.abs(ExactEngine(single).signal(ex) - ExactEngine(cryst).signal(ex)).max() < 1e-12
    st = type(ex)(name="static", t_max_s=2e-4, points=9)
    assert np.abs(ExactEngine(single).signal(st) - ExactEngine(cryst).signal(st)).max() < 1e-12


def test_a_pair_at_the_magic_angle_is_refused_by_one_crystal_but_not_by_the_powder():
    # The single-crystal parametrisation must divide by P2(r.f) = 0 and refuses; the crystallite of the
    # powder at that orientation is an ordinary one (its signal is checked in the dense test below).
    c = _cluster(THREE, RATE, 2 / RATE, 9, field_direction=(0.0, 0.0, 1.0))
    with pytest.raises(QhlInputError, match="magic angle"):
        ExactEngine(build_model(c, free="*")).signal(c.experiments[0])
    s = powder_signal(c, c.experiments[0], order=3, gamma_points=2)
    assert np.all(np.isfinite(s)) and abs(s[0] - 1) < 1e-12


def test_explicit_dipolar_hz_stays_orientation_independent_when_spinning():
    # Convention (qhl.exact.powder, as for static powders): a pair given by dipolar_hz has no geometry, so
    # every crystallite carries the same constant coupling; the spinning powder of that pair alone is then
    # the static signal of the same constant H (common practice: H constant in time gives the static FID).
    pair = [("A", [0.0, 0.0, 0.0], 150.0), ("B", 1.6 * MAGIC, -220.0)]
    c = _cluster(pair, RATE, 2 / RATE, 9, pairs='[[pair]]\nspins = ["A", "B"]\ndipolar_hz = -2500.0\n')
    ex = c.experiments[0]
    st = type(ex)(name="static", t_max_s=ex.t_max_s, points=ex.points)
    static = ExactEngine(build_model(c, free="*")).signal(st)
    assert np.abs(powder_signal(c, ex, order=3, gamma_points=2) - static).max() < 1e-12
    assert np.abs(static[1:] - 1).min() > 1e-3             # the coupling does act (the test can fail)


def test_grid_weights_and_bad_gamma_points():
    # common practice: quadrature weights sum to 1; psi equally spaced over one turn.
    d, psi, w = spinning_orientations(5, 4)
    assert d.shape == (14 * 4, 3) and abs(w.sum() - 1) < 1e-14
    np.testing.assert_allclose(psi[:4], [0, 90, 180, 270])
    assert len(spinning_orientations(5)[2]) == 14 * 6          # default N = order + 1
    for bad in (0, -2, 1.5, True, "3"):
        with pytest.raises(QhlInputError, match="gamma_points"):
            spinning_orientations(5, bad)


def test_powder_lines_of_spinning_samples_stay_refused():
    c = _cluster(THREE, RATE, 2 / RATE, 9)
    with pytest.raises(QhlInputError, match="spins"):
        powder_lines(c, c.experiments[0], order=3)


# ------------------------------------------------------------------ physics of the average
def test_isolated_pair_refocuses_at_every_rotor_period():
    # M. M. Maricq and J. S. Waugh, J. Chem. Phys. 70, 3300 (1979): at the magic angle the coupling of an
    # isolated pair averages to zero over each rotor period, and with equal offsets H(t) commutes with
    # itself, so every crystallite refocuses, S(m T_R) = 1; in between the powder signal has decayed.
    # The pair lies at the magic angle to the grid direction z (no crystallite may be refused for it).
    pair = [("A", [0.0, 0.0, 0.0], 250.0), ("B", 1.6 * MAGIC, 250.0)]
    c = _cluster(pair, RATE, 4 / RATE, 9)
    s = powder_signal(c, c.experiments[0], order=11, gamma_points=6)
    # the shared offset only turns the phase: Tr[I+ Rz(wt) Ix Rz(wt)^dag] / Tr[I+ Ix] = exp(+i w t)
    s = s * np.exp(-2j * np.pi * 250.0 * c.experiments[0].times_s)
    assert np.abs(s[::2] - 1).max() < 1e-10                # t = 0, T_R, 2 T_R, 3 T_R, 4 T_R
    assert np.abs(s[1::2]).max() < 0.9                     # half periods: not refocused (the test can fail)


def test_slow_spinning_tends_to_the_static_powder():
    # common practice: when the rotor period is much longer than the acquisition window the sample barely
    # turns and the spinning powder average approaches the static one. To first order in the rotor phase
    # phi = 2 pi t / T_R a coupling moves by 3 b a0 b1 phi (qhl.spins.spinning), and the average of a0 b1
    # over the rotor azimuth psi is zero (derived here: it is (r_perp . (r x f)) = 0), so the difference
    # shrinks like (t_max / T_R)^2: measured 2.0e-2 at T_R = 100 t_max and 2.1e-4 at 1000 t_max
    # (order 7, 8 azimuths).
    t_max = 2e-4
    static_c = _cluster(THREE, 1.0, t_max, 9)
    st = type(static_c.experiments[0])(name="static", t_max_s=t_max, points=9)
    ref = powder_signal(static_c, st, order=7)
    diffs = []
    for ratio in (100.0, 1000.0):
        c = _cluster(THREE, 1 / (ratio * t_max), t_max, 9)
        diffs.append(np.abs(powder_signal(c, c.experiments[0], order=7, gamma_points=8) - ref).max())
    assert diffs[1] < 5e-4
    assert 50 < diffs[0] / diffs[1] < 200                  # ~ 1 / rate^2: the approach is the slow-spinning one


def _rotation_gap(orders):
    rot = Rotation.random(random_state=7)
    t_max, n = 2 / RATE, 9
    c = _cluster(THREE, RATE, t_max, n)
    turned = _cluster([(lab, rot.apply(pos), off) for lab, pos, off in THREE], RATE, t_max, n)
    return [np.abs(powder_signal(c, c.experiments[0], order=k) - powder_signal(turned, turned.experiments[0],
                                                                            order=k)).max() for k in orders]


def test_powder_is_invariant_under_a_rotation_of_the_cluster():
    # common practice: a powder average covers every crystallite orientation, so it cannot depend on how
    # the cluster is turned in its own frame (here by a random rotation, seed 7). Tolerance set by the grid:
    # the product grid is exact for Wigner functions up to degree min(order, N - 1) (qhl.exact.powder;
    # default N = order + 1), and the signal over two rotor periods needs higher degrees: measured largest
    # difference 7.9e-2 at order 5, 7.1e-3 at order 11, 5.3e-4 at order 17 (slow test below).
    d5, d11 = _rotation_gap((5, 11))
    assert d11 < 1e-2
    assert d11 < d5 / 5                                    # a finer grid closes the gap


@pytest.mark.slow
def test_powder_is_invariant_under_a_rotation_of_the_cluster_fine_grid():
    # as above (common practice), order 17 and 18 azimuths: 1980 crystallites, about 15 s; measured 5.3e-4.
    assert _rotation_gap((17,))[0] < 1e-3


# ------------------------------------------------------------------ independent dense reference
_PAULI = {"x": np.array([[0, 1], [1, 0]], complex) / 2, "y": np.array([[0, -1j], [1j, 0]]) / 2,
          "z": np.array([[1, 0], [0, -1]], complex) / 2}


def _op(axis, i, n):
    """I_axis on spin i of n, qubit i the least significant bit (qiskit's order, as qhl's convention)."""
    out = np.array([[1.0 + 0j]])
    for q in reversed(range(n)):
        out = np.kron(out, _PAULI[axis] if q == i else np.eye(2))
    return out


def _reference_crystallite(cluster, experiment, f, psi_deg, times):
    """S(t) of one crystallite, imports nothing of qhl: rotor axis R = cos(th) f + sin(th) e', e' the unit part
    of x (y if f is near x) perpendicular to f turned by psi about f; pairs turn about R; secular homonuclear
    H(t) = 2 pi [sum_i nu_i Iz_i + sum_ij d_ij P2(cos Theta_ij(t)) (3 Iz Iz - I.I)], d = -(mu0/4pi) g^2 hbar /
    (2 pi r^3); drho/dt = -i [H, rho] by solve_ivp (DOP853, rtol 1e-11)."""
    spins = cluster.spins
    n = len(spins)
    f = np.asarray(f, float) / np.linalg.norm(f)
    x = np.array([1.0, 0.0, 0.0]) if abs(f[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    e = x - (x @ f) * f
    e = Rotation.from_rotvec(np.radians(psi_deg) * f).apply(e / np.linalg.norm(e))
    th = np.radians(experiment.spinning_angle_deg)
    axis = np.cos(th) * f + np.sin(th) * e
    gamma = const.physical_constants["proton gyromag. ratio"][0]
    iz = [_op("z", i, n) for i in range(n)]
    static = sum(2 * np.pi * s.offset_hz * iz[i] for i, s in enumerate(spins))
    pairs = []
    for i in range(n):
        for j in range(i + 1, n):
            r = np.subtract(spins[j].position_angstrom, spins[i].position_angstrom) * 1e-10
            d = -const.mu_0 / (4 * np.pi) * gamma**2 * const.hbar / np.linalg.norm(r) ** 3 / (2 * np.pi)
            g = 3 * iz[i] @ iz[j] - sum(_op(a, i, n) @ _op(a, j, n) for a in "xyz")
            pairs.append((r / np.linalg.norm(r), 2 * np.pi * d * g))
    rho0 = sum(_op("x", i, n) for i in range(n))
    obs = sum(_op("x", i, n) + 1j * _op("y", i, n) for i in range(n))
    w = 2 * np.pi * experiment.spinning_hz
    dim = 2**n

    def rhs(t, y):
        rho = y.reshape(dim, dim)
        turn = Rotation.from_rotvec(w * t * axis)
        h = static.copy()
        for r, g in pairs:
            c = turn.apply(r) @ f
            h = h + (1.5 * c * c - 0.5) * g
        return (-1j * (h @ rho - rho @ h)).ravel()

    sol = solve_ivp(rhs, (0.0, float(times[-1])), rho0.ravel().astype(complex), method="DOP853", t_eval=times,
                    rtol=1e-11, atol=1e-12)
    rhos = sol.y.T.reshape(len(times), dim, dim)
    return np.einsum("ab,tba->t", obs, rhos) / np.trace(obs @ rho0)


def test_powder_equals_independent_crystallite_sum():
    # Source: the dense reference above (solve_ivp, error ~1e-9), on a grid built here from scipy's
    # lebedev_rule (degree 3: 6 directions, one of them z, where the pair A-B sits at the magic angle)
    # times 3 equally spaced rotor azimuths, weights w_k / 3. With 64 slices per rotor period the engine's
    # fourth-order error is below the floor set by the two gyromagnetic ratios (qhl: IUPAC 2001; here
    # CODATA via scipy, 2e-8 apart): measured 2.6e-6 per crystallite and 9.6e-7 in the average (with the
    # engine's default slices, 18 to 30 here: 3.4e-4 and 3.7e-5); 1e-5 as tolerance.
    c = _cluster(THREE, RATE, 2 / RATE, 13)
    ex = c.experiments[0]
    t = ex.times_s
    x, wk = lebedev_rule(3)
    wk = wk / wk.sum()
    base = crystallite_model(c)
    ref = np.zeros(t.size, complex)
    worst = 0.0
    for f, weight in zip(x.T, wk):
        for psi in (0.0, 120.0, 240.0):
            dense = _reference_crystallite(c, ex, f, psi, t)
            eng = ExactEngine(base.posed(f, psi))
            eng.spinning_slices_per_period = 64
            worst = max(worst, np.abs(eng.signal(ex) - dense).max())
            ref += weight / 3 * dense
    assert worst < 1e-5
    assert np.abs(powder_signal(c, ex, order=3, gamma_points=3, slices_per_period=64) - ref).max() < 1e-5
