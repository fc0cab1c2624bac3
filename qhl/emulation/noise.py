"""Noise models for the emulator: depolarising gates and symmetric readout error (qiskit_aer.noise).

Model (common practice). Noisy circuits are transpiled to the basis rz, sx, x, cx. After every
sx and x the depolarising channel E(rho) = (1 - p) rho + p I/2 acts on that qubit, after every
cx the two-qubit channel (1 - p) rho + p I/4 on the pair (qiskit_aer.noise.depolarizing_error);
rz is a frame change and noiseless. Each measured bit is flipped with probability q.

Predicted shrink factor. A depolarising channel multiplies every Pauli component of the state
that acts non-trivially on its qubits by (1 - p) and leaves the rest alone. The common-practice
estimate counts one factor (1 - p) per noisy layer: L = the depth of the transpiled circuit
counting only the noisy gates (sx, x, cx), i.e. the number of layers of noisy gates on the
longest path; the Pauli paths that carry the signal go through most layers, not every gate.
Readout error on a product of w measured Z's multiplies it by (1 - 2q)^w exactly. So
    X_noisy ~ (1 - p)^L (1 - 2q)^w X .
"""

from dataclasses import dataclass

import numpy as np

from ..base.errors import QhlInputError

__all__ = ["NoiseSpec", "NOISY_BASIS", "NOISY_GATES", "noisy_layers", "predicted_shrink"]

NOISY_BASIS = ("rz", "sx", "x", "cx")
NOISY_GATES = ("sx", "x", "cx")


def _check_rate(value, key):
    v = float(value)
    if not np.isfinite(v) or not 0.0 <= v < 1.0:
        raise QhlInputError(f"expected a rate in [0, 1), got {value!r}", key=key)
    return v


@dataclass(frozen=True)
class NoiseSpec:
    """Depolarising rate p on sx, x, cx and readout flip probability q (both in [0, 1)).

    Raises:
        QhlInputError: a rate outside [0, 1).
    """

    depolarizing: float = 0.0
    readout: float = 0.0

    def __post_init__(self):
        object.__setattr__(self, "depolarizing", _check_rate(self.depolarizing, "--noise"))
        object.__setattr__(self, "readout", _check_rate(self.readout, "--readout"))

    @property
    def is_noiseless(self) -> bool:
        return self.depolarizing == 0.0 and self.readout == 0.0

    @property
    def has_gate_noise(self) -> bool:
        return self.depolarizing > 0.0

    def noise_model(self):
        """The qiskit_aer NoiseModel (see the module docstring)."""
        from qiskit_aer.noise import NoiseModel, ReadoutError, depolarizing_error
        nm = NoiseModel(basis_gates=list(NOISY_BASIS))
        if self.depolarizing > 0:
            nm.add_all_qubit_quantum_error(depolarizing_error(self.depolarizing, 1), ["sx", "x"])
            nm.add_all_qubit_quantum_error(depolarizing_error(self.depolarizing, 2), ["cx"])
        if self.readout > 0:
            q = self.readout
            nm.add_all_qubit_readout_error(ReadoutError([[1 - q, q], [q, 1 - q]]))
        return nm


def noisy_layers(transpiled) -> int:
    """L: depth of `transpiled` counting only sx, x and cx (module docstring)."""
    return int(transpiled.depth(filter_function=lambda inst: inst.operation.name in NOISY_GATES))


def predicted_shrink(noise: NoiseSpec, layers: int, observable_weight: int) -> float:
    """(1 - p)^L (1 - 2q)^w, the common-practice depolarising prediction (module docstring)."""
    return (1 - noise.depolarizing) ** layers * (1 - 2 * noise.readout) ** observable_weight
