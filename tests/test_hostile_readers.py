"""Hostile structure and signal files: empty, non-UTF-8, huge fields, library errors -> one line.

Each case once ended in a traceback (IndexError from the structure library on an empty mmCIF,
UnicodeDecodeError, _csv.Error on a field over 131072 characters) or a warning before the error.
The property is the project's bad-input convention (one line naming file, key and expectation;
common practice); UTF-8 validity as Python's codec decides it (RFC 3629, Yergeau 2003).
"""

import warnings

import numpy as np
import pytest

from qhl import QhlInputError, demo_cluster
from qhl.exact.likelihood import Dataset
from qhl.learning.data_csv import load_signals_csv, write_signals_csv
from qhl.survey.structure import demo_structure_path, read_structure


def _one_line(fn, pattern):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(QhlInputError, match=pattern) as e:
            fn()
    assert "\n" not in str(e.value) and len(str(e.value)) < 400
    return str(e.value)


@pytest.mark.parametrize("name,data,pattern", [
    ("empty.cif", b"", "empty file"),
    ("blank.cif", b"  \n\n", "empty file"),
    ("empty.pdb", b"", "empty file"),
    ("latin.pdb", b"REMARK caf\xe9\n", r"line 1: byte 0xe9 is not UTF-8"),
    ("latin.cif", b"data_x\n# \xff\n", r"line 2: byte 0xff is not UTF-8"),
    ("nomodel.cif", b"data_x\n", "no model"),
    ("junk.cif", b"loop_\n_atom_site.id\n", "cannot read structure"),
    ("far.pdb", b"HETATM    1  H1  QXA A   1       1e308   0.331   0.471  1.00 20.00           H  \n",
     r"coordinates must be finite with \|value\| <= 1e\+06"),
])
def test_structure_reader_turns_every_failure_into_one_line(tmp_path, name, data, pattern):
    p = tmp_path / name
    p.write_bytes(data)
    _one_line(lambda: read_structure(p), pattern)


def test_demo_structure_still_reads():
    assert len(read_structure(demo_structure_path())) == 48


@pytest.fixture
def demo_csv(tmp_path):
    c = demo_cluster()
    t = c.experiment("static").times_s[:4]
    path = tmp_path / "fid.csv"
    write_signals_csv(path, Dataset({"static": (t, np.ones(4, complex), np.full(4, 1e-3))}))
    return c, path


def _last_time(raw, value):
    head, last = raw.rstrip(b"\r\n").rsplit(b"\n", 1)
    parts = last.split(b",")
    return head + b"\n" + b",".join([parts[0], value] + parts[2:]) + b"\r\n"


@pytest.mark.parametrize("edit,pattern", [
    (lambda b: b.replace(b"static", b"s" * 20000, 1), r"line 2: a field of more than 10,000 characters"),
    (lambda b: b.replace(b"static", b"s" * 200000, 1), r"line 2: malformed CSV \(field larger than field limit"),
    (lambda b: b.replace(b"static", b"st\xe4tic", 1), r"line 2: byte 0xe4 is not UTF-8"),
    (lambda b: b + b'static,"unclosed\n', r"field of more than|malformed CSV|expected 5 fields|matches no"),
    (lambda b: b.replace(b",1.0,", b",1e300,", 1), r"line 2: real: expected a value in \[-1e\+06, 1e\+06\]"),
    (lambda b: b.replace(b"0.001\r\n", b"1e-320\r\n", 1), r"line 2: sigma: expected a value in \[1e-15, 1000\]"),
    (lambda b: _last_time(b, b"1e308"), r"line 5: time 1e\+308 s matches no sampling time"),
    (lambda b: b.replace(b"static,0.0,", b"static,-1e308,", 1), r"matches no sampling time"),
    (lambda b: b.replace(b"static,0.0,", b"static," + b"9" * 400 + b",", 1), r"NaN or infinite"),
])
def test_csv_reader_turns_every_failure_into_one_line(demo_csv, edit, pattern):
    c, path = demo_csv
    raw = path.read_bytes()
    assert load_signals_csv(path, c).signals["static"][0].size == 4
    path.write_bytes(edit(raw))
    _one_line(lambda: load_signals_csv(path, c), pattern)


def test_csv_sigma_argument_is_range_checked(demo_csv):
    c, path = demo_csv
    _one_line(lambda: load_signals_csv(path, c, sigma=float("nan")), r"sigma: expected a finite number")
    _one_line(lambda: load_signals_csv(path, c, sigma=True), r"sigma: expected a number")
