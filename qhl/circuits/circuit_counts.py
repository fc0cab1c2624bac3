"""Gate counts of compiled circuits, the input of the costing module.

Counting convention: transpile with qiskit to the basis [cx, rz, sx, x] at optimisation level 2
(no coupling map: all-to-all connectivity assumed; seed_transpiler fixed for reproducible
counts), then report
    qubits     circuit width,
    cx         number of CX gates,
    depth      circuit depth (every gate and measurement counts one layer),
    rotations  arbitrary-angle rotations: rz gates whose angle is not a multiple of pi/2
               (those are Clifford), including unbound parameterised rz.
A family is counted on its representative bound member with measurements (the heaviest
insertion row, observed spins in |+>), so inactive insertion gadgets (angle 0) are removed by
the transpiler as identities; per-step counts are of one Trotter step of the evolution alone.
"""

from dataclasses import asdict, dataclass

import numpy as np
from qiskit import QuantumCircuit, transpile

__all__ = ["BASIS_GATES", "OPTIMIZATION_LEVEL", "CircuitCounts", "transpile_for_counts", "count_gates",
           "circuit_counts", "family_counts", "is_clifford_angle"]

BASIS_GATES = ("cx", "rz", "sx", "x")
OPTIMIZATION_LEVEL = 2
_SEED = 1234


@dataclass(frozen=True)
class CircuitCounts:
    """Counts of one transpiled circuit (see the module docstring)."""

    qubits: int
    cx: int
    depth: int
    rotations: int

    def to_dict(self) -> dict:
        return asdict(self)


def is_clifford_angle(theta, atol: float = 1e-9) -> bool:
    """True when rz(theta) is a Clifford gate (theta a multiple of pi/2); False if symbolic."""
    try:
        value = float(theta)
    except TypeError:
        return False
    k = value / (np.pi / 2)
    return abs(k - round(k)) * (np.pi / 2) < atol


def transpile_for_counts(circuit: QuantumCircuit) -> QuantumCircuit:
    """`circuit` transpiled to BASIS_GATES at OPTIMIZATION_LEVEL (fixed seed)."""
    return transpile(circuit, basis_gates=list(BASIS_GATES), optimization_level=OPTIMIZATION_LEVEL,
                     seed_transpiler=_SEED)


def count_gates(transpiled: QuantumCircuit) -> CircuitCounts:
    """Counts of an already transpiled circuit."""
    ops = transpiled.count_ops()
    rotations = sum(1 for inst in transpiled.data
                    if inst.operation.name == "rz" and not is_clifford_angle(inst.operation.params[0]))
    return CircuitCounts(qubits=transpiled.num_qubits, cx=int(ops.get("cx", 0)), depth=int(transpiled.depth()),
                         rotations=int(rotations))


def circuit_counts(circuit: QuantumCircuit) -> CircuitCounts:
    """Transpile `circuit` (see transpile_for_counts) and count it.

    Example:
        >>> qc = QuantumCircuit(2); _ = qc.rzz(0.3, 0, 1)
        >>> circuit_counts(qc)
        CircuitCounts(qubits=2, cx=2, depth=3, rotations=1)
    """
    return count_gates(transpile_for_counts(circuit))


def family_counts(family, transpiled: QuantumCircuit | None = None) -> dict:
    """Counts of a CircuitFamily: whole representative circuit and one Trotter step.

    Args:
        family: qhl.circuits.circuit_family.CircuitFamily.
        transpiled: the transpiled representative circuit, if already at hand.

    Returns:
        {qubits, cx, depth, rotations, steps, per_step: {qubits, cx, depth, rotations}}; `steps`
        is the number of Trotter steps r.
    """
    if transpiled is None:
        transpiled = transpile_for_counts(family.with_measurements(family.representative()))
    whole = count_gates(transpiled)
    out = whole.to_dict()
    out["steps"] = int(family.steps)
    out["per_step"] = circuit_counts(family.step_circuit).to_dict()
    return out
