"""`qhl circuits`: the JSON contract, OpenQASM 3 export and one-line errors with exit code 2.

References: the OpenQASM 3 specification (Cross et al., "OpenQASM 3: A broader and deeper quantum
assembly language", ACM Trans. Quantum Comput. 3, 12 (2022)) for the file header; counts are
re-derived from the exported text; exit code 2 for bad input is common practice (argparse)."""

import json
import re

import numpy as np
import pytest

from qhl.circuits.circuit_counts import is_clifford_angle
from qhl.cli import main

BASE = ["circuits", "--time", "1e-5", "--steps", "2"]


def _run(capsys, argv):
    rc = main(argv)
    out = capsys.readouterr()
    return rc, out.out, out.err


def _angle(text):
    # OpenQASM 3 angles as qiskit writes them: numbers and products/quotients with pi
    if not re.fullmatch(r"[0-9eE+\-*/.\s()pi]+", text):
        raise ValueError(text)
    return eval(text.replace("pi", repr(np.pi)), {"__builtins__": {}}, {})


@pytest.mark.parametrize("kind,extra,qubits", [("signal", [], 6), ("gradient", ["--param", "dipolar:H1-H2"], 7),
                                               ("hessian", ["--param", "offset:H1", "j:H3-H4"], 8)])
def test_json_contract_and_qasm_counts(capsys, tmp_path, kind, extra, qubits):
    qasm = tmp_path / f"{kind}.qasm"
    rc, out, err = _run(capsys, BASE + ["--kind", kind, *extra, "--order", "2", "--json", "--qasm", str(qasm)])
    assert rc == 0 and err == ""
    report = json.loads(out)
    assert {"qubits", "cx", "depth", "rotations", "steps"} <= set(report)
    assert report["qubits"] == qubits and report["steps"] == 2
    assert report["cx"] > 0 and report["depth"] > 0 and report["rotations"] > 0
    text = qasm.read_text()
    assert text.startswith("OPENQASM 3")
    # the exported circuit is the counted one: its gate lines give the same numbers
    gates = [ln.strip() for ln in text.splitlines() if re.match(r"\s*(cx|rz|sx|x)\b", ln)]
    assert sum(g.startswith("cx ") for g in gates) == report["cx"]
    rz = [_angle(re.match(r"rz\((.*)\)", g).group(1)) for g in gates if g.startswith("rz(")]
    assert sum(not is_clifford_angle(a) for a in rz) == report["rotations"]
    assert re.search(rf"qubit\[{qubits}\]", text)


def test_text_output_and_drawing(capsys):
    rc, out, err = _run(capsys, BASE + ["--kind", "gradient", "--param", "offset:H2", "--draw"])
    assert rc == 0
    assert "whole circuit" in out and "one Trotter step" in out
    assert "q_6" in out           # the ancilla appears in the drawing of the one-step instance


def test_eps_chooses_steps(capsys):
    rc, out, _ = _run(capsys, ["circuits", "--time", "1e-5", "--eps", "0.01", "--order", "2", "--json"])
    assert rc == 0
    from qhl import build_model, demo_cluster
    from qhl.circuits.trotter import trotter_terms
    from qhl.circuits.trotter_bounds import trotter_steps_for
    c = demo_cluster()
    terms = trotter_terms(build_model(c), c.experiments[0])
    assert json.loads(out)["steps"] == trotter_steps_for(terms, 1e-5, 0.01, 2)


@pytest.mark.parametrize("argv", [
    BASE + ["--kind", "gradient", "--param", "offset:H9"],          # unknown parameter
    BASE + ["--kind", "gradient"],                                    # no parameter
    ["circuits", "--time", "0", "--steps", "2"],                      # non-positive time
    ["circuits", "--time", "-1e-5", "--steps", "2"],
    ["circuits", "--time", "1e-5", "--steps", "0"],                   # non-positive steps
    ["circuits", "--time", "1e-5"],                                   # neither steps nor eps
    BASE + ["--kind", "spectrum"],                                    # a kind not offered
    BASE + ["--qasm", "/nonexistent-folder/out.qasm"],                # unwritable output
    BASE + ["--experiment", "spinning"],                              # unknown experiment
    BASE + ["--kind", "hessian", "--param", "offset:H1", "offset:H2", "offset:H3"],
    BASE + ["--eps", "0.01"],                                         # --steps and --eps together
])
def test_bad_input_exits_2_with_one_line(capsys, argv):
    try:
        rc = main(argv)
    except SystemExit as e:      # argparse usage errors exit through parser.exit
        rc = e.code
    err = capsys.readouterr().err.strip()
    assert rc == 2
    assert len(err.splitlines()) == 1 and err.startswith("qhl: error:")


def test_bound_above_one_gets_a_note(capsys):
    """||U - V|| <= 2 for unitaries (common practice): a commutator bound above 1 says nothing."""
    rc, out, err = _run(capsys, ["circuits", "--time", "2e-4", "--steps", "1", "--json"])
    assert rc == 0
    data = json.loads(out)
    assert data["trotter_error_bound"] > 1 and "says nothing" in err and data["notes"]
    rc, out, err = _run(capsys, ["circuits", "--time", "1e-6", "--steps", "4", "--json"])
    assert json.loads(out)["trotter_error_bound"] < 1 and "says nothing" not in err


SPINNING = """name = "rotor-trio"
field_tesla = 9.4
observe = "1H"
[[spin]]
label = "A"
isotope = "1H"
position_angstrom = [0.0, 0.0, 0.0]
offset_hz = 100.0
[[spin]]
label = "B"
isotope = "1H"
position_angstrom = [1.8, 0.0, 0.0]
offset_hz = -250.0
[[experiment]]
name = "mas"
t_max_s = 2e-4
points = 8
spinning_hz = 1e5
"""


def test_spinning_steps_follow_the_rotor_rule_even_when_given(capsys, tmp_path):
    # the README's rule r = max(requested, ceil(8 nu_r t)) (common practice: 8 steps per rotor period):
    # 1e5 Hz over 1e-4 s is 10 periods, so --steps 2 becomes 80, with a note; --steps 100 stays 100
    path = tmp_path / "rotor.toml"
    path.write_text(SPINNING)
    rc, out, err = _run(capsys, ["circuits", str(path), "--time", "1e-4", "--steps", "2", "--json"])
    assert rc == 0 and json.loads(out)["per_step"] and "raised to 80 by the rotor rule" in err
    rc, out, err = _run(capsys, ["circuits", str(path), "--time", "1e-4", "--steps", "2"])
    assert "r = 80 steps" in out
    rc, out, err = _run(capsys, ["circuits", str(path), "--time", "1e-4", "--steps", "100"])
    assert "r = 100 steps" in out and "raised" not in err
    assert main(["check", str(path), "--time", "1e-4", "--steps", "2", "--shots", "50", "--param", "offset:A"]) == 0
    cap = capsys.readouterr()
    assert "r = 80 steps" in cap.out and "raised to 80 by the rotor rule" in cap.err
    # 0.1 s at 100 kHz needs 80,000 steps: refused before any circuit is built
    assert main(["check", str(path), "--time", "0.1", "--steps", "2", "--shots", "50", "--param", "offset:A"]) == 2
    assert "needs 80,000 Trotter steps over 0.1 s; at most 5,000 are built" in capsys.readouterr().err
