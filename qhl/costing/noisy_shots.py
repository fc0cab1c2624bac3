"""Noise-aware shot counts: circuit fidelity from error rates, 1/F^2 shots, mitigation overheads.

Error rates and circuit fidelity: qhl.circuits.circuit_fidelity (the one model, shared with `qhl check
--device`): ErrorRates (uniform `--gate-error P` per two-qubit gate, P/10 single-qubit, rz error-free,
`--readout-error Q`, or a backend's calibration), the depolarising parameter p_g = e_g d/(d - 1) and
    F = prod_g (1 - p_g) * prod_{measured i} (1 - 2 q_i),
a pessimistic bound on the Hadamard-test attenuation for unital noise (reason and measurements there).
ErrorRates, depolarising_parameter and circuit_fidelity are re-exported here.

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
from ..circuits.circuit_fidelity import MODEL as _FIDELITY_MODEL
from ..circuits.circuit_fidelity import ErrorRates, depolarising_parameter
from ..circuits.circuit_fidelity import circuit_fidelity as _circuit_fidelity

__all__ = ["MITIGATIONS", "ZNE_FACTORS", "ASSUMPTIONS", "ErrorRates", "depolarising_parameter",
           "circuit_fidelity", "extrapolate_fidelity", "richardson_weights", "mitigation_overhead", "zne_attenuation",
           "noisy_shots", "largest_time_below"]

MITIGATIONS = ("none", "pec", "zne")
ZNE_FACTORS = (1.0, 3.0, 5.0)

ASSUMPTIONS = {
    "noise_rates": "gate error = average gate infidelity e_g (calibration data or --gate-error P for two-qubit "
                   "gates, P/10 single-qubit, rz error-free); as depolarising parameter p = e d/(d-1) (Nielsen, "
                   "Phys. Lett. A 303, 249 (2002)); readout error q = symmetric bit flip",
    "circuit_fidelity": _FIDELITY_MODEL + " (qhl.circuits.circuit_fidelity)",
    "noisy_shots": "N_noisy = N_bound / F^2 (single-shot values still +-R, estimate rescaled by 1/F); "
                   "pec: N_bound gamma^2 / F_ro^2 with gamma = prod (1 + 2 p_g) to first order (Temme, Bravyi, "
                   "Gambetta, PRL 119, 180509 (2017)); zne: N_bound (sum |c_k|)^2 / F_ro^2, Richardson weights "
                   "c_k at noise factors 1, 3, 5 with optimal shot split (Giurgica-Tiron et al., IEEE QCE 2020), rescaled by "
                   "the attenuation A = sum c_k F_g^lambda_k the extrapolation leaves (A^2 in the denominator)",
    "noisy_circuit": "the worst component's Hadamard-test circuit at the budget's chosen Trotter order (order 1 "
                     "or 2, the ones built as circuits; else the one with fewer steps) and its smallest valid step "
                     "count (signal and gradient error, exact propagator or commutator bound: routing "
                     "'trotter_steps_source'); its one- and two-step members routed on the target and r steps "
                     "extrapolated linearly (gate counts) and log-linearly (fidelity)",
    "max_useful_time": "largest t on a log grid (t/1e3 .. t*1e3) whose noisy count stays <= --max-shots; the step "
                       "count there is the commutator bound of the same order times the ratio valid / bound found "
                       "at the budget's t (the bound's t and error-split scaling; exact at t itself)",
}


def circuit_fidelity(transpiled, rates: ErrorRates) -> dict:
    """F of a transpiled (routed) circuit under `rates`: qhl.circuits.circuit_fidelity.circuit_fidelity with
    the observable the Z-string over every measured bit (the Hadamard-test readout).

    Returns:
        {'fidelity', 'gate_fidelity' prod (1 - p_g), 'readout_fidelity' prod (1 - 2 q_i), 'gamma' prod (1 + 2 p_g),
         'log_fidelity', 'log_gamma', ..., 'gates' (noisy gates counted), 'measured'}.
    """
    return _circuit_fidelity(transpiled, rates)


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
