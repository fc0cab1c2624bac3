"""Routed gate counts: a circuit compiled for a target's connectivity and native gates.

Method. The circuit is transpiled with qiskit's preset pass manager
(`generate_preset_pass_manager`, optimisation level OPTIMIZATION_LEVEL = 2, the level of
qhl.circuits.circuit_counts): for a fake backend with the backend's own Target (coupling map,
native gates such as ecr or cz, calibrated errors), for a generic map (qhl.circuits.targets) with
that coupling map and the basis [cx, rz, sx, x]. Each of `seeds` is tried three ways:
    'qiskit'        qiskit's own layout search (VF2Layout, then SabreLayout's random trials), seeded;
    'greedy-start'  the same, with the coupling-strength layout of `greedy_layout` handed to SabreLayout as
                    one more starting layout (its documented `sabre_starting_layouts` property);
    'greedy'        the coupling-strength layout fixed as the initial layout (routing only).
The routing with the fewest two-qubit gates is kept (ties: smaller depth, then the earlier try).
Reported: two-qubit gates (every gate on two qubits: cx, ecr or cz), depth, SWAPs inserted by the
router (counted on the circuit right after routing; the optimiser may later merge some of them into
neighbouring two-qubit blocks, so the two-qubit count grows by less than 3 per SWAP), arbitrary
rotations (rz angles that are not multiples of pi/2, as in circuit_counts), and the initial layout
(circuit qubit -> physical qubit; spins first, then ancillas).

Greedy layout heuristic (stated once). Weight of a circuit-qubit pair w_ij:
    spin pairs      sum of |coefficients| (Hz) of the two-spin Pauli terms (XX, YY, ZZ) of the pair in
                    the experiment's Hamiltonian (qhl.circuits.trotter terms): it grows with |d_ij| and
                    |J_ij| (3 |J_ij| / 4 for a scalar coupling alone, I = sigma/2);
    ancilla pairs   the number of two-qubit gates between the two qubits in the circuit, times the
                    largest spin-pair weight over the largest such count (ancillas sit beside the spins
                    they control).
Circuit qubits are placed one at a time: first the one with the largest total weight on the
physical qubit with the smallest sum of distances to all others (the centre of the map); then,
repeatedly, the unplaced qubit most strongly coupled to the placed ones goes to the free physical
qubit minimising sum_j w_ij dist(p, phys_j) (distance: shortest path on the undirected map; ties
to the centre). Common practice for interaction-graph placement; no optimality is claimed, which is
why qiskit's own layout is tried beside it and the better one is kept.

Large clusters (`routed_step_counts`): one and two Trotter steps of a family are routed and the
counts of r steps are extrapolated linearly, whole(r) = one + (r - 1) (two - one): the second step
carries the marginal cost of a step including the SWAPs that undo or extend the first one's
permutation. Above ROUTE_MAX_QUBITS circuit qubits nothing is routed: the caller reports
'routing not computed' rather than a number.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from ..base.errors import QhlInputError
from .circuit_counts import BASIS_GATES, OPTIMIZATION_LEVEL, count_gates, is_clifford_angle, transpile_for_counts

__all__ = ["ROUTE_MAX_QUBITS", "DEFAULT_SEEDS", "RoutedCounts", "coupling_weights", "circuit_weights",
           "greedy_layout", "route_circuit", "routed_family_counts", "routed_step_counts", "extrapolate_counts"]

ROUTE_MAX_QUBITS = 33       # 32 spins + an ancilla: about a minute per routed pair of circuits on a 127-qubit map
DEFAULT_SEEDS = (11, 23, 37, 53)


@dataclass(frozen=True)
class RoutedCounts:
    """Counts of one routed circuit (see the module docstring).

    Attributes:
        target: target name; qubits: circuit qubits; physical_qubits: qubits of the target (None: all-to-all).
        two_qubit_gate: the native two-qubit gate(s) counted ('cx', 'ecr', 'cz', joined by '+' if several).
        two_qubit, depth, swaps, rotations: the counts.
        layout: [physical qubit of circuit qubit i] (spins first, then ancillas).
        layout_method: 'qiskit', 'greedy-start', 'greedy' or 'identity' (all-to-all); seed: the kept seed.
        tries: [(layout method, seed, two-qubit gates)] of every routing tried.
        transpiled: the kept circuit (not serialised).
    """

    target: str
    qubits: int
    physical_qubits: int | None
    two_qubit_gate: str
    two_qubit: int
    depth: int
    swaps: int
    rotations: int
    layout: list
    layout_method: str
    seed: int | None
    tries: list = field(default_factory=list)
    transpiled: object = field(default=None, repr=False, compare=False)

    def to_dict(self) -> dict:
        d = asdict(self)
        d.pop("transpiled")
        d["tries"] = [list(t) for t in self.tries]
        return d


# ---------------------------------------------------------------- weights and layout

def coupling_weights(terms, n_qubits: int | None = None) -> np.ndarray:
    """(n, n) symmetric w_ij = sum |c| (Hz) of the two-qubit Pauli terms of pair (i, j) (module docstring).

    Args:
        terms: qhl.circuits.trotter.TrotterTerms (coefficients in rad/s).
        n_qubits: size of the matrix (>= terms.n_qubits; extra rows stay zero).
    """
    n = terms.n_qubits if n_qubits is None else int(n_qubits)
    w = np.zeros((n, n))
    for group in terms.groups:
        for block in group.blocks:
            if len(block.qubits) != 2:
                continue
            i, j = block.qubits
            s = float(np.sum(np.abs(np.asarray(block.coeffs)))) / (2 * np.pi)
            w[i, j] += s
            w[j, i] += s
    return w


def circuit_weights(circuit, spin_weights: np.ndarray | None = None) -> np.ndarray:
    """Weights over all circuit qubits: the spin block from `spin_weights`, pairs with an ancilla
    from two-qubit gate counts scaled to the largest spin weight (module docstring)."""
    n = circuit.num_qubits
    counts = np.zeros((n, n))
    for inst in circuit.data:
        if len(inst.qubits) == 2:
            i, j = (circuit.find_bit(q).index for q in inst.qubits)
            counts[i, j] += 1
            counts[j, i] += 1
    if spin_weights is None:
        return counts
    w = np.zeros((n, n))
    k = spin_weights.shape[0]
    w[:k, :k] = spin_weights[:k, :k]
    extra = counts.copy()
    extra[:k, :k] = 0
    if extra.max() > 0:
        w += extra * (max(w.max(), 1.0) / extra.max())
    return w


def _distances(coupling_map) -> np.ndarray:
    import rustworkx as rx
    g = coupling_map.graph.to_undirected(multigraph=False)
    return np.asarray(rx.distance_matrix(g), float)


def greedy_layout(weights: np.ndarray, coupling_map, distances: np.ndarray | None = None) -> list:
    """Physical qubit of each circuit qubit by the greedy coupling-strength placement (module docstring)."""
    w = np.asarray(weights, float)
    n = w.shape[0]
    dist = _distances(coupling_map) if distances is None else distances
    size = dist.shape[0]
    if n > size:
        raise QhlInputError(f"the circuit needs {n} qubits but the target has {size}", key="target")
    centrality = dist.sum(axis=1)
    free = np.ones(size, bool)
    phys = np.full(n, -1)
    total = w.sum(axis=1)
    placed = []
    for _ in range(n):
        left = np.flatnonzero(phys < 0)
        if placed:
            pull = w[np.ix_(left, placed)].sum(axis=1)
            i = int(left[np.lexsort((-total[left], -pull))[0]])
        else:
            i = int(left[np.argmax(total[left])])
        cand = np.flatnonzero(free)
        if placed:
            cost = dist[np.ix_(cand, phys[placed])] @ w[i, placed]
            if not np.any(w[i, placed] > 0):      # nothing to pull towards: stay next to the placed ones
                cost = dist[np.ix_(cand, phys[placed])].min(axis=1)
        else:
            cost = np.zeros(cand.size)
        p = int(cand[np.lexsort((centrality[cand], cost))[0]])
        phys[i] = p
        free[p] = False
        placed.append(i)
    return [int(p) for p in phys]


# ---------------------------------------------------------------- routing

def _starting_layout_pass(physical):
    """An analysis pass handing `physical` (circuit qubit i -> physical qubit) to SabreLayout as an extra
    starting layout (the property `sabre_starting_layouts`, qiskit's documented hook)."""
    from qiskit.transpiler import AnalysisPass, Layout

    class _StartFrom(AnalysisPass):
        def run(self, dag):
            self.property_set["sabre_starting_layouts"] = [
                Layout({q: int(p) for q, p in zip(dag.qubits, physical)})]

    return _StartFrom()


def _pass_manager(target, seed, start, fixed):
    from qiskit.transpiler import PassManager, generate_preset_pass_manager
    if target.backend is not None:
        pm = generate_preset_pass_manager(optimization_level=OPTIMIZATION_LEVEL, target=target.backend.target,
                                          seed_transpiler=seed, initial_layout=fixed)
    else:
        pm = generate_preset_pass_manager(optimization_level=OPTIMIZATION_LEVEL, coupling_map=target.coupling_map,
                                          basis_gates=list(BASIS_GATES), seed_transpiler=seed, initial_layout=fixed)
    if start is not None:
        pm.pre_layout = PassManager([_starting_layout_pass(start)])
    return pm


def _count(transpiled, swaps):
    two = {}
    rotations = 0
    for inst in transpiled.data:
        op = inst.operation
        if op.num_qubits == 2 and op.name != "barrier":
            two[op.name] = two.get(op.name, 0) + 1
        elif op.name == "rz" and not is_clifford_angle(op.params[0]):
            rotations += 1
    return "+".join(sorted(two)) or "-", sum(two.values()), int(transpiled.depth()), int(swaps), rotations


def route_circuit(circuit, target, seeds=DEFAULT_SEEDS, weights: np.ndarray | None = None,
                  progress=None) -> RoutedCounts:
    """Route `circuit` for `target` (qhl.circuits.targets.Target), keeping the best try (module docstring).

    Args:
        circuit: a bound QuantumCircuit (measurements allowed).
        target: the resolved target; all-to-all gives circuit_counts' numbers with no SWAPs.
        seeds: transpiler seeds; each is tried with qiskit's layout and with the greedy layout.
        weights: (n, n) pair weights over circuit qubits for the greedy layout (default: the
            circuit's two-qubit gate counts).
        progress: optional callable(str), told after each try.

    Raises:
        QhlInputError: the circuit is wider than the target.
    """
    n = circuit.num_qubits
    if target.all_to_all:
        out = transpile_for_counts(circuit)
        c = count_gates(out)
        return RoutedCounts(target.name, n, None, "cx", c.cx, c.depth, 0, c.rotations, list(range(n)), "identity",
                            None, [], out)
    if n > target.num_qubits:
        raise QhlInputError(f"the circuit needs {n} qubits but {target.name} has {target.num_qubits}", key="target")
    if not seeds:
        raise QhlInputError("routing needs at least one seed", key="seeds")
    w = circuit_weights(circuit) if weights is None else np.asarray(weights, float)
    greedy = greedy_layout(w, target.coupling_map)
    best = None
    tries = []
    for method, start, fixed in (("qiskit", None, None), ("greedy-start", greedy, None), ("greedy", None, greedy)):
        for seed in seeds:
            pm = _pass_manager(target, int(seed), start, fixed)
            swaps = [0]

            def watch(**kw):
                swaps[0] = max(swaps[0], kw["dag"].count_ops().get("swap", 0))

            out = pm.run(circuit, callback=watch)
            gate, two, depth, sw, rot = _count(out, swaps[0])
            tries.append((method, int(seed), two))
            if progress is not None:
                progress(f"routing on {target.name}: try {len(tries)}/{3 * len(seeds)} ({method}, seed {seed}): "
                         f"{two} two-qubit gates")
            if best is None or (two, depth) < (best[1][1], best[1][2]):
                best = (out, (gate, two, depth, sw, rot), method, int(seed))
    out, (gate, two, depth, sw, rot), method, seed = best
    layout = out.layout.initial_index_layout(filter_ancillas=True)[:n]
    return RoutedCounts(target.name, n, target.num_qubits, gate, two, depth, sw, rot, [int(p) for p in layout],
                        method, seed, tries, out)


def _family_weights(family, circuit):
    ev = family.evolution or {}
    if ev.get("model") is None:
        return None
    from .trotter import trotter_terms
    terms = trotter_terms(ev["model"], ev.get("experiment"), ev.get("values_hz"), ev.get("grouping", "pairs"),
                          ev.get("ordering", "offsets-first"))
    return circuit_weights(circuit, coupling_weights(terms))


def routed_family_counts(family, target, seeds=DEFAULT_SEEDS) -> dict:
    """Routed counts of a CircuitFamily's representative circuit with measurements and of one Trotter step.

    Returns:
        {'whole': RoutedCounts, 'per_step': RoutedCounts} (per step: family.step_circuit routed on its own).
    """
    measured = family.with_measurements(family.representative())
    whole = route_circuit(measured, target, seeds, _family_weights(family, measured))
    step = family.step_circuit
    per = route_circuit(step, target, seeds, _family_weights(family, step))
    return {"whole": whole, "per_step": per}


def routed_step_counts(build, steps: int, target, seeds=DEFAULT_SEEDS, progress=None) -> dict:
    """Counts of an r-step family from routing its one- and two-step members (module docstring).

    Args:
        build: callable(k) -> the CircuitFamily with k Trotter steps of the same step length.
        steps: r >= 1.
        target: the resolved Target.

    Returns:
        {'one', 'two': RoutedCounts, 'two_qubit', 'depth', 'swaps', 'rotations' at r steps (floats,
        extrapolated), 'steps': r, 'method': text}; or {'computed': False, 'reason': text} above
        ROUTE_MAX_QUBITS.
    """
    fam1 = build(1)
    n = fam1.circuit.num_qubits
    if n > ROUTE_MAX_QUBITS:
        return {"computed": False, "reason": f"routing not computed: {n} circuit qubits exceed the "
                                             f"{ROUTE_MAX_QUBITS} routed here"}
    fam2 = build(2)
    circs = [f.with_measurements(f.representative()) for f in (fam1, fam2)]
    one, two = (route_circuit(c, target, seeds, _family_weights(f, c), progress) for c, f in zip(circs, (fam1, fam2)))
    out = {"computed": True, "one": one, "two": two,
           "method": "one and two Trotter steps routed; r steps extrapolated linearly (one + (r - 1)(two - one))"}
    out.update(extrapolate_counts(one, two, steps))
    return out


def extrapolate_counts(one: RoutedCounts, two: RoutedCounts, steps: int) -> dict:
    """{'steps', 'two_qubit', 'depth', 'swaps', 'rotations'} of r steps: one + (r - 1) max(two - one, 0)."""
    r = int(steps)
    out = {"steps": r}
    for k in ("two_qubit", "depth", "swaps", "rotations"):
        a, b = getattr(one, k), getattr(two, k)
        out[k] = float(a + (r - 1) * max(b - a, 0))
    return out
