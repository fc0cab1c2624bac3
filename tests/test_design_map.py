"""Learnability map over the dipolar scale (qhl.survey.learnability_map) and `qhl design --map`."""

import json

import numpy as np
import pytest

from qhl.base.errors import QhlInputError
from qhl.survey.diagnostics import GOE_MEAN_R, POISSON_MEAN_R, diagnose
from qhl.survey.learnability_map import WINDOW_DEFAULTS, learnability_map, plot_learnability_map
from made_up_clusters import random_cluster


@pytest.fixture(scope="module")
def cluster():
    return random_cluster(np.random.default_rng(7), 4)


@pytest.fixture(scope="module")
def lmap(cluster):
    return learnability_map(cluster, values=(0.0, 1.0), t_max_s=5e-4, points=32,
                            thresholds={"hard_seconds": 0.0, "max_t_count": 1e30})


def test_map_reports_what_qhl_diagnostics_computes(cluster, lmap):
    # The learnability and ergodicity columns are those of qhl.survey.diagnostics.diagnose at the same FID.
    d = diagnose(cluster, 1.0, t_max_s=5e-4, points=32, noise=1e-3, free=("offset:*", "dipolar:*"))
    p = lmap.points[1]
    assert p.fisher_min_eigenvalue == pytest.approx(float(d.fisher_eigenvalues[0]), rel=1e-9)
    assert p.median_crb_hz == pytest.approx(d.median_crb_hz, rel=1e-9)
    assert p.mean_r == pytest.approx(d.mean_r, rel=1e-12)
    assert 0.0 < p.mean_r < 1.0 and 0.0 < p.mean_d2_random < 1.0


def test_decoupled_point_cannot_see_dipolar_couplings(lmap):
    # At dipolar scale 0 the signal does not depend on the dipolar couplings (they are multiplied
    # by the scale in H; common practice): the smallest Fisher eigenvalue is zero, nothing is learnable.
    p0, p1 = lmap.points
    assert p0.fisher_min_eigenvalue == pytest.approx(0.0, abs=1e-12 * p1.fisher_min_eigenvalue)
    assert p0.softest_bound_hz == np.inf and p0.median_crb_hz == np.inf
    assert not p0.learnable and p1.fisher_min_eigenvalue > 0
    # the Hamiltonian's norm grows with the dipolar terms, and with it the Trotter steps and T gates
    # of the fault-tolerant estimate (qhl.costing.trotter_cost: r grows with C_p; common practice)
    assert p1.t_count > p0.t_count


def test_window_is_learnable_and_hard_and_affordable(lmap):
    # thresholds: hard above 0 s (every point is hard), affordable up to 1e30 T gates (every point)
    assert all(p.classically_hard and p.affordable for p in lmap.points)
    assert lmap.window == [p.value for p in lmap.points if p.learnable]
    assert lmap.thresholds["max_median_crb_hz"] == WINDOW_DEFAULTS["max_median_crb_hz"]
    out = lmap.to_json()
    assert out["poisson_mean_r"] == pytest.approx(2 * np.log(2) - 1)    # Atas et al., PRL 110, 084101 (2013)
    assert out["goe_mean_r"] == GOE_MEAN_R and POISSON_MEAN_R < GOE_MEAN_R


def test_map_plot(lmap, tmp_path):
    path = plot_learnability_map(lmap, tmp_path / "map.png")
    assert path.stat().st_size > 1000


def test_bad_axis_and_thresholds_are_refused(cluster):
    with pytest.raises(QhlInputError, match="control axis"):
        learnability_map(cluster, axis="rf_nutation_hz", values=(1.0,))
    with pytest.raises(QhlInputError, match="unknown threshold"):
        learnability_map(cluster, values=(1.0,), thresholds={"max_crb": 1.0})
    with pytest.raises(QhlInputError, match="dipolar_scale"):
        learnability_map(cluster, values=(1e9,))


@pytest.mark.slow
def test_cli_map_json(capsys, tmp_path):
    from qhl.cli import main
    assert main(["design", "--map", "dipolar_scale", "--values", "0.5", "--map-points", "16", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["axis"] == "dipolar_scale" and len(out["points"]) == 1
    for key in ("fisher_min_eigenvalue", "median_crb_hz", "mean_r", "mean_d2", "mean_d2_random",
                "classical_seconds", "t_count", "learnable", "classically_hard", "affordable", "window"):
        assert key in out["points"][0]


def test_ctrl_c_keeps_the_values_done(cluster, monkeypatch):
    # Long work keeps what is done on Ctrl-C (RULES; common practice): the second value is interrupted.
    import qhl.survey.learnability_map as lm
    real = lm.classical_cost
    calls = []

    def interrupted_on_second(c):
        calls.append(1)
        if len(calls) == 2:
            raise KeyboardInterrupt
        return real(c)

    monkeypatch.setattr(lm, "classical_cost", interrupted_on_second)
    out = lm.learnability_map(cluster, values=(0.5, 1.0), points=16)
    assert out.interrupted and [p.value for p in out.points] == [0.5]
    monkeypatch.setattr(lm, "classical_cost", lambda c: (_ for _ in ()).throw(KeyboardInterrupt))
    with pytest.raises(KeyboardInterrupt):
        lm.learnability_map(cluster, values=(0.5,), points=16)


def test_a_cycle_time_too_short_for_the_window_names_the_axis():
    # common practice: the map's own key and the limit in its units, not the internal step key
    # (map.step[0].repeat) the unrolled train used to report
    from qhl.spins.cluster import MAX_REPEAT
    from qhl.survey.learnability_map import cycle_train
    with pytest.raises(QhlInputError, match=r"map.cycle_time_s: a cycle time of 1e-09 s repeats 500,000 times"):
        cycle_train(1e-9, 5e-4)
    assert cycle_train(5e-4 / (MAX_REPEAT + 1), 5e-4).cycles == MAX_REPEAT + 1
