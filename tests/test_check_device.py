"""`qhl check --device`: gradients emulated under an offline fake backend's noise model (SamplerV2 on
AerSimulator.from_backend) beside the exact value times the predicted attenuation.

References: the calibration snapshot of qiskit-ibm-runtime's fake_lima (5 qubits; its Target's
gate and readout errors), the dense Trotterised derivatives (qhl.circuits.trotter_reference),
and the global-depolarising attenuation model (qhl.circuits.circuit_fidelity; common practice,
a pessimistic bound, its accuracy measured there). Statistics: central limit theorem (common practice), fixed seeds.
"""

import json

import pytest

from qhl.cli import main
from qhl.emulation.check import check_derivatives

from made_up_clusters import small_cluster


@pytest.fixture
def cluster(trio_file):
    return trio_file


def test_device_check_is_consistent_with_predicted_attenuation():
    """3 spins + ancilla on fake_lima (46 cx after routing), dS/d offset:S0 at t = 1 s, r = 2,
    30000 shots per part, seed 3. The attenuation model F R = prod (1 - p_g) prod (1 - 2 q) is a
    pessimistic bound: the exact density-matrix shrink of this family under the device's noise model
    (qiskit-aer, NoiseModel.from_backend) is 0.657 against F R = 0.532 (1.23 F R), so the expected
    Re-row z against the prediction is +2.5; the check therefore tests the interval [predicted,
    trotter_exact] (DEVICE_RULE). Re: emulated 0.446 +- 0.038, predicted 0.420, noiseless 0.790
    (z 0.68, z_noiseless -9.0; sampler seeded per batch, qhl.emulation.check). The true value sits 2.5 sd inside the lower edge and 7 sd inside the
    upper one, so a false failure needs a 2.5-sd fluctuation (~6e-3 per row). The Re row has power
    and rejects the unattenuated value (z_noiseless < -4): the check sees the noise."""
    rep = check_derivatives(small_cluster(False, 3), 1.0, 2, 30000, 3, parameters=["offset:S0"],
                            device="fake_lima")     # 4 active qubits: Aer's density-matrix method
    assert rep.device == "fake_lima" and len(rep.rows) == 2 and rep.status == "pass"
    for r in rep.rows:
        print(f"\n  {r['part']}: emulated {r['emulated']:.4f} +- {r['stderr']:.4f}, predicted {r['predicted']:.4f} "
              f"(F R = {r['attenuation']:.3f}, {r['two_qubit_gates']} cx), z {r['z']:.2f}, "
              f"z_noiseless {r['z_noiseless']:.2f}")
        assert r["z"] > -4 and r["z_noiseless"] < 4            # trotter_exact > 0 on both rows
        assert r["predicted"] == pytest.approx(r["trotter_exact"] * r["attenuation"], rel=1e-12)
        assert 0.3 < r["attenuation"] < 0.9 and r["two_qubit_gates"] >= 20
    re = rep.rows[0]
    assert re["trotter_exact"] > 0 and re["power"] and re["z_noiseless"] < -4


def test_device_rule_fails_outside_the_interval():
    """The interval rule of device rows (qhl.emulation.check.DEVICE_RULE), hand-built rows: a value damped
    beyond the bound fails, one above the noiseless value fails, one inside passes; mirrored for a negative
    value (common practice: a bound is tested from its side)."""
    from qhl.emulation.check import CheckReport, annotate_row

    def row(value, trot, pred, se=0.01):
        return annotate_row({"parameter": "p", "part": "re", "exact": trot, "trotter_exact": trot, "emulated": value,
                             "stderr": se, "z": (value - pred) / se, "z_noiseless": (value - trot) / se,
                             "trotter_bias": 0.0, "predicted": pred})
    for sign in (1, -1):
        ok = CheckReport(rows=[row(sign * 0.6, sign * 0.8, sign * 0.5)], device="fake_lima", planned=1)
        low = CheckReport(rows=[row(sign * 0.4, sign * 0.8, sign * 0.5)], device="fake_lima", planned=1)
        high = CheckReport(rows=[row(sign * 0.9, sign * 0.8, sign * 0.5)], device="fake_lima", planned=1)
        assert ok.status == "pass" and low.status == "fail" and high.status == "fail"
        assert "outside [predicted, trotter_exact]" in low.verdict()
    # without a device the two-sided |z| rule stays (a row 5 sd above its reference fails)
    r = row(0.55, 0.5, 0.5)
    del r["z_noiseless"]
    assert CheckReport(rows=[r], planned=1).status == "fail"


def test_cli_device_json(cluster, capsys):
    """The --json contract of device mode: rows carry predicted, attenuation and the measured
    attenuation; the report names the device and the model (few shots: plumbing only)."""
    rc = main(["check", cluster, "--time", "2e-4", "--steps", "1", "--shots", "300", "--seed", "1",
               "--param", "offset:A", "--device", "lima", "--max-circuits", "16", "--json"])
    assert rc == 0
    out = json.loads(capsys.readouterr().out)
    assert out["device"] == "fake_lima" and "global depolarising" in out["attenuation_model"]
    assert out["reference"] == "trotter_exact * attenuation" and "[predicted, trotter_exact]" in out["device_rule"]
    for r in out["rows"]:
        assert {"predicted", "attenuation", "attenuation_gates", "attenuation_readout", "measured_attenuation",
                "measured_attenuation_stderr", "two_qubit_gates", "z_noiseless"} <= set(r)
        assert r["z"] == pytest.approx((r["emulated"] - r["predicted"]) / r["stderr"])


@pytest.mark.parametrize("extra, words", [
    (["--device", "fake_nowhere"], ["unknown device 'fake_nowhere'", "fake_lima", "fake_nairobi"]),
    (["--device", "fake_lima", "--noise", "0.01"], ["leave out --noise"]),
    (["--device", "fake_lima", "--max-circuits", "0"], ["--max-circuits"]),
    (["--max-circuits", "10"], ["--max-circuits applies to --device"]),
    (["--device", "fake_lima", "--shots-per-pub", "0"], ["--shots-per-pub"]),
    (["--shots-per-pub", "10"], ["--shots-per-pub applies to --device"]),
    (["--target", "moon"], ["unknown target 'moon'", "line", "heavy-hex", "fake_lima"]),
])
def test_bad_device_input_exit_2_one_line(cluster, capsys, extra, words):
    try:
        rc = main(["check", cluster, "--time", "2e-4", "--steps", "1", "--shots", "100", *extra])
    except SystemExit as stop:           # argparse's range check exits 2 itself
        rc = stop.code
    assert rc == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and all(w in err for w in words)


def test_cluster_larger_than_device_names_both_numbers(capsys):
    """The built-in demo cluster (6 spins) plus the Hadamard-test ancilla on 5-qubit fake_lima."""
    rc = main(["check", "--time", "1e-4", "--steps", "1", "--shots", "100", "--device", "fake_lima"])
    assert rc == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "6 spins + 1 ancilla = 7 qubits" in err and "fake_lima has 5" in err


def test_target_larger_than_cluster_names_both_numbers(capsys):
    """--target fake_lima (5 qubits) for the demo cluster (6 spins + 1 ancilla): one line with both numbers."""
    rc = main(["check", "--time", "1e-4", "--steps", "1", "--shots", "100", "--target", "fake_lima"])
    assert rc == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "7 qubits" in err and "6 spins + 1 ancilla" in err and "fake_lima has 5" in err


def test_cli_target_reports_routed_counts(cluster, capsys):
    """`qhl check --target line`: per checked family, routed counts beside the all-to-all count. Checks (common
    practice): routing never removes two-qubit gates (routed >= all-to-all), and a line of 4 qubits needs SWAPs for
    3 mutually coupled spins plus the Hadamard-test ancilla; the layout maps the 4 circuit qubits to 4 distinct
    physical qubits. Without --target the keys are None (today's behaviour)."""
    base = ["check", cluster, "--time", "2e-4", "--steps", "2", "--shots", "200", "--param", "offset:A", "dipolar:A-B"]
    assert main(base + ["--target", "line", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["target"] == "line" and [r["parameter"] for r in out["routing"]] == ["offset:A", "dipolar:A-B"]
    for r in out["routing"]:
        w = r["whole"]
        assert w["two_qubit"] >= r["all_to_all_two_qubit"] > 0 and w["swaps"] >= 1
        assert sorted(set(w["layout"])) == sorted(w["layout"]) and len(w["layout"]) == 4
        assert w["two_qubit_gate"] == "cx" and r["per_step"]["two_qubit"] > 0
    assert len(out["rows"]) == 4 and out["status"] in ("pass", "inconclusive")
    assert main(base + ["--target", "line"]) == 0
    text = capsys.readouterr().out
    assert "routed for line" in text and "2q all-to-all" in text
    assert main(base + ["--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["target"] is None and out["routing"] is None


def test_cli_shots_per_pub_sets_the_pub_plan(cluster, capsys):
    """`--shots-per-pub 1` on the device path: every shot is its own parameter row (qhl.emulation.sampler_path's
    documented plan: setting g appears ceil(n_g / S) times), so 600 rows (300 shots per part, Re and Im batched
    together, qhl.emulation.check's `batch`) in jobs of at most 16 rows make ceil(600 / 16) = 38 jobs; the Re PUB's
    last 12 rows share job 19 with the Im PUB's first 4, so 39 PUBs. The default plan (one PUB per distinct shot
    count) needs fewer jobs. Same total shots either way."""
    base = ["check", cluster, "--time", "2e-4", "--steps", "1", "--shots", "300", "--seed", "1", "--param", "offset:A",
            "--device", "fake_lima", "--max-circuits", "16", "--json"]
    assert main(base + ["--shots-per-pub", "1"]) == 0
    one = json.loads(capsys.readouterr().out)
    assert one["sampler_jobs"] == 38 and one["sampler_pubs"] == 39 and one["shots"] == 600
    assert main(base) == 0
    default = json.loads(capsys.readouterr().out)
    assert default["sampler_jobs"] < 38 and default["shots"] == 600
