"""The Trotter-step count rule against qiskit's transpiler (qhl.circuits.circuit_counts) for n <= 12."""

import pytest

from qhl import build_model
from qhl.circuits.circuit_counts import circuit_counts
from qhl.circuits.step_counts import step_counts_rule
from qhl.circuits.trotter import trotter_circuit, trotter_terms
from test_pauli_commutators import _cluster


def _transpiled_marginal(terms, order):
    one = circuit_counts(trotter_circuit(terms, 1e-6, 1, order)).to_dict()
    two = circuit_counts(trotter_circuit(terms, 2e-6, 2, order)).to_dict()
    return {k: two[k] - one[k] for k in ("cx", "rotations", "depth")}


@pytest.mark.parametrize("n,hetero", [(4, False), (6, True), (9, False), (12, False)])
def test_count_rule_against_transpiled_steps(n, hetero):
    # reference: qiskit.transpile (basis cx, rz, sx, x; optimisation level 2) of the actual circuits
    c = _cluster(n, n, hetero)
    terms = trotter_terms(build_model(c), c.experiments[0])
    for order in (1, 2):
        tr = _transpiled_marginal(terms, order)
        rule = step_counts_rule(terms, order)
        if order == 1:
            assert rule["cx"] == tr["cx"]
        else:
            # the transpiler may merge the two first-group pair blocks around a step boundary: one block
            assert 0 <= rule["cx"] - tr["cx"] <= 3
        # rotations: an upper bound; the merged block and offsets folded into it give up to 5 fewer
        assert tr["rotations"] <= rule["rotations"] <= 1.05 * tr["rotations"] + 5
        assert 0.9 * tr["depth"] <= rule["depth"] <= 1.3 * tr["depth"]
    assert step_counts_rule(terms, 4) == {k: 5 * v for k, v in step_counts_rule(terms, 2).items()}


@pytest.mark.parametrize("n,hetero", [(4, False), (6, True), (8, False)])
def test_rotation_profile_rule_against_the_decomposed_step(n, hetero):
    # reference: qiskit.transpile at optimisation level 0 of the actual step circuits (every Pauli
    # rotation keeps its own rz), as the fault-tolerant costing decomposes them up to 8 qubits
    from qhl.circuits.step_counts import rotation_profile_rule
    from qhl.costing.synthesis import rotation_depth_profile
    c = _cluster(n, n, hetero)
    terms = trotter_terms(build_model(c), c.experiments[0])
    for order in (1, 2, 4):
        rule = rotation_profile_rule(terms, order)
        circuit = rotation_depth_profile(terms, order, 1e-6)
        assert rule["rotations"] == circuit["rotations"]
        assert rule["rotation_depth"] == circuit["rotation_depth"]
        # Clifford layers: the rule's blocks are the level-2 transpiler's (single-qubit Cliffords
        # merged), so it counts fewer than level 0 does; they are a small part of the depth either way
        assert 0.5 * circuit["clifford_layers"] <= rule["clifford_layers"] <= circuit["clifford_layers"]
