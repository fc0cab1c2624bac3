"""Sample spinning: the dipolar factors s_n(t) against a direct rotation of the vectors.

References: the rotation itself is done by scipy.spatial.transform.Rotation (a general-purpose
library), the interval averages by scipy.integrate.quad; the rotor-period average equals
P2(cos beta) P2(cos theta_R) (spherical-harmonic addition theorem; M. M. Maricq and
J. S. Waugh, J. Chem. Phys. 70, 3300 (1979)), zero at the magic angle arccos(1/sqrt 3).
"""

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.spatial.transform import Rotation

from qhl.base.errors import QhlInputError
from qhl.spins.cluster_file import parse_cluster_toml
from qhl.spins.model import build_model
from qhl.spins.spinning import MAGIC_ANGLE_DEG, rotor_axis, spinning_factors

TEXT = """field_tesla = 9.4
observe = "1H"
field_direction = [0.3, 0.2, 1.0]
[[spin]]
label = "A"
isotope = "1H"
position_angstrom = [0.0, 0.0, 0.0]
[[spin]]
label = "B"
isotope = "1H"
position_angstrom = [1.2, 0.4, 1.0]
[[spin]]
label = "C"
isotope = "13C"
position_angstrom = [-0.9, 1.1, 0.3]
[[experiment]]
name = "mas"
t_max_s = 1e-3
points = 64
spinning_hz = 12500.0
{extra}
"""


def _cluster(extra=""):
    return parse_cluster_toml(TEXT.format(extra=extra), "made_up.toml")


def _direct(pair_vec, field, axis, nu, t):
    """P2 of the angle between the turned pair vector and the field, by scipy's rotation."""
    r = np.asarray(pair_vec, float) / np.linalg.norm(pair_vec)
    rot = Rotation.from_rotvec(np.outer(2 * np.pi * nu * np.atleast_1d(t), axis))
    c = rot.apply(r) @ field
    return 0.5 * (3 * c**2 - 1)


def test_magic_angle_value():
    # arccos(1/sqrt(3)) = 54.7356 degrees (common practice)
    assert MAGIC_ANGLE_DEG == pytest.approx(54.7356103, abs=1e-6)


@pytest.mark.parametrize("angle", [MAGIC_ANGLE_DEG, 30.0, 90.0])
def test_factors_equal_direct_rotation(angle):
    c = _cluster("" if angle == MAGIC_ANGLE_DEG else f"spinning_angle_deg = {angle}")
    m = build_model(c)
    ex = c.experiments[0]
    sf = spinning_factors(m, ex)
    f = np.array(c.field_direction)
    axis = rotor_axis(f, angle)
    assert np.degrees(np.arccos(axis @ f)) == pytest.approx(angle, abs=1e-9)
    t = np.linspace(0, 3.3 / ex.spinning_hz, 41)
    got = sf.at(t)
    for k, prm in enumerate(m.parameters):
        if prm.kind != "dipolar":
            assert np.all(got[:, k] == 1.0)
            continue
        a, b = (c.spin(x).position_angstrom for x in prm.spins)
        d = np.subtract(b, a)
        static = _direct(d, f, axis, 0.0, 0.0)[0]
        want = _direct(d, f, axis, ex.spinning_hz, t) / static
        np.testing.assert_allclose(got[:, k], want, atol=1e-12)
        # times the model value: the coupling b P2(cos Theta(t)) from the distance alone
        np.testing.assert_allclose(prm.value_hz * got[:, k], prm.value_hz / static * _direct(d, f, axis, ex.spinning_hz, t),
                                   rtol=1e-12)


def test_interval_means_equal_quadrature():
    c = _cluster()
    m = build_model(c)
    sf = spinning_factors(m, c.experiments[0])
    t0 = np.array([0.0, 1.3e-5, 7.7e-5, 2e-4])
    t1 = t0 + np.array([8e-5, 2.2e-6, 1e-9, 0.0])
    got = sf.mean(t0, t1)
    for k in range(len(m.parameters)):
        for i in range(t0.size):
            if t1[i] == t0[i]:
                want = sf.at(t0[i])[0, k]
            else:
                want = quad(lambda x: sf.at(x)[0, k], t0[i], t1[i], epsabs=1e-13)[0] / (t1[i] - t0[i])
            assert got[i, k] == pytest.approx(want, abs=1e-9)


@pytest.mark.parametrize("angle", [MAGIC_ANGLE_DEG, 40.0, 70.0])
def test_rotor_period_average_addition_theorem(angle):
    # Maricq and Waugh (1979): <P2(cos Theta)>_rotor = P2(cos beta) P2(cos theta_R), beta = angle(r, R)
    c = _cluster("" if angle == MAGIC_ANGLE_DEG else f"spinning_angle_deg = {angle}")
    m = build_model(c)
    ex = c.experiments[0]
    sf = spinning_factors(m, ex)
    f = np.array(c.field_direction)
    axis = rotor_axis(f, angle)
    mean = sf.mean(0.37e-5, 0.37e-5 + 1 / ex.spinning_hz)[0]
    p2 = lambda x: 0.5 * (3 * x * x - 1)
    for k, prm in enumerate(m.parameters):
        if prm.kind == "dipolar":
            a, b = (c.spin(x).position_angstrom for x in prm.spins)
            r = np.subtract(b, a) / np.linalg.norm(np.subtract(b, a))
            want = p2(r @ axis) * p2(np.cos(np.radians(angle))) / p2(r @ f)
            assert mean[k] == pytest.approx(want, abs=1e-12)
            if angle == MAGIC_ANGLE_DEG:
                assert abs(mean[k]) < 1e-12


def test_dipolar_scale_multiplies():
    c1, c2 = _cluster(), _cluster("dipolar_scale = -0.5")
    f1 = spinning_factors(build_model(c1), c1.experiments[0]).fourier
    f2 = spinning_factors(build_model(c2), c2.experiments[0]).fourier
    dip = [p.kind == "dipolar" for p in build_model(c1).parameters]
    np.testing.assert_allclose(f2[dip], -0.5 * f1[dip], rtol=1e-14)


def test_static_paths_refuse_spinning_experiment():
    c = _cluster()
    with pytest.raises(QhlInputError, match="spins"):
        build_model(c).scale_factors(c.experiments[0])


def test_pair_without_positions_refused():
    text = TEXT.format(extra="").replace('position_angstrom = [-0.9, 1.1, 0.3]\n', "")
    text += '[[pair]]\nspins = ["A", "C"]\ndipolar_hz = -900.0\n'
    c = parse_cluster_toml(text, "made_up.toml")
    with pytest.raises(QhlInputError, match="no positions"):
        spinning_factors(build_model(c), c.experiments[0])


def test_pair_at_magic_angle_to_field_refused():
    text = TEXT.format(extra="").replace("field_direction = [0.3, 0.2, 1.0]", "field_direction = [0.0, 0.0, 1.0]")
    text = text.replace("[1.2, 0.4, 1.0]", f"[{np.sqrt(2):.15f}, 0.0, 1.0]")   # cos^2 = 1/3
    c = parse_cluster_toml(text, "made_up.toml")
    with pytest.raises(QhlInputError, match="magic angle"):
        spinning_factors(build_model(c), c.experiments[0])


@pytest.mark.parametrize("extra,key", [("spinning_hz = -1.0", "spinning_hz"),
                                       ("spinning_hz = 2e6", "spinning_hz"),
                                       ("spinning_angle_deg = 91.0", "spinning_angle_deg")])
def test_bad_values_name_the_key(extra, key):
    text = TEXT.format(extra="").replace("spinning_hz = 12500.0\n", "") + extra + "\n"
    if key == "spinning_angle_deg":
        text += "spinning_hz = 1e4\n"
    with pytest.raises(QhlInputError, match=key):
        parse_cluster_toml(text, "made_up.toml")


def test_angle_without_rate_refused():
    text = TEXT.format(extra="").replace("spinning_hz = 12500.0\n", "spinning_angle_deg = 50.0\n")
    with pytest.raises(QhlInputError, match="spinning_angle_deg needs spinning_hz"):
        parse_cluster_toml(text, "made_up.toml")


def test_written_cluster_keeps_spinning():
    from qhl.survey.structure import cluster_to_toml
    c = _cluster("spinning_angle_deg = 60.0")
    back = parse_cluster_toml(cluster_to_toml(c), "again.toml")
    assert back.experiments[0].spinning_hz == 12500.0
    assert back.experiments[0].spinning_angle_deg == 60.0
