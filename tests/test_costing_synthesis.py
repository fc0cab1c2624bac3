"""Rotation synthesis and T-depth against qiskit's own Ross-Selinger synthesis and circuit depth.

References: N. J. Ross and P. Selinger, "Optimal ancilla-free Clifford+T approximation of
z-rotations", Quantum Inf. Comput. 16, 901 (2016), as implemented by
qiskit.synthesis.gridsynth_rz; QuantumCircuit.depth (qiskit) for layer counting; qiskit
Operator for unitary distances.
"""

import math

import numpy as np
import pytest
from qiskit import QuantumCircuit, transpile
from qiskit.quantum_info import Operator
from qiskit.synthesis import gridsynth_rz

from qhl import build_model
from qhl.base.errors import QhlInputError
from qhl.circuits.trotter import trotter_circuit, trotter_terms
from qhl.costing import BudgetModel, BudgetSettings
from qhl.costing.synthesis import (SYNTHESIS_BASIS, clifford_t_circuit, synthesised_step, t_count_per_rotation,
                                   weighted_depth)
from qhl.spins.cluster import Cluster, Experiment, Spin

T_GATES = ("t", "tdg")


def four_spins(dipolar_scale=1.0):
    """An invented four-proton cluster (made-up geometry and offsets)."""
    spins = (Spin("A", "1H", (0.0, 0.0, 0.0), -350.0), Spin("B", "1H", (1.8, 0.1, 0.0), 120.0),
             Spin("C", "1H", (0.4, 2.1, 0.5), 560.0), Spin("D", "1H", (2.1, 1.9, -1.1), -60.0))
    return Cluster(9.4, "1H", spins, (), (Experiment("fid", 2e-4, 32, dipolar_scale, 1e-3),), name="four")


def _gridsynth_median(eps, n=25, seed=11):
    rng = np.random.default_rng(seed)
    counts = []
    for a in rng.uniform(0.05, 2 * math.pi - 0.05, n):
        ops = gridsynth_rz(float(a), eps).count_ops()
        counts.append(sum(ops.get(g, 0) for g in T_GATES))
    return float(np.median(counts))


@pytest.mark.parametrize("eps", [1e-4, 1e-8, 1e-12])
def test_rule_within_15_percent_of_gridsynth(eps):
    # Ross and Selinger 2016: about 3 log2(1/eps) T gates; qiskit's gridsynth_rz median over
    # 25 random angles (fixed seed) is the reference.
    assert t_count_per_rotation(eps) == pytest.approx(_gridsynth_median(eps), rel=0.15)


@pytest.fixture(scope="module")
def four_budget():
    bm = BudgetModel(four_spins(), settings=BudgetSettings(circuit_variance_max_spins=0, hessian_exact=False))
    return bm, bm.budget(2e-4, 0.01)


def test_budget_t_per_rotation_within_15_percent_of_gridsynth_median(four_budget):
    # the budget's T per rotation against qiskit's gridsynth median at the same rotation error
    # (other angles than the budget's: an independent sample)
    _, b = four_budget
    ft = b.fault_tolerant
    assert ft["t_per_rotation"] == pytest.approx(_gridsynth_median(ft["rotation_error"]), rel=0.15)
    assert ft["t_per_rotation_rule"] == pytest.approx(3 * math.log2(1 / ft["rotation_error"]), rel=1e-9)


def _synthesised_by_qiskit(terms, tau, order, eps):
    """One step transpiled by qiskit to the synthesis basis, every non-Clifford rz replaced by
    qiskit's gridsynth_rz sequence."""
    qc = transpile(trotter_circuit(terms, tau, 1, order), basis_gates=list(SYNTHESIS_BASIS), optimization_level=0)
    out = QuantumCircuit(qc.num_qubits)
    rotations = 0
    for inst in qc.data:
        qs = [qc.find_bit(q).index for q in inst.qubits]
        if inst.operation.name == "rz":
            k = float(inst.operation.params[0]) / (math.pi / 2)
            if abs(k - round(k)) > 1e-9:
                rotations += 1
                for s in gridsynth_rz(float(inst.operation.params[0]) % (2 * math.pi), eps).data:
                    out.append(s.operation, qs)
                continue
        out.append(inst.operation, qs)
    return out, rotations


@pytest.mark.parametrize("order", [1, 2])
def test_step_t_depth_counted_on_the_synthesised_circuit(order):
    # The model's per-step T-depth (longest path weighted by each rotation's T-count) equals the
    # T-depth that qiskit's QuantumCircuit.depth counts on the synthesised one-step circuit.
    c = four_spins()
    terms = trotter_terms(build_model(c), c.experiments[0], grouping="pairs")
    tau, eps = 2e-6, 1e-7
    circ, rotations = _synthesised_by_qiskit(terms, tau, order, eps)
    model = synthesised_step(terms, order, tau, eps, marginal=False)
    assert model.t_depth == circ.depth(filter_function=lambda i: i.operation.name in T_GATES)
    assert model.t_count == sum(circ.count_ops().get(g, 0) for g in T_GATES)
    assert model.rotations == rotations
    # the exported Clifford+T step is the same circuit
    ours = clifford_t_circuit(terms, order, tau, eps)
    assert ours.depth(filter_function=lambda i: i.operation.name in T_GATES) == model.t_depth


def test_clifford_t_step_is_within_the_synthesis_error_of_the_step():
    # Operator distance (qiskit Operator, up to a global phase) of the Clifford+T step to the
    # exact step is at most rotations x eps (triangle inequality; gridsynth's error is in
    # operator norm up to phase).
    c = four_spins()
    terms = trotter_terms(build_model(c), c.experiments[0], grouping="pairs")
    tau, eps = 2e-6, 1e-5
    ct = Operator(clifford_t_circuit(terms, 2, tau, eps)).data
    ex = Operator(trotter_circuit(terms, tau, 1, 2)).data
    phase = np.trace(ex.conj().T @ ct)
    phase /= abs(phase)
    n_rot = synthesised_step(terms, 2, tau, eps, marginal=False).rotations
    dist = np.linalg.norm(ct - phase * ex, 2)
    assert dist <= n_rot * eps
    assert dist > 0


def test_weighted_depth_with_unit_weights_is_qiskit_depth():
    # QuantumCircuit.depth (qiskit) on random circuits
    rng = np.random.default_rng(5)
    for _ in range(5):
        qc = QuantumCircuit(4)
        for _ in range(40):
            if rng.random() < 0.5:
                a, b = rng.choice(4, 2, replace=False)
                qc.cx(int(a), int(b))
            else:
                qc.rz(float(rng.normal()), int(rng.integers(4)))
        assert weighted_depth(qc, lambda i: 1.0) == qc.depth()
        assert weighted_depth(qc, lambda i: 1.0 if i.operation.name == "rz" else 0.0) == \
            qc.depth(filter_function=lambda i: i.operation.name == "rz")


def test_fault_tolerant_depth_counts_t_layers(four_budget):
    # depth >= t_depth >= (runs x calls x steps) x the synthesised step's T-depth
    _, b = four_budget
    ft = b.fault_tolerant
    assert ft["depth"] >= ft["t_depth"] > 0
    calls = ft["median_repetitions"] * (2 * ft["queries"] + 1)
    assert ft["t_depth"] >= calls * ft["trotter_steps"] * ft["step_t_depth"]
    assert ft["step_t_depth"] >= ft["step_rotation_depth"] * 0.9 * ft["t_per_rotation"]
    assert ft["queries_total"] == ft["median_repetitions"] * ft["queries"]
    assert ft["gradient"]["t_depth"] > 0


def test_mixed_fallback_rule_and_its_refusal_inside_amplitude_estimation():
    # Kliuchnikov, Lauter, Minko, Paetznick, Petit, Quantum 7, 1208 (2023), abstract:
    # T-count 0.56 log2(1/eps) + 5.3 with mixed fallback; at eps = 1e-10: 0.56 x 33.22 + 5.3 = 23.90
    assert t_count_per_rotation(1e-10, "mixed") == pytest.approx(23.90, abs=0.01)
    # a mixture of unitaries cannot sit inside coherent amplitude estimation: refused
    with pytest.raises(QhlInputError, match="synthesis"):
        BudgetSettings(synthesis="mixed").validate()
    with pytest.raises(QhlInputError):
        t_count_per_rotation(1e-10, "nonsense")


@pytest.mark.slow
def test_cli_writes_the_clifford_t_step_and_reports_t_depth(tmp_path, capsys):
    # qiskit.qasm3 output; the T layers counted by qiskit on the written step equal the budget's
    import json
    from qhl.cli import main
    out = tmp_path / "step.qasm"
    assert main(["budget", "--json", "--physical-error", "1e-3", "--clifford-t", str(out)]) == 0
    d = json.loads(capsys.readouterr().out)
    ft = d["fault_tolerant"]
    text = out.read_text()
    assert text.startswith("OPENQASM 3")
    assert ft["clifford_t_step"]["t_count"] == sum(line.strip().startswith(("t ", "tdg ")) for line in text.splitlines())
    assert ft["depth"] >= ft["t_depth"] > 0
    assert d["surface_code"]["limited_by"] in ("reaction", "code cycles", "factories")
    assert d["surface_code"]["wall_time_s"] >= ft["t_depth"] * 1e-5   # at least one reaction time per T layer


def test_order4_clifford_t_step_is_the_suzuki_step():
    # Suzuki 1990 S4 from five S2 stages (one with negative duration); the Clifford+T step against
    # the exact S4 step (qiskit Operator of the unsynthesised stages), within rotations x eps.
    from qhl.costing.trotter_order4 import SUZUKI4_U as u
    c = four_spins()
    terms = trotter_terms(build_model(c), c.experiments[0], grouping="pairs")
    tau, eps = 3e-6, 1e-5
    exact = np.eye(16, dtype=complex)
    for f in (u, u, 1 - 4 * u, u, u):
        m = Operator(trotter_circuit(terms, abs(f) * tau, 1, 2)).data
        exact = (m if f > 0 else m.conj().T) @ exact
    ct = clifford_t_circuit(terms, 4, tau, eps)
    u_ct = Operator(ct).data
    phase = np.trace(exact.conj().T @ u_ct)
    phase /= abs(phase)
    n_rot = synthesised_step(terms, 4, tau, eps, marginal=False).rotations   # five stages' rotations
    dist = np.linalg.norm(u_ct - phase * exact, 2)
    assert 0 < dist <= n_rot * eps
