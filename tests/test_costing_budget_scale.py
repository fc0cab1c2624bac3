"""Budgets beyond the exact engine: tiers, up-front plans, the bound tier at 40-100 spins, cut -> budget.

The bound tier's numbers are functions of the Pauli coefficients only; the checks here are that
they do not depend on whether the engine ran (same cluster, both tiers), that the engine is never
built when it does not fit, and that large clusters give complete budgets quickly (common
practice: a bound must not change with the method used beside it). The bounds themselves are
checked against their sources elsewhere: the Hadamard-test range (Banchi and Crooks, Quantum 5,
386 (2021)) in test_costing_shots.py, the commutator sums (Childs, Su, Tran, Wiebe, Zhu, PRX 11,
011020 (2021)) against qiskit's Pauli algebra in test_pauli_commutators.py.
"""

import json
import math

import pytest

import qhl.costing.budget as budget_mod
from qhl.cli import main
from qhl.costing import BudgetModel, BudgetSettings
from qhl.survey.structure import demo_structure_path
from test_pauli_commutators import _cluster


def _no_engine(*a, **k):
    raise AssertionError("the exact engine must not be built here")


def test_bound_tier_equals_the_bounds_of_the_exact_tier():
    c = _cluster(5, 3)
    s = dict(empirical_trotter=False, circuit_variance_max_spins=0)
    with_engine = BudgetModel(c, settings=BudgetSettings(**s)).budget(1e-4, 0.02)
    bound_only = BudgetModel(c, settings=BudgetSettings(use_exact=False, **s)).budget(1e-4, 0.02)
    assert with_engine.tiers["exact"] == "used" and bound_only.tiers["exact"] == "skipped"
    for key in ("shots_per_component_bound", "shots_per_gradient_bound", "shots_per_hessian_entry_bound",
                "shots_per_fisher_bound", "shots_per_component_hoeffding"):
        assert bound_only.near_term[key] == with_engine.near_term[key]
    for key in ("trotter_steps", "t_count", "depth", "logical_qubits", "queries"):
        assert bound_only.fault_tolerant[key] == with_engine.fault_tolerant[key]
    # without means the best count is the bound, and it says so
    assert bound_only.near_term["shots_per_component"] == bound_only.near_term["shots_per_component_bound"]
    assert bound_only.methods["near_term"]["shots_per_component"] == "bound"
    assert with_engine.methods["near_term"]["shots_per_component"] == "exact"
    assert with_engine.near_term["shots_per_component"] <= with_engine.near_term["shots_per_component_bound"]


def test_exact_parts_are_planned_before_anything_is_built(monkeypatch):
    # issue: a 12-proton budget computed for minutes, then refused the exact Hessian. The plan decides
    # up front from sector sizes (binomials) and a fixed matrix-product rate here (for a deterministic test).
    monkeypatch.setattr(budget_mod, "_matmul_rate", lambda: 2e9)
    settings = BudgetSettings()
    from qhl import build_model
    small = budget_mod.exact_engine_plan(build_model(_cluster(6, 0)), _cluster(6, 0).experiments, settings)
    assert small["use_engine"] and small["use_hessian"]
    c12 = _cluster(12, 0)
    plan = budget_mod.exact_engine_plan(build_model(c12), c12.experiments, settings)
    assert not plan["use_engine"] and "would take about" in plan["reason"]
    c16 = _cluster(16, 0)
    plan = budget_mod.exact_engine_plan(build_model(c16), c16.experiments, settings)
    assert not plan["use_engine"]
    # C(16, 8) = 12870 states in the largest sector: the Hessian alone needs 16 * 3 * 12870^3 bytes
    assert plan["hessian_memory_bytes"] >= 16 * 3 * 12870.0**3
    monkeypatch.setattr(budget_mod, "ExactEngine", _no_engine)
    bm = BudgetModel(c12, settings=BudgetSettings(empirical_trotter=False))
    assert bm.engine is None and any("exact tier skipped" in n for n in bm.notes)


def test_forty_spin_budget_in_the_bound_tier(monkeypatch):
    monkeypatch.setattr(budget_mod, "ExactEngine", _no_engine)
    c = _cluster(40, 2)
    messages = []
    bm = BudgetModel(c, progress=messages.append)
    b = bm.budget(bm.default_time_s, 0.01)
    assert bm.default_time_s == c.experiments[0].t_max_s
    d = json.loads(json.dumps(b.to_json()))
    assert d["tiers"] == {"exact": "skipped", "estimated": "not available", "bound": "used"}
    assert any("40 spins" in n for n in d["notes"])
    assert set(d["methods"]["near_term"].values()) <= {"bound", None}
    ft = d["fault_tolerant"]
    assert ft["trotter_steps"] > 1 and ft["t_count"] > ft["rotations"] > 0
    assert ft["logical_qubits"] > 40 and ft["gradient"]["t_count"] > ft["t_count"]
    assert d["methods"]["fault_tolerant"]["gate_counts_per_step"] == "count rule"
    assert d["near_term"]["per_parameter"]["dipolar:H1-H2"]["shots_exact"] is None
    assert d["precision_hz"]["value"] > 0 and d["comparison"]["fault_tolerant_cheaper_per_gradient"] in (True, False)
    assert any("prepared" in m for m in messages)
    # 40 spins, 820 free parameters: the Hoeffding count of the component range (Hoeffding 1963)
    r = d["near_term"]["component_range"]
    assert d["near_term"]["shots_per_component_hoeffding"] == math.ceil(2 * r**2 * math.log(2 / 0.05) / 0.01**2)


@pytest.mark.slow
def test_hundred_spin_budget(monkeypatch):
    monkeypatch.setattr(budget_mod, "ExactEngine", _no_engine)
    c = _cluster(100, 4)
    bm = BudgetModel(c)
    b = bm.budget(bm.default_time_s, 0.01)
    assert b.fault_tolerant["logical_qubits"] > 100 and math.isfinite(float(b.fault_tolerant["t_count"]))
    assert b.near_term["shots_per_gradient"] > 0


def test_cut_forty_then_budget_end_to_end(tmp_path, capsys):
    out = tmp_path / "clusters"
    assert main(["cut", str(demo_structure_path()), "--size", "40", "--centres", "1", "--out", str(out)]) == 0
    files = sorted(out.glob("*.toml"))
    assert len(files) == 1
    capsys.readouterr()
    assert main(["budget", str(files[0]), "--json"]) == 0
    captured = capsys.readouterr()
    d = json.loads(captured.out)
    assert d["tiers"]["exact"] == "skipped" and d["fault_tolerant"]["t_count"] > 0
    assert "note: exact tier skipped" in captured.err and "Traceback" not in captured.err
    assert main(["budget", str(files[0])]) == 0
    text = capsys.readouterr().out
    assert "method" in text and "per gradient" in text and "Hz" in text
