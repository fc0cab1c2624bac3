"""Noise-aware shot counts: circuit fidelity from error rates, 1/F^2 shots, mitigation overheads.

Error rates. A gate's error e_g is its average gate infidelity (what randomized benchmarking and
the calibration data of a device report; a fake backend's `backend.target[name][qargs].error`). As
a depolarising channel E(rho) = (1 - p) rho + p I/d on the gate's k qubits (d = 2^k) it has
p_g = e_g d / (d - 1) (average gate fidelity of a depolarising channel, F_avg = 1 - p (d - 1)/d:
Nielsen, "A simple formula for the average gate fidelity of a quantum dynamical map", Phys. Lett. A
303, 249 (2002)). Uniform rates (`--gate-error P --readout-error Q`): P per two-qubit gate, P/10 per
single-qubit gate unless given (common practice: single-qubit errors about ten times smaller), rz
error-free (a frame change, common practice; also with a backend), Q per measured bit; with a backend, each
given uniform rate replaces the calibrated ones of its kind. A readout error q is a symmetric
bit flip; a fake backend's `target['measure'][(i,)].error` is taken as that q.

Fidelity model (independent errors, global depolarising approximation). Each gate's channel
shrinks the Pauli components it touches by (1 - p_g); the global approximation lets every gate
shrink the whole signal, so the Hadamard-test expectation X attenuates to F X with
    F = prod_g (1 - p_g) * prod_{measured i} (1 - 2 q_i)
(the readout factor is exact for a product of measured Z's with symmetric flips; the gate factor
is the pessimistic global estimate: Pauli paths that avoid a gate are not damped by it, so the
true shrink is usually weaker: tests/test_noisy_shots.py measures both on density matrices).

Shots. The noisy single-shot value is still +-R, so with the estimate rescaled by 1/F (F known)
    N_noisy = R^2 / (F^2 eps^2) = N_bound / F^2          ('none': the attenuation alone);
'pec' (probabilistic error cancellation; Temme, Bravyi, Gambetta, "Error mitigation for short-depth
quantum circuits", PRL 119, 180509 (2017)): quasi-probability cost gamma = prod_g (1 + 2 p_g) to
first order in p_g, N = N_bound gamma^2 / F_readout^2 (readout inverted separately, exact for
symmetric flips); 'zne' (zero-noise extrapolation; Giurgica-Tiron, Hindy, LaRose, Mari, Zeng,
"Digital zero noise extrapolation for quantum error mitigation", IEEE QCE 2020): Richardson
extrapolation through noise factors lambda_k with weights c_k = prod_{j != k} lambda_j /
(lambda_j - lambda_k) has variance sum c_k^2 sigma_k^2 / N_k, smallest for N_k ~ |c_k|: a variance
amplification (sum |c_k|)^2 (sigma_k <= R; noise factors ZNE_FACTORS by default). Under the same global
model the signal at noise factor lambda is F_g^lambda X, so the extrapolation returns A X with
A = sum_k c_k F_g^lambda_k (A -> 1 as F_g -> 1; A ~ c_1 F_g when F_g -> 0: the extrapolation no longer
removes the attenuation); rescaled by 1/A, N = N_bound (sum |c_k|)^2 / (A^2 F_readout^2). Under this model
(F known) plain rescaling ('none') is always cheaper; mitigation earns its cost when F is not known.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..base.errors import QhlInputError

__all__ = ["MITIGATIONS", "ZNE_FACTORS", "ASSUMPTIONS", "ErrorRates", "depolarising_parameter",
           "circuit_fidelity", "extrapolate_fidelity", "richardson_weights", "mitigation_overhead", "zne_attenuation",
           "noisy_shots", "largest_time_below"]

MITIGATIONS = ("none", "pec", "zne")
ZNE_FACTORS = (1.0, 3.0, 5.0)
SINGLE_QUBIT_RATIO = 0.1
_FRAME_GATES = ("rz", "delay", "barrier", "id", "reset")

ASSUMPTIONS = {
    "noise_rates": "gate error = average gate infidelity e_g (calibration data or --gate-error P for two-qubit "
                   "gates, P/10 single-qubit, rz error-free); as depolarising parameter p = e d/(d-1) (Nielsen, "
                   "Phys. Lett. A 303, 249 (2002)); readout error q = symmetric bit flip",
    "circuit_fidelity": "independent errors, global depolarising approximation: the Hadamard-test expectation "
                        "attenuates by F = prod_g (1 - p_g) prod_measured (1 - 2 q_i)",
    "noisy_shots": "N_noisy = N_bound / F^2 (single-shot values still +-R, estimate rescaled by 1/F); "
                   "pec: N_bound gamma^2 / F_ro^2 with gamma = prod (1 + 2 p_g) to first order (Temme, Bravyi, "
                   "Gambetta, PRL 119, 180509 (2017)); zne: N_bound (sum |c_k|)^2 / F_ro^2, Richardson weights "
                   "c_k at noise factors 1, 3, 5 with optimal shot split (Giurgica-Tiron et al., IEEE QCE 2020), rescaled by "
                   "the attenuation A = sum c_k F_g^lambda_k the extrapolation leaves (A^2 in the denominator)",
    "noisy_circuit": "the worst component's Hadamard-test circuit, second-order product formula with the "
                     "commutator-bound step count; its one- and two-step members routed on the target and r "
                     "steps extrapolated linearly (gate counts) and log-linearly (fidelity)",
    "max_useful_time": "largest t on a log grid (t/1e3 .. t*1e3) whose noisy count stays <= --max-shots",
}


def _rate(value, key, upper=1.0):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise QhlInputError(f"expected an error rate in [0, {upper:g}), got {value!r}", key=key) from None
    if not math.isfinite(v) or not 0.0 <= v < upper:
        raise QhlInputError(f"expected an error rate in [0, {upper:g}), got {value!r}", key=key)
    return v


def depolarising_parameter(error: float, qubits: int) -> float:
    """p = e d / (d - 1), d = 2^qubits: the depolarising parameter of average gate infidelity e (module docstring)."""
    d = 2 ** int(qubits)
    return float(error) * d / (d - 1)


@dataclass(frozen=True)
class ErrorRates:
    """Per-gate error rates: uniform (`gate_error`, `single_error`, `readout_error`) or a backend's
    calibrated table (`backend`); uniform values given beside a backend replace its numbers.

    Raises:
        QhlInputError: a rate outside [0, 3/4) (gates) or [0, 1/2) (readout).
    """

    gate_error: float | None = None
    single_error: float | None = None
    readout_error: float | None = None
    backend: object | None = None

    def __post_init__(self):
        if self.gate_error is not None:
            object.__setattr__(self, "gate_error", _rate(self.gate_error, "--gate-error", 0.75))
        if self.single_error is not None:
            object.__setattr__(self, "single_error", _rate(self.single_error, "--single-error", 0.5))
        if self.readout_error is not None:
            object.__setattr__(self, "readout_error", _rate(self.readout_error, "--readout-error", 0.5))

    @property
    def given(self) -> bool:
        """True when any rate is known (a backend or a uniform value)."""
        return self.backend is not None or any(v is not None for v in (self.gate_error, self.single_error,
                                                                          self.readout_error))

    @property
    def source(self) -> str:
        parts = []
        if self.backend is not None:
            parts.append(f"calibration of {self.backend.name}")
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

    def _backend_error(self, name, qargs):
        target = self.backend.target
        if name not in target.operation_names:
            return 0.0
        props = target[name]
        p = props.get(tuple(qargs)) if props is not None else None
        return float(p.error) if p is not None and p.error is not None else 0.0

    def gate(self, name: str, qargs) -> float:
        """Average gate infidelity e_g of gate `name` on physical qubits `qargs`."""
        if name in _FRAME_GATES:
            return 0.0
        if len(qargs) >= 2:
            if self.gate_error is not None:
                return self.gate_error
        elif self.single_error is not None or self.gate_error is not None:
            return self.single
        return self._backend_error(name, qargs) if self.backend is not None else 0.0

    def readout(self, qubit: int) -> float:
        """Flip probability q of measured qubit `qubit`."""
        if self.readout_error is not None:
            return self.readout_error
        if self.backend is not None:
            return min(self._backend_error("measure", (qubit,)), 0.5)
        return 0.0


def circuit_fidelity(transpiled, rates: ErrorRates) -> dict:
    """F of a transpiled (routed) circuit under `rates` (module docstring).

    Returns:
        {'fidelity', 'gate_fidelity' prod (1 - p_g), 'readout_fidelity' prod (1 - 2 q_i), 'gamma' prod (1 + 2 p_g),
         'log_fidelity', 'log_gamma', 'gates' (noisy gates counted), 'measured'}.
    """
    log_g = log_gamma = log_ro = 0.0
    gates = measured = 0
    for inst in transpiled.data:
        op = inst.operation
        qargs = [transpiled.find_bit(q).index for q in inst.qubits]
        if op.name == "measure":
            q = rates.readout(qargs[0])
            log_ro += math.log1p(-2 * q) if q < 0.5 else -math.inf
            measured += 1
            continue
        if op.name == "barrier":
            continue
        e = rates.gate(op.name, qargs)
        if e <= 0:
            continue
        p = min(depolarising_parameter(e, len(qargs)), 1.0)
        log_g += math.log1p(-p) if p < 1 else -math.inf
        log_gamma += math.log1p(2 * p)
        gates += 1
    log_f = log_g + log_ro
    return {"fidelity": math.exp(log_f), "gate_fidelity": math.exp(log_g), "readout_fidelity": math.exp(log_ro),
            "gamma": math.exp(log_gamma), "log_fidelity": log_f, "log_gate_fidelity": log_g,
            "log_readout_fidelity": log_ro, "log_gamma": log_gamma, "gates": gates, "measured": measured}


def extrapolate_fidelity(one: dict, two: dict, steps) -> dict:
    """circuit_fidelity of r steps from the one- and two-step circuits: logs linear in r (arrays broadcast).

    log X(r) = log X(1) + (r - 1) (log X(2) - log X(1)) for X = gate fidelity and gamma; the readout
    factor is that of the one-step circuit (the same measured qubits).
    """
    r = np.asarray(steps, float)
    out = {"log_gate_fidelity": one["log_gate_fidelity"]
           + (r - 1) * min(two["log_gate_fidelity"] - one["log_gate_fidelity"], 0.0),
           "log_gamma": one["log_gamma"] + (r - 1) * max(two["log_gamma"] - one["log_gamma"], 0.0)}
    out["log_readout_fidelity"] = one["log_readout_fidelity"] + 0 * r
    out["log_fidelity"] = out["log_gate_fidelity"] + out["log_readout_fidelity"]
    with np.errstate(over="ignore", under="ignore"):
        for k in ("fidelity", "gate_fidelity", "readout_fidelity", "gamma"):
            out[k] = np.exp(out["log_" + k])
    return out


def richardson_weights(factors=ZNE_FACTORS) -> np.ndarray:
    """c_k = prod_{j != k} lambda_j / (lambda_j - lambda_k): sum c_k f(lambda_k) = f(0) for polynomials of
    degree < len(factors) (Richardson extrapolation to zero noise)."""
    lam = np.asarray(factors, float)
    if lam.size < 2 or len(set(lam.tolist())) != lam.size or np.any(lam < 1):
        raise QhlInputError(f"expected two or more distinct noise factors >= 1, got {list(factors)}", key="--zne-factors")
    return np.array([np.prod([lam[j] / (lam[j] - lam[k]) for j in range(lam.size) if j != k])
                     for k in range(lam.size)])


def mitigation_overhead(method: str, fid: dict, factors=ZNE_FACTORS):
    """Shot multiplier over the noiseless bound count (module docstring); arrays broadcast (inf past the
    floating-point range)."""
    with np.errstate(over="ignore", under="ignore"):
        return _overhead(method, fid, factors)


def _overhead(method, fid, factors):
    if method not in MITIGATIONS:
        raise QhlInputError(f"unknown mitigation {method!r}: expected one of {', '.join(MITIGATIONS)}",
                            key="--mitigation")
    if method == "none":
        return np.exp(-2 * np.asarray(fid["log_fidelity"], float))
    ro = np.exp(-2 * np.asarray(fid["log_readout_fidelity"], float))
    if method == "pec":
        return np.exp(2 * np.asarray(fid["log_gamma"], float)) * ro
    c = richardson_weights(factors)
    a = zne_attenuation(fid, factors)
    return float(np.sum(np.abs(c))) ** 2 * ro / np.maximum(a, 1e-300) ** 2


def zne_attenuation(fid: dict, factors=ZNE_FACTORS):
    """A = sum_k c_k F_g^lambda_k: what Richardson extrapolation leaves of a globally depolarised signal."""
    c = richardson_weights(factors)
    log_g = np.asarray(fid["log_gate_fidelity"], float)
    return sum(ck * np.exp(lk * log_g) for ck, lk in zip(c, factors))


def noisy_shots(bound_shots, fid: dict, method: str = "none", factors=ZNE_FACTORS):
    """ceil(N_bound x overhead) (arrays: float, inf where F = 0)."""
    over = mitigation_overhead(method, fid, factors)
    with np.errstate(over="ignore", invalid="ignore"):
        n = np.asarray(bound_shots, float) * over
        return np.ceil(n * (1 - 1e-12))


def largest_time_below(times, counts, cap):
    """(largest t with counts <= cap, its index) on an increasing grid, or (None, None) if none is below.

    Noisy counts grow with t (R^2 ~ t^2 and F falls with r), so the grid's last point under the cap is
    the answer up to the grid spacing.
    """
    times = np.asarray(times, float)
    ok = np.flatnonzero(np.asarray(counts, float) <= float(cap))
    if ok.size == 0:
        return None, None
    k = int(ok[-1])
    return float(times[k]), k
