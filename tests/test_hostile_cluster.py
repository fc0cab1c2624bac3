"""Hostile cluster files: every number type- and range-checked, readers bounded, one-line errors.

The ranges are qhl's own choices, stated in qhl.spins.cluster (common practice for NMR:
fields up to 100 T, frequencies below 1 GHz, FIDs of at most 2^20 points and 1000 s). Each case
below once ended in a traceback, a memory error, a hang or a silently wrong value.
"""

import warnings
from pathlib import Path

import numpy as np
import pytest

from qhl import QhlInputError, load_cluster, parse_cluster_toml
from qhl.spins.cluster import MAX_POINTS, MAX_SPINS, Cluster, Experiment, Spin
from qhl.spins.cluster_file import read_xyz_atoms
from qhl.spins.nuclei import larmor_frequency_hz

DEMO = (Path(__file__).parents[1] / "qhl" / "data" / "demo_cluster.toml").read_text()


def _one_line_error(text, pattern, source="bad.toml"):
    with warnings.catch_warnings():
        warnings.simplefilter("error")          # no RuntimeWarning may precede the error
        with pytest.raises(QhlInputError, match=pattern) as e:
            parse_cluster_toml(text, source)
    msg = str(e.value)
    assert "\n" not in msg and msg.startswith(source + ": ") and len(msg) < 400
    return msg


@pytest.mark.parametrize("old,new,pattern", [
    ("shift_ppm = 1.20", "offset_hz = 1e308", r"spin\[0\]\.offset_hz.*\|value\| <= 1e\+09, got 1e\+308"),
    ("shift_ppm = 1.20", "offset_hz = " + "9" * 400, r"spin\[0\]\.offset_hz.*400 characters"),
    ("field_tesla = 9.4", "field_tesla = 18446744073709551616", r"field_tesla.*\(0, 100\].*18446744073709551616"),
    ("field_tesla = 9.4", "field_tesla = true", r"field_tesla: expected a number.*True"),
    ("field_tesla = 9.4", 'field_tesla = "9.4"', r"field_tesla: expected a number.*'9.4'"),
    ("field_tesla = 9.4", "field_tesla = 1979-05-27", r"field_tesla: expected a number"),
    ("points = 192", "points = 1000000000000000000", r"experiment\[0\]\.points.*\[2, 1,048,576\]"),
    ("points = 192", "points = 9223372036854775807", r"experiment\[0\]\.points.*\[2, 1,048,576\]"),
    ("points = 192", "points = 1e30", r"experiment\[0\]\.points: expected an integer"),
    ("points = 192", "points = true", r"experiment\[0\]\.points: expected an integer"),
    ("t_max_s = 2.0e-4", "t_max_s = 1e308", r"experiment\[0\]\.t_max_s.*\(0, 1000\]"),
    ("dipolar_scale = 0.5", "dipolar_scale = 1e300", r"experiment\[1\]\.dipolar_scale.*<= 10"),
    ("noise = 1.0e-3", "noise = 1e-320", r"experiment\[0\]\.noise.*\[1e-15, 1000\]"),
    ("noise = 1.0e-3", "noise = nan", r"experiment\[0\]\.noise.*finite"),
    ("j_hz = -13.5", 'j_hz = "-13.5"', r"pair\[0\]\.j_hz: expected a number"),
    ("j_hz = -13.5", "j_hz = -2e9", r"pair\[0\]\.j_hz.*1e\+09"),
    ("position_angstrom = [0.00, 0.00, 0.00]", "position_angstrom = [1e300, 0, 0]", r"spin\[0\]\.position"),
    ('name = "static"', "name = 5", r"experiment\[0\]\.name: expected a name"),
    ('name = "demo-cage-H6"', 'name = "d"\nfield_direction = [0, 0, 0]', r"field_direction.*non-zero"),
    ('name = "demo-cage-H6"', 'name = "d"\nfield_direction = [0, 0, inf]', r"field_direction.*finite"),
])
def test_out_of_range_or_wrong_type_is_one_line(old, new, pattern):
    assert old in DEMO
    _one_line_error(DEMO.replace(old, new, 1), pattern)


def test_deeply_nested_arrays_are_refused_without_recursion():
    msg = _one_line_error(DEMO + "\nx = " + "[" * 100000 + "]" * 100000 + "\n", "nested deeper than 32")
    assert "Recursion" not in msg
    # ordinary nesting (a list of lists) still parses up to the refusal
    _one_line_error(DEMO + "\nx = [[1], [2]]\n", "unknown key 'x'")


def test_huge_field_direction_normalises_to_a_unit_vector():
    # 1e160 squared overflows a naive norm: the direction became (0, 0, 0)
    for raw in ("[0, 0, 1e160]", "[0, 0, 1e-320]", "[1e200, 1e200, 0]"):
        c = parse_cluster_toml(DEMO.replace('name = "demo-cage-H6"', f'name = "d"\nfield_direction = {raw}'))
        assert np.linalg.norm(c.field_direction) == pytest.approx(1.0)


def test_spin_count_is_refused_before_the_pairwise_distances():
    n = MAX_SPINS + 1
    spins = "".join(f'[[spin]]\nlabel = "H{i}"\nisotope = "1H"\nposition_angstrom = [{i}.0, 0, 0]\n'
                    for i in range(n))
    text = f'field_tesla = 9.4\nobserve = "1H"\n{spins}'
    msg = _one_line_error(text, rf"1,001 spins: expected at most {MAX_SPINS:,}.*GiB")
    assert "spin" in msg
    # and through the API: a 30,000-spin Cluster is refused at once (no 30,000^2 distance table)
    many = tuple(Spin(f"H{i}", "1H", (float(i), 0.0, 0.0)) for i in range(30000))
    with pytest.raises(QhlInputError, match="30,000 spins"):
        Cluster(9.4, "1H", many)


def test_non_utf8_and_oversized_files(tmp_path):
    bad = tmp_path / "latin.toml"
    bad.write_bytes(DEMO.encode().replace(b"invented", b"invent\xe9d", 1))
    with pytest.raises(QhlInputError, match=r"latin.toml: line 1: byte 0xe9 is not UTF-8"):
        load_cluster(bad)
    xyz = tmp_path / "latin.xyz"
    xyz.write_bytes(b"1\ncomment \xff\nH 0 0 0\n")
    with pytest.raises(QhlInputError, match="line 2: byte 0xff is not UTF-8"):
        load_cluster(xyz)
    with pytest.raises(QhlInputError, match="no such file"):
        load_cluster(tmp_path / "missing.toml")
    with pytest.raises(QhlInputError, match="a folder, not a file"):
        load_cluster(tmp_path)                       # a folder


@pytest.mark.parametrize("count,pattern", [("-1", "number of atoms >= 0, got -1"), ("3", "expected 3 atom lines")])
def test_xyz_wrong_atom_count_is_refused(tmp_path, count, pattern):
    p = tmp_path / "m.xyz"
    p.write_text(f"{count}\nmade up\nH 0 0 0\nH 1.5 0 0\n")
    with pytest.raises(QhlInputError, match=pattern):
        read_xyz_atoms(p)


def test_points_limit_is_the_stated_one():
    ok = Experiment("fid", 1e-3, MAX_POINTS)
    c = Cluster(9.4, "1H", (Spin("A", "1H"), Spin("B", "1H", offset_hz=10.0)), experiments=(ok,))
    assert c.experiments[0].points == 2**20
    with pytest.raises(QhlInputError, match=r"points.*\[2, 1,048,576\], got 1048577"):
        Cluster(9.4, "1H", (Spin("A", "1H"),), experiments=(Experiment("fid", 1e-3, MAX_POINTS + 1),))


# ----------------------------------------------------------------- reference_ppm per isotope
HETERO = """
field_tesla = 9.4
observe = "1H"
reference_ppm = REF
[[spin]]
label = "H1"
isotope = "1H"
shift_ppm = 6.0
[[spin]]
label = "C1"
isotope = "13C"
shift_ppm = 120.0
"""


def test_reference_ppm_table_sets_one_carrier_per_isotope():
    c = parse_cluster_toml(HETERO.replace("REF", '{"1H" = 4.7, "13C" = 100.0}'))
    # offset = (shift - carrier of that isotope) * 1e-6 * nu0 (common practice: carriers are per isotope)
    assert c.spin("H1").offset_hz == pytest.approx(1.3e-6 * larmor_frequency_hz("1H", 9.4))
    assert c.spin("C1").offset_hz == pytest.approx(20e-6 * larmor_frequency_hz("13C", 9.4))
    assert abs(c.spin("H1").offset_hz) < 600          # 1.3 ppm of 400 MHz, not -36.7 kHz


def test_bare_reference_ppm_is_the_observed_isotopes_carrier_only():
    _one_line_error(HETERO.replace("REF", "4.7"),
                    r"spin\[1\]\.shift_ppm: reference_ppm = 4.7 is the carrier of the observed isotope 1H only")
    _one_line_error(HETERO.replace("REF", '{"1H" = 4.7}'), r"spin\[1\]\.shift_ppm: no carrier for 13C")
    _one_line_error(HETERO.replace("REF", '{"1H" = 4.7, "13C" = 1.0, "31P" = 0.0}'), r"reference_ppm.31P")
    _one_line_error(HETERO.replace("REF", '{"2H" = 4.7}'), r"reference_ppm.2H.*spin 1")
    # a homonuclear file keeps its bare number
    c = parse_cluster_toml(HETERO.replace("REF", "4.7").replace('shift_ppm = 120.0', 'offset_hz = 5.0'))
    assert c.spin("H1").offset_hz == pytest.approx(1.3e-6 * larmor_frequency_hz("1H", 9.4))


def test_engine_memory_estimate_counts_the_time_points(monkeypatch):
    from qhl import ExactEngine, build_model
    from qhl.base import memory
    from qhl.base.errors import MemoryBudgetError

    c = Cluster(9.4, "1H", (Spin("A", "1H", (0, 0, 0)), Spin("B", "1H", (1.8, 0, 0), 100.0)),
                experiments=(Experiment("fid", 1e-3, MAX_POINTS),))
    eng = ExactEngine(build_model(c))
    monkeypatch.setattr(memory, "available_memory_bytes", lambda: 64 * 2**20)   # a 64 MiB machine
    assert eng.signal(times=np.linspace(0, 1e-3, 64)).shape == (64,)
    with pytest.raises(MemoryBudgetError, match=r"1,048,576 time points needs about"):
        eng.signal(c.experiments[0])


def test_huge_points_are_refused_with_the_memory_they_would_take():
    # a complex128 signal takes 16 bytes per point (numpy documentation: complex128 is 16 bytes)
    msg = _one_line_error(DEMO.replace("points = 192", "points = 1000000000000000000", 1),
                          r"points.*1,048,576.*would need 13.9 EiB")
    _one_line_error(DEMO.replace("points = 192", "points = " + "9" * 400, 1), r"points.*EiB")
    assert "got 1000000000000000000" in msg
