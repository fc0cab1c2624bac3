"""Predicted signal attenuation of a transpiled circuit under gate and readout errors (`qhl check --device`).

A thin layer over qhl.circuits.circuit_fidelity, the one attenuation model shared with the budget:
    X_noisy ~ F * R * X,   F = prod_g (1 - p_g),   R = readout factor,
p_g = e_g d / (d - 1) the depolarising parameter of gate g's calibrated average infidelity e_g, R the
|coefficient|-weighted mean over the observable's Z-strings of prod (1 - 2 q_i). For unital noise F is
a pessimistic bound (the true shrink is weaker; measurements and reason in that module's docstring).
"""

from dataclasses import dataclass

from ..circuits.circuit_fidelity import ErrorRates, circuit_fidelity, depolarising_infidelity

__all__ = ["Attenuation", "global_depolarising_attenuation", "target_attenuation",
           "uniform_depolarising_attenuation", "depolarising_infidelity"]


@dataclass(frozen=True)
class Attenuation:
    """Predicted shrink factors: gates F, readout R, and the noisy gate counts behind F."""

    gates: float
    readout: float
    one_qubit_gates: int
    two_qubit_gates: int

    @property
    def total(self) -> float:
        return self.gates * self.readout

    def to_json(self) -> dict:
        return {"gates": self.gates, "readout": self.readout, "total": self.total,
                "one_qubit_gates": self.one_qubit_gates, "two_qubit_gates": self.two_qubit_gates}


class _Callables:
    def __init__(self, gate_error, readout_error):
        self.gate, self.readout = gate_error, readout_error


def _attenuation(transpiled, measured_physical, masks, rates) -> Attenuation:
    f = circuit_fidelity(transpiled, rates, masks=masks, measured=measured_physical)
    return Attenuation(f["gate_fidelity"], f["readout_fidelity"], f["one_qubit_gates"], f["two_qubit_gates"])


def global_depolarising_attenuation(transpiled, measured_physical, masks, gate_error, readout_error) -> Attenuation:
    """F and R (module docstring) with the rates given as callables.

    Args:
        transpiled: the circuit as run (physical qubits).
        measured_physical: physical qubit of classical bit k.
        masks: [(coefficient, bit mask over classical bits)] of the observable
            (qhl.emulation.runner.observable_masks).
        gate_error: callable(name, physical qubits) -> average infidelity e (None: 0).
        readout_error: callable(physical qubit) -> flip probability q.
    """
    return _attenuation(transpiled, measured_physical, masks, _Callables(gate_error, readout_error))


def target_attenuation(transpiled, measured_physical, masks, target) -> Attenuation:
    """F R from a qiskit Target's (or a backend's) calibrated errors (instruction error = e; measure error = q)."""
    return _attenuation(transpiled, measured_physical, masks, ErrorRates(backend=target))


def uniform_depolarising_attenuation(transpiled, measured_physical, masks, p: float, q: float = 0.0,
                                     noisy_gates=("sx", "x", "cx")) -> Attenuation:
    """F R for depolarising parameter p on every gate in `noisy_gates` and readout flips q (F = prod (1 - p))."""
    rates = ErrorRates(gate_error=depolarising_infidelity(p, 2), single_error=depolarising_infidelity(p, 1),
                       readout_error=q, noisy_gates=tuple(noisy_gates))
    return _attenuation(transpiled, measured_physical, masks, rates)
