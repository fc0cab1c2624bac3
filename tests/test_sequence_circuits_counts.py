"""Gate counts of pulse-sequence signal circuits and the budget of a cluster with a sequence experiment.

References: qiskit's transpiler (basis cx, rz, sx, x; qhl.circuits.circuit_counts' convention) on the
circuits themselves, against the count rule of qhl.circuits.sequence_circuits.sequence_counts;
the parse of examples/hahn_echo.toml (an invented cluster).
"""

import math
from pathlib import Path

import numpy as np
import pytest
from qiskit import QuantumCircuit

from qhl import build_model
from qhl.circuits.circuit_counts import circuit_counts
from qhl.circuits.sequence_circuits import (PULSE_LAYERS, PlannedPulse, acquisition_terms, preparation_circuit,
                                            pulse_counts, sequence_counts, sequence_plan)
from qhl.spins.cluster import Delay, Experiment, Pulse
from qhl.spins.cluster_file import load_cluster
from qhl.spins.sequences import named_block

from made_up_clusters import small_cluster

FREE = ["offset:*", "dipolar:*", "j:*"]
EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "hahn_echo.toml"


def _experiment(repeat=2):
    return Experiment("w", 0.2, 3, 1.0, steps=(named_block("wahuha", 0.01, repeat), Pulse(60, 30), Delay(0.03)))


@pytest.mark.parametrize("theta_deg,phi_deg", [(180, 90), (90, 0), (60, 30), (73, 90), (45, 200), (360, 17)])
def test_pulse_rule_against_transpiled_rgate(theta_deg, phi_deg):
    # transpiled RGate on 2 qubits: rotations <= rule, depth <= PULSE_LAYERS (common practice: U = rz sx rz sx rz)
    pulse = PlannedPulse(np.deg2rad(theta_deg), np.deg2rad(phi_deg), (0, 1))
    qc = QuantumCircuit(2)
    for q in pulse.qubits:
        qc.r(pulse.theta, pulse.phi, q)
    got, rule = circuit_counts(qc), pulse_counts(pulse)
    assert got.rotations <= rule["rotations"]
    assert got.depth <= rule["depth"] <= PULSE_LAYERS
    if theta_deg == 180 and phi_deg == 90:
        assert got.rotations == rule["rotations"] == 0          # a Y pulse is Clifford


@pytest.mark.parametrize("n,order", [(3, 1), (4, 1), (3, 2), (4, 2)])
def test_preparation_rule_against_transpiled_circuit(n, order):
    model = build_model(small_cluster(False, n), free=FREE)
    ex = _experiment()
    terms = acquisition_terms(model, ex)
    c = sequence_counts(model, ex, 0.2, 4, order)
    got = circuit_counts(preparation_circuit(terms, sequence_plan(model, ex, 0.2, 4), order))
    prep = c["preparation"]
    if order == 1:
        assert prep["cx"] == got.cx                     # measured: 99 (3 spins), 165 (4 spins)
    else:                                               # the transpiler merges some half steps (measured 10-20%)
        assert got.cx <= prep["cx"] <= 1.25 * got.cx
    assert abs(prep["rotations"] - got.rotations) <= 0.15 * got.rotations
    assert prep["depth"] >= got.depth                   # the rule's depth: blocks one after the other


def test_counts_grow_with_the_steps_of_the_sequence():
    model = build_model(small_cluster(False, 3), free=FREE)
    prep = [sequence_counts(model, _experiment(k), 0.2, 4, 2)["preparation"] for k in (1, 2, 4, 8)]
    for a, b in zip(prep, prep[1:]):
        assert b["steps"] > a["steps"] and b["cx"] > a["cx"] and b["rotations"] > a["rotations"]
        assert b["pulses"] == 2 * a["pulses"] - 1       # 4 pulses per wahuha cycle, plus one
    # finer acquisition steps shorten the delays' steps too: the preparation's steps grow with r
    fine = [sequence_counts(model, _experiment(), 0.2, r, 1) for r in (4, 40, 400)]
    assert [f["preparation"]["steps"] for f in fine] == [
        sum(max(1, math.ceil(d / (0.2 / r) - 1e-9)) for d in (0.01, 0.01, 0.02, 0.01, 0.01) * 2 + (0.03,))
        for r in (4, 40, 400)]
    for f in fine:
        share = f["preparation_share"]["cx"]
        assert share == pytest.approx(f["preparation"]["cx"] / (f["preparation"]["cx"] + f["acquisition"]["cx"]))


def test_budget_of_a_cluster_with_a_sequence_experiment():
    from qhl.costing import BudgetModel, BudgetSettings

    cluster = load_cluster(EXAMPLE)
    bm = BudgetModel(cluster, settings=BudgetSettings(empirical_trotter=False, classical_meter=False))
    b = bm.budget(0.05, 0.01)
    seq = b.to_json()["sequences"]["hahn"]
    assert [ex.name for ex in bm.experiments] == ["fid"]
    r, order = seq["acquisition"]["steps"], seq["order"]
    assert r >= b.fault_tolerant["trotter_steps"] and order == b.fault_tolerant["trotter_order"]
    assert seq["step_s"] * r == pytest.approx(0.05)
    assert seq["preparation"]["steps"] == 2 * math.ceil(0.02 / seq["step_s"] - 1e-9)     # two 0.02 s delays
    assert seq["preparation"]["pulses"] == 1 and seq["preparation"]["pulse_rotations"] == 0   # 180 about y
    assert seq["total"]["steps"] == r + seq["preparation"]["steps"]
    assert 0 < seq["preparation_share"]["cx"] < 1
    assert any("sequence 'hahn'" in note and "share" in note for note in b.notes)
    assert "sequence_circuits" in b.assumptions


def test_budget_no_longer_refuses_when_every_experiment_is_a_sequence():
    # A cluster of sequence experiments only is budgeted per component (tests/test_sequence_budget.py).
    import dataclasses

    from qhl.costing import BudgetModel, BudgetSettings

    cluster = load_cluster(EXAMPLE)
    only = dataclasses.replace(cluster, experiments=cluster.experiments[1:])
    bm = BudgetModel(only, settings=BudgetSettings(empirical_trotter=False, classical_meter=False))
    assert bm.sequence_only and list(bm.budget(0.05, 0.01).sequences) == ["hahn"]
