"""Gate counts of one Trotter step from a count rule, without building or transpiling a circuit.

Rule (the circuits of qhl.circuits.trotter after qhl.circuits.circuit_counts' transpile to
[cx, rz, sx, x] at optimisation level 2, all-to-all connectivity):
    spin block (offset Z_i)                         0 CX, 1 arbitrary rotation, 1 layer;
    pair block with k of XX, YY, ZZ (non-zero)      k rotations; 2 CX for k <= 2, 3 CX for k = 3
        (the transpiler merges the block into one two-qubit unitary of the XX/YY/ZZ family; a
        generic one needs 3 CX, one or two of the three interactions 2 CX: Vatan and Williams,
        Phys. Rev. A 69, 032315 (2004), from memory); layers of one block alone: BLOCK_LAYERS
        (measured once on qiskit 2.x transpiles of single blocks; common practice).
A step's counts are marginal, like TrotterModel's transpiled counts: counts of two steps minus
one step over the slots of qhl.circuits.trotter.product_formula_slots (merged exponentials
between steps counted once). Depth: blocks scheduled as soon as their qubits are free
(as-soon-as-possible layering, block by block). Rotations: an upper bound on the transpiled count
(the transpiler can merge an offset rz into a neighbouring block's single-qubit gates); CX: equal at
order 1; at order 2 an upper bound by at most one pair block (3 CX) per step, where the transpiler merges
the two first-group blocks around a step boundary (measured: 224 rule against 203 transpiled for 8
second-order steps of 4 spins, 10 %; the share falls as 3 / (CX per step): about 2 % at 12 spins, 0.1 % at 50).
tests/test_step_counts.py checks the rule against transpiled circuits for n <= 12.
"""

import numpy as np

from .trotter import product_formula_slots

__all__ = ["BLOCK_LAYERS", "block_counts", "step_counts_rule", "evolution_counts_rule", "rotation_profile_rule"]

BLOCK_LAYERS = {1: 3, 2: 11, 3: 10}     # pair blocks by k (k = 1: ZZ; XX alone 9, YY alone 7)
_PAIR_CX = {1: 2, 2: 2, 3: 3}


def block_counts(block):
    """(qubits, cx, rotations, layers) of one TermBlock by the rule; rotations with a zero angle dropped."""
    k = int(np.count_nonzero(np.asarray(block.coeffs)))
    if k == 0:
        return block.qubits, 0, 0, 0
    if len(block.qubits) == 1:
        return block.qubits, 0, k, k
    if len(block.qubits) == 2:
        return block.qubits, _PAIR_CX[k], k, BLOCK_LAYERS[k]
    w = len(block.qubits)          # a general Pauli string (not produced by qhl's models): CX ladders
    return block.qubits, k * 2 * (w - 1), k, k * (2 * w - 1)


def _count(terms, slots, blocks):
    frontier = np.zeros(terms.n_qubits, dtype=np.int64)
    cx = rot = 0
    for slot in slots:
        for qubits, c, r, layers in blocks[slot.group]:
            if layers == 0:
                continue
            q = list(qubits)
            start = int(frontier[q].max())
            frontier[q] = start + layers
            cx += c
            rot += r
    return cx, rot, int(frontier.max())


def step_counts_rule(terms, order: int) -> dict:
    """Marginal {cx, depth, rotations} of one step of order 1 or 2 (order 4: five order-2 steps).

    Args:
        terms: qhl.circuits.trotter.TrotterTerms.
        order: 1, 2 or 4.
    """
    base = 2 if order == 4 else order
    blocks = [[block_counts(b) for b in g.blocks] for g in terms.groups]
    one = _count(terms, product_formula_slots(len(terms.groups), 1.0, 1, base), blocks)
    two = _count(terms, product_formula_slots(len(terms.groups), 2.0, 2, base), blocks)
    per = {k: max(b - a, 1) for k, a, b in zip(("cx", "rotations", "depth"), one, two)}
    if order == 4:
        per = {k: 5 * v for k, v in per.items()}
    return per


def evolution_counts_rule(terms, order: int, steps: int) -> dict:
    """{cx, depth, rotations} of a whole evolution S(t/r)^r by the rule: the first step in full (its
    slots, merged as qhl.circuits.trotter.product_formula_slots merges them) plus r - 1 marginal
    steps (step_counts_rule). Order 4: five order-2 steps per step (as step_counts_rule)."""
    base = 2 if order == 4 else order
    mult = 5 if order == 4 else 1
    blocks = [[block_counts(b) for b in g.blocks] for g in terms.groups]
    cx, rot, depth = _count(terms, product_formula_slots(len(terms.groups), 1.0, 1, base), blocks)
    per = step_counts_rule(terms, base)
    more = mult * int(steps) - 1
    return {"cx": cx + more * per["cx"], "rotations": rot + more * per["rotations"],
            "depth": depth + more * per["depth"]}


def rotation_profile_rule(terms, order: int) -> dict:
    """Marginal {rotations, rotation_depth, clifford_layers} of one step by the count rule.

    Rotation depth: the same as-soon-as-possible block schedule with each block occupying its
    qubits for as many layers as it has arbitrary rotations (the rotations of one pair block are
    sequential: rzz, rxx, ryy each carry one rz); Clifford layers: the rule's depth minus that,
    which counts the optimised (level-2) blocks, so it is a lower estimate of an unoptimised
    decomposition's Clifford layers (0.5-1x on 4-8 spins: tests/test_step_counts.py).
    The fault-tolerant costing uses it above the size where one step is built and synthesised.
    """
    base = 2 if order == 4 else order
    blocks = [[block_counts(b) for b in g.blocks] for g in terms.groups]
    rot_blocks = [[(q, c, r, r) for q, c, r, _ in g] for g in blocks]
    counts = {}
    for steps in (1, 2):
        slots = product_formula_slots(len(terms.groups), float(steps), steps, base)
        _, rot, depth = _count(terms, slots, blocks)
        _, _, rot_depth = _count(terms, slots, rot_blocks)
        counts[steps] = (rot, rot_depth, depth)
    rot = max(counts[2][0] - counts[1][0], 1)
    rot_depth = max(counts[2][1] - counts[1][1], 1)
    clifford = max((counts[2][2] - counts[1][2]) - rot_depth, 1)
    mult = 5 if order == 4 else 1
    return {"rotations": mult * rot, "rotation_depth": mult * rot_depth, "clifford_layers": mult * clifford}
