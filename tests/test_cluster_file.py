"""The cluster file loader: valid files, every kind of bad input, and property-based tests.

Bad-input behaviour is a project convention (common practice): one line naming file, key and
what was expected; the CLI exits with status 2 and prints no traceback.
"""

import math
import subprocess
import sys

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from qhl import QhlInputError, demo_cluster, load_cluster, parse_cluster_toml
from qhl.spins.nuclei import larmor_frequency_hz

GOOD = """
field_tesla = 9.4
observe = "1H"
[[spin]]
label = "A"
isotope = "1H"
position_angstrom = [0, 0, 0]
shift_ppm = 2.0
[[spin]]
label = "B"
isotope = "13C"
position_angstrom = [1.09, 0, 0]
[[pair]]
spins = ["A", "B"]
j_hz = 140.0
[[experiment]]
name = "fid"
t_max_s = 1e-4
points = 16
"""


def test_good_file_parses():
    c = parse_cluster_toml(GOOD, "good.toml")
    assert c.labels == ["A", "B"] and c.observe == "1H"
    # offset = shift_ppm * 1e-6 * nu0 with nu0 = |gamma| B / 2 pi (common practice)
    assert c.spin("A").offset_hz == pytest.approx(2.0e-6 * larmor_frequency_hz("1H", 9.4))
    assert c.experiments[0].times_s[-1] == pytest.approx(1e-4)


def test_demo_cluster_is_six_protons_with_four_experiments():
    c = demo_cluster()
    assert c.n_spins == 6 and {s.isotope for s in c.spins} == {"1H"}
    assert [e.dipolar_scale for e in c.experiments] == [1.0, 0.5, 0.25, 0.0]


BAD = [
    ("field_tesla = 9.4\nobserve = \n", "TOML syntax error.*line 2"),
    (GOOD + "\ncolour = 1\n", "unknown key 'colour'"),
    (GOOD.replace('isotope = "13C"', 'isotope = "2H"'), r"spin\[1\].isotope.*spin 1"),
    (GOOD.replace('isotope = "13C"', 'isotope = "99Xx"'), r"spin\[1\].isotope.*unknown isotope"),
    (GOOD.replace('label = "B"', 'label = "A"'), "duplicate label 'A'"),
    (GOOD.replace("[1.09, 0, 0]", "[0.3, 0, 0]"), "0.300 A apart"),
    (GOOD.replace("[1.09, 0, 0]", "[nan, 0, 0]"), "position_angstrom"),
    (GOOD.replace("field_tesla = 9.4", "field_tesla = -1.0"), "field_tesla.*positive"),
    (GOOD.replace("field_tesla = 9.4", "field_tesla = inf"), "field_tesla"),
    (GOOD.replace('spins = ["A", "B"]', 'spins = ["A", "Q"]'), r"pair\[0\].spins.*unknown spin 'Q'"),
    (GOOD.replace("t_max_s = 1e-4", "t_max_s = 0.0"), r"experiment\[0\].t_max_s.*positive number in \(0, 1000\]"),
    (GOOD.replace("points = 16", "points = 1"), r"experiment\[0\].points.*integer in \[2, 1,048,576\]"),
    (GOOD.replace("j_hz = 140.0", "j_hz = nan"), r"pair\[0\].j_hz.*finite"),
    (GOOD.replace('observe = "1H"', 'observe = "31P"'), "observe.*no spin of the observed isotope"),
    (GOOD.replace('shift_ppm = 2.0', 'shift_ppm = 2.0\noffset_hz = 3.0'), "not both"),
    (GOOD.replace('field_tesla = 9.4\n', ''), "field_tesla: missing required key"),
]


@pytest.mark.parametrize("text,pattern", BAD)
def test_bad_input_is_one_clear_line(text, pattern):
    with pytest.raises(QhlInputError, match=pattern) as e:
        parse_cluster_toml(text, "bad.toml")
    msg = str(e.value)
    assert msg.startswith("bad.toml: ") and "\n" not in msg


def test_missing_file(tmp_path):
    with pytest.raises(QhlInputError, match="no such file"):
        load_cluster(tmp_path / "nope.toml")


@pytest.mark.parametrize("text,pattern", [BAD[0], BAD[2], BAD[5]])
def test_cli_exit_code_2_without_traceback(tmp_path, text, pattern):
    f = tmp_path / "bad.toml"
    f.write_text(text)
    r = subprocess.run([sys.executable, "-m", "qhl", "signal", str(f)], capture_output=True, text=True)
    assert r.returncode == 2
    assert "Traceback" not in r.stderr and len(r.stderr.strip().splitlines()) == 1
    assert str(f) in r.stderr


def test_xyz_file(tmp_path):
    f = tmp_path / "w.xyz"
    # an invented bent triatomic with two protons 1.5265 A apart
    f.write_text("3\ninvented\nO 0 0 0.1173\nH 0 0.76325 -0.4692\nH 0 -0.76325 -0.4692\n")
    c = load_cluster(f)
    assert c.labels == ["H1", "H2"]
    d = np.linalg.norm(np.subtract(c.spins[0].position_angstrom, c.spins[1].position_angstrom))
    assert d == pytest.approx(1.5265, abs=1e-4)


def test_xyz_bad_lines(tmp_path):
    f = tmp_path / "bad.xyz"
    f.write_text("2\nc\nH 0 0 zero\nH 1 1 1\n")
    with pytest.raises(QhlInputError, match="line 3"):
        load_cluster(f)


# ---------------------------------------------------------------- property-based tests
_labels = st.lists(st.from_regex(r"[A-Z][a-z0-9]{0,3}", fullmatch=True), min_size=1, max_size=5, unique=True)


def _toml_cluster(labels, coords, offsets, field, points, tmax):
    lines = [f"field_tesla = {field!r}", 'observe = "1H"']
    for lab, xyz, off in zip(labels, coords, offsets):
        lines += ["[[spin]]", f'label = "{lab}"', 'isotope = "1H"',
                  f"position_angstrom = [{xyz[0]!r}, {xyz[1]!r}, {xyz[2]!r}]", f"offset_hz = {off!r}"]
    lines += ["[[experiment]]", 'name = "e"', f"t_max_s = {tmax!r}", f"points = {points}"]
    return "\n".join(lines) + "\n"


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(labels=_labels, data=st.data(),
       field=st.floats(0.1, 30.0), points=st.integers(2, 64), tmax=st.floats(1e-6, 1.0))
def test_valid_files_round_trip(labels, data, field, points, tmax):
    n = len(labels)
    coords = [(3.0 * i, data.draw(st.floats(-1, 1)), data.draw(st.floats(-1, 1))) for i in range(n)]
    offsets = data.draw(st.lists(st.floats(-1e5, 1e5), min_size=n, max_size=n))
    c = parse_cluster_toml(_toml_cluster(labels, coords, offsets, field, points, tmax))
    assert c.labels == labels
    assert [s.offset_hz for s in c.spins] == offsets
    assert c.field_tesla == field and c.experiments[0].points == points


@settings(max_examples=150, deadline=None)
@given(text=st.text(max_size=200))
def test_arbitrary_text_only_ever_raises_input_errors(text):
    try:
        parse_cluster_toml(text)
    except QhlInputError as e:
        assert "\n" not in str(e)


@settings(max_examples=100, deadline=None)
@given(key=st.sampled_from(["field_tesla", "t_max_s", "points", "offset_hz", "j_hz"]),
       value=st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-5, 5), st.text(max_size=5),
                       st.booleans()))
def test_mutated_values_never_crash(key, value):
    rendered = repr(value) if not isinstance(value, str) else '"' + value.replace('\\', '').replace('"', '') + '"'
    if isinstance(value, bool):
        rendered = "true" if value else "false"
    if isinstance(value, float) and math.isnan(value):
        rendered = "nan"
    elif isinstance(value, float) and math.isinf(value):
        rendered = "inf" if value > 0 else "-inf"
    base = GOOD.replace("offset", "x")  # no offset_hz line in GOOD: add one
    base = base.replace('shift_ppm = 2.0', 'offset_hz = 1.0')
    lines = [ln if not ln.startswith(key + " =") else f"{key} = {rendered}" for ln in base.splitlines()]
    try:
        parse_cluster_toml("\n".join(lines))
    except QhlInputError as e:
        assert "\n" not in str(e)
