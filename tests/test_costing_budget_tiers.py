"""The estimated tier and the classical-cost meter beside a budget (qhl.costing.budget).

Reference for the estimated tier: the exact engine (sector eigendecomposition, qhl.exact.engine),
an algorithm independent of the pure-state engine (Chebyshev propagation of random states,
dynamical typicality: Bartsch and Gemmer, Phys. Rev. Lett. 102, 110403 (2009), from memory). The
counts depend on the means only through R^2 - mu^2 with |mu| << R, so the two tiers agree to far
better than the engine's statistical error on mu itself (tolerance 1e-3 relative; deterministic seeds).
"""

import json

import pytest

from qhl import demo_cluster
from qhl.cli import main
from qhl.costing import BudgetModel, BudgetSettings

FAST = dict(empirical_trotter=False, circuit_variance_max_spins=0, classical_meter=False)


def test_estimated_tier_with_the_pure_state_engine_meets_the_exact_tier():
    c = demo_cluster()
    exact = BudgetModel(c, settings=BudgetSettings(**FAST)).budget(2e-4, 0.01)
    typical = BudgetModel(c, settings=BudgetSettings(use_exact=False, **FAST), estimator="typical").budget(2e-4, 0.01)
    assert typical.tiers == {"exact": "skipped", "estimated": "used", "bound": "used"}
    for key in ("shots_per_component", "shots_per_gradient", "shots_per_fisher"):
        assert typical.methods["near_term"][key] == "estimated"
        assert exact.methods["near_term"][key] == "exact"
        assert typical.near_term[key] == pytest.approx(exact.near_term[key], rel=1e-3)
        # and both at or below the range bound (R^2 - mu^2 <= R^2)
        assert typical.near_term[key] <= exact.near_term[key.replace("component", "component_bound")
                                                          if key == "shots_per_component" else key + "_bound"]


def test_budget_json_carries_the_classical_meter(capsys):
    assert main(["budget", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    c = out["classical"]
    assert {"method", "memory_bytes", "seconds", "feasible_here"} <= set(c)
    # the demo (6 spins, 64-dimensional space) is well within reach of a classical computer
    assert c["feasible_here"] is True and c["memory_bytes"] < 2**30
    assert c["crossover_spins"] is None or c["crossover_spins"] > 6
