"""Shot counts from the exact variance of the compiled estimator (small clusters).

The range-based counts of qhl.costing.shots use R^2 (bound) and R^2 - mu^2 (exact only for a
two-valued +-R estimator, an upper bound otherwise). For a cluster small enough to hold the row
unitaries densely, the Hadamard-test gradient family of qhl.circuits.gradient_circuits is compiled and
its single-shot variance Var x = E[x^2] - E[x]^2 is computed exactly (qhl.emulation.variance),
so the standard error eps needs
    N = Var x / eps^2 shots        (central limit theorem, common practice),
with x in units of 1/unit_hz (Var scales by unit_hz^2). Var x is that of the Trotterised
estimator with the given steps and order; E[x] is the Trotterised derivative.
"""

from ..emulation.variance import MAX_QUBITS, family_moments
from ..circuits.gradient_circuits import gradient_circuit
from .shots import variance_shots

__all__ = ["circuit_variance_shots", "component_circuit_variance", "fits_circuit_variance", "ASSUMPTIONS"]

ASSUMPTIONS = {
    "circuit_variance": "exact single-shot variance E[x^2] - E[x]^2 of the compiled Hadamard-test gradient "
                        "estimator (insertion rows by |w|, product inputs, Born outcomes; qhl.emulation.variance), "
                        "N = Var/eps^2 (central limit theorem, common practice), Trotterised with the stated steps",
}


def fits_circuit_variance(n_spins: int, max_spins: int) -> bool:
    """True when a gradient family (n_spins + 1 ancilla) is small enough for the exact variance."""
    return 0 < n_spins <= max_spins and n_spins + 1 <= MAX_QUBITS


def circuit_variance_shots(family, eps, part: str = "re", unit_hz: float = 1.0) -> float:
    """N = Var x unit_hz^2 / eps^2 (float) for standard error eps of `family`'s estimate (per unit_hz).

    Args:
        family: a CircuitFamily; eps: target standard error (> 0) in units of X per unit_hz.
        part: 're' or 'im'; unit_hz: frequency unit of the derivative (1: per Hz).

    Raises:
        QhlInputError: bad part or a family too large (qhl.emulation.variance.MAX_QUBITS).
    """
    return float(variance_shots(family_moments(family, part).variance * unit_hz ** 2, eps))


def component_circuit_variance(model, experiment, parameter, time, steps, order=2, unit_hz=1e3, part="re"):
    """Exact single-shot variance of dS/dh_n (per unit_hz) at `time` from the compiled family.

    Returns:
        (variance per unit_hz^2, range R per unit_hz, Trotterised mean per unit_hz).
    """
    fam = gradient_circuit(model, experiment, parameter, time, steps, order)
    mo = family_moments(fam, part)
    return mo.variance * unit_hz ** 2, mo.value_range * unit_hz, mo.mean * unit_hz
