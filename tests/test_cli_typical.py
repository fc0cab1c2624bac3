"""`qhl signal` / `qhl fisher` with --method: JSON contract (keys named in the project's issue 11),
the auto rule, and agreement with the Python API (common practice for CLIs)."""

import json

import numpy as np

from qhl import build_model, demo_cluster
from qhl.cli import main
from qhl.exact.typicality import TypicalEngine


def test_typical_json_has_error_bars(capsys):
    # the CLI's typical engine runs single precision unless double is asked for (make_engine's
    # rule): equal to the API's engine with the same options, to rounding
    c = demo_cluster()
    for extra, prec in (([], "single"), (["--engine-precision", "double"], "double")):
        assert main(["signal", "--json", "--method", "typical", "--replicas", "3", "--seed", "7"] + extra) == 0
        out = json.loads(capsys.readouterr().out)
        assert out["method"] == "typical" and out["replicas"] == 3 and out["engine_precision"] == prec
        eng = TypicalEngine(build_model(c), replicas=3, seed=7, precision=prec)
        for row, ex in zip(out["experiments"], c.experiments):
            est = eng.estimate(ex)
            np.testing.assert_allclose(np.array(row["signal_real"]) + 1j * np.array(row["signal_imag"]),
                                       est.signal, atol=1e-12)
            np.testing.assert_allclose(row["signal_stderr_real"], est.signal_stderr_real, atol=1e-12)
            np.testing.assert_allclose(row["signal_stderr_imag"], est.signal_stderr_imag, atol=1e-12)
            assert min(row["signal_stderr_real"][1:]) > 0
            assert row["typical_scheme"] == est.scheme == "positive"    # the demo's H conserves magnetisation


def test_auto_is_exact_when_it_fits(capsys):
    assert main(["signal", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["method"] == "exact"
    assert "signal_stderr_real" not in out["experiments"][0]


def test_auto_falls_back_to_typical_with_a_note(capsys, monkeypatch):
    import qhl.exact.engine_choice as choice
    monkeypatch.setattr(choice, "available_memory_bytes", lambda: 1.0)
    assert main(["signal", "--json", "--free", "offset:*"]) == 0
    cap = capsys.readouterr()
    assert json.loads(cap.out)["method"] == "typical"
    assert "note" in cap.err and "typical" in cap.err and "Traceback" not in cap.err


def test_fisher_typical_json(capsys):
    assert main(["fisher", "--json", "--method", "typical", "--free", "offset:*", "--replicas", "2"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["method"] == "typical" and len(out["crb_hz"]) == 6
    assert all(np.isfinite(out["crb_hz"]))


def test_table_names_the_method(capsys):
    assert main(["signal", "--method", "typical", "--replicas", "2"]) == 0
    out = capsys.readouterr().out
    assert "method: typical" in out and "max stderr" in out


def test_ctrl_c_keeps_finished_experiments():
    # RULES: Ctrl-C keeps what is done (common practice); simulated with an engine that is
    # interrupted during the second experiment
    from qhl.exact.signals import compute_signals

    class Interrupted(TypicalEngine):
        calls = 0

        def estimate(self, *a, **k):
            Interrupted.calls += 1
            if Interrupted.calls == 2:
                raise KeyboardInterrupt
            return super().estimate(*a, **k)

    c = demo_cluster()
    rep = compute_signals(c, engine=Interrupted(build_model(c, free="offset:*"), replicas=2))
    assert [e.name for e in rep.experiments] == [c.experiments[0].name]
    assert "interrupted: 1 of 4" in rep.note
    assert rep.to_json()["experiments"][0]["signal_stderr_real"] is not None


def test_fisher_takes_the_engine_precision(capsys):
    # `qhl fisher --engine-precision fast` reaches the exact engine (it was accepted and ignored):
    # its Fisher matrix differs from the double one by rounding only (fast's stated tolerance,
    # 1e-3 of the largest gradient entry, gives at most ~2e-3 of the largest Fisher entry)
    assert main(["fisher", "--json"]) == 0
    ref = np.array(json.loads(capsys.readouterr().out)["fisher"])
    assert main(["fisher", "--json", "--engine-precision", "fast"]) == 0
    fast = np.array(json.loads(capsys.readouterr().out)["fisher"])
    diff = np.abs(fast - ref).max() / np.abs(ref).max()
    assert 0 < diff < 2e-3
