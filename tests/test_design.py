"""Experiment design on the exact engine (qhl.learning.design, qhl.learning.design_candidates)."""

import dataclasses
import json

import numpy as np
import pytest

from qhl import demo_cluster
from qhl.base.errors import QhlInputError
from qhl.exact.engine import ExactEngine
from qhl.exact.likelihood import fisher_information
from qhl.learning.design import design_experiments
from qhl.learning.design_candidates import TCostModel, build_candidates, candidate_fishers
from qhl.learning.design_optimal import criterion_value
from qhl.spins.cluster import Experiment
from qhl.spins.model import build_model

FREE = ("offset:*", "dipolar:H1-H2", "dipolar:H3-H4")


@pytest.fixture(scope="module")
def engine():
    return ExactEngine(build_model(demo_cluster(), free=FREE))


def test_time_point_candidates_carry_the_terms_of_the_fisher_sum(engine):
    # qhl.exact.likelihood.fisher_information sums Re[conj(dS) dS^T] / sigma^2 over times; an
    # Experiment of two points (0 and t) has the Fisher information of the single time t, since
    # S(0) = tr(rho0 O) does not depend on the parameters (dS/dh(0) = 0; common practice).
    c = demo_cluster()
    cands = build_candidates(c, time_points=5)
    assert len(cands) == 5 * len(c.experiments) and all(x.kind == "time_point" for x in cands)
    F = candidate_fishers(engine, cands)
    for k in (0, 3, 7, 19):
        ex = cands[k].experiment
        t = float(cands[k].times[0])
        two = Experiment("two", t, 2, ex.dipolar_scale, ex.noise)
        assert np.allclose(F[k], fisher_information(engine, [two]), rtol=1e-9, atol=1e-12 * np.abs(F[k]).max())


def test_generated_candidates_grid_and_names():
    c = demo_cluster()
    cands = build_candidates(c, dipolar_scales=[0.0, 0.5], windows_s=[1e-3, 2e-3], points=32)
    gen = [x for x in cands if x.kind == "generated"]
    assert len(gen) == 4
    assert {(x.experiment.dipolar_scale, x.experiment.t_max_s, x.experiment.points) for x in gen} == {
        (0.0, 1e-3, 32), (0.0, 2e-3, 32), (0.5, 1e-3, 32), (0.5, 2e-3, 32)}
    assert all(x.experiment.noise == 1e-3 for x in gen)      # the file's noise
    with pytest.raises(QhlInputError, match="dipolar_scale"):
        build_candidates(c, dipolar_scales=[1e9], windows_s=[1e-3])


@pytest.mark.parametrize("criterion", ["D", "A", "worst"])
def test_optimised_design_beats_equal_shares_on_the_demo(engine, criterion):
    # The optimum over candidates that include the current set can only be better (convexity);
    # with a grid of extra windows it must be strictly better here. common practice.
    rep = design_experiments(demo_cluster(), criterion=criterion, engine=engine,
                             dipolar_scales=[0.0, 0.5, 1.0], windows_s=[2e-4, 1e-3, 4e-3], points=64)
    assert rep.value < rep.baseline_value
    assert rep.gain > 1.0
    assert rep.shares.sum() == pytest.approx(1.0, abs=1e-9) and np.all(rep.shares >= 0)
    assert rep.shots.sum() == round(rep.budget)
    if criterion == "D":
        assert rep.equivalence == pytest.approx(1.0, abs=1e-4)
    # the gain is the budget factor: the baseline at gain x budget reaches the optimum's value
    base = rep.fishers[[k for k, c in enumerate(rep.candidates) if c.kind == "file"]].mean(axis=0)
    sel = [rep.parameters.index(n) for n in rep.selection]
    assert criterion_value((rep.gain * rep.budget * base)[None], [1.0], criterion, sel) == pytest.approx(
        rep.value, rel=1e-6, abs=1e-6)


def test_crb_at_budget_scales_as_one_over_sqrt_budget(engine):
    # Fisher information adds over independent shots (Kay 1993, ch. 3): CRB ~ 1/sqrt(budget).
    a = design_experiments(demo_cluster(), engine=engine, budget=4)
    b = design_experiments(demo_cluster(), engine=engine, budget=400)
    assert np.allclose(a.crb_hz / b.crb_hz, 10.0, rtol=1e-6)
    assert np.allclose(a.shares, b.shares, atol=1e-9)


def test_t_cost_grows_with_evolution_time_and_is_zero_at_zero(engine):
    tc = TCostModel(engine.model)
    ex = demo_cluster().experiments[0]
    t = np.array([0.0, 1e-5, 5e-5, 1e-4, 2e-4])
    cost = tc.per_time(ex, t)
    assert cost[0] == 0.0
    assert np.all(np.diff(cost[1:]) > 0)
    # decoupling removes the dipolar terms, the largest in the Hamiltonian: fewer T gates per circuit
    dec = tc.per_time(demo_cluster().experiment("decoupled"), t)
    assert np.all(dec[1:] < cost[1:])


def test_per_t_gate_shares_follow_budget_shares_over_cost(engine):
    rep = design_experiments(demo_cluster(), per="t_count", engine=engine)
    w = rep.budget_shares / rep.cost_per_shot
    assert np.allclose(rep.shares, w / w.sum(), atol=1e-12)
    # shots never spend more than the budget
    assert float(np.sum(rep.shots * rep.cost_per_shot)) <= rep.budget * (1 + 1e-9)
    assert rep.value <= rep.baseline_value + 1e-9


def test_per_point_costs_count_the_sampled_times(engine):
    # per point: a whole acquisition costs its points, a single time costs 1; the default budget is the
    # file's total points (4 x 192 on the demo).
    rep = design_experiments(demo_cluster(), per="point", engine=engine, time_points=8)
    assert np.all(rep.cost_per_shot == 1.0)
    assert rep.budget == 4 * 192
    assert rep.shots.sum() <= rep.budget
    rep2 = design_experiments(demo_cluster(), per="point", engine=engine)
    assert np.all(rep2.cost_per_shot == 192.0)
    assert np.allclose(rep2.shares, rep2.budget_shares)         # equal costs: shot and budget shares agree


def test_bad_input_is_refused(engine):
    c = demo_cluster()
    with pytest.raises(QhlInputError, match="per"):
        design_experiments(c, per="hour", engine=engine)
    with pytest.raises(QhlInputError, match="budget"):
        design_experiments(c, budget=-1, engine=engine)
    with pytest.raises(QhlInputError, match="no free parameter matches"):
        design_experiments(c, criterion="A", parameters=["j:*"], engine=engine)
    with pytest.raises(QhlInputError, match="at most 1e"):
        design_experiments(c, budget=1e20, engine=engine)
    with pytest.raises(QhlInputError, match="candidates: expected at most"):
        build_candidates(c, time_points=10_000)
    # dipolar scale 0 alone cannot see the dipolar couplings
    with pytest.raises(QhlInputError, match="singular"):
        design_experiments(c, engine=engine, include_file=False, dipolar_scales=[0.0], windows_s=[1e-3])


def test_cli_design_json_and_table(capsys, tmp_path):
    from qhl.cli import main
    png = tmp_path / "d.png"
    assert main(["design", "--free", *FREE, "--criterion", "A", "--scales", "0:1:3", "--windows",
                 "2e-4:1e-3:2", "--points", "32", "--json", "--plot", str(png)]) == 0
    out = json.loads(capsys.readouterr().out)
    for key in ("candidates", "chosen", "criterion_value", "baseline_criterion_value", "gain", "crb_hz",
                "baseline_crb_hz", "equivalence_ratio", "per", "budget"):
        assert key in out
    assert len(out["candidates"]) == 4 + 6
    assert out["gain"] >= 1.0
    assert png.stat().st_size > 1000
    assert main(["design", "--free", *FREE]) == 0
    text = capsys.readouterr().out
    assert "gain: the current set needs" in text and "offset:H1" in text
    with pytest.raises(SystemExit) as e:              # argparse's own usage error: status 2
        main(["design", "--criterion", "E"])
    assert e.value.code == 2
    assert main(["design", "--free", *FREE, "--criterion", "A", "--parameters", "j:*"]) == 2
    assert "no free parameter matches j:*" in capsys.readouterr().err


def test_shots_go_to_the_chosen_set_only():
    # efficient rounding (Pukelsheim and Rieder, Biometrika 79, 763 (1992)) gives every positive share at
    # least one unit; shares below the chosen threshold must get none (invented Hahn-echo example file)
    from pathlib import Path
    from qhl import load_cluster
    from qhl.learning.design import CHOSEN_MIN_SHARE, design_experiments

    c = load_cluster(Path(__file__).resolve().parent.parent / "examples" / "hahn_echo.toml")
    rep = design_experiments(c, budget=2)
    small = rep.shares < CHOSEN_MIN_SHARE
    assert small.any() and np.all(rep.shots[small] == 0)
    assert rep.shots.sum() == 2


def test_sequence_candidate_costs_its_delays_and_pulses(engine):
    # A Hahn echo with Clifford pulses (180 about x) costs exactly the free evolution of t + 2 tau
    # (its delays are Trotterised like the acquisition, common practice); a 73-degree pulse adds
    # rotations, so it costs more; the preparation costs T gates even at t = 0.
    from qhl.spins.cluster import Delay, Pulse
    tc = TCostModel(engine.model)
    fid = demo_cluster().experiments[0]
    tau = 2e-5
    echo = dataclasses.replace(fid, name="echo", steps=(Delay(tau), Pulse(180, 0), Delay(tau)))
    odd = dataclasses.replace(fid, name="odd", steps=(Delay(tau), Pulse(73, 0), Delay(tau)))
    t = np.array([0.0, 1e-5, 5e-5])
    np.testing.assert_allclose(tc.per_time(echo, t), tc.per_time(fid, t + 2 * tau), rtol=1e-12)
    assert np.all(tc.per_time(odd, t) > tc.per_time(echo, t))
    assert tc.per_time(echo, t)[0] > 0


def test_spinning_candidate_costs_at_least_the_static_one_and_follows_the_rotor_rule(engine):
    # common practice (the budget's spinning rule): a spinning circuit takes at least the static circuit's
    # steps with couplings at their largest |s_n(t)| (>= the static ones) and at least 8 steps per rotor
    # period; at 1 MHz the rotor rule dominates, so doubling t doubles the rotations (the T per rotation
    # then grows only by the log of the finer synthesis error: ratio in [2, 2.2])
    tc = TCostModel(engine.model)
    fid = demo_cluster().experiments[0]
    t = np.array([0.0, 1e-5, 2e-5, 5e-5])
    for rate in (12.5e3, 1e6):
        spin = dataclasses.replace(fid, name="mas", spinning_hz=rate)
        got = tc.per_time(spin, t)
        assert got[0] == 0.0
        assert np.all(got[1:] >= tc.per_time(fid, t)[1:])
    short = np.array([1e-6, 2e-6])                  # 8 and 16 rotor-rule steps at 1 MHz
    fast = tc.per_time(dataclasses.replace(fid, name="mas", spinning_hz=1e6), short)
    assert 2.0 <= fast[1] / fast[0] <= 2.2


def test_per_t_gate_leaves_out_an_experiment_the_circuits_cannot_compile(engine):
    # common practice (as qhl budget): a finite-pulse experiment has no T-count, so it cannot share a T
    # budget; it is left out with its reason instead of failing the whole design after the Fisher work
    from qhl.spins.cluster import Delay, Pulse
    c = demo_cluster()
    echo = Experiment("finite-echo", 1e-3, 16, 1.0, 1e-3,
                      steps=(Delay(2e-4), Pulse(180.0, 0.0, duration_s=5e-6), Delay(2e-4)))
    c = dataclasses.replace(c, experiments=c.experiments + (echo,))
    rep = design_experiments(c, per="t_count", engine=engine, dipolar_scales=(1.0,), windows_s=())
    left = rep.assumptions["left_out"]
    assert list(left) == ["finite-echo"] and "finite pulses" in left["finite-echo"]
    assert "finite-echo" not in [x.name for x in rep.candidates] and len(rep.candidates) == len(rep.cost_per_shot)
    assert np.all(np.isfinite(rep.crb_hz)) and rep.value <= rep.baseline_value + 1e-9


@pytest.mark.parametrize("per,budget", [("shot", 0.5), ("t_count", 10.0)])
def test_a_budget_below_one_shot_is_refused_before_the_fisher_work(engine, per, budget):
    # common practice: with no whole shot the integer allocation is empty and no bound exists (the
    # design printed finite Cramer-Rao bounds for 0 shots)
    with pytest.raises(QhlInputError, match="buys no whole shot of any candidate"):
        design_experiments(demo_cluster(), per=per, budget=budget, engine=engine, dipolar_scales=(1.0,),
                           windows_s=())
