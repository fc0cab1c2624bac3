"""`qhl budget`: the --json contract and one-line errors with exit code 2.

The physics of each number is checked against its published source in tests/test_costing_*.py;
here only the contract and the bad-input behaviour (exit code 2, common practice) are tested."""

import json

import pytest

from qhl.cli import main


def _run(capsys, *argv):
    try:
        rc = main(["budget", *argv])
    except SystemExit as e:   # argparse's own usage errors
        rc = e.code
    out = capsys.readouterr()
    return rc, out.out, out.err


def test_json_contract(capsys):
    rc, out, _ = _run(capsys, "--time", "1e-4", "--precision", "0.02", "--physical-error", "1e-3", "--json")
    assert rc == 0
    d = json.loads(out)
    for key in ("shots_per_component", "shots_per_gradient", "shots_per_hessian_entry"):
        assert d["near_term"][key] > 0
    for key in ("logical_qubits", "trotter_order", "trotter_steps", "depth", "t_count"):
        assert d["fault_tolerant"][key] > 0
    assert d["fault_tolerant"]["trotter_order"] in (1, 2, 4)
    assert "hoeffding" in d["assumptions"] and d["surface_code"]["code_distance"] >= 3
    assert d["time_s"] == 1e-4


def test_text_output_with_sweep_and_plot(capsys, tmp_path):
    png = tmp_path / "b.png"
    rc, out, err = _run(capsys, "--sweep-time", "1e-5:1e-4:4", "--sweep-precision", "1e-3:1e-1:3",
                        "--plot", str(png))
    assert rc == 0
    assert "fitted scaling exponents" in out and "near_term_component_bound" in out
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "budget:" in err   # progress on stderr


@pytest.mark.parametrize("argv, what", [
    (["--precision", "0"], "--precision"),
    (["--precision", "1"], "--precision"),
    (["--precision", "-0.5"], "--precision"),
    (["--time", "0"], "--time"),
    (["--time", "-0.0001"], "--time"),
    (["--time=-1e-4"], "--time"),
    (["--time", "nan"], "--time"),
    (["--sweep-time", "1e-5:1e-4"], "--sweep-time"),
    (["--sweep-time", "a:b:3"], "--sweep-time"),
    (["--sweep-time", "1e-4:1e-5:3"], "--sweep-time"),
    (["--sweep-time", "1e-5:1e-4:1"], "--sweep-time"),
    (["--sweep-precision", "1e-3:2:5"], "--sweep-precision"),
    (["--physical-error", "0.01"], "threshold"),
    (["--physical-error", "0.3"], "threshold"),
])
def test_bad_input_one_line_exit_2(capsys, argv, what):
    rc, out, err = _run(capsys, *argv)
    assert rc == 2
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and what in lines[0] and "Traceback" not in err
