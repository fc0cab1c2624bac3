"""Budgets of pulse-sequence experiments: the gradient range over the whole Trotterised time, the shot counts
built on it, and the fault-tolerant counts (qhl.costing.budget `sequences`, qhl.costing.near_term).

References: the exact single-shot moments of the compiled Hadamard-test family (qhl.emulation.variance,
computed from the circuits' row unitaries, not from the range formula); Bhatia and Davis, Amer. Math.
Monthly 107, 353 (2000), from memory: a variable in [-R, R] with mean mu has Var <= (R - mu)(R + mu);
Hoeffding, J. Amer. Statist. Assoc. 58, 13 (1963) for the coin simulation; Hahn, Phys. Rev. 80, 580 (1950)
for the echo sequence (delay, 180-degree pulse, delay).
"""

import math

import numpy as np
import pytest

from qhl import build_model
from qhl.base.errors import QhlInputError
from qhl.circuits.sequence_circuits import sequence_gradient_circuit
from qhl.costing.budget import BudgetModel, BudgetSettings
from qhl.costing.near_term import sequence_gradient_range
from qhl.emulation.variance import family_moments
from qhl.spins.cluster import Cluster, Delay, Experiment, Pair, Pulse, Spin

FREE = ["offset:*", "dipolar:*", "j:*"]


def hahn(name="hahn", tau=0.1, t_max=0.3, scale=0.8):
    return Experiment(name, t_max, 4, scale, steps=(Delay(tau), Pulse(180, 90), Delay(tau)))


def invented(k, experiments):
    """Three invented three-proton clusters with Hz-scale couplings (2 pi h t of order one at t ~ 0.3 s)."""
    spins = [(Spin("A", "1H", None, 1.3), Spin("B", "1H", None, -0.8), Spin("C", "1H", None, 0.55)),
             (Spin("A", "1H", None, -0.4), Spin("B", "1H", None, 0.9), Spin("C", "1H", None, 2.1)),
             (Spin("A", "1H", None, 0.2), Spin("B", "1H", None, -1.7), Spin("C", "1H", None, 0.6))][k]
    pairs = [(Pair(("A", "B"), j_hz=0.45, dipolar_hz=0.9), Pair(("B", "C"), dipolar_hz=-0.6)),
             (Pair(("A", "B"), dipolar_hz=-1.2), Pair(("A", "C"), j_hz=0.3, dipolar_hz=0.5),
              Pair(("B", "C"), j_hz=-0.2)),
             (Pair(("A", "C"), j_hz=0.7, dipolar_hz=0.35), Pair(("B", "C"), dipolar_hz=1.4))][k]
    return Cluster(9.4, "1H", spins, pairs, tuple(experiments), name=f"invented{k}")


@pytest.mark.parametrize("k", [0, 1, 2])
def test_range_bounds_every_single_shot_of_the_compiled_sequence_estimator(k):
    # The compiled Hahn-echo gradient family's exact single-shot moments (qhl.emulation.variance):
    # its largest |value| never exceeds R (and equals it: the range is tight), and its exact variance
    # obeys Bhatia-Davis Var <= (R - mu)(R + mu) with R from the formula (Bhatia and Davis 2000).
    ex = hahn(tau=0.05 + 0.05 * k)
    c = invented(k, [ex])
    model = build_model(c, free=FREE)
    kappa = float(sum(model.observed))
    t = 0.2
    for name in model.free:
        fam = sequence_gradient_circuit(model, ex, name, t, 3, 2)
        mo = family_moments(fam, "re")
        l1 = float(np.sum(np.abs(model.parameter(name).generator.coeffs)))
        s = model.scale_factors(ex)[model.free_indices][list(model.free).index(name)]
        r = float(sequence_gradient_range(t, ex, l1, s, kappa, 1.0))
        assert mo.value_range <= r * (1 + 1e-12)
        assert mo.value_range == pytest.approx(r, rel=1e-9)
        assert mo.variance <= (r - mo.mean) * (r + mo.mean) * (1 + 1e-12)
        # the acquisition time alone would not cover it once the delays are on
        assert mo.value_range > float(sequence_gradient_range(t, Experiment("fid", 0.3, 4, 0.8), l1, s, kappa, 1.0))


def _budget(cluster, t=0.2, eps=0.05, **kw):
    settings = BudgetSettings(empirical_trotter=False, classical_meter=False, hessian_exact=False, **kw)
    return BudgetModel(cluster, free=FREE, settings=settings).budget(t, eps)


def test_hoeffding_count_of_the_sequence_range_covers_sampled_coins():
    # Hoeffding 1963: N shots of a fair +-R coin (the worst case of a [-R, R] estimator with mean 0) have
    # P(|mean| >= eps) <= delta. Seeded, 4000 trials; the true exceedance rate is ~0.005 here, so
    # observing > 0.05 has probability < 1e-30 (binomial tail): no false failures.
    b = _budget(invented(0, [Experiment("fid", 0.3, 4, 0.8), hahn()]), eps=0.5)
    near = b.sequences["hahn"]["near_term"]
    r, n = near["component_range"], near["shots_per_component_hoeffding"]
    assert n == math.ceil(2 * r**2 * math.log(2 / 0.05) / 0.5**2)
    rng = np.random.default_rng(17)
    means = (2 * rng.binomial(n, 0.5, size=4000) - n) * r / n
    assert np.mean(np.abs(means) >= 0.5) <= 0.05


def test_sequence_shots_grow_with_the_delays_while_the_fid_budget_does_not_change():
    # Common practice: the estimator's range, hence every range-based count, grows with the Trotterised
    # time; the free-evolution experiment's numbers do not depend on the sequence beside it.
    fid = Experiment("fid", 0.3, 4, 0.8)
    seq, top = [], []
    for tau in (0.02, 0.05, 0.1, 0.2):
        b = _budget(invented(1, [fid, hahn(tau=tau)]), circuit_variance_max_spins=0)
        near = b.sequences["hahn"]["near_term"]
        seq.append((near["component_range"], near["shots_per_component_bound"],
                    near["shots_per_component_hoeffding"], b.sequences["hahn"]["fault_tolerant"]["trotter_steps"]))
        top.append((b.near_term["shots_per_component"], b.near_term["shots_per_component_hoeffding"],
                     b.fault_tolerant["trotter_steps"]))
    for a, c in zip(seq, seq[1:]):
        assert all(y > x for x, y in zip(a[:3], c[:3]))
        assert c[3] >= a[3]
    assert seq[-1][3] > seq[0][3]
    assert len(set(top)) == 1


def test_sequence_block_counts_the_gradient_circuit_and_states_its_sources():
    # The gradient circuit = the signal circuit + one controlled-Pauli gadget (2 CX per qubit of the Pauli,
    # qhl.circuits.gradient_circuits: rzz = 2 CX, common practice); the exact mean lies within the range
    # (|mu| <= R, the estimator's values lie in [-R, R]); the compiled variance is at most R^2 - mu^2.
    b = _budget(invented(2, [Experiment("fid", 0.3, 4, 0.8), hahn()]))
    blk = b.sequences["hahn"]
    near, ft = blk["near_term"], blk["fault_tolerant"]
    assert ft["gradient_circuit"]["cx"] == blk["total"]["cx"] + ft["gadget"]["cx"]
    assert ft["gradient_circuit"]["rotations"] == blk["total"]["rotations"] + ft["gadget"]["rotations"]
    assert ft["trotter_steps"] == blk["total"]["steps"]
    assert blk["evolution_time_s"] == pytest.approx(0.2 + 0.2)
    assert abs(near["mean"]) <= near["component_range"]
    assert near["shots_per_component_circuit"] <= near["shots_per_component"] <= near["shots_per_component_bound"]
    assert blk["methods"]["shots_per_component"] == "exact"
    assert "sequence_gradients" in b.assumptions and "t + T_delays" in b.assumptions["sequence_gradients"]


def test_a_cluster_of_sequence_experiments_only_gets_a_budget_naming_its_sources():
    # Every experiment a Hahn echo (Hahn 1950): no refusal any more. The top level carries the experiment
    # with the largest range; its fault-tolerant steps cover the whole evolution t + delays (commutator
    # bound; at least as many as for the acquisition t alone of the same Hamiltonian, common practice:
    # the Trotter error grows with the simulated time); methods name each number's source.
    c = invented(0, [hahn("short", tau=0.05), hahn("long", tau=0.2)])
    bm = BudgetModel(c, free=FREE, settings=BudgetSettings(empirical_trotter=False, classical_meter=False))
    assert bm.sequence_only and any("every experiment" in note for note in bm.notes)
    b = bm.budget(0.2, 0.05)
    assert b.near_term["experiment"] == "long"
    assert b.fault_tolerant["evolution_time_s"] == pytest.approx(0.6)
    assert b.near_term["component_range"] == max(b.sequences[k]["near_term"]["component_range"] for k in b.sequences)
    assert b.sequences["long"]["fault_tolerant"]["steps_whole_evolution"] >= \
        b.sequences["short"]["fault_tolerant"]["steps_whole_evolution"]
    src = b.methods["sources"]
    assert "sequence_gradient_range" in src["component_range"] and "Hoeffding" in src["shots_per_component_hoeffding"]
    assert "sequence_engine" in src["shots_per_component"] and "ft_cost_arrays" in src["trotter_steps"]
    assert b.fault_tolerant["t_count"] > 0 and b.fault_tolerant["logical_qubits"] > c.n_spins
    assert b.near_term["shots_per_component_hoeffding"] == math.ceil(
        2 * b.near_term["component_range"] ** 2 * math.log(2 / 0.05) / 0.05**2)
    assert b.to_json()["sequences"]["short"]["near_term"]["worst_parameter"] in bm.model.free
    with pytest.raises(QhlInputError, match="sweeps"):
        bm.sweep([0.1, 0.2], [0.05])


def test_cli_budget_of_a_sequence_only_cluster(tmp_path, capsys):
    # The example's Hahn echo alone (examples/hahn_echo.toml without its FID): exit 0, the text names it.
    from pathlib import Path
    from qhl.cli import main
    text = (Path(__file__).resolve().parents[1] / "examples" / "hahn_echo.toml").read_text()
    start, end = text.index('[[experiment]]\nname = "fid"'), text.index('[[experiment]]\nname = "hahn"')
    path = tmp_path / "hahn_only.toml"
    path.write_text(text[:start] + text[end:])
    assert main(["budget", str(path), "--precision", "0.01", "--no-classical"]) == 0
    out = capsys.readouterr().out
    assert "sequence 'hahn'" in out and "shots per component" in out


@pytest.mark.parametrize("pauli", ["Z", "XX", "YZX"])
def test_gadget_rule_bounds_the_transpiled_controlled_pauli(pauli):
    # The budget's gadget rule (2 w CX, 2 w rz) against qiskit transpiles (basis [cx, rz, sx, x], counts by
    # qhl.circuits.circuit_counts): the gadget the gradient family runs at its sampled point (phi = pi) needs
    # no more; it is controlled-((-i)^w P), checked as a matrix against qiskit's controlled Pauli
    # (qiskit.circuit.library.PauliGate(...).control()), which transpiles with no arbitrary-angle rotation
    # (the gate is Clifford: the rule's rotations are conservative).
    from types import SimpleNamespace
    from qiskit import QuantumCircuit
    from qiskit.circuit.library import PauliGate
    from qiskit.quantum_info import Operator
    from qhl.circuits.circuit_counts import circuit_counts
    from qhl.circuits.gradient_circuits import _controlled_pauli
    w = len(pauli)
    ours = QuantumCircuit(w + 1)
    _controlled_pauli(w, SimpleNamespace(qubits=tuple(range(w)), pauli=pauli), np.pi)(ours)
    ref = QuantumCircuit(w + 1)
    ref.append(PauliGate(pauli[::-1]).control(1), [w, *range(w)])
    assert Operator(ours).equiv(Operator(ref)) or np.allclose(
        Operator(ours).data, Operator(ref).data @ np.diag(np.r_[np.ones(2**w), np.full(2**w, (-1j) ** w)]))
    b = _budget(invented(0, [Experiment("fid", 0.3, 4, 0.8), hahn()]), circuit_variance_max_spins=0)
    gadget = b.sequences["hahn"]["fault_tolerant"]["gadget"]
    assert gadget["cx"] == 2 * gadget["pauli_weight"] == gadget["rotations"]
    got, qiskit_own = circuit_counts(ours), circuit_counts(ref)
    assert got.cx <= 2 * w and got.rotations <= 2 * w
    assert qiskit_own.cx <= 2 * w and qiskit_own.rotations == 0


def test_compiled_variance_is_skipped_with_a_note_for_very_long_delays():
    # Delays 200 times the acquisition: about 8 x 401 steps exceed SEQUENCE_VARIANCE_MAX_STEPS, so the exact
    # compiled variance is skipped (a note says why) while the range-based counts stay (common practice).
    b = _budget(invented(1, [Experiment("fid", 0.3, 4, 0.8), hahn(tau=2.0, t_max=0.01)]), t=0.01)
    near = b.sequences["hahn"]["near_term"]
    assert near["shots_per_component_circuit"] is None and near["shots_per_component_bound"] > 0
    assert any("compiled estimator's variance skipped" in note for note in b.notes)


def test_sequence_fault_tolerant_counts_include_the_pulse_rotations():
    # The amplitude-estimation counts of a sequence experiment's gradient circuit count its pulses'
    # rotations: a pulse at a non-Clifford angle (73 degrees) adds rotations that a 180-degree pulse does
    # not. Reference for the per-pulse rotations: qiskit's transpiler on RGate(theta, 0) alone, counting
    # the rz angles that are not multiples of pi/2 (common practice: those need synthesis).
    from qiskit import QuantumCircuit, transpile
    ex180 = Experiment("e", 0.3, 4, 0.8, steps=(Delay(0.1), Pulse(180, 0), Delay(0.1)))
    ex73 = Experiment("e", 0.3, 4, 0.8, steps=(Delay(0.1), Pulse(73, 0), Delay(0.1)))
    b180 = _budget(invented(0, [Experiment("fid", 0.3, 4, 0.8), ex180]))
    b73 = _budget(invented(0, [Experiment("fid", 0.3, 4, 0.8), ex73]))
    ae180 = b180.sequences["e"]["fault_tolerant"]["amplitude_estimation"]
    ae73 = b73.sequences["e"]["fault_tolerant"]["amplitude_estimation"]
    qc = QuantumCircuit(1)
    qc.r(np.deg2rad(73), 0.0, 0)
    tq = transpile(qc, basis_gates=["rz", "sx", "x"], optimization_level=1)
    odd = sum(1 for inst in tq.data if inst.operation.name == "rz"
              and not np.isclose((float(inst.operation.params[0]) / (np.pi / 2)) % 1, 0, atol=1e-9)
              and not np.isclose((float(inst.operation.params[0]) / (np.pi / 2)) % 1, 1, atol=1e-9))
    n_pulsed = 3          # three protons, all pulsed
    assert odd >= 1
    assert ae73["rotations_per_call"] - ae180["rotations_per_call"] == odd * n_pulsed
    assert ae73["t_count"] > ae180["t_count"]
    assert b73.sequences["e"]["methods"]["amplitude_estimation"].startswith("estimate")


def test_sequence_t_per_rotation_matches_gridsynth():
    # qiskit.synthesis.gridsynth_rz (Ross and Selinger, Quantum Inf. Comput. 16, 901 (2016)) at the budget's
    # own rotation error: its T-count on a few generic angles lies within 15 % of the budget's T per rotation
    from qiskit.synthesis import gridsynth_rz
    b = _budget(invented(1, [Experiment("fid", 0.3, 4, 0.8), hahn()]))
    ae = b.sequences["hahn"]["fault_tolerant"]["amplitude_estimation"]
    counts = [gridsynth_rz(a, ae["rotation_error"]).count_ops().get("t", 0) for a in (0.3117, 1.0471, 2.2222)]
    assert np.median(counts) == pytest.approx(ae["t_per_rotation"], rel=0.15)
    assert ae["t_count"] > ae["runs"] * (2 * ae["queries"] + 1) * ae["rotations_per_call"] * min(counts) * 0.8
