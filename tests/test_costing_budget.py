"""The Budget API on the demo cluster: consistency, scaling exponents and bad input."""

import math

import numpy as np
import pytest

from qhl import demo_cluster
from qhl.costing import BudgetModel, BudgetSettings, fit_exponents
from qhl.costing.amplitude_estimation import amplitude_error_bound
from qhl.costing.shots import hoeffding_shots
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


def test_bound_is_never_below_the_exact_variance_count(budget, sweep):
    nt = budget.near_term
    for exact, bound in (("shots_per_component", "shots_per_component_bound"),
                         ("shots_per_gradient", "shots_per_gradient_bound"),
                         ("shots_per_gradient_uniform", "shots_per_gradient_uniform_bound"),
                         ("shots_per_hessian_entry", "shots_per_hessian_entry_bound"),
                         ("shots_per_fisher", "shots_per_fisher_bound")):
        assert 0 < nt[exact] <= nt[bound]
    for row in nt["per_parameter"].values():
        assert row["shots_exact"] <= row["shots_bound"]
    assert np.all(sweep.tables["near_term_component_exact"] <= sweep.tables["near_term_component_bound"])


def test_optimal_allocation_is_never_worse_than_uniform(budget, sweep):
    # Cauchy-Schwarz (Wecker, Hastings, Troyer 2015, from memory)
    assert budget.near_term["shots_per_gradient"] <= budget.near_term["shots_per_gradient_uniform"]
    assert np.all(sweep.tables["near_term_gradient_exact"] <= sweep.tables["near_term_gradient_uniform_exact"])


def test_hoeffding_count_of_the_component_range(budget):
    # Hoeffding 1963 with the component's own range
    nt = budget.near_term
    assert nt["shots_per_component_hoeffding"] == hoeffding_shots(nt["component_range"], 0.01, 0.05)


def test_sweep_exponents(sweep):
    # common practice (project references): near-term shots grow as t^2/eps^2 (bound, exact to
    # 2.00 +- 0.02 over the sweep), Hessian entries as t^4/eps^2
    bt, be, _, _ = sweep.exponents["near_term_component_bound"]
    assert bt == pytest.approx(2.0, abs=0.02) and be == pytest.approx(-2.0, abs=0.02)
    ht, he, _, _ = sweep.exponents["near_term_hessian_entry_bound"]
    assert ht == pytest.approx(4.0, abs=0.02) and he == pytest.approx(-2.0, abs=0.02)
    gt, ge, _, _ = sweep.exponents["near_term_gradient_exact"]
    assert gt == pytest.approx(2.0, abs=0.05) and ge == pytest.approx(-2.0, abs=0.02)


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
