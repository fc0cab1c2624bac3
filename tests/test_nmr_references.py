"""Nuclear constants, dipolar couplings and classic spectra against published references."""

import numpy as np
import pytest
import scipy.constants as const

from qhl import ExactEngine, QhlInputError, build_model, nucleus
from qhl.spins.cluster import Cluster, Experiment, Pair, Spin
from qhl.spins.dipolar import dipolar_constant_hz
from qhl.spins.nuclei import larmor_frequency_hz
from qhl.exact.powder import lebedev_orientations, powder_lines, powder_signal


# ---------------------------------------------------------------- gyromagnetic ratios
def test_proton_gamma_matches_codata():
    # CODATA via scipy.constants 'proton gyromag. ratio'; IUPAC 2001 is 2.2e-7 below (REFERENCES.md)
    codata = const.physical_constants["proton gyromag. ratio"][0]
    assert abs(nucleus("1H").gamma_rad_per_s_per_tesla / codata - 1) < 1e-6


@pytest.mark.parametrize("iso,gamma_1e7", [("13C", 6.728284), ("15N", -2.71261804), ("19F", 25.18148),
                                           ("31P", 10.8394), ("29Si", -5.3190)])
def test_gammas_iupac_2001(iso, gamma_1e7):
    # Harris, Becker, Cabral de Menezes, Goodfellow, Granger, Pure Appl. Chem. 73, 1795 (2001)
    assert nucleus(iso).gamma_rad_per_s_per_tesla == pytest.approx(gamma_1e7 * 1e7, rel=1e-9)


def test_larmor_frequencies_name_the_magnets():
    # common practice: a 9.4 T magnet is a "400 MHz" and 14.1 T a "600 MHz" spectrometer
    assert larmor_frequency_hz("1H", 9.4) / 1e6 == pytest.approx(400.2, abs=0.05)
    assert larmor_frequency_hz("1H", 14.1) / 1e6 == pytest.approx(600.3, abs=0.05)


@pytest.mark.parametrize("iso", ["2H", "14N", "17O", "23Na"])
def test_spin_above_half_refused(iso):
    with pytest.raises(QhlInputError, match="spin-1/2"):
        nucleus(iso)


# ---------------------------------------------------------------- dipolar constant
@pytest.mark.parametrize("a,b,r,khz", [("1H", "1H", 1.00, 120.12), ("1H", "1H", 1.78, 21.30),
                                       ("1H", "13C", 1.09, 23.33), ("1H", "15N", 1.02, 11.48),
                                       ("13C", "13C", 1.54, 2.08)])
def test_dipolar_constant(a, b, r, khz):
    # b = -(mu0/4pi) gamma_i gamma_j hbar / r^3 (Levitt, Spin Dynamics, 2008); values [derived] in REFERENCES.md
    d = dipolar_constant_hz(nucleus(a).gamma_rad_per_s_per_tesla, nucleus(b).gamma_rad_per_s_per_tesla, r)
    assert abs(d) / 1e3 == pytest.approx(khz, abs=0.01)
    assert (d > 0) == (b == "15N")  # gamma_N < 0 flips the sign


def _pair(theta_deg, r=1.78, isotopes=("1H", "1H"), observe="1H"):
    th = np.radians(theta_deg)
    spins = (Spin("I", isotopes[0], (0.0, 0.0, 0.0)),
             Spin("S", isotopes[1], (r * np.sin(th), 0.0, r * np.cos(th))))
    return Cluster(9.4, observe, spins, (), (Experiment("fid", 1e-4, 8),))


@pytest.mark.parametrize("theta", [0.0, 30.0, 70.0, 90.0])
def test_pake_doublet_line_positions(theta):
    # Pake, J. Chem. Phys. 16, 327 (1948): lines at +-(3/4)(b/2pi)(3cos^2 theta - 1), equal intensity
    c = _pair(theta)
    f, a = ExactEngine(build_model(c)).transitions()
    b = dipolar_constant_hz(nucleus("1H").gamma_rad_per_s_per_tesla, nucleus("1H").gamma_rad_per_s_per_tesla, 1.78)
    expected = 0.75 * abs(b * (3 * np.cos(np.radians(theta)) ** 2 - 1))
    strong = np.abs(a) > 1e-6
    np.testing.assert_allclose(np.sort(f[strong]), [-expected, expected], rtol=1e-9)
    np.testing.assert_allclose(np.abs(a[strong]), [0.5, 0.5], rtol=1e-9)


def test_magic_angle_collapses_dipolar_splitting():
    # Pake 1948 / common practice: 3cos^2(54.7356 deg) - 1 = 0
    c = _pair(np.degrees(np.arccos(1 / np.sqrt(3))))
    s = ExactEngine(build_model(c)).signal(times=np.linspace(0, 1e-3, 11))
    np.testing.assert_allclose(s, 1.0, atol=1e-9)


def test_heteronuclear_pair_lines():
    # heteronuclear pair: lines at +-(1/2)(b/2pi)(3cos^2 theta - 1) (REFERENCES.md, [paper + derived])
    c = _pair(20.0, r=1.09, isotopes=("1H", "13C"))
    f, a = ExactEngine(build_model(c)).transitions()
    b = dipolar_constant_hz(nucleus("1H").gamma_rad_per_s_per_tesla, nucleus("13C").gamma_rad_per_s_per_tesla, 1.09)
    expected = 0.5 * abs(b * (3 * np.cos(np.radians(20.0)) ** 2 - 1))
    np.testing.assert_allclose(np.sort(f[np.abs(a) > 1e-6]), [-expected, expected], rtol=1e-9)


def _powder_lines(c, order):
    f, a = powder_lines(c, order=order)
    return f, a.real


@pytest.mark.parametrize("isotopes,factor", [(("1H", "1H"), 9 / 20), (("1H", "13C"), 1 / 5)])
def test_powder_second_moment_van_vleck(isotopes, factor):
    # Van Vleck, Phys. Rev. 74, 1168 (1948): powder M2 = (9/20) b^2 (homonuclear), b^2/5 (heteronuclear).
    # Lebedev-Laikov grids (Doklady Math. 59, 477 (1999)) of degree >= 4 integrate P2^2 exactly.
    c = _pair(0.0, r=1.5, isotopes=isotopes)
    f, a = _powder_lines(c, 11)
    m2 = np.sum(a * (2 * np.pi * f) ** 2) / np.sum(a)
    b = 2 * np.pi * dipolar_constant_hz(nucleus(isotopes[0]).gamma_rad_per_s_per_tesla,
                                        nucleus(isotopes[1]).gamma_rad_per_s_per_tesla, 1.5)
    assert m2 == pytest.approx(factor * b**2, rel=1e-9)


def test_powder_signal_is_weighted_mean_of_orientations():
    # the grid average of S(t) equals the line-list average evaluated at the same times
    c = _pair(0.0)
    t = np.linspace(0, 1e-4, 9)
    f, a = powder_lines(c, order=11)
    direct = (a[None, :] * np.exp(2j * np.pi * np.outer(t, f))).sum(axis=1)
    np.testing.assert_allclose(powder_signal(c, c.experiments[0], order=11, times=t), direct, atol=1e-12)
    assert lebedev_orientations(11)[1].sum() == pytest.approx(1.0)


def test_powder_pattern_horns_and_edges():
    # Pake 1948: horns (theta = 90 deg) (3/2)|b|/2pi apart, outer edges 3|b|/2pi apart
    c = _pair(0.0)
    f, a = _powder_lines(c, 131)
    b = abs(dipolar_constant_hz(nucleus("1H").gamma_rad_per_s_per_tesla, nucleus("1H").gamma_rad_per_s_per_tesla, 1.78))
    pos = f[a > 1e-9]
    assert pos.max() - pos.min() == pytest.approx(3 * b, rel=2e-3)
    hist, edges = np.histogram(f, bins=120, range=(-1.6 * b, 1.6 * b), weights=a)
    centres = 0.5 * (edges[1:] + edges[:-1])
    right = centres[centres > 0][np.argmax(hist[centres > 0])]
    left = centres[centres < 0][np.argmax(hist[centres < 0])]
    width = edges[1] - edges[0]
    assert right - left == pytest.approx(1.5 * b, abs=2 * width)


# ---------------------------------------------------------------- AB quartet
def test_ab_quartet():
    # Pople, Schneider, Bernstein, "High-resolution Nuclear Magnetic Resonance" (1959):
    # J = 10 Hz, dnu = 20 Hz: lines at +-16.180 Hz (rel. intensity 1 - J/C) and +-6.180 Hz (1 + J/C)
    spins = (Spin("A", "1H", None, 110.0), Spin("B", "1H", None, 90.0))
    c = Cluster(9.4, "1H", spins, (Pair(("A", "B"), j_hz=10.0),), (Experiment("fid", 1.0, 8),))
    f, a = ExactEngine(build_model(c)).transitions()
    strong = np.abs(a) > 1e-9
    f, a = f[strong] - 100.0, a[strong].real
    C = np.hypot(20.0, 10.0)
    np.testing.assert_allclose(f, [-(C + 10) / 2, -(C - 10) / 2, (C - 10) / 2, (C + 10) / 2], atol=1e-9)
    np.testing.assert_allclose(f[[0, 1]], [-16.180, -6.180], atol=5e-4)
    np.testing.assert_allclose(a / a.sum() * 4, [1 - 10 / C, 1 + 10 / C, 1 + 10 / C, 1 - 10 / C], rtol=1e-9)
    assert (1 - 10 / C) / 2 == pytest.approx(0.553 / 2, abs=5e-4)


def test_ax_limit_gives_doublets_split_by_j():
    # Pople, Schneider, Bernstein 1959: AX limit (dnu >> J) gives two doublets split by J
    spins = (Spin("A", "1H", None, 2000.0), Spin("X", "1H", None, -2000.0))
    c = Cluster(9.4, "1H", spins, (Pair(("A", "X"), j_hz=7.0),), (Experiment("fid", 1.0, 8),))
    f, a = ExactEngine(build_model(c)).transitions()
    f = f[np.abs(a) > 1e-6]
    assert f[1] - f[0] == pytest.approx(7.0, abs=0.02) and f[3] - f[2] == pytest.approx(7.0, abs=0.02)
