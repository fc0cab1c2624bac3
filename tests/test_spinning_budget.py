"""`qhl budget` (and the other CLI paths) on clusters with spinning experiments.

References: gate counts from qiskit.transpile (basis [cx, rz, sx, x], optimisation level 2, seed 1234: the
counting convention of the README) of the compiled spinning signal circuit, counted here; T per rotation
3 log2(1/eps) (N. J. Ross and P. Selinger, Quantum Inf. Comput. 16, 901 (2016), from memory); the steps
rule is stated in qhl.circuits.spinning_circuits (8 steps per rotor period, common practice). The cluster is
invented (tests/test_spinning_circuits.py).
"""

import json
import math

import numpy as np
import pytest
from qiskit import transpile

from qhl.cli import main
from qhl.circuits.spinning_circuits import spinning_gradient_circuit, spinning_signal_circuit

import test_spinning_circuits as spin

EXTRA_STATIC = '[[experiment]]\nname = "static"\nt_max_s = 8e-5\npoints = 16\n'


def _run(capsys, *argv):
    try:
        rc = main(list(argv))
    except SystemExit as e:
        rc = e.code
    out = capsys.readouterr()
    return rc, out.out, out.err


def _transpiled_counts(circuit):
    """cx, rotations (rz with an angle not a multiple of pi/2) and depth of a level-2 transpile, counted here."""
    tq = transpile(circuit, basis_gates=["cx", "rz", "sx", "x"], optimization_level=2, seed_transpiler=1234)
    rot = sum(1 for inst in tq.data if inst.operation.name == "rz"
              and abs(float(inst.operation.params[0]) / (np.pi / 2) - round(float(inst.operation.params[0]) / (np.pi / 2)))
              > 1e-9)
    return {"cx": int(tq.count_ops().get("cx", 0)), "rotations": rot, "depth": int(tq.depth())}


def test_budget_json_of_a_spinning_cluster(capsys, tmp_path):
    path = tmp_path / "rotor.toml"
    path.write_text(spin._text(4))
    rc, out, err = _run(capsys, "budget", str(path), "--precision", "0.01", "--json")
    assert rc == 0, err
    d = json.loads(out)
    assert d["near_term"] == {} and d["fault_tolerant"] == {}          # not covered: said in the notes
    assert any("not covered" in n for n in d["notes"])
    (e,) = d["spinning"]
    assert e["name"] == "mas" and e["spinning_hz"] == 12500.0
    assert e["angle_deg"] == pytest.approx(54.7356103, abs=1e-6)      # the magic angle, arccos(1/sqrt 3)
    assert e["trotter_steps"] == 8 and e["steps_from"] == "rotor rule"   # ceil(8 x 12.5 kHz x 80 us)
    assert "8 steps per rotor period" in e["steps_rule"]
    # counts: the compiled circuit itself, transpiled and counted here
    c = spin._cluster(4)
    m = spin.build_model(c)
    fam = spinning_signal_circuit(m, c.experiments[0], spin.T, 8, 2)
    want = _transpiled_counts(fam.with_measurements(fam.representative()))
    got = e["signal_circuit"]
    assert {k: got[k] for k in want} == want
    assert got["qubits"] == 4
    # T-count: rotations x 3 log2(1/eps_rot), eps_rot = synthesis share x eps / rotations
    assert got["t_count"] == math.ceil(got["rotations"] * 3 * math.log2(1 / e["rotation_error"]))
    assert e["rotation_error"] < 0.01 / got["rotations"]
    # near-term shots of the worst gradient component: the single-shot range of the compiled Hadamard estimator,
    # 2 W N_obs with 2 W = the family's total insertion weight (qhl.circuits.gradient_circuits docstring:
    # values in +-2 W N_obs; Popoviciu), N_obs = 3 observed protons, per kHz
    n = e["near_term"]
    ranges = {nm: spinning_gradient_circuit(m, c.experiments[0], nm, spin.T, 8, 2).insertions.total_weight * 3 * 1e3
              for nm in m.free}
    assert n["worst_parameter"] == max(ranges, key=ranges.get)
    assert n["component_range"] == pytest.approx(max(ranges.values()), rel=1e-12)
    assert n["shots_per_component_bound"] == math.ceil(n["component_range"] ** 2 / 0.01 ** 2 * (1 - 1e-12))
    assert 0 < n["shots_per_component_circuit"] <= n["shots_per_component_bound"] < n["shots_per_component_hoeffding"]
    # the Richardson estimate of the signal error at r = 8 against the measured error against the dense
    # time-ordered reference (2.66e-4, tests/test_spinning_circuits.py): within 20 %
    assert e["signal_error"]["value"] == pytest.approx(2.66e-4, rel=0.2)
    _check_amplitude_estimation(e, 0.01)
    # the exact mean of the worst component: central differences of the dense time-ordered reference
    # (tests/reference_spinning.py, 400 slices per period: O(slice^2) ~1e-5 of the signal), per kHz; the
    # variance bound R^2 - mu^2 (Bhatia and Davis, Amer. Math. Monthly 107, 353 (2000): variance of values
    # in [-R, R] with mean mu) lies above the compiled estimator's exact variance
    from reference_spinning import dense_spinning_gradient
    k = list(m.free).index(n["worst_parameter"])
    ref = dense_spinning_gradient(c, m, c.experiments[0], [spin.T], step_hz=1e-2)[k, 0].real * 1e3
    assert n["mean"] == pytest.approx(ref, abs=1e-4 * n["component_range"])
    assert n["shots_per_component"] == math.ceil((n["component_range"] ** 2 - n["mean"] ** 2) / 0.01 ** 2
                                                  * (1 - 1e-12))
    assert n["shots_per_component_circuit"] <= n["shots_per_component"]
    assert "lower bound" in d["classical"]["covers"] and d["classical"]["memory_bytes"] > 0


def _check_amplitude_estimation(e, eps):
    """Fault-tolerant amplitude estimation of the worst component against outside references."""
    ae = e["fault_tolerant"]["amplitude_estimation"]
    assert e["fault_tolerant"]["parameter"] == e["near_term"]["worst_parameter"]
    # Brassard, Hoyer, Mosca and Tapp, "Quantum amplitude amplification and estimation" (2002), Thm 12: M
    # queries give |a~ - a| <= 2 pi sqrt(a(1-a)) / M + pi^2 / M^2 (a = 1/2 the worst case) with probability
    # >= 8/pi^2; the target is the estimation share (0.70, the budget's stated split) of eps over 2R. M is the
    # canonical algorithm's power of two: the smallest one meeting the target.
    target = 0.70 * eps / (2 * e["near_term"]["component_range"])
    bound = lambda m: math.pi / m + math.pi ** 2 / m ** 2
    m = ae["queries"]
    assert m & (m - 1) == 0 and bound(m) <= target < bound(m // 2)
    # the median of k runs fails with probability <= delta = 0.05 (Hoeffding, common practice)
    p = 8 / math.pi ** 2
    assert ae["runs"] == math.ceil(math.log(1 / 0.05) / (2 * (p - 0.5) ** 2))
    # every call of the gradient circuit carries at least its own rotations plus one per insertion point
    assert ae["rotations_per_call"] >= e["gradient_circuit"]["rotations"] + e["trotter_steps"] + 1
    # qiskit.synthesis.gridsynth_rz (Ross and Selinger, Quantum Inf. Comput. 16, 901 (2016)) at the stated
    # rotation error: its T-count on generic angles within 15 % of the T per rotation used
    from qiskit.synthesis import gridsynth_rz
    counts = [gridsynth_rz(a, ae["rotation_error"]).count_ops().get("t", 0) for a in (0.3117, 1.0471, 2.2222)]
    assert np.median(counts) == pytest.approx(ae["t_per_rotation"], rel=0.15)
    assert ae["t_count"] >= ae["runs"] * m * ae["rotations_per_call"] * min(counts) * 0.8
    assert ae["logical_qubits"] >= e["gradient_circuit"]["qubits"] + int(math.log2(m))


def test_budget_text_and_refused_sweep(capsys, tmp_path):
    path = tmp_path / "rotor.toml"
    path.write_text(spin._text(3))
    rc, out, _ = _run(capsys, "budget", str(path))
    assert rc == 0
    assert "spinning 'mas'" in out and "Trotter steps" in out
    rc, out, err = _run(capsys, "budget", str(path), "--sweep-time", "1e-5:1e-4:3")
    assert rc == 2 and "spins" in err and "Traceback" not in err


def test_mixed_cluster_keeps_the_static_budget(capsys, tmp_path):
    path = tmp_path / "mixed.toml"
    path.write_text(spin._text(3) + EXTRA_STATIC)
    rc, out, err = _run(capsys, "budget", str(path), "--json", "--no-classical")
    assert rc == 0, err
    d = json.loads(out)
    assert d["near_term"]["shots_per_component"] > 0
    assert d["fault_tolerant"]["worst_component"]["experiment"] == "static"
    (e,) = d["spinning"]
    # the spinning circuit takes the free-evolution budget's steps when they exceed the rotor rule
    assert d["fault_tolerant"]["trotter_order"] in (1, 2)          # orders the circuits build (measured: 1)
    assert e["trotter_steps"] == max(8, d["fault_tolerant"]["trotter_steps"])
    assert e["trotter_order"] == d["fault_tolerant"]["trotter_order"]
    assert "spinning_circuits" in d["assumptions"]


def test_signal_command_runs_the_exact_spinning_engine(capsys, tmp_path):
    # qhl signal takes a spinning experiment (qhl.exact.spinning_engine); S(0) = 1 by the normalisation
    # S(t) = Tr[O rho(t)] / Tr[O rho(0)] (common practice)
    path = tmp_path / "rotor.toml"
    path.write_text(spin._text(3))
    rc, out, err = _run(capsys, "signal", str(path), "--json")
    assert rc == 0, err
    (e,) = json.loads(out)["experiments"]
    assert e["times_s"][0] == 0.0
    assert abs(e["signal_real"][0] - 1.0) < 1e-12 and abs(e["signal_imag"][0]) < 1e-12
    assert len(e["signal_real"]) == len(e["times_s"]) > 2


@pytest.mark.parametrize("argv", [["circuits", "--time", "8e-5", "--steps", "8", "--kind", "hessian", "--param",
                                   "offset:A"],
                                  ["check", "--time", "8e-5", "--steps", "4", "--shots", "100", "--hessian"]])
def test_other_commands_give_one_line_errors(capsys, tmp_path, argv):
    path = tmp_path / "rotor.toml"
    path.write_text(spin._text(3))
    rc, out, err = _run(capsys, argv[0], str(path), *argv[1:])
    assert rc == 2
    assert "spins" in err and "Traceback" not in err
    assert len([ln for ln in err.splitlines() if ln.startswith("qhl: error")]) == 1


def test_slow_rotor_takes_more_steps_than_the_rotor_rule(capsys, tmp_path):
    # at 2 kHz one rotor period lasts 500 us: the rule's 8 steps (62.5 us each) do not resolve kHz couplings, so
    # the budget doubles r until the Richardson error estimate is within the Trotter share of eps; the error of
    # the chosen r against the dense time-ordered reference (tests/reference_spinning.py) must then be within
    # twice that target (Richardson is an estimate)
    text = spin._text(3, spinning_hz=2000.0).replace(f"t_max_s = {spin.T}", "t_max_s = 0.0005")
    path = tmp_path / "slow.toml"
    path.write_text(text)
    rc, out, err = _run(capsys, "budget", str(path), "--precision", "0.01", "--json")
    assert rc == 0, err
    (e,) = json.loads(out)["spinning"]
    assert e["steps_rotor_rule"] == 8 and e["trotter_steps"] > 8
    assert e["steps_from"].startswith("signal error")
    assert e["signal_error"]["value"] <= e["signal_error"]["target"]
    c = spin.parse_cluster_toml(text, "made_up.toml")
    m = spin.build_model(c)
    ex = c.experiments[0]
    ref = spin.dense_spinning_signal(c, m, ex, [5e-4])[0]
    got = spin._operator_signal(m, spin.spinning_evolution(m, ex, 5e-4, e["trotter_steps"], 2))
    assert abs(got - ref) <= 2 * e["signal_error"]["target"]
    # and at half the steps the error is above the target (the doubling stopped at the first r that fits)
    half = spin._operator_signal(m, spin.spinning_evolution(m, ex, 5e-4, e["trotter_steps"] // 2, 2))
    assert abs(half - ref) > 0.5 * e["signal_error"]["target"]


def test_circuits_command_counts_the_spinning_circuits(capsys, tmp_path):
    # qhl circuits on a spinning experiment: the counts of the compiled time-dependent circuit, transpiled and
    # counted here (qiskit.transpile), equal to the budget's signal circuit; --eps takes at least the rotor rule
    path = tmp_path / "rotor.toml"
    path.write_text(spin._text(4))
    rc, out, err = _run(capsys, "circuits", str(path), "--time", str(spin.T), "--steps", "8", "--order", "2",
                        "--json")
    assert rc == 0, err
    d = json.loads(out)
    c = spin._cluster(4)
    m = spin.build_model(c)
    fam = spinning_signal_circuit(m, c.experiments[0], spin.T, 8, 2)
    want = _transpiled_counts(fam.with_measurements(fam.representative()))
    assert {k: d[k] for k in want} == want
    assert any("spinning" in note for note in d["notes"])
    rc, out, err = _run(capsys, "circuits", str(path), "--time", str(spin.T), "--eps", "0.5", "--order", "2",
                        "--json")
    assert rc == 0, err
    d = json.loads(out)
    assert d["steps"] >= 8 and d["trotter_error_bound"] <= 0.5
