"""Command-line abuse: out-of-range options, Ctrl-C at start-up, warnings before errors, cut's observe.

Convention (common practice for this project): bad input prints one line `qhl: error: ...`
naming the option, the value and the allowed range, and exits with status 2.
"""

import warnings

import numpy as np
import pytest

import qhl.cli as cli
from qhl import QhlInputError, load_cluster
from qhl.cli import main
from qhl.survey.structure import demo_structure_path


def _error_line(capsys, argv):
    with pytest.raises(SystemExit) as e:
        main(argv)
    err = capsys.readouterr().err
    assert e.value.code == 2 and err.count("\n") == 1 and err.startswith("qhl: error: ")
    return err


@pytest.mark.parametrize("argv,pattern", [
    (["check", "--time", "1e-4", "--steps", "1", "--shots", "10", "--seed", "-1"], r"--seed: expected an integer in \[0, "),
    (["learn", "--seed", "-1"], r"--seed: expected an integer in \[0, "),
    (["check", "--time", "1e-4", "--steps", "1", "--shots", "1e20"], r"--shots: .*\[1, 100,000,000\], got '1e20'"),
    (["learn", "--gradients", "emulated", "--shots", "1e20"], r"--shots: .*\[1, 100,000,000\]"),
    (["budget", "--precision", "1e-320"], r"--precision: expected a number in \[1e-09, 1\)"),
    (["budget", "--time", "1e300"], r"--time: expected a number in \(0, 1000\], got '1e300'"),
    (["check", "--time", "1e300", "--steps", "1", "--shots", "1"], r"--time: .*\(0, 1000\]"),
    (["circuits", "--time", "1e300"], r"--time: .*\(0, 1000\]"),
    (["circuits", "--time", "1e-4", "--steps", "1e11"], r"--steps: expected an integer in \[1, 5,000\]"),
    (["check", "--time", "1e-4", "--steps", "100000000000", "--shots", "1"], r"--steps: .*\[1, 5,000\]"),
    (["scan", "x.toml", "--out", "r.csv", "--dipolar-scale", "1e-5:1e-4:100000000"],
     r"--dipolar-scale: expected A:B:N with N an integer in \[1, 10,000\]"),
    (["budget", "--sweep-time", "1e-4:1e-3:1000000"], r"--sweep-time: .*\[1, 1,000\]"),
    (["fisher", "--noise", "nan"], r"--noise: expected a number in \[1e-15, 1000\]"),
    (["cut", "x.pdb", "--size", "2", "--centres", "1", "--out", "o", "--field", "1e9"], r"--field: .*\(0, 100\]"),
    (["cut", "x.pdb", "--size", "100000", "--centres", "1", "--out", "o"], r"--size: .*\[2, 1,000\]"),
    (["scan", "x.toml", "--out", "r.csv", "--dipolar-scale", "1", "--points", "1e9"], r"--points: .*1,048,576"),
    (["signal", "--method", "typical", "--seed", "-1"], r"--seed: expected an integer in \[0, "),
    (["fisher", "--seed", "-1"], r"--seed: expected an integer in \[0, "),
])
def test_option_out_of_range_is_one_line(capsys, argv, pattern):
    import re
    assert re.search(pattern, _error_line(capsys, argv))


def test_integers_may_be_written_in_float_notation(capsys, tmp_path):
    assert cli.common.SHOTS("1e6") == 10**6 and cli.common.SEED("0") == 0
    assert cli.common.STEPS("12") == 12


def test_ctrl_c_during_start_up_prints_no_traceback(capsys, monkeypatch):
    def interrupted():
        raise KeyboardInterrupt
    monkeypatch.setattr(cli, "build_parser", interrupted)
    assert main(["signal"]) == 130
    assert capsys.readouterr().err == "qhl: interrupted\n"


def test_warnings_do_not_precede_a_one_line_error(capsys, monkeypatch):
    import qhl.cli.cmd_signal as cmd_signal

    def warn_then_refuse(args):
        np.log(np.zeros(1))                      # RuntimeWarning: divide by zero
        raise QhlInputError("refused", key="cluster")
    monkeypatch.setattr(cmd_signal, "cluster_from_args", warn_then_refuse)
    with warnings.catch_warnings():
        warnings.simplefilter("always")
        assert main(["signal"]) == 2
    assert capsys.readouterr().err == "qhl: error: cluster: refused\n"


def test_cut_observes_the_first_isotope_given(tmp_path, capsys):
    # the demo structure lists a carbon before any proton; --isotope 1H first means 1H is observed
    assert main(["cut", str(demo_structure_path()), "--isotope", "1H", "--isotope", "13C", "--size", "4",
                 "--centres", "3", "--out", str(tmp_path)]) == 0
    files = sorted(tmp_path.glob("*.toml"))
    assert files and all(load_cluster(f).observe == "1H" for f in files if "H" in f.read_text())
    assert all('observe = "1H"' in f.read_text() for f in files if 'isotope = "1H"' in f.read_text())
    assert main(["cut", str(demo_structure_path()), "--isotope", "13C", "--isotope", "1H", "--size", "4",
                 "--centres", "3", "--out", str(tmp_path / "c")]) == 0
    assert all(load_cluster(f).observe == "13C" for f in (tmp_path / "c").glob("*.toml"))


@pytest.mark.parametrize("command", ["fisher", "learn"])
def test_missing_noise_names_the_option(tmp_path, capsys, command):
    from pathlib import Path
    demo = (Path(cli.__file__).parents[1] / "data" / "demo_cluster.toml").read_text()
    p = tmp_path / "quiet.toml"
    p.write_text(demo.replace("noise = 1.0e-3\n", ""))
    assert main([command, str(p)]) == 2
    err = capsys.readouterr().err
    assert "--noise" in err and err.count("\n") == 1


def test_integer_options_with_hundreds_of_digits(capsys):
    assert "--seed: expected an integer" in _error_line(capsys, ["learn", "--seed", "9" * 400])
    assert "--shots: expected an integer" in _error_line(capsys, ["learn", "--shots", "9" * 5000])


def test_step_count_derived_from_eps_is_bounded(capsys):
    # a tight bound over a long time asks for billions of steps: refused, not built
    assert main(["circuits", "--time", "1e-3", "--eps", "1e-6"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--eps: needs" in err and "at most 5,000" in err


FULL = "/dev/full"      # Linux: every write fails with ENOSPC (a full disk)


@pytest.mark.skipif(not __import__("os").path.exists(FULL), reason="needs /dev/full (Linux)")
@pytest.mark.parametrize("argv,option", [
    (["learn", "--max-iter", "3", "--json", "--report", FULL], "--report"),
    (["learn", "--max-iter", "3", "--plot", FULL], "--plot"),
    (["signal", "--plot", FULL], "--plot"),
    (["circuits", "--time", "1e-4", "--steps", "2", "--qasm", FULL], "--qasm"),
    (["circuits", "--time", "1e-4", "--steps", "2", "--json", "--qasm", FULL], "--qasm"),
])
def test_a_failed_output_write_is_one_line_and_keeps_the_result(capsys, argv, option):
    # common practice: a write error at the end (disk full) used to raise OSError with a traceback and
    # lose the finished result; now one error line names the option and the file, the result is still
    # printed, and the exit status is 2
    rc = main(argv)
    out, err = capsys.readouterr()
    errors = [line for line in err.splitlines() if line.startswith("qhl: error: ")]
    assert rc == 2 and errors == [f"qhl: error: {option}: could not write '{FULL}': No space left on device"]
    assert "Traceback" not in err and "wrote" not in out
    if "--json" in argv:
        import json
        data = json.loads(out)
        assert data and data.get("qasm") is None and data.get("plot") is None
    else:
        assert out.count("\n") >= 3                      # the table is there


@pytest.mark.parametrize("t", ["1e-40", "1e-300"])
def test_budget_at_a_vanishing_time_gives_a_budget_not_a_traceback(capsys, t):
    # common practice: t -> 0 makes every derivative ~t, so the error allowed on the amplitude grows
    # without bound (one query) and the rounded amplitude may step outside [0, 1]; both used to end
    # in "cannot convert float NaN to integer"
    import json
    assert main(["budget", "--time", t, "--no-classical", "--json"]) == 0
    ft = json.loads(capsys.readouterr().out)["fault_tolerant"]
    assert ft["t_count"] > 0 and ft["logical_qubits"] > 0


def test_amplitude_queries_are_stable_for_small_and_large_errors():
    # Brassard, Hoyer, Mosca, Tapp, Contemp. Math. 305, 53 (2002), thm. 12: the bound
    # 2 pi sqrt(a(1-a))/M + pi^2/M^2, solved here by bisection on M (independent of the closed form)
    from qhl.costing.amplitude_estimation import queries_for_amplitude_error

    def smallest(e, a):
        bound = lambda m: 2 * np.pi * np.sqrt(a * (1 - a)) / m + np.pi ** 2 / m ** 2
        lo, hi = 1, 1
        while bound(hi) > e:
            hi *= 2
        while lo < hi:
            mid = (lo + hi) // 2
            lo, hi = (mid + 1, hi) if bound(mid) > e else (lo, mid)
        return lo
    for e, a in [(1e-3, 0.5), (1e-9, 0.5), (1e-12, 0.3), (1e-14, 0.0), (1e3, 0.5)]:
        assert queries_for_amplitude_error(e, a) == smallest(e, a)
    assert queries_for_amplitude_error(np.inf) == 1 and queries_for_amplitude_error(1e-3, 1 + 1e-15) >= 1
    with pytest.raises(QhlInputError):
        queries_for_amplitude_error(1e-320)


def _returned_error(capsys, argv):
    rc = main(argv)
    err = capsys.readouterr().err
    assert rc == 2 and err.count("\n") == 1 and err.startswith("qhl: error: ")
    return err


@pytest.mark.parametrize("argv", [["signal", "--plot", "fid.txt"], ["budget", "--no-classical", "--plot", "sweep.dat"]])
def test_plot_format_is_checked_before_any_work(capsys, tmp_path, monkeypatch, argv):
    # common practice: matplotlib refuses 'txt' only when saving, after the work (and left an empty file)
    monkeypatch.chdir(tmp_path)
    err = _returned_error(capsys, argv)
    assert f"--plot: cannot write a figure to '{argv[-1]}': expected a file ending in .png, .pdf, .svg" in err
    assert not (tmp_path / argv[-1]).exists()


def test_gradient_without_a_free_parameter_is_one_line(capsys, tmp_path):
    # common practice: --free 'dipolar:*' on a one-spin cluster leaves nothing to differentiate (it was
    # an argmax-of-empty traceback, and an empty gradient with exit 0 under --json)
    path = tmp_path / "lone.toml"
    path.write_text('field_tesla = 9.4\nobserve = "1H"\n[[spin]]\nlabel = "H1"\nisotope = "1H"\n'
                    'offset_hz = 10.0\n[[experiment]]\nname = "fid"\nt_max_s = 1e-3\npoints = 8\n')
    for extra in ([], ["--json"]):
        err = _returned_error(capsys, ["signal", str(path), "--gradient", "--free", "dipolar:*", *extra])
        assert "--free: no parameter of" in err and "nothing to differentiate" in err and "offset:H1" in err


from test_cli_circuits import SPINNING      # an invented two-proton cluster spinning at 100 kHz

SPIN_STEPS = SPINNING.replace("points = 8\n", "points = 8\nnoise = 1e-3\n") + """[[experiment.step]]
delay_s = 1.25e-6
[[experiment.step]]
pulse_deg = 180
"""


def test_engine_refusals_of_a_file_entry_name_the_file(capsys, tmp_path):
    # common practice (this project's convention): FILE: KEY: message. The off-rotor delay is found by
    # the spinning engine after the file was read, and its message used to lack the file
    path = tmp_path / "offrotor.toml"
    path.write_text(SPIN_STEPS)
    err = _returned_error(capsys, ["fisher", str(path)])
    assert err.startswith(f"qhl: error: {path}: experiment.step.delay_s: ") and "0.125 rotor periods" in err
    # an option's error names no file
    err = _returned_error(capsys, ["fisher", str(path), "--free", "nope:*"])
    assert str(path) not in err and "no parameter matches 'nope:*'" in err


def test_byte_order_mark_and_no_experiments(capsys, tmp_path):
    # a UTF-8 byte-order mark before a cluster file is dropped (common practice for text files written on
    # Windows); a cluster without experiments gives qhl signal nothing to compute (one line, as qhl fisher)
    path = tmp_path / "bom.toml"
    text = SPIN_STEPS.split("[[experiment]]")[0]
    path.write_bytes(b"\xef\xbb\xbf" + text.encode())
    err = _returned_error(capsys, ["signal", str(path)])
    assert err == f"qhl: error: {path}: experiment: the cluster defines no experiments: add an [[experiment]]\n"


def test_structure_files_folders_and_a_stray_param_are_one_line(capsys, tmp_path):
    # common practice: say what the input is and what to do instead (a TOML syntax error for a PDB file,
    # "no such file" for a folder and a silently ignored --param were the old answers)
    pdb = tmp_path / "made_up.pdb"
    pdb.write_text("HETATM    1  H1  QXA A   1       0.000   0.000   0.000  1.00 20.00           H  \nEND\n")
    assert "a structure file, not a cluster file: cut clusters from it with `qhl cut made_up.pdb" in \
        _returned_error(capsys, ["signal", str(pdb)])
    assert _returned_error(capsys, ["signal", str(tmp_path)]).endswith(f"{tmp_path}: a folder, not a file\n")
    assert "a folder, not a structure file" in _returned_error(
        capsys, ["cut", str(tmp_path), "--size", "2", "--centres", "1", "--out", str(tmp_path / "o")])
    assert "--param: --kind signal differentiates nothing" in _returned_error(
        capsys, ["circuits", "--time", "1e-4", "--steps", "1", "--param", "offset:H1"])
