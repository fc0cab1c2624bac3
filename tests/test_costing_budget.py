"""The Budget API on the demo cluster: consistency, scaling exponents and bad input."""

import math

import numpy as np
import pytest

from qhl import demo_cluster
from qhl.costing import BudgetModel, BudgetSettings, fit_exponents
from qhl.costing.amplitude_estimation import amplitude_error_bound
from qhl.base.errors import QhlInputError


@pytest.fixture(scope="module")
def bm():
    return BudgetModel(demo_cluster(), settings=BudgetSettings(empirical_trotter=False, physical_error=1e-3))


@pytest.fixture(scope="module")
def budget(bm):
    return bm.budget(2e-4, 0.01)


@pytest.fixture(scope="module")
def sweep(bm):
    return bm.sweep(np.geomspace(1e-5, 1e-3, 12), np.geomspace(1e-4, 1e-1, 10))


def test_counts_bracket_the_compiled_estimators_own_variance(budget):
    # Bhatia and Davis, Amer. Math. Monthly 107, 353 (2000) (from memory): a variable in [-R, R] with
    # mean mu has Var <= R^2 - mu^2 <= R^2. The compiled Hadamard-test estimator's exact variance is
    # computed from its circuits' Born probabilities (qhl.emulation.variance; checked against qiskit
    # Statevector in test_prediction_vs_emulation.py), independently of the range formula: its count
    # must lie at or below the R^2 - mu^2 count, which lies at or below the R^2 bound.
    nt = budget.near_term
    assert nt["shots_per_component_circuit"] is not None
    assert 0 < nt["shots_per_component_circuit"] <= nt["shots_per_component"] <= nt["shots_per_component_bound"]


def test_optimal_allocation_is_never_worse_than_uniform(budget, sweep):
    # Cauchy-Schwarz (Wecker, Hastings, Troyer 2015, from memory)
    assert budget.near_term["shots_per_gradient"] <= budget.near_term["shots_per_gradient_uniform"]
    assert np.all(sweep.tables["near_term_gradient_exact"] <= sweep.tables["near_term_gradient_uniform_exact"])


def test_hoeffding_count_keeps_its_confidence(budget):
    # Hoeffding, J. Amer. Statist. Assoc. 58, 13 (1963): N shots of a variable in [-R, R] give
    # P(|mean - mu| > eps) <= delta. Checked by simulation on the worst case, a fair +-R coin
    # (sums drawn as binomials, 200,000 seeded trials): at the budget's N the failure rate is
    # below delta (normal limit 0.66 %), and at N/4 it is far above (17 %): the count is of the
    # right size, not only valid. Binomial sd of a rate near 0.7 % over 2e5 trials: 0.02 %.
    nt = budget.near_term
    n, r, eps, delta = nt["shots_per_component_hoeffding"], nt["component_range"], 0.01, 0.05
    rng = np.random.default_rng(1963)
    trials = 200_000
    for shots, expect_ok in ((n, True), (n // 4, False)):
        heads = rng.binomial(shots, 0.5, size=trials)
        mean = r * (2.0 * heads - shots) / shots
        rate = float(np.mean(np.abs(mean) > eps))
        assert (rate <= delta) == expect_ok, (shots, rate)


def test_shot_scaling_with_time_measured_on_the_compiled_estimator(bm):
    # common practice (project references): near-term gradient shots grow as t^2 at fixed eps. Here
    # the exponent is measured, not assumed: the exact single-shot variance of the compiled
    # Hadamard-test family of the worst component (Born probabilities of its circuits,
    # qhl.emulation.variance) at t, 2t, 4t with the same Trotter steps, fitted on a log-log line
    # (at longer times E[x^2] - mu^2 bends away from t^2: 1.77 over 1e-5 to 4e-5 s).
    from qhl.costing.family_variance import component_circuit_variance
    ex = bm.experiments[0]
    name = bm.budget(2e-5, 0.01).fault_tolerant["worst_component"]["parameter"]
    times = np.array([1e-7, 2e-7, 4e-7])      # 2 pi h t << 1 for the 20 kHz couplings: the short-time regime
    var = [component_circuit_variance(bm.model, ex, name, t, 4)[0] for t in times]
    slope = np.polyfit(np.log(times), np.log(var), 1)[0]
    assert slope == pytest.approx(2.0, abs=0.05)


def test_sweep_exponents(sweep):
    # the sweep's fitted exponents report what its tables hold (t^2/eps^2 bound, t^4/eps^2 Hessian):
    # a consistency check of the fit, the physics is checked on circuits in the test above
    bt, be, _, _ = sweep.exponents["near_term_component_bound"]
    assert bt == pytest.approx(2.0, abs=0.02) and be == pytest.approx(-2.0, abs=0.02)
    ht, he, _, _ = sweep.exponents["near_term_hessian_entry_bound"]
    assert ht == pytest.approx(4.0, abs=0.02) and he == pytest.approx(-2.0, abs=0.02)


def test_fit_exponents_recovers_a_power_law():
    t = np.geomspace(1, 10, 5)
    e = np.geomspace(1e-3, 1e-1, 4)
    assert fit_exponents(t, e, 3 * t[:, None] ** 1.7 * e[None, :] ** -0.6) == pytest.approx((1.7, -0.6))


def test_sweep_point_matches_the_single_budget(bm):
    t, eps = 3e-5, 2e-3
    b = bm.budget(t, eps)
    sw = bm.sweep([t, 2 * t], [eps, 2 * eps])
    assert math.ceil(sw.tables["near_term_component_bound"][0, 0]) == b.near_term["shots_per_component_bound"]
    assert math.ceil(sw.tables["near_term_component_exact"][0, 0]) == b.near_term["shots_per_component"]
    assert math.ceil(sw.tables["near_term_gradient_exact"][0, 0]) == b.near_term["shots_per_gradient"]
    # the sweep prices rotations at the median gridsynth T-count per decade of eps, the single budget
    # synthesises the step's own angles (qhl.costing.synthesis): 0.5 % apart on this cluster
    assert sw.tables["fault_tolerant_t_count"][0, 0] == pytest.approx(b.fault_tolerant["t_count"], rel=0.02)
    assert int(sw.orders[0, 0]) == b.fault_tolerant["trotter_order"]


def test_fault_tolerant_budget_meets_its_error_shares(bm, budget):
    ft, err = budget.fault_tolerant, budget.error_budget
    assert sum(err.values()) == pytest.approx(0.01)
    r = ft["worst_component"]["range"]
    # estimation share: BHMT bound at the chosen number of queries (Brassard et al. 2002)
    assert amplitude_error_bound(0.5, ft["queries"]) <= err["estimation"] / (2 * r)
    # Trotter share: half to the product formula, unitary error e_T / (8R) (commutator bound)
    order = ft["trotter_order"]
    x = [ex.name for ex in bm.experiments].index(ft["worst_component"]["experiment"])
    c = bm.trotter[x].constants[order]
    assert c * budget.time_s ** (order + 1) / ft["trotter_steps"] ** order <= err["trotter"] / (8 * r) * (1 + 1e-9)
    # the chosen order has the lowest T-count of the three
    assert ft["t_count"] == min(o["t_count"] for o in ft["orders"].values())
    # every median run (Hoeffding-style majority, qhl.costing.amplitude_estimation) is in the totals
    assert ft["depth_trotter_steps"] == ft["median_repetitions"] * (2 * ft["queries"] + 1) * ft["trotter_steps"]
    assert budget.surface_code["code_distance"] >= 3


def test_learning_run_and_iterations(bm):
    class FakeFit:
        iterations = 7
    b = bm.budget(1e-4, 0.05, iterations=FakeFit())
    assert b.near_term["shots_per_learning_run"] == 7 * b.near_term["shots_per_gradient"]


def test_assumptions_name_their_sources(budget):
    a = budget.assumptions
    for key in ("hoeffding", "amplitude_estimation", "ross-selinger", "mixed", "logical_error", "distillation",
                "order4_bound", "trotter_orders_1_2", "error_split", "precision_unit"):
        assert key in a and len(a[key]) > 20


@pytest.mark.parametrize("t, eps", [(0.0, 0.01), (-1e-4, 0.01), (1e-4, 0.0), (1e-4, 1.0), (1e-4, -0.1),
                                    (float("nan"), 0.01)])
def test_bad_time_or_precision(bm, t, eps):
    with pytest.raises(QhlInputError):
        bm.budget(t, eps)


def test_bad_settings():
    with pytest.raises(QhlInputError, match="threshold"):
        BudgetSettings(physical_error=0.02).validate()
    with pytest.raises(QhlInputError):
        BudgetSettings(split=(("trotter", 0.5), ("synthesis", 0.5), ("estimation", 0.5))).validate()
