"""Clifford+T synthesis of Z rotations: the published T-count rules and measured gridsynth counts.

Rules (T gates for one Z rotation to operator-norm error eps, up to a global phase):
    'ross-selinger': 3 log2(1/eps) + O(log log(1/eps)) (N. J. Ross and P. Selinger, "Optimal
        ancilla-free Clifford+T approximation of z-rotations", Quantum Inf. Comput. 16, 901
        (2016)); the O(log log) term is left out of the rule.
    'mixed': the mixed fallback of Kliuchnikov, Lauter, Minko, Paetznick, Petit, "Shorter quantum
        circuits via single-qubit gate approximation", Quantum 7, 1208 (2023), abstract:
        T-count 0.56 log2(1/eps) + 5.3. Its output is a probabilistic mixture of unitaries with a
        diamond-norm error, not one unitary: it cannot sit inside the coherent amplitude-estimation
        circuit (interference needs the same unitary in every call), so the budget refuses it
        (SYNTHESIS_METHODS holds only 'ross-selinger'); the rule is kept for reference only.

Measured counts: qiskit.synthesis.gridsynth_rz (the Ross-Selinger algorithm in qiskit) synthesises
each rotation; its output is a single-qubit sequence, so its T-depth equals its T-count. Results
are cached per (angle, eps). A sweep uses the median over SAMPLE_ANGLES at each decade of eps,
interpolated linearly in log2(1/eps) (`measured_t_per_rotation`); one budget synthesises the actual
angles of one Trotter step (`synthesised_step`, at most MAX_STEP_ANGLES distinct angles; others
get the median of those synthesised).

Per-step T-depth: the longest path through the step decomposed at optimisation level 0 into
SYNTHESIS_BASIS (each Pauli rotation: basis changes, CX ladder, one rz; no merging, so the
structure does not depend on the angles) where a non-Clifford rz weighs its synthesised T-count
and every other gate 0; Clifford layers: the same path with non-Clifford rz weighing 0 and every
other gate 1.
Depth counting both (`depth` >= `t_depth`) is bounded by their sum: the single-qubit Cliffords
inside synthesised sequences are not counted as layers (commuted into the Pauli frame; Litinski,
Quantum 3, 128 (2019)).
"""

from dataclasses import dataclass
from functools import lru_cache
import math

import numpy as np

from ..base.errors import QhlInputError

__all__ = ["SYNTHESIS_METHODS", "RULES", "t_count_per_rotation", "gridsynth_t_count", "measured_t_per_rotation",
           "weighted_depth", "StepSynthesis", "synthesised_step", "clifford_t_circuit", "write_clifford_t_step",
           "rotation_depth_profile",
           "ASSUMPTIONS"]

SYNTHESIS_METHODS = ("ross-selinger",)
RULES = ("ross-selinger", "mixed")
MIXED_SLOPE, MIXED_OFFSET = 0.56, 5.3
SAMPLE_ANGLES = tuple(float(a) for a in np.random.default_rng(20231208).uniform(0.05, 2 * np.pi - 0.05, 9))
MAX_STEP_ANGLES = 64
_T_GATES = ("t", "tdg")

ASSUMPTIONS = {
    "ross-selinger": "measured: qiskit.synthesis.gridsynth_rz (Ross and Selinger, Quantum Inf. Comput. 16, 901 "
                     "(2016)) on the actual rotations of one Trotter step at the budgeted error; the rule "
                     "3 log2(1/eps_rot) is shown beside it",
    "mixed": "mixed fallback T-count 0.56 log2(1/eps) + 5.3 (Kliuchnikov et al., Quantum 7, 1208 (2023), abstract): "
             "a probabilistic mixture (diamond-norm error), not allowed inside coherent amplitude estimation",
    "synthesis_error": "rotation errors add (triangle inequality): eps_rot = synthesis share / rotations",
    "t_depth": "per Trotter step: longest path with each non-Clifford rz weighing its synthesised T-count "
               "(a one-qubit sequence: T-depth = T-count); Clifford layers: the same path with cx/sx/x weighing 1",
    "depth": "depth = T layers + Clifford layers (an upper bound on the longest path); single-qubit Cliffords "
             "inside synthesised sequences go to the Pauli frame (Litinski, Quantum 3, 128 (2019))",
}


def _check_eps(eps):
    e = np.asarray(eps, float)
    if np.any(~np.isfinite(e)) or np.any(e <= 0) or np.any(e >= 1):
        raise QhlInputError(f"rotation error must be in (0, 1), got {eps!r}", key="synthesis")
    return e


def t_count_per_rotation(eps, method: str = "ross-selinger"):
    """T gates of one Z rotation to error eps by the published rule (float or array; not rounded).

    Example:
        >>> round(float(t_count_per_rotation(1e-10)))
        100
        >>> round(float(t_count_per_rotation(1e-10, "mixed")), 2)
        23.9
    """
    bits = np.log2(1.0 / _check_eps(eps))
    if method == "ross-selinger":
        out = 3.0 * bits
    elif method == "mixed":
        out = MIXED_SLOPE * bits + MIXED_OFFSET
    else:
        raise QhlInputError(f"unknown synthesis method {method!r}: expected one of {', '.join(RULES)}",
                            key="synthesis")
    return float(out) if np.ndim(out) == 0 else out


def _key(angle, eps):
    return round(float(angle) % (2 * math.pi), 12), float(f"{float(eps):.6g}")


@lru_cache(maxsize=65536)
def _gridsynth(angle_key, eps_key):
    from qiskit.synthesis import gridsynth_rz
    qc = gridsynth_rz(angle_key, eps_key)
    ops = qc.count_ops()
    return int(sum(ops.get(g, 0) for g in _T_GATES)), int(qc.size())


def gridsynth_t_count(angle, eps) -> int:
    """T-count (= T-depth) of qiskit.synthesis.gridsynth_rz(angle, eps), cached."""
    _check_eps(eps)
    return _gridsynth(*_key(angle, eps))[0]


@lru_cache(maxsize=256)
def _decade_median(k):
    return float(np.median([gridsynth_t_count(a, 10.0 ** -k) for a in SAMPLE_ANGLES]))


def measured_t_per_rotation(eps):
    """Median gridsynth T-count over SAMPLE_ANGLES, interpolated between decades of eps (vectorised).

    Exact medians at eps = 10^-k; in between, linear in log2(1/eps) (the rules are linear there).
    """
    e = _check_eps(eps)
    x = -np.log10(e)
    lo = np.floor(x).astype(int)
    lo = np.maximum(lo, 1)
    hi = lo + 1
    vals = {k: _decade_median(int(k)) for k in np.unique(np.concatenate([np.ravel(lo), np.ravel(hi)]))}
    v_lo = np.vectorize(vals.get, otypes=[float])(lo)
    v_hi = np.vectorize(vals.get, otypes=[float])(hi)
    out = v_lo + (v_hi - v_lo) * (x - lo)
    return float(out) if np.ndim(out) == 0 else out


def weighted_depth(circuit, weight) -> float:
    """Longest path through `circuit`: each instruction adds weight(instruction) to the largest
    level among its qubits, and every qubit it touches moves to that level (the rule of
    QuantumCircuit.depth, with weights)."""
    level = {}
    for inst in circuit.data:
        qs = inst.qubits
        top = max((level.get(q, 0.0) for q in qs), default=0.0) + weight(inst)
        for q in qs:
            level[q] = top
    return max(level.values(), default=0.0)


def _is_rotation(inst):
    from ..circuits.circuit_counts import is_clifford_angle
    return inst.operation.name == "rz" and not is_clifford_angle(inst.operation.params[0])


@dataclass(frozen=True)
class StepSynthesis:
    """Synthesised counts of one Trotter step at rotation error eps (see the module docstring).

    Attributes:
        rotations: non-Clifford rz gates; rotation_depth: of them on the longest path;
        t_count: sum of synthesised T-counts; t_depth: T layers on the longest path;
        clifford_layers: cx/sx/x layers on the longest path; t_per_rotation: median measured;
        t_per_rotation_rule: 3 log2(1/eps); synthesised_angles: distinct angles synthesised.
    """

    eps: float
    rotations: int
    rotation_depth: int
    t_count: int
    t_depth: int
    clifford_layers: int
    t_per_rotation: float
    t_per_rotation_rule: float
    synthesised_angles: int

    def to_json(self):
        return dict(self.__dict__)


SYNTHESIS_BASIS = ("cx", "rz", "h", "s", "sdg", "sx", "sxdg", "x")


def _transpile_fixed(circuit):
    """Decompose to SYNTHESIS_BASIS at optimisation level 0: every Pauli rotation keeps one rz
    whose angle is exactly 2 tau c (no merging, no near-identity removal), whatever tau is."""
    from qiskit import transpile
    return transpile(circuit, basis_gates=list(SYNTHESIS_BASIS), optimization_level=0)


def _step_circuits(terms, order, tau):
    """Circuits of one and two steps of `order` (4: the second-order stage at u tau), decomposed
    by `_transpile_fixed`."""
    from ..circuits.trotter import trotter_circuit
    from .trotter_order4 import SUZUKI4_U
    base, dur = (2, SUZUKI4_U * tau) if order == 4 else (order, tau)
    return (_transpile_fixed(trotter_circuit(terms, dur, 1, base)),
            _transpile_fixed(trotter_circuit(terms, 2 * dur, 2, base)), 5 if order == 4 else 1)


def _counts(circuit, t_of):
    rots = [i for i in circuit.data if _is_rotation(i)]
    return {"rotations": len(rots),
            "rotation_depth": weighted_depth(circuit, lambda i: 1.0 if _is_rotation(i) else 0.0),
            "t_count": sum(t_of(i.operation.params[0]) for i in rots),
            "t_depth": weighted_depth(circuit, lambda i: t_of(i.operation.params[0]) if _is_rotation(i) else 0.0),
            "clifford_layers": weighted_depth(circuit, lambda i: 0.0 if _is_rotation(i) else 1.0)}


def _angle_table(circuits, eps):
    angles = sorted({_key(i.operation.params[0], eps)[0] for c in circuits for i in c.data if _is_rotation(i)})
    if len(angles) > MAX_STEP_ANGLES:
        pick = np.linspace(0, len(angles) - 1, MAX_STEP_ANGLES).round().astype(int)
        sample = [angles[k] for k in pick]
    else:
        sample = angles
    table = {a: gridsynth_t_count(a, eps) for a in sample}
    med = float(np.median(list(table.values()))) if table else 0.0
    return table, med, len(sample)


def synthesised_step(terms, order: int, tau: float, eps: float, marginal: bool = True) -> StepSynthesis:
    """Counts of one Trotter step (duration tau, `order` 1, 2 or 4) with every rotation synthesised at eps.

    Args:
        terms: qhl.circuits.trotter.TrotterTerms.
        marginal: the cost of one more step (two steps minus one, so exponentials merged between
            steps are not double counted); False: the one-step circuit itself.
    """
    _check_eps(eps)
    one, two, mult = _step_circuits(terms, order, tau)
    table, med, n = _angle_table((one, two) if marginal else (one,), eps)

    def t_of(angle):
        return table.get(_key(angle, eps)[0], med)

    c1 = _counts(one, t_of)
    if marginal:
        c2 = _counts(two, t_of)
        c = {k: max(c2[k] - c1[k], 0.0) for k in c1}
    else:
        c = c1
    return StepSynthesis(float(eps), int(mult * c["rotations"]), int(mult * c["rotation_depth"]),
                         int(mult * c["t_count"]), int(mult * c["t_depth"]), int(mult * c["clifford_layers"]), med,
                         float(t_count_per_rotation(eps)), n)


def rotation_depth_profile(terms, order: int, tau: float) -> dict:
    """Marginal {rotations, rotation_depth, clifford_layers} of one step (no synthesis)."""
    one, two, mult = _step_circuits(terms, order, tau)
    c1, c2 = _counts(one, lambda a: 0.0), _counts(two, lambda a: 0.0)
    return {k: mult * max(c2[k] - c1[k], 1.0) for k in ("rotations", "rotation_depth", "clifford_layers")}


def clifford_t_circuit(terms, order: int, tau: float, eps: float):
    """One Trotter step (order 1, 2 or 4; 4: its five second-order stages u, u, 1 - 4u, u, u)
    decomposed as in `synthesised_step`, every non-Clifford rz replaced by its gridsynth Clifford+T
    sequence (global phases dropped)."""
    from qiskit import QuantumCircuit
    from qiskit.synthesis import gridsynth_rz
    from ..circuits.trotter import trotter_circuit
    from .trotter_order4 import SUZUKI4_U
    if order == 4:
        u = SUZUKI4_U
        stages = [(2, f * tau) for f in (u, u, 1 - 4 * u, u, u)]
    else:
        stages = [(order, tau)]
    out = QuantumCircuit(terms.n_qubits, name=f"trotter{order}_clifford_t")
    for base, dur in stages:
        stage = trotter_circuit(terms, abs(dur), 1, base)
        one = _transpile_fixed(stage if dur >= 0 else stage.inverse())   # S2(-x) = S2(x)^dag (symmetric)
        for inst in one.data:
            qs = [one.find_bit(q).index for q in inst.qubits]
            if _is_rotation(inst):
                for s in gridsynth_rz(*_key(inst.operation.params[0], eps)).data:
                    out.append(s.operation, [qs[0]])
            else:
                out.append(inst.operation, qs)
    return out


def write_clifford_t_step(terms, order: int, tau: float, eps: float, path) -> dict:
    """Write `clifford_t_circuit` as OpenQASM 3 (qiskit.qasm3) to `path`; returns its counts."""
    from qiskit import qasm3
    qc = clifford_t_circuit(terms, order, tau, eps)
    with open(path, "w", encoding="utf-8") as fh:
        qasm3.dump(qc, fh)
    ops = qc.count_ops()
    return {"path": str(path), "t_count": int(sum(ops.get(g, 0) for g in _T_GATES)),
            "t_depth": int(qc.depth(filter_function=lambda i: i.operation.name in _T_GATES)),
            "depth": int(qc.depth()), "qubits": qc.num_qubits}
