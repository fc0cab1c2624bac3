"""Predicted signal attenuation of a transpiled circuit under gate and readout errors.

Model (global-depolarising approximation; common practice): the noisy circuit's state is taken as
    rho_noisy = F rho + (1 - F) I / D,   F = prod_g (1 - r_g),
with r_g the average gate infidelity of gate g on its physical qubits (what device calibrations
report, e.g. the error of each instruction in a qiskit Target; virtual rz and delays carry none).
Every traceless observable then shrinks by F. Readout: a symmetric flip with probability q_i on
measured qubit i multiplies a product of Z's over the qubits S exactly by prod_{i in S} (1 - 2 q_i)
(common practice); an observable with several Z-product terms gets the |coefficient|-weighted mean
of their factors (exact when all terms measure qubits with equal q). So
    X_noisy ~ F * R * X,   R = readout factor.
For a depolarising channel E(rho) = (1 - p) rho + p I / d on d = 2^k dimensions (Nielsen &
Chuang, Quantum Computation and Quantum Information (2000), sec. 8.3.4, the depolarising channel)
the average gate infidelity is r = p (d - 1) / d (from F_avg = (d F_pro + 1) / (d + 1) with the
process fidelity F_pro = 1 - p + p / d^2; Nielsen, Phys. Lett. A 303, 249 (2002), from memory).

Accuracy (measured here by exact density-matrix runs of the gradient families of
tests/made_up_clusters.small_model, 3-4 spins + 1 ancilla, 70-230 noisy gates, 40-120 cx): the
predicted gate factor F over the true one, minus 1, was -5% to +10% for uniform depolarising gates,
+6% on fake_lima (75 cx), +5% and +31% on fake_jakarta (46 and 75 cx) and +21% on fake_nairobi
(38 cx), whose noise models add thermal relaxation (non-unital) to depolarising gate errors.
The model ignores that a gate leaves the Pauli components it does not touch unchanged, and
relaxation's drift towards |0>. So a device check with many shots may reject the model: that
says the budget's attenuation is optimistic there, not that the emulation is wrong.
"""

from dataclasses import dataclass
import math

__all__ = ["Attenuation", "global_depolarising_attenuation", "target_attenuation",
           "uniform_depolarising_attenuation", "depolarising_infidelity"]

_FREE = ("measure", "barrier", "delay", "rz", "reset")


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


def depolarising_infidelity(p: float, qubits: int) -> float:
    """Average gate infidelity r = p (d - 1) / d of the depolarising channel with parameter p."""
    d = 2 ** int(qubits)
    return float(p) * (d - 1) / d


def global_depolarising_attenuation(transpiled, measured_physical, masks, gate_error, readout_error) -> Attenuation:
    """F and R of the module docstring.

    Args:
        transpiled: the circuit as run (physical qubits).
        measured_physical: physical qubit of classical bit k.
        masks: [(coefficient, bit mask over classical bits)] of the observable
            (qhl.emulation.runner.observable_masks).
        gate_error: callable(name, physical qubits) -> average infidelity r (None: 0).
        readout_error: callable(physical qubit) -> flip probability q.
    """
    log_f, ones, twos = 0.0, 0, 0
    for inst in transpiled.data:
        name = inst.operation.name
        if name in _FREE:
            continue
        qubits = tuple(transpiled.find_bit(q).index for q in inst.qubits)
        r = gate_error(name, qubits) or 0.0
        if r > 0:
            log_f += math.log1p(-min(float(r), 1.0 - 1e-15))
            ones += len(qubits) == 1
            twos += len(qubits) == 2
    weights, factors = [], []
    for c, mask in masks:
        f = 1.0
        for k, q in enumerate(measured_physical):
            if mask >> k & 1:
                f *= 1.0 - 2.0 * float(readout_error(q))
        weights.append(abs(c))
        factors.append(f)
    readout = sum(w * f for w, f in zip(weights, factors)) / sum(weights) if sum(weights) > 0 else 1.0
    return Attenuation(math.exp(log_f), readout, ones, twos)


def target_attenuation(transpiled, measured_physical, masks, target) -> Attenuation:
    """F R from a qiskit Target's calibrated errors (instruction error = r; measure error = q)."""
    def gate_error(name, qubits):
        try:
            props = target[name][qubits]
        except KeyError:
            return 0.0
        return props.error if props is not None else 0.0

    def readout_error(q):
        try:
            props = target["measure"][(q,)]
        except KeyError:
            return 0.0
        return (props.error or 0.0) if props is not None else 0.0

    return global_depolarising_attenuation(transpiled, measured_physical, masks, gate_error, readout_error)


def uniform_depolarising_attenuation(transpiled, measured_physical, masks, p: float, q: float = 0.0,
                                     noisy_gates=("sx", "x", "cx")) -> Attenuation:
    """F R for depolarising parameter p on every gate in `noisy_gates` and readout flips q."""
    return global_depolarising_attenuation(
        transpiled, measured_physical, masks,
        lambda name, qubits: depolarising_infidelity(p, len(qubits)) if name in noisy_gates else 0.0,
        lambda _q: q)
