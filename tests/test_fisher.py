"""Fisher matrix, Cramer-Rao bounds and unlearnable combinations (qhl.learning.fisher_report, `qhl fisher`).

References:
- Single complex exponential S = exp(2 pi i nu t) in Gaussian noise sigma per Re/Im part with
  known amplitude and phase: F_nu = sum_k (2 pi t_k)^2 / sigma^2, so with t_k = k dt,
  k = 0..N-1, CRB(nu) = sigma / (2 pi dt sqrt((N-1) N (2N-1) / 6)) (S. M. Kay, "Fundamentals of
  Statistical Signal Processing: Estimation Theory", 1993, ch. 3, frequency estimation; the sum
  of squares from the standard formula, common practice).
- Cramer-Rao bound std >= sqrt((F^-1)_nn) (H. Cramer 1946; C. R. Rao 1945), compared with
  numpy.linalg.inv, and F with central finite differences of the engine's signal.
"""

import json

import numpy as np
import pytest

from qhl import ExactEngine, build_model, demo_cluster
from qhl.cli import main
from qhl.spins.cluster import Cluster, Experiment, Spin
from qhl.base.errors import QhlInputError
from qhl.learning.fisher_report import fisher_report, report_from_fisher

DEGENERATE_TOML = """
name = "twin"
field_tesla = 9.4
observe = "1H"

[[spin]]
label = "A"
isotope = "1H"
offset_hz = 100.0

[[spin]]
label = "B"
isotope = "1H"
offset_hz = 100.0

[[experiment]]
name = "fid"
t_max_s = 0.01
points = 50
noise = 0.002
"""


def one_spin(points=40, t_max=0.02, sigma=1e-3, offset=37.0):
    return Cluster(9.4, "1H", (Spin("A", "1H", None, offset),), (),
                   (Experiment("fid", t_max, points, 1.0, sigma),), name="one")


def test_single_spin_crb_matches_closed_form():
    c = one_spin()
    rep = fisher_report(c, free="offset:*")
    ex = c.experiments[0]
    n, dt, sigma = ex.points, ex.times_s[1], ex.noise
    f_ref = (2 * np.pi * dt) ** 2 * (n - 1) * n * (2 * n - 1) / 6 / sigma**2
    assert rep.fisher[0, 0] == pytest.approx(f_ref, rel=1e-10)
    assert rep.crb_hz[0] == pytest.approx(sigma / (2 * np.pi * dt * np.sqrt((n - 1) * n * (2 * n - 1) / 6)),
                                          rel=1e-10)
    # sigma override scales the bound linearly
    assert fisher_report(c, free="offset:*", sigma=3 * sigma).crb_hz[0] == pytest.approx(3 * rep.crb_hz[0])


def test_fisher_against_finite_differences_and_inverse():
    c = demo_cluster()
    model = build_model(c, free=["offset:H1", "offset:H4", "dipolar:H1-H2", "dipolar:H3-H5"])
    engine = ExactEngine(model)
    rep = fisher_report(c, engine=engine)
    h = model.free_values_hz
    step = 1e-3
    F = np.zeros((len(h), len(h)))
    for ex in c.experiments:
        cols = []
        for k in range(len(h)):
            e = np.zeros_like(h)
            e[k] = step
            up, down = engine.signal(ex, free_values_hz=h + e), engine.signal(ex, free_values_hz=h - e)
            cols.append((up - down) / (2 * step))
        d = np.array(cols)
        F += np.real(np.conj(d) @ d.T) / ex.noise**2
    np.testing.assert_allclose(rep.fisher, F, rtol=1e-5)
    np.testing.assert_allclose(rep.crb_hz, np.sqrt(np.diag(np.linalg.inv(F))), rtol=1e-5)
    v, lam = rep.eigenvectors, rep.eigenvalues
    np.testing.assert_allclose(v @ np.diag(lam) @ v.T, rep.fisher, rtol=1e-10, atol=1e-10 * lam.max())
    assert np.all(np.diff(lam) >= 0) and not rep.singular


def test_no_effect_parameter_gets_infinite_bound():
    """Dipolar coupling with only a fully decoupled experiment: zero row in F, flagged, no crash."""
    c = demo_cluster()
    decoupled = [ex for ex in c.experiments if ex.dipolar_scale == 0]
    rep = fisher_report(c, free=["offset:H1", "dipolar:H1-H2"], experiments=decoupled)
    assert np.isinf(rep.crb_hz[1]) and np.isfinite(rep.crb_hz[0])
    assert rep.singular and rep.unlearnable_mask.sum() == 1
    assert rep.unlearnable[0]["combination"] == {"dipolar:H1-H2": pytest.approx(1.0)}


def test_degenerate_offsets_give_unlearnable_difference():
    """Two uncoupled spins at the same offset: only nu_A + nu_B is learnable.

    dS/dnu_A = dS/dnu_B = (1/2) 2 pi i t exp(2 pi i nu t), so F = pi^2 sum t^2 / sigma^2 [[1,1],[1,1]]:
    eigenvalue 2 pi^2 sum t^2 / sigma^2 along (1,1)/sqrt 2, zero along (1,-1)/sqrt 2.
    """
    from qhl.spins.cluster_file import parse_cluster_toml
    c = parse_cluster_toml(DEGENERATE_TOML)
    rep = fisher_report(c, free="offset:*")
    ex = c.experiments[0]
    lam = 2 * np.pi**2 * np.sum(ex.times_s**2) / ex.noise**2
    assert rep.eigenvalues[-1] == pytest.approx(lam, rel=1e-9)
    assert abs(rep.eigenvalues[0]) < 1e-9 * lam
    assert np.all(np.isinf(rep.crb_hz))
    combo = rep.unlearnable[0]["combination"]
    assert combo["offset:A"] == pytest.approx(-combo["offset:B"], rel=1e-6)
    assert abs(combo["offset:A"]) == pytest.approx(2**-0.5, rel=1e-6)


def test_cli_fisher_json_contract(capsys):
    assert main(["fisher", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert {"fisher", "crb_hz", "eigenvalues", "eigenvectors", "parameters"} <= set(out)
    rep = fisher_report(demo_cluster())
    assert out["parameters"] == list(rep.names)
    np.testing.assert_allclose(out["crb_hz"], rep.crb_hz, rtol=1e-12)
    np.testing.assert_allclose(np.array(out["fisher"]), rep.fisher, rtol=1e-12)
    # eigenvectors: one row per eigenvalue, F v = lambda v
    for lam, vec in zip(out["eigenvalues"], out["eigenvectors"]):
        np.testing.assert_allclose(rep.fisher @ np.array(vec), lam * np.array(vec),
                                   atol=1e-8 * max(out["eigenvalues"]))


def test_cli_fisher_singular_warns_and_json_marks_inf(tmp_path, capsys):
    path = tmp_path / "twin.toml"
    path.write_text(DEGENERATE_TOML)
    assert main(["fisher", str(path), "--json"]) == 0
    cap = capsys.readouterr()
    out = json.loads(cap.out)
    assert out["crb_hz"] == ["inf", "inf"]
    assert "singular Fisher matrix" in cap.err and "offset:A" in cap.err and "offset:B" in cap.err
    assert main(["fisher", str(path)]) == 0
    assert "UNLEARNABLE" in capsys.readouterr().out


def test_cli_learn_reports_unlearnable_combination(tmp_path, capsys):
    path = tmp_path / "twin.toml"
    path.write_text(DEGENERATE_TOML)
    assert main(["learn", str(path), "--free", "offset:*", "--json"]) == 0
    cap = capsys.readouterr()
    assert "do not determine" in cap.err and "offset:A" in cap.err
    out = json.loads(cap.out)
    assert [p["stderr_hz"] for p in out["parameters"]] == ["inf", "inf"]
    # the learnable sum is still fitted
    s = sum(p["fitted_hz"] for p in out["parameters"])
    assert s == pytest.approx(200.0, abs=0.5)


def test_bad_input():
    c = Cluster(9.4, "1H", (Spin("A", "1H", None, 10.0),), (), (), name="bare")
    with pytest.raises(QhlInputError, match="no experiments"):
        fisher_report(c, free="offset:*")
    with pytest.raises(QhlInputError, match="sigma must be positive"):
        fisher_report(one_spin(), free="offset:*", sigma=-1.0)
    quiet = Cluster(9.4, "1H", (Spin("A", "1H", None, 10.0),), (), (Experiment("fid", 0.01, 10),), name="q")
    with pytest.raises(QhlInputError, match="has no noise"):
        fisher_report(quiet, free="offset:*")
    with pytest.raises(SystemExit) as info:      # argparse rejects it: one line, exit 2
        main(["fisher", "--noise", "0"])
    assert info.value.code == 2


def test_report_from_fisher_all_zero_matrix():
    rep = report_from_fisher(["a", "b"], [1.0, 2.0], np.zeros((2, 2)))
    assert np.all(np.isinf(rep.crb_hz)) and len(rep.unlearnable) == 2


def _rotation(angle):
    c, s = np.cos(angle), np.sin(angle)
    return np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])


def test_weak_but_learnable_direction_keeps_finite_bound():
    """A direction with a 0.44 Hz bound next to a 1e-6 Hz one (eigenvalue ratio 5e-12) is learnable.

    F = R diag(1e12, 5.2, 0) R^T with R a rotation by 1e-5 rad between the first two parameters;
    the third has no effect. Expected bounds from numpy.linalg.inv of the 2 x 2 learnable block
    (Cramer 1946; Rao 1945): a fixed relative cut-off of 1e-10 marked all three infinite.
    """
    r = _rotation(1e-5)
    F = r @ np.diag([1e12, 5.2, 0.0]) @ r.T
    rep = report_from_fisher(["a", "b", "c"], [1000.0, 50.0, 20.0], F)
    ref = np.sqrt(np.diag(np.linalg.inv(F[:2, :2])))
    np.testing.assert_allclose(rep.crb_hz[:2], ref, rtol=1e-6)
    assert rep.crb_hz[1] == pytest.approx(1 / np.sqrt(5.2), rel=1e-6)     # 0.4385 Hz
    assert np.isinf(rep.crb_hz[2])
    assert rep.unlearnable_mask.tolist() == [True, False, False]
    assert [u["combination"] for u in rep.unlearnable] == [{"c": pytest.approx(1.0)}]


def test_direction_with_bound_above_limit_is_unlearnable():
    """Bound 1e8 Hz on parameters of ~100 Hz exceeds 1e3 x the largest value (1e5 Hz): unlearnable."""
    rep = report_from_fisher(["a", "b"], [100.0, 50.0], np.diag([1e4, 1e-16]))
    assert rep.bound_limit_hz == pytest.approx(1e5)
    assert np.isinf(rep.crb_hz[1]) and rep.crb_hz[0] == pytest.approx(1e-2)
    assert "1e+05 Hz" in rep.rule


def test_cli_fisher_states_cutoff_and_relative_error(capsys):
    assert main(["fisher"]) == 0
    out = capsys.readouterr().out
    rep = fisher_report(demo_cluster())
    rel = np.sqrt(np.sum(rep.crb_hz ** 2)) / np.linalg.norm(rep.values_hz)
    assert f"{rel:.3e}" in out and "cut-off:" in out and "Hz" in out.split("cut-off:")[1]
