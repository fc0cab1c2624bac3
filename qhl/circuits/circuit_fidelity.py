"""Circuit fidelity of a transpiled circuit under gate and readout errors: the one attenuation model.

Used by the budget's noise-aware shot counts (qhl.costing.noisy_shots) and by the predicted
attenuation of `qhl check --device` (qhl.emulation.device_fidelity).

Error rates. A gate's error e_g is its average gate infidelity (what randomized benchmarking and
device calibrations report; a qiskit Target's `target[name][qargs].error`, a backend's
`backend.target`). As a depolarising channel E(rho) = (1 - p) rho + p I/d on the gate's k qubits
(d = 2^k; Nielsen & Chuang, Quantum Computation and Quantum Information (2000), sec. 8.3.4) it has
    p_g = e_g d / (d - 1)
(average gate fidelity of that channel F_avg = 1 - p (d - 1)/d: Nielsen, "A simple formula for the
average gate fidelity of a quantum dynamical map", Phys. Lett. A 303, 249 (2002)). Uniform rates:
`gate_error` per two-qubit gate, `single_error` (default gate_error / 10; common practice: single-
qubit errors about ten times smaller) per single-qubit gate, rz / delay / barrier / id / reset
error-free (rz is a frame change; common practice), `readout_error` per measured bit; beside a
backend, each given uniform rate replaces the calibrated ones of its kind. A readout error q is a
symmetric bit flip; a Target's `target['measure'][(i,)].error` is taken as that q.

Model (independent errors, global depolarising approximation). A depolarising gate multiplies every
Pauli component it touches by exactly (1 - p_g); the global approximation lets every noisy gate
shrink the whole signal, so a traceless observable X attenuates to F R X with
    F = prod_g (1 - p_g),   R = prod_{measured i in the Z-string} (1 - 2 q_i).
R is exact for a product of measured Z's with symmetric flips (common practice); an observable with
several Z-string terms gets the |coefficient|-weighted mean of their R (exact when all its terms see
equal q). Also returned: gamma = prod_g (1 + 2 p_g), the first-order quasi-probability cost of
inverting the channels (Temme, Bravyi, Gambetta, PRL 119, 180509 (2017)).

Why p_g and not the infidelity e_g in the product. (1 - p_g) is the exact damping of each Pauli
component a depolarising gate acts on; paths that avoid a gate are not damped by it, so for unital
(depolarising) noise the global product is a pessimistic bound: F is at most the true shrink.
Measured on exact density matrices (qiskit-aer, 3-4 spins + ancilla): with local depolarising gates
at P (cx) and P/10 (sx, x) every Z-string shrank by >= F, median 1.01-1.19 F (tests/test_noisy_shots.py);
with the same p on every sx, x and cx the Hadamard-test signals shrank by 1.32-1.42 F
(tests/test_sampler_depolarising.py); under fake_lima's noise model (depolarising plus thermal
relaxation, 46 cx) by 1.23 F R (tests/test_check_device.py). The variant prod (1 - e_g) is closer on
average but no bound (measured -5% .. +31% against the truth, both signs). Relaxation is not unital,
so on devices the bound is measured there, not guaranteed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ..base.errors import QhlInputError

__all__ = ["ErrorRates", "SINGLE_QUBIT_RATIO", "FRAME_GATES", "MODEL", "depolarising_parameter",
           "depolarising_infidelity", "circuit_fidelity", "measured_qubits"]

SINGLE_QUBIT_RATIO = 0.1
FRAME_GATES = ("rz", "delay", "barrier", "id", "reset")
MODEL = ("independent errors, global depolarising approximation: a traceless observable attenuates by "
         "F R, F = prod_g (1 - p_g) over the transpiled gates with the depolarising parameter p_g = e_g d/(d-1) "
         "of the gate's average infidelity e_g (Nielsen, Phys. Lett. A 303, 249 (2002)); R = prod (1 - 2 q_i) over "
         "measured qubits in the Z-string (q_i readout flip); a pessimistic bound for unital noise")


def _rate(value, key, upper=1.0):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise QhlInputError(f"expected an error rate in [0, {upper:g}), got {value!r}", key=key) from None
    if not math.isfinite(v) or not 0.0 <= v < upper:
        raise QhlInputError(f"expected an error rate in [0, {upper:g}), got {value!r}", key=key)
    return v


def depolarising_parameter(error: float, qubits: int) -> float:
    """p = e d / (d - 1), d = 2^qubits: the depolarising parameter of average gate infidelity e."""
    d = 2 ** int(qubits)
    return float(error) * d / (d - 1)


def depolarising_infidelity(p: float, qubits: int) -> float:
    """e = p (d - 1) / d: the average gate infidelity of the depolarising channel with parameter p."""
    d = 2 ** int(qubits)
    return float(p) * (d - 1) / d


@dataclass(frozen=True)
class ErrorRates:
    """Per-gate error rates: uniform (`gate_error`, `single_error`, `readout_error`, average
    infidelities and a flip probability) and/or a calibrated table (`backend`: a backend with a
    `.target`, or a qiskit Target); uniform values given beside a table replace its numbers of
    their kind. `noisy_gates` (None: all) limits the noisy gates to those names.

    Raises:
        QhlInputError: a rate outside [0, 3/4) (two-qubit), [0, 1/2) (single-qubit, readout).
    """

    gate_error: float | None = None
    single_error: float | None = None
    readout_error: float | None = None
    backend: object | None = None
    noisy_gates: tuple | None = None

    def __post_init__(self):
        if self.gate_error is not None:
            object.__setattr__(self, "gate_error", _rate(self.gate_error, "--gate-error", 0.75))
        if self.single_error is not None:
            object.__setattr__(self, "single_error", _rate(self.single_error, "--single-error", 0.5))
        if self.readout_error is not None:
            object.__setattr__(self, "readout_error", _rate(self.readout_error, "--readout-error", 0.5))

    @property
    def given(self) -> bool:
        """True when any rate is known (a table or a uniform value)."""
        return self.backend is not None or any(v is not None for v in (self.gate_error, self.single_error,
                                                                          self.readout_error))

    @property
    def table(self):
        """The qiskit Target of `backend` (or `backend` itself when it is a Target); None without one."""
        return None if self.backend is None else getattr(self.backend, "target", self.backend)

    @property
    def source(self) -> str:
        parts = []
        if self.backend is not None:
            parts.append(f"calibration of {getattr(self.backend, 'name', None) or 'the target'}")
        if self.gate_error is not None:
            parts.append(f"two-qubit {self.gate_error:g}")
        if self.gate_error is not None or self.single_error is not None:
            parts.append(f"single-qubit {self.single:g}")
        if self.readout_error is not None:
            parts.append(f"readout {self.readout_error:g}")
        return "; ".join(parts) or "none"

    @property
    def single(self) -> float:
        if self.single_error is not None:
            return self.single_error
        return SINGLE_QUBIT_RATIO * (self.gate_error or 0.0)

    def _table_error(self, name, qargs):
        target = self.table
        if name not in target.operation_names:
            return 0.0
        props = target[name]
        p = props.get(tuple(qargs)) if props is not None else None
        return float(p.error) if p is not None and p.error is not None else 0.0

    def gate(self, name: str, qargs) -> float:
        """Average gate infidelity e_g of gate `name` on physical qubits `qargs`."""
        if name in FRAME_GATES or name == "measure":
            return 0.0
        if self.noisy_gates is not None and name not in self.noisy_gates:
            return 0.0
        if len(qargs) >= 2:
            if self.gate_error is not None:
                return self.gate_error
        elif self.single_error is not None or self.gate_error is not None:
            return self.single
        return self._table_error(name, qargs) if self.backend is not None else 0.0

    def readout(self, qubit: int) -> float:
        """Flip probability q of measured qubit `qubit`."""
        if self.readout_error is not None:
            return self.readout_error
        if self.backend is not None:
            return min(self._table_error("measure", (qubit,)), 0.5)
        return 0.0


def measured_qubits(transpiled) -> list:
    """Physical qubit of each classical bit (by the circuit's measure instructions; None if unmeasured)."""
    out = [None] * transpiled.num_clbits
    for inst in transpiled.data:
        if inst.operation.name == "measure":
            out[transpiled.find_bit(inst.clbits[0]).index] = transpiled.find_bit(inst.qubits[0]).index
    return out


def _log1m(x):
    return math.log1p(-x) if x < 1 else -math.inf


def circuit_fidelity(transpiled, rates, masks=None, measured=None) -> dict:
    """F, R and gamma of a transpiled (physical-qubit) circuit under `rates` (module docstring).

    Args:
        transpiled: the circuit as run.
        rates: ErrorRates (or any object with gate(name, qargs) -> e and readout(qubit) -> q).
        masks: [(coefficient, bit mask over classical bits)] of the observable; None: the Z-string
            over every measured bit.
        measured: physical qubit of classical bit k (default: from the measure instructions).

    Returns:
        {'fidelity' F R, 'gate_fidelity' F, 'readout_fidelity' R, 'gamma', their natural logs
         'log_fidelity', 'log_gate_fidelity', 'log_readout_fidelity', 'log_gamma', 'gates' (noisy gates
         counted), 'one_qubit_gates', 'two_qubit_gates', 'measured' (measured bits)}.
    """
    log_g = log_gamma = 0.0
    ones = twos = 0
    for inst in transpiled.data:
        name = inst.operation.name
        if name == "measure" or name in FRAME_GATES:
            continue
        qargs = tuple(transpiled.find_bit(q).index for q in inst.qubits)
        e = rates.gate(name, qargs) or 0.0
        if e <= 0:
            continue
        p = min(depolarising_parameter(e, len(qargs)), 1.0)
        log_g += _log1m(p)
        log_gamma += math.log1p(2 * p)
        ones += len(qargs) == 1
        twos += len(qargs) >= 2
    if measured is None:
        measured = measured_qubits(transpiled)
    bits = [k for k, q in enumerate(measured) if q is not None]
    if masks is None:
        masks = [(1.0, sum(1 << k for k in bits))]
    q_of = {k: float(rates.readout(measured[k])) for k in bits}
    weights, logs = [], []
    for c, mask in masks:
        logs.append(sum(_log1m(2 * q_of[k]) for k in bits if mask >> k & 1))
        weights.append(abs(c))
    total = sum(weights)
    if len(logs) == 1 or total == 0:
        log_ro = logs[0] if len(logs) == 1 else 0.0
    else:
        mean = sum(w * math.exp(lg) for w, lg in zip(weights, logs)) / total
        log_ro = math.log(mean) if mean > 0 else -math.inf
    log_f = log_g + log_ro
    return {"fidelity": math.exp(log_f), "gate_fidelity": math.exp(log_g), "readout_fidelity": math.exp(log_ro),
            "gamma": math.exp(log_gamma), "log_fidelity": log_f, "log_gate_fidelity": log_g,
            "log_readout_fidelity": log_ro, "log_gamma": log_gamma, "gates": ones + twos,
            "one_qubit_gates": ones, "two_qubit_gates": twos, "measured": len(bits)}
