"""Spectrometer files -> qhl signals: round trips through nmrglue's own writers, the sign convention,
the mapping onto a cluster file's experiments, and corrupt files through the CLI.

Every FID here is invented (a few lines with made-up frequencies and decays); nothing is real data.
References, beside each check:
  * nmrglue (J. J. Helmus, C. P. Jaroniec, "Nmrglue: an open source Python package for the analysis
    of multidimensional NMR data", J. Biomol. NMR 55, 355 (2013)): bruker.write, varian.write and
    its unit conversion (the frequency axis of its spectra) are the outside reference.
  * JCAMP-DX: R. S. McDonald, P. A. Wilks, Appl. Spectrosc. 42, 151 (1988), with the NMR NTUPLES
    layout of A. N. Davies, P. Lampen, Appl. Spectrosc. 47, 1093 (1993); nmrglue has no JCAMP-DX
    writer, so the file is written here by hand.
  * Proton gyromagnetic ratio: CODATA via scipy.constants ('proton gyromag. ratio').
Tolerances: float64 Bruker-style data through nmrglue's FFT-based filter-delay removal: 1e-12
relative; Varian-style data are stored as float32: 1e-6; JCAMP-DX integers with FACTOR 1e-9 for
values of order 1: 2e-9 absolute (half a unit of the last digit on each of two points, common practice).
"""

import json

import nmrglue as ng
import numpy as np
import pytest

from qhl import QhlInputError, load_cluster
from qhl.cli import main
from qhl.learning.spectrometer import load_spectrometer_data, read_acquisition, read_acquisitions

DWELL = 1e-4      # s: spectral width 10 kHz
OBS_MHZ = 400.13
LINES = [(820.0, 0.6, 1.5e-3), (-1430.0, 0.4, 4e-3)]   # invented: (offset Hz, amplitude, T2 s)


def invented_signal(n, dwell=DWELL):
    """qhl's convention: S(t) = sum a exp(+2 pi i nu t - t/T2), S(0) = 1."""
    t = np.arange(n) * dwell
    return sum(a * np.exp(2j * np.pi * nu * t - t / t2) for nu, a, t2 in LINES)


def stored(signal, gain=2.5e3 * np.exp(0.7j)):
    """What a console stores for that signal: the opposite sense of rotation, some gain and phase."""
    return gain * np.conj(signal)


def _delay(grpdly, decim, dspfvs):
    """The filter delay nmrglue removes: GRPDLY if > 0, else its table for DSPFVS < 14, else 0 (floored)."""
    if grpdly > 0:
        return np.floor(grpdly)
    return np.floor(ng.bruker.bruker_dsp_table[dspfvs][decim]) if dspfvs < 14 else 0.0


def write_bruker(path, signal, grpdly=12.0, decim=1, dspfvs=20, big=None, nuc="1H", extra=0, td=None, dtypa=2,
                 gain=2.5e3 * np.exp(0.7j)):
    """Bruker-style directory via nmrglue.bruker.write; the FID is delayed by floor(group delay) points."""
    delay = int(_delay(grpdly, decim, dspfvs))
    raw = np.roll(np.concatenate([stored(signal, gain), np.zeros(delay + 2 + extra)]), delay)
    acqus = {"_coreheader": ["##TITLE= invented FID", "##JCAMPDX= 5.0"], "_comments": [],
             "TD": td if td is not None else 2 * raw.size, "SW_h": 1.0 / DWELL, "BF1": OBS_MHZ, "SFO1": OBS_MHZ,
             "O1": 0.0, "NUC1": nuc, "GRPDLY": float(grpdly), "DECIM": decim, "DSPFVS": dspfvs, "BYTORDA": 0,
             "DTYPA": dtypa, "AQ_mod": 3}
    ng.bruker.write(str(path), {"acqus": acqus}, raw, write_prog=False, big=big, overwrite=True)
    return path


def write_varian(path, signal, tn="H1"):
    udic = ng.fileiobase.create_blank_udic(1)
    udic[0].update(size=signal.size, complex=True, sw=1.0 / DWELL, obs=OBS_MHZ, car=0.0, label=tn)
    dic = ng.varian.create_dic(udic)
    for name, value, kind in (("sw", repr(1.0 / DWELL), "1"), ("sfrq", repr(OBS_MHZ), "1"), ("tn", tn, "2"),
                              ("tof", "0", "1")):
        entry = ng.varian.create_pdic_param(name, [value])
        entry["basictype"] = kind
        dic["procpar"][name] = entry
    ng.varian.write(str(path), dic, stored(signal).astype(np.complex64), overwrite=True)
    return path


def write_jcampdx(path, signal, nucleus="^1H", factor=1e-9, var_dim=None, cut_lines=0):
    """Minimal NMR FID in JCAMP-DX 5.01 NTUPLES form (McDonald & Wilks 1988; Davies & Lampen 1993)."""
    f = stored(signal, gain=np.exp(0.3j))          # values of order 1 for the FACTOR below
    n = f.size
    t_last = (n - 1) * DWELL
    lines = ["##TITLE= invented FID", "##JCAMP-DX= 5.01", "##DATA TYPE= NMR FID", "##DATA CLASS= NTUPLES",
             "##ORIGIN= qhl tests", "##OWNER= public domain", f"##.OBSERVE FREQUENCY= {OBS_MHZ!r}",
             f"##.OBSERVE NUCLEUS= {nucleus}", "##NTUPLES= NMR FID", "##VAR_NAME= TIME, FID/REAL, FID/IMAG",
             "##SYMBOL= X, R, I", "##VAR_TYPE= INDEPENDENT, DEPENDENT, DEPENDENT", "##VAR_FORM= AFFN, AFFN, AFFN",
             f"##VAR_DIM= {var_dim or n}, {var_dim or n}, {var_dim or n}",
             "##UNITS= SECONDS, ARBITRARY UNITS, ARBITRARY UNITS",
             f"##FIRST= 0.0, {float(f[0].real)!r}, {float(f[0].imag)!r}",
             f"##LAST= {t_last!r}, {float(f[-1].real)!r}, {float(f[-1].imag)!r}", f"##FACTOR= 1, {factor}, {factor}"]
    for page, (sym, part) in enumerate((("R", f.real), ("I", f.imag)), start=1):
        lines += [f"##PAGE= N={page}", f"##DATA TABLE= (X++({sym}..{sym})), XYDATA"]
        y = np.rint(part / factor).astype(np.int64)
        rows = [" ".join([str(k)] + [str(v) for v in y[k:k + 5]]) for k in range(0, n, 5)]
        lines += rows[:len(rows) - cut_lines]
    lines += ["##END NTUPLES= NMR FID", "##END="]
    path.write_text("\n".join(lines) + "\n")
    return path


def cluster_file(tmp_path, experiments, observe="1H"):
    """An invented two-proton cluster with the given [[experiment]]s: (name, points)."""
    text = ['name = "invented-pair"', "field_tesla = 9.4", f'observe = "{observe}"',
            '[[spin]]', 'label = "A"', 'isotope = "1H"', "offset_hz = 820.0",
            '[[spin]]', 'label = "B"', 'isotope = "1H"', "offset_hz = -1430.0",
            "[[pair]]", 'spins = ["A", "B"]', "j_hz = 7.5"]
    for name, points in experiments:
        text += ["[[experiment]]", f'name = "{name}"', f"t_max_s = {(points - 1) * DWELL!r}", f"points = {points}",
                 "dipolar_scale = 0.0", "noise = 1e-3"]
    p = tmp_path / "pair.toml"
    p.write_text("\n".join(text) + "\n")
    return p


# ------------------------------------------------------------------------------ round trips
@pytest.mark.parametrize("grpdly,decim,dspfvs", [(12.0, 1, 20), (67.98, 1, 20), (-1.0, 16, 12), (0.0, 1, 20)])
def test_bruker_round_trip_removes_the_filter_delay(tmp_path, grpdly, decim, dspfvs):
    s = invented_signal(96)
    a = read_acquisition(write_bruker(tmp_path / "fid1", s, grpdly, decim, dspfvs))
    assert a.format == "bruker" and a.points == 96 and a.nucleus == "1H"
    assert a.filter_delay_points == _delay(grpdly, decim, dspfvs)
    np.testing.assert_allclose(a.signal, s, rtol=0, atol=1e-12)
    assert a.dwell_s == pytest.approx(DWELL, rel=1e-15) and a.spectral_width_hz == 1e4


def test_bruker_round_trip_of_32_bit_integers(tmp_path):
    """DTYPA = 0: int32 values; a gain of 1e6 leaves a rounding of 0.5 / 1e6 per value (tolerance 2e-6)."""
    s = invented_signal(96)
    a = read_acquisition(write_bruker(tmp_path / "fid1", s, dtypa=0, gain=1e6 * np.exp(-1.1j)))
    assert (tmp_path / "fid1" / "fid").stat().st_size == 4 * 2 * (96 + 14)
    np.testing.assert_allclose(a.signal, s, rtol=0, atol=2e-6)
    assert np.max(np.abs(a.signal - s)) > 0           # the rounding is really there: int32 was written


def test_varian_round_trip(tmp_path):
    s = invented_signal(80)
    a = read_acquisition(write_varian(tmp_path / "fid1.fid", s))
    assert a.format == "varian" and a.points == 80 and a.nucleus == "1H" and a.filter_delay_points == 0
    np.testing.assert_allclose(a.signal, s, rtol=0, atol=1e-6)


def test_jcampdx_round_trip(tmp_path):
    s = invented_signal(73)
    a = read_acquisition(write_jcampdx(tmp_path / "fid1.jdx", s))
    assert a.format == "jcampdx" and a.points == 73 and a.nucleus == "1H"
    assert a.dwell_s == pytest.approx(DWELL, rel=1e-12)
    np.testing.assert_allclose(a.signal, s, rtol=0, atol=2e-9)


def test_field_from_the_observe_frequency_matches_codata():
    from scipy.constants import physical_constants
    gamma = physical_constants["proton gyromag. ratio"][0]       # CODATA, s^-1 T^-1
    import tempfile
    from pathlib import Path
    d = Path(tempfile.mkdtemp())
    a = read_acquisition(write_bruker(d / "x", invented_signal(16)))
    assert a.field_tesla == pytest.approx(2 * np.pi * OBS_MHZ * 1e6 / gamma, rel=1e-6)
    assert a.observe_mhz == OBS_MHZ and a.carrier_mhz == OBS_MHZ


@pytest.mark.filterwarnings("ignore:.*cannot be shaped into:UserWarning")
def test_sign_matches_nmrglue_frequency_axis(tmp_path):
    """A qhl signal exp(+2 pi i nu t) read from a stored FID peaks at +nu on nmrglue's own Hz axis
    (nmrglue.proc_base.fft + fileiobase.unit_conversion of the stored data), so the conjugation in
    the reader agrees with how nmrglue plots vendor data."""
    n, nu = 256, 1250.0
    s = np.exp(2j * np.pi * nu * np.arange(n) * DWELL)
    path = write_bruker(tmp_path / "one", s, grpdly=0.0)
    a = read_acquisition(path)
    np.testing.assert_allclose(a.signal, s[:a.points], atol=1e-12)
    dic, data = ng.bruker.read(str(path), read_pulseprogram=False)
    data = ng.bruker.remove_digital_filter(dic, data)
    uc = ng.fileiobase.unit_conversion(data.size, True, 1.0 / DWELL, OBS_MHZ, 0.0)
    peak_hz = uc.hz_scale()[np.argmax(np.abs(ng.proc_base.fft(data)))]
    assert abs(peak_hz - nu) < 1.0 / (data.size * DWELL)


# ------------------------------------------------------------------------------ mapping onto a cluster
def test_directory_of_datasets_maps_by_name_then_by_order(tmp_path):
    c = load_cluster(cluster_file(tmp_path, [("slow", 64), ("fast", 48)]))
    data = tmp_path / "data"
    data.mkdir()
    write_bruker(data / "fast", invented_signal(48))
    write_jcampdx(data / "slow.jdx", invented_signal(64))
    ds, acqs = load_spectrometer_data(data, c)
    assert list(ds.signals) == ["slow", "fast"] and [a.name for a in acqs] == ["slow", "fast"]
    np.testing.assert_allclose(ds.signals["fast"][1], invented_signal(48), atol=1e-12)
    np.testing.assert_allclose(ds.signals["slow"][0], c.experiment("slow").times_s)
    # names that match no experiment: by order (datasets in name order, experiments in file order)
    other = tmp_path / "other"
    other.mkdir()
    write_jcampdx(other / "a.jdx", invented_signal(64))
    write_bruker(other / "b", invented_signal(48))
    ds, acqs = load_spectrometer_data(other, c)
    assert [a.name for a in acqs] == ["a", "b"] and ds.signals["slow"][1].size == 64


@pytest.mark.parametrize("make,pattern", [
    (lambda d: write_bruker(d / "slow", invented_signal(63)), r"63 points .* but the experiment has points = 64"),
    (lambda d: write_bruker(d / "slow", invented_signal(64), nuc="13C"), r"nucleus 13C, but the cluster observes 1H"),
    (lambda d: write_jcampdx(d / "slow.jdx", invented_signal(64), nucleus="^19F"), r"nucleus 19F"),
    (lambda d: write_varian(d / "slow", invented_signal(64), tn="C13"), r"nucleus 13C"),
])
def test_disagreement_with_the_cluster_is_one_line(tmp_path, make, pattern):
    c = load_cluster(cluster_file(tmp_path, [("slow", 64)]))
    d = tmp_path / "data"
    d.mkdir()
    make(d)
    with pytest.raises(QhlInputError, match=pattern) as e:
        load_spectrometer_data(d, c)
    assert "\n" not in str(e.value)


def test_dwell_time_disagreement_names_the_t_max_to_set(tmp_path):
    p = cluster_file(tmp_path, [("slow", 64)])
    p.write_text(p.read_text().replace(f"t_max_s = {63 * DWELL!r}", "t_max_s = 0.0065"))
    c = load_cluster(p)
    write_bruker(tmp_path / "slow", invented_signal(64))
    with pytest.raises(QhlInputError, match=r"dwell time 0.0001 s .* set t_max_s = 0.0063"):
        load_spectrometer_data(tmp_path / "slow", c)


# ------------------------------------------------------------------------------ the CLI
def test_learn_fits_a_spectrometer_directory(tmp_path, capsys):
    """Data made with the exact engine for the cluster's own values, stored as a console would
    (conjugated, with gain and phase), with the filter delay; the fit starts at the truth and
    must stay within 3 Cramer-Rao bounds (4 checks at most: <= 1.1% false failures, fixed seed)."""
    from qhl.exact.engine import ExactEngine
    from qhl.spins.model import build_model
    path = cluster_file(tmp_path, [("slow", 64)])
    c = load_cluster(path)
    eng = ExactEngine(build_model(c, free="offset:*"))
    s = eng.signal(c.experiments[0])
    rng = np.random.default_rng(3)
    noisy = s + 1e-3 * (rng.normal(size=s.size) + 1j * rng.normal(size=s.size))
    write_bruker(tmp_path / "slow", noisy / noisy[0])
    rc = main(["learn", str(path), "--data", str(tmp_path / "slow"), "--free", "offset:*", "--nuisance",
               "scale,phase", "--json"])
    assert rc == 0
    captured = capsys.readouterr()
    js = json.loads(captured.out)
    assert js["data_files"][0]["format"] == "bruker" and js["data_files"][0]["points"] == 64
    truth = dict(zip(eng.model.free, eng.model.free_values_hz))
    for p in js["parameters"]:
        assert abs(p["fitted_hz"] - truth[p["name"]]) < 3 * p["stderr_hz"]
    assert {r["name"] for r in js["nuisance"]} == {"scale:slow", "phase:slow"}
    # The files were taken at 400.13 MHz (9.398 T): no note against the cluster's 9.4 T; a note at 11.7 T.
    assert "was taken at" not in captured.err
    path.write_text(path.read_text().replace("field_tesla = 9.4", "field_tesla = 11.7"))
    argv = ["learn", str(path), "--data", str(tmp_path / "slow"), "--free", "offset:*", "--max-iter", "3"]
    assert main(argv) in (0, 1)
    assert "was taken at 9.398 T (400.13 MHz 1H), the cluster file says field_tesla = 11.7" in capsys.readouterr().err


def _cli_error(capsys, argv):
    rc = main(argv)
    err = capsys.readouterr().err
    assert rc == 2 and err.count("\n") == 1 and err.startswith("qhl: error: "), err
    return err


def _truncate(p):
    fid = p / "fid"
    fid.write_bytes(fid.read_bytes()[:200])


def _swap_bytes(p):
    fid = p / "fid"
    fid.write_bytes(np.frombuffer(fid.read_bytes(), "<f8").astype(">f8").tobytes())


def _swap_int32(p):
    fid = p / "fid"
    fid.write_bytes(np.frombuffer(fid.read_bytes(), "<i4").astype(">i4").tobytes())


def test_int32_data_in_the_wrong_byte_order_are_one_line(tmp_path, capsys):
    path = cluster_file(tmp_path, [("slow", 64)])
    d = write_bruker(tmp_path / "slow", invented_signal(64), dtypa=0, gain=1e5)
    assert read_acquisition(d).points == 64          # the right order reads
    _swap_int32(d)
    err = _cli_error(capsys, ["learn", str(path), "--data", str(d)])
    assert "most values fill all 32 bits" in err and "BYTORDA = 0" in err


@pytest.mark.parametrize("corrupt,pattern", [
    (_truncate, r"fid: truncated FID: 200 bytes, but TD = \d+ values of 8 bytes need"),
    (lambda p: (p / "acqus").unlink(), r"missing parameter file: a fid but neither acqus"),
    (lambda p: (p / "fid").unlink(), r"missing fid: a Bruker-style directory holds acqus and fid"),
    (_swap_bytes, r"wrong byte order \(BYTORDA = 0\)"),
    (lambda p: (p / "acqus").write_text((p / "acqus").read_text().replace("##$TD= 156", "##$TD= 40")),
     r"the FID holds 156 values but acqus TD = 40"),
    (lambda p: (p / "acqus").write_text((p / "acqus").read_text().replace("##$SW_h= 10000.0", "##$SW_h= -3")),
     r"SW_h: expected a spectral width in Hz > 0"),
])
def test_corrupt_bruker_files_are_one_line_errors(tmp_path, capsys, corrupt, pattern):
    import re
    path = cluster_file(tmp_path, [("slow", 64)])
    d = write_bruker(tmp_path / "slow", invented_signal(64))
    assert "##$TD= 156" in (d / "acqus").read_text()
    corrupt(d)
    err = _cli_error(capsys, ["learn", str(path), "--data", str(d)])
    assert re.search(pattern, err), err


def test_point_count_disagreeing_with_the_cluster_via_cli(tmp_path, capsys):
    path = cluster_file(tmp_path, [("slow", 64)])
    write_bruker(tmp_path / "slow", invented_signal(60))
    err = _cli_error(capsys, ["learn", str(path), "--data", str(tmp_path / "slow")])
    assert "60 points (after removing the digital filter" in err and "points = 64" in err


def test_corrupt_varian_and_jcampdx_files_are_one_line_errors(tmp_path, capsys):
    path = cluster_file(tmp_path, [("slow", 64)])
    v = write_varian(tmp_path / "v", invented_signal(64))
    raw = (v / "fid").read_bytes()
    (v / "fid").write_bytes(raw[:100])
    assert "truncated FID: 100 bytes" in _cli_error(capsys, ["learn", str(path), "--data", str(v)])
    (v / "fid").write_bytes(raw)
    (v / "procpar").unlink()
    assert "missing parameter file" in _cli_error(capsys, ["learn", str(path), "--data", str(v)])
    v = write_varian(tmp_path / "w", invented_signal(64))
    head = np.frombuffer((v / "fid").read_bytes()[:32], ">i4").astype("<i4").tobytes()
    (v / "fid").write_bytes(head + raw[32:])
    assert "wrong byte order" in _cli_error(capsys, ["learn", str(path), "--data", str(v)])
    j = write_jcampdx(tmp_path / "slow.jdx", invented_signal(64), cut_lines=3)
    assert re_search(r"VAR_DIM: ##VAR_DIM= 64 points, but the pages hold 50 real",
                     _cli_error(capsys, ["learn", str(path), "--data", str(j)]))
    j = write_jcampdx(tmp_path / "slow.jdx", invented_signal(64), var_dim=70)
    assert "VAR_DIM= 70 points" in _cli_error(capsys, ["learn", str(path), "--data", str(j)])
    assert "no such file" in _cli_error(capsys, ["learn", str(path), "--data", str(tmp_path / "nothing.jdx")])


def re_search(pattern, text):
    import re
    return re.search(pattern, text) is not None


def test_csv_still_reads_through_the_same_option(tmp_path):
    from qhl.exact.likelihood import Dataset
    from qhl.learning.data_csv import write_signals_csv
    c = load_cluster(cluster_file(tmp_path, [("slow", 64)]))
    t = c.experiment("slow").times_s[:3]
    p = write_signals_csv(tmp_path / "d.csv", Dataset({"slow": (t, np.ones(3, complex), np.full(3, 1e-3))}))
    from qhl.learning.fitting import learn
    rep = learn(c, free="offset:*", data_path=p, max_iter=3)
    assert rep.dataset.signals["slow"][0].size == 3 and rep.acquisitions == []


@pytest.mark.parametrize("files,pattern", [
    ({"x.jdx": b""}, r"x.jdx: empty file"),
    ({"x.jdx": b"\xff\xfe\x00garbage"}, r"expected ##DATA TYPE= NMR FID, got '\(none\)'"),
    ({"x.jdx": b"##TITLE= x\n##DATA TYPE= NMR SPECTRUM\n##XYDATA= (X++(Y..Y))\n1 2 3\n##END=\n"},
     r"got 'NMR SPECTRUM'"),
    ({"d/acqus": b"junk\n", "d/fid": b"x"}, r"acqus: TD: missing parameter TD"),
    ({"d/procpar": b"junk\n", "d/fid": b"x" * 100}, r"procpar: cannot read the parameter file"),
    ({"d/fid": b"x"}, r"missing parameter file"),
    ({"d/notes.txt": b"x"}, r"no dataset found"),
])
def test_hostile_files_are_one_line_errors(tmp_path, files, pattern):
    """Common practice for this project's readers (tests/test_hostile_readers.py): one line, no warning."""
    import warnings
    for name, data in files.items():
        (tmp_path / name).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / name).write_bytes(data)
    target = tmp_path / next(iter(files)).split("/")[0]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(QhlInputError, match=pattern) as e:
            read_acquisitions(target)
    assert "\n" not in str(e.value)
