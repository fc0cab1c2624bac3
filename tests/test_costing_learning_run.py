"""Learning-run shots: what each optimiser evaluation needs, with evaluations from a real fit."""

import numpy as np
import pytest

from qhl import ExactEngine, build_model
from qhl.costing import BudgetModel, BudgetSettings
from qhl.costing.learning_run import learning_run_cost, signal_shots
from qhl.exact.likelihood import synthetic_dataset
from qhl.learning import ExactGradientProvider, fit, perturbed_start
from qhl.spins.cluster import Cluster, Experiment, Spin
from qhl.base.errors import QhlInputError


def three_spins():
    """An invented three-proton cluster (made-up geometry and offsets)."""
    spins = (Spin("A", "1H", (0.0, 0.0, 0.0), -280.0), Spin("B", "1H", (2.0, 0.1, 0.0), 240.0),
             Spin("C", "1H", (0.5, 2.2, 0.6), 650.0))
    return Cluster(9.4, "1H", spins, (), (Experiment("fid", 4e-4, 24, 1.0, 1e-3),), name="three")


@pytest.fixture(scope="module")
def setup():
    c = three_spins()
    st = BudgetSettings(empirical_trotter=False, circuit_variance_max_spins=0, hessian_exact=False)
    return c, BudgetModel(c, settings=st)


def test_signal_shots_reach_the_noise_by_sampling():
    # Variance bound (common practice): N = kappa^2/sigma^2 shots of a +-kappa estimator give a
    # standard error <= sigma. Sampled (numpy, seed 3) with the worst case, mean 0: 400 repeats,
    # the sample standard deviation of the mean within 10 % of sigma (false-failure rate < 1e-3).
    kappa, sigma = 3.0, 0.05
    n = signal_shots([type("E", (), {"points": 1, "noise": sigma})()], kappa) // 2
    rng = np.random.default_rng(3)
    means = kappa * (2 * rng.binomial(n, 0.5, size=400) / n - 1)
    assert np.std(means) == pytest.approx(sigma, rel=0.10)


def test_methods_charge_signals_plus_gradient_or_jacobian(setup):
    c, bm = setup
    nt = bm.budget(2e-4, 0.01).near_term
    sig = signal_shots(c.experiments, bm.near.kappa)
    assert sig == 2 * 24 * int(np.ceil(3**2 / 1e-3**2))      # kappa = 3 observed protons, sigma = 1e-3
    gn = nt["learning_run"]
    assert gn["needs"] == "jacobian" and gn["evaluations_source"] == "setting"
    assert gn["shots_per_evaluation"] == sig + nt["shots_per_fisher"]
    cg = learning_run_cost(sig, nt["shots_per_gradient"], nt["shots_per_fisher"], 50, "cg")
    assert cg.shots_per_evaluation == sig + nt["shots_per_gradient"] < gn["shots_per_evaluation"]
    assert cg.shots_total == 50 * cg.shots_per_evaluation
    with pytest.raises(QhlInputError):
        learning_run_cost(sig, 1, 1, 10, "newton")


@pytest.mark.parametrize("method", ["gn", "lbfgs"])
def test_evaluations_come_from_an_actual_fit(setup, method):
    # a real qhl.learning fit on synthetic data: the budget counts its evaluations and its method
    c, bm = setup
    model = build_model(c)
    engine = ExactEngine(model)
    data = synthetic_dataset(engine, c.experiments, seed=5)
    res = fit(ExactGradientProvider(engine, c.experiments), data, perturbed_start(model.free_values_hz, 0.03, 5),
              method=method)
    run = bm.budget(2e-4, 0.01, iterations=res).near_term["learning_run"]
    assert run["evaluations_source"] == "fit" and run["method"] == method
    assert run["evaluations"] == max(res.evaluations or res.iterations, 1) >= res.iterations
    assert run["shots_total"] == run["evaluations"] * run["shots_per_evaluation"]
