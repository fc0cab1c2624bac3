"""Routed counts (qhl.circuits.routing) and the --target option of `qhl circuits` / `qhl budget`.

References: routing on a restricted coupling map only adds gates (common practice: SWAP insertion
never removes a required interaction); a line cannot host a fully coupled 4-spin cluster without
SWAPs, while a nearest-neighbour chain maps onto a line with none (common practice); qiskit's own
preset pass manager (qiskit.transpiler.generate_preset_pass_manager, Qiskit documentation) is the
baseline the layout search must not lose to; the scalar-coupling Hamiltonian 2 pi J I1.I2 with
I = sigma/2 has Pauli coefficients J/4 on XX, YY, ZZ (Levitt, "Spin Dynamics", 2nd ed. 2008; from memory).
"""

import json

import numpy as np
import pytest

from made_up_clusters import random_cluster
from qhl.base.errors import QhlInputError
from qhl.circuits.circuit_counts import circuit_counts, family_counts
from qhl.circuits.gradient_circuits import gradient_circuit, signal_circuit
from qhl.circuits.routing import coupling_weights, greedy_layout, route_circuit, routed_family_counts, \
    routed_step_counts
from qhl.circuits.targets import GENERIC_TARGETS, backend_names, resolve_target
from qhl.circuits.trotter import trotter_terms
from qhl.cli import main
from qhl.spins.cluster import Cluster, Experiment, Pair, Spin
from qhl.spins.model import build_model

HAS_BACKENDS = bool(backend_names())
needs_backends = pytest.mark.skipif(not HAS_BACKENDS, reason="qiskit-ibm-runtime (device extra) not installed")
SEEDS = (11, 23)


@pytest.fixture(scope="module")
def demo_family():
    from qhl import demo_cluster
    c = demo_cluster()
    m = build_model(c)
    return gradient_circuit(m, c.experiments[0], "dipolar:H1-H2", 1e-4, 1, 2)


def _chain_cluster(n):
    spins = tuple(Spin(f"S{i}", "1H", None, 100.0 * (i + 1)) for i in range(n))
    pairs = tuple(Pair((f"S{i}", f"S{i + 1}"), j_hz=5.0 + i) for i in range(n - 1))
    return Cluster(9.4, "1H", spins, pairs, (Experiment("x", 0.01, 4, 0.5),))


def test_routed_counts_at_least_all_to_all_on_every_target(demo_family):
    # common practice: routing adds SWAPs, it never removes a needed two-qubit interaction
    base = family_counts(demo_family)
    names = [t for t in GENERIC_TARGETS if t != "all-to-all"]
    if HAS_BACKENDS:
        names += ["fake_brisbane", "fake_torino"]        # ecr and cz native gates
    for name in names:
        target = resolve_target(name, demo_family.circuit.num_qubits)
        r = routed_family_counts(demo_family, target, seeds=SEEDS)
        assert r["whole"].two_qubit >= base["cx"], name
        assert r["per_step"].two_qubit >= base["per_step"]["cx"], name
        assert r["whole"].depth >= base["depth"] or target.backend is not None, name
        assert sorted(set(r["whole"].layout)) == sorted(r["whole"].layout)           # a layout is injective
        assert max(r["whole"].layout) < target.num_qubits
        if target.backend is not None:
            native = set(target.backend.target.operation_names)
            assert set(r["whole"].two_qubit_gate.split("+")) <= native


def test_all_to_all_is_todays_count(demo_family):
    qc = demo_family.with_measurements(demo_family.representative())
    r = route_circuit(qc, resolve_target("all-to-all", qc.num_qubits))
    c = circuit_counts(qc)
    assert (r.two_qubit, r.depth, r.rotations, r.swaps) == (c.cx, c.depth, c.rotations, 0)


def test_line_needs_swaps_for_a_fully_coupled_cluster_and_none_for_a_chain():
    # common practice: K4 is not a subgraph of a path, so a line needs SWAPs; a path maps onto a line exactly
    full = random_cluster(np.random.default_rng(5), 4, with_j=False)
    m = build_model(full)
    step = signal_circuit(m, full.experiments[0], 1e-4, 1, 1).step_circuit
    r = route_circuit(step, resolve_target("line", 4), seeds=SEEDS)
    assert r.swaps > 0 and r.two_qubit > circuit_counts(step).cx
    chain = _chain_cluster(5)
    mc = build_model(chain)
    step = signal_circuit(mc, chain.experiments[0], 1e-3, 1, 1).step_circuit
    r = route_circuit(step, resolve_target("line", 5), seeds=SEEDS)
    assert r.swaps == 0 and r.two_qubit == circuit_counts(step).cx
    assert all(abs(r.layout[i] - r.layout[i + 1]) == 1 for i in range(4))       # neighbours stay neighbours


def test_layout_search_never_worse_than_qiskit_default(demo_family):
    # baseline: qiskit's preset pass manager with its own layout, the same seeds (Qiskit documentation)
    from qiskit.transpiler import generate_preset_pass_manager
    qc = demo_family.with_measurements(demo_family.representative())
    names = ["line", "heavy-hex"] + (["fake_brisbane"] if HAS_BACKENDS else [])
    for name in names:
        target = resolve_target(name, qc.num_qubits)
        ours = route_circuit(qc, target, seeds=SEEDS)
        plain = []
        for seed in SEEDS:
            if target.backend is not None:
                pm = generate_preset_pass_manager(optimization_level=2, target=target.backend.target,
                                                  seed_transpiler=seed)
            else:
                pm = generate_preset_pass_manager(optimization_level=2, coupling_map=target.coupling_map,
                                                  basis_gates=["cx", "rz", "sx", "x"], seed_transpiler=seed)
            out = pm.run(qc)
            plain.append(sum(1 for i in out.data if i.operation.num_qubits == 2))
        assert ours.two_qubit <= min(plain), name
        assert {t[0] for t in ours.tries} == {"qiskit", "greedy-start", "greedy"}


def test_coupling_weights_and_greedy_placement():
    # J only: 2 pi J I1.I2 = 2 pi (J/4)(XX + YY + ZZ): weight 3|J|/4 in Hz (Levitt 2008, from memory)
    chain = _chain_cluster(4)
    w = coupling_weights(trotter_terms(build_model(chain), chain.experiments[0]))
    assert w[0, 1] == pytest.approx(0.75 * 5.0) and w[2, 3] == pytest.approx(0.75 * 7.0)
    assert w[0, 2] == 0 and np.allclose(w, w.T)
    # a star of strengths on a line: the strongest partner of the hub sits next to it
    weights = np.zeros((4, 4))
    for j, s in ((1, 1.0), (2, 50.0), (3, 2.0)):
        weights[0, j] = weights[j, 0] = s
    phys = greedy_layout(weights, resolve_target("line", 9).coupling_map)
    assert abs(phys[0] - phys[2]) == 1
    assert len(set(phys)) == 4
    assert phys[0] == 4                                          # the hub at the centre of the line


def test_step_extrapolation_matches_a_routed_three_step_circuit(demo_family):
    # one + 2 (two - one) against routing the 3-step circuit itself: same order of magnitude (within 25%)
    from qhl import demo_cluster
    c = demo_cluster()
    m = build_model(c)
    target = resolve_target("line", 7)
    tau = 1e-5
    est = routed_step_counts(lambda k: gradient_circuit(m, c.experiments[0], "dipolar:H1-H2", k * tau, k, 2), 3,
                             target, seeds=SEEDS)
    fam3 = gradient_circuit(m, c.experiments[0], "dipolar:H1-H2", 3 * tau, 3, 2)
    direct = route_circuit(fam3.with_measurements(fam3.representative()), target, seeds=SEEDS)
    assert est["computed"] and est["steps"] == 3
    assert est["two_qubit"] == pytest.approx(direct.two_qubit, rel=0.25)


def test_wide_circuits_are_not_routed():
    # above ROUTE_MAX_QUBITS the count is refused with a reason, not invented
    from qhl.circuits.routing import ROUTE_MAX_QUBITS
    chain = _chain_cluster(ROUTE_MAX_QUBITS + 1)
    m = build_model(chain)
    out = routed_step_counts(lambda k: signal_circuit(m, None, k * 1e-4, k, 1), 10,
                             resolve_target("line", ROUTE_MAX_QUBITS + 1))
    assert out["computed"] is False and "not computed" in out["reason"] and "two_qubit" not in out


def test_routing_refusals():
    with pytest.raises(QhlInputError) as e:
        route_circuit(signal_circuit(build_model(_chain_cluster(5)), None, 1e-3, 1, 1).step_circuit,
                      resolve_target("line", 3))
    assert "5" in str(e.value) and "3" in str(e.value)


# ---------------------------------------------------------------- CLI


def _run(capsys, argv):
    rc = main(argv)
    out = capsys.readouterr()
    return rc, out.out, out.err


def test_cli_unknown_target_lists_names(capsys):
    for argv in (["circuits", "--time", "1e-5", "--steps", "1", "--target", "moebius"],
                 ["budget", "--no-classical", "--target", "moebius"]):
        rc, out, err = _run(capsys, argv)
        lines = [line for line in err.splitlines() if "error" in line]
        assert rc == 2 and len(lines) == 1 and "moebius" in lines[0]
        assert all(name in lines[0] for name in GENERIC_TARGETS)
        assert "Traceback" not in err


@needs_backends
def test_cli_more_spins_than_device_qubits(capsys):
    # the demo's 6 spins + 1 ancilla on a 5-qubit device: one line with both numbers
    rc, out, err = _run(capsys, ["budget", "--no-classical", "--target", "fake_athens"])
    lines = [line for line in err.splitlines() if "error" in line]
    assert rc == 2 and len(lines) == 1
    assert "7 qubits" in lines[0] and "6 spins" in lines[0] and "has 5" in lines[0]
    rc, out, err = _run(capsys, ["circuits", "--time", "1e-5", "--steps", "1", "--target", "fake_athens"])
    assert rc == 2 and "6 qubits" in err and "has 5" in err


def test_cli_circuits_target_json(capsys):
    rc, out, _ = _run(capsys, ["circuits", "--time", "1e-5", "--steps", "1", "--target", "ring", "--json"])
    d = json.loads(out)
    assert rc == 0
    r = d["routing"]
    assert r["target"] == "ring" and r["whole"]["two_qubit"] >= d["cx"] and r["whole"]["swaps"] > 0
    assert r["per_step"]["two_qubit"] >= d["per_step"]["cx"]
    rc, out, _ = _run(capsys, ["circuits", "--time", "1e-5", "--steps", "1", "--json"])
    assert "routing" not in json.loads(out)                  # default: today's report
