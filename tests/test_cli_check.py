"""`qhl check`: table, verdict, --json contract, bad input (exit 2, one line), Ctrl-C.

Statistics: noiseless estimates of the Trotterised derivatives have z ~ N(0, 1) (central limit
theorem, common practice); with 4 rows the verdict "all |z| < 4" fails for 2.5e-4 of seeds.
"""

import json

import pytest

from qhl.cli import main


@pytest.fixture
def cluster(trio_file):
    return trio_file


def _args(cluster, *extra):
    return ["check", cluster, "--time", "2e-4", "--steps", "3", "--shots", "1500", "--seed", "1",
            "--param", "offset:A", "dipolar:A-B", *extra]


def test_table_and_verdict(cluster, capsys, tmp_path):
    png = tmp_path / "check.png"
    assert main(_args(cluster, "--plot", str(png))) == 0
    cap = capsys.readouterr()
    assert "PASS: all |z| < 4" in cap.out and "offset:A" in cap.out and "dipolar:A-B" in cap.out
    assert "trotter" in cap.out and "4/4" not in cap.out and "2/2" in cap.err   # progress on stderr
    assert "Trotterised reference (slots)" in cap.err and "elapsed" in cap.err
    assert png.stat().st_size > 1000


def test_json_contract_and_reproducible(cluster, capsys):
    assert main(_args(cluster, "--json")) == 0
    out = json.loads(capsys.readouterr().out)
    assert isinstance(out, dict) and {"rows", "status", "verdict", "shots", "circuits_run", "seconds"} <= set(out)
    rows = out["rows"]
    assert len(rows) == 4
    keys = {"parameter", "exact", "trotter_exact", "emulated", "stderr", "z", "trotter_bias", "shots",
            "circuits_run", "seconds"}
    for r in rows:
        assert keys <= set(r)
        assert r["z"] == pytest.approx((r["emulated"] - r["trotter_exact"]) / r["stderr"])
        assert r["trotter_bias"] == pytest.approx(r["trotter_exact"] - r["exact"])
        assert r["shots"] == 1500 and abs(r["z"]) < 4
    assert main(_args(cluster, "--json")) == 0
    again = json.loads(capsys.readouterr().out)["rows"]
    assert [r["emulated"] for r in again] == [r["emulated"] for r in rows]


def test_hessian_rows(cluster, capsys):
    assert main(["check", cluster, "--time", "2e-4", "--steps", "2", "--shots", "800", "--param", "offset:A",
                 "--hessian", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)["rows"]
    assert [r["parameter"] for r in rows] == ["offset:A", "offset:A", "offset:A x offset:A", "offset:A x offset:A"]


@pytest.mark.parametrize("extra, word", [
    (["--shots", "0"], "--shots"), (["--noise", "1.0"], "[0, 1)"), (["--noise", "-0.1"], "[0, 1)"),
    (["--time", "0"], "--time"), (["--time", "nan"], "--time"), (["--param", "offset:Z"], "offset:Z")])
def test_bad_input_exit_2_one_line(cluster, capsys, extra, word):
    args = ["check", cluster, "--time", "2e-4", "--steps", "2", "--shots", "10", *extra]
    try:
        rc = main(args)
    except SystemExit as e:      # range-checked options are refused by argparse itself
        rc = e.code
    assert rc == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and word in err


def test_ctrl_c_prints_what_finished(cluster, capsys, monkeypatch):
    import qhl.emulation.check as chk
    real = chk.emulate_gradient
    calls = [0]

    def flaky(*a, **k):
        calls[0] += 1
        if calls[0] == 2:
            raise KeyboardInterrupt
        return real(*a, **k)

    monkeypatch.setattr(chk, "emulate_gradient", flaky)
    assert main(_args(cluster)) == 130
    cap = capsys.readouterr()
    assert "interrupted; 2 of 4 rows finished" in cap.err
    assert "offset:A" in cap.out and "dipolar:A-B" not in cap.out.split("\n", 2)[2]


def test_no_power_gives_inconclusive_not_pass(cluster, capsys):
    """20 shots: every stderr exceeds |value|/3, so no row could detect a 100% error (POWER_RULE)."""
    assert main(["check", cluster, "--time", "2e-4", "--steps", "3", "--shots", "20", "--seed", "1",
                 "--param", "offset:A", "dipolar:A-B", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    for r in out["rows"]:
        assert r["stderr"] > max(abs(r["exact"]), abs(r["trotter_exact"])) / 3 and r["power"] is False
    assert out["status"] == "inconclusive" and out["verdict"].startswith("INCONCLUSIVE")
    assert main(["check", cluster, "--time", "2e-4", "--steps", "3", "--shots", "20", "--seed", "1",
                 "--param", "offset:A", "dipolar:A-B"]) == 0
    text = capsys.readouterr().out
    assert "INCONCLUSIVE" in text and "PASS" not in text and "no-power" in text


@pytest.mark.parametrize("shots", [1, 2, 3])
def test_too_few_shots_for_a_standard_error_is_inconclusive_not_fail(cluster, capsys, shots):
    """common practice: one shot has no sample standard error, and 2-3 shots that all agree give 0;
    neither can carry a z test (they used to print nan or z = inf and a false FAIL)."""
    assert main(["check", cluster, "--time", "2e-4", "--steps", "3", "--shots", str(shots), "--seed", "1",
                 "--param", "offset:A", "dipolar:A-B", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["status"] in ("inconclusive", "pass") and not out["verdict"].startswith("FAIL")
    for r in out["rows"]:
        if r["stderr"] is None or r["stderr"] == 0:
            assert r["z"] is None and r["power"] is False
    if shots == 1:
        assert all(r["stderr"] is None and r["z"] is None for r in out["rows"]) and out["status"] == "inconclusive"
    assert main(["check", cluster, "--time", "2e-4", "--steps", "3", "--shots", str(shots), "--seed", "1",
                 "--param", "offset:A", "dipolar:A-B"]) == 0
    text = capsys.readouterr().out
    assert "nan" not in text and "inf" not in text and "FAIL" not in text


def test_trotter_bias_larger_than_value_is_flagged(cluster, capsys):
    """One step over 4e-4 s: the Trotterised Re dS/d offset:A has the opposite sign of the exact one
    (values from the exact engine and the dense Trotter reference: -1.79e-6 and +1.63e-4)."""
    assert main(["check", cluster, "--time", "4e-4", "--steps", "1", "--shots", "200", "--seed", "1",
                 "--param", "offset:A", "--json"]) == 0
    cap = capsys.readouterr()
    row = [r for r in json.loads(cap.out)["rows"] if r["part"] == "re"][0]
    assert row["exact"] < 0 < row["trotter_exact"]
    assert row["sign_flip"] and row["bias_exceeds_value"]
    assert "Trotter bias" in cap.err and "sign flipped" in cap.err
    assert main(["check", cluster, "--time", "4e-4", "--steps", "1", "--shots", "200", "--seed", "1",
                 "--param", "offset:A"]) == 0
    assert "BIAS>VALUE" in capsys.readouterr().out


def test_exact_column_does_not_depend_on_param_order(cluster, capsys):
    """--param in an order other than the model's used to pair a parameter's Trotterised value with
    another parameter's exact value. Reference: qhl's exact engine with that parameter alone free."""
    from qhl import ExactEngine, build_model
    from qhl.spins.cluster_file import load_cluster
    c = load_cluster(cluster)
    ref = ExactEngine(build_model(c, free=["dipolar:A-B"])).gradient(c.experiments[0], [2e-4])[1][0, 0]
    assert main(["check", cluster, "--time", "2e-4", "--steps", "2", "--shots", "50", "--param", "dipolar:A-B",
                 "offset:C", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)["rows"]
    re = [r for r in rows if r["parameter"] == "dipolar:A-B" and r["part"] == "re"][0]
    assert re["exact"] == pytest.approx(ref.real, rel=1e-9)
