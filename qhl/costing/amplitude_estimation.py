"""Coherent estimation of one amplitude: queries, success probability and repetitions.

Amplitude estimation (G. Brassard, P. Hoyer, M. Mosca, A. Tapp, "Quantum amplitude amplification
and estimation", Contemp. Math. 305, 53 (2002), Theorem 12): with M applications of the Grover
iterate Q = -A S_0 A^dag S_chi, the estimate a~ of a = |<good|A|0>|^2 satisfies
    |a~ - a| <= 2 pi sqrt(a (1 - a)) / M + pi^2 / M^2      with probability >= 8 / pi^2.
For a +-R valued quantity mu = R (2a - 1) (Hadamard test), |mu~ - mu| <= eps needs |a~ - a| <=
eps / (2R). Worst case a = 1/2: M ~ pi R / eps. The success probability 8/pi^2 ~ 0.81 is raised to
1 - delta by the median of k runs: by Hoeffding's inequality the median fails with probability
<= exp(-2 k (p - 1/2)^2), so k = ceil(ln(1/delta) / (2 (p - 1/2)^2)).

Variant costed: the canonical phase-estimation algorithm of that theorem, with an m-qubit phase
register and M = 2^m (the smallest power of two meeting the bound; `phase_register_queries`);
all k median runs are in the budget's totals.

The time integral of the gradient (insertion time s in [0, t]) is done coherently: a register
over the r + 1 Trotter step boundaries, prepared with trapezoid weights, controls where the
Pauli insertion happens (and a second register selects the Pauli term with weights |c_k|), so one
amplitude holds the whole integral.
"""

import math

import numpy as np

from ..base.errors import QhlInputError

__all__ = ["SUCCESS_PROBABILITY", "amplitude_error_bound", "queries_for_amplitude_error",
           "phase_register_queries", "median_repetitions", "ASSUMPTIONS"]

SUCCESS_PROBABILITY = 8 / math.pi**2

ASSUMPTIONS = {
    "amplitude_estimation": "|a~ - a| <= 2 pi sqrt(a(1-a))/M + pi^2/M^2 with probability >= 8/pi^2 "
                            "(Brassard, Hoyer, Mosca, Tapp, Contemp. Math. 305, 53 (2002)); worst case a = 1/2",
    "amplitude_encoding": "mu = R (2a - 1) from the Hadamard-test ancilla, so the amplitude error is eps/(2R)",
    "queries": "canonical phase-estimation AE: M rounded up to 2^m with an m-qubit phase register (at most 2x "
               "the bound's M); queries_bhmt is the unrounded M",
    "coherent_time_integral": "register over the r+1 Trotter step boundaries with trapezoid weights selects "
                              "the insertion time; a second register selects the Pauli term by |c_k|",
    "median_boost": "median of k runs fails with probability <= exp(-2k(p-1/2)^2), p = 8/pi^2 (Hoeffding 1963); "
                    "the k runs are in every fault-tolerant total",
}


def amplitude_error_bound(a, queries):
    """2 pi sqrt(a(1-a))/M + pi^2/M^2 (BHMT 2002, Theorem 12)."""
    a = np.asarray(a, float)
    m = np.asarray(queries, float)
    return 2 * np.pi * np.sqrt(a * (1 - a)) / m + np.pi**2 / m**2


def queries_for_amplitude_error(amplitude_error, a=0.5):
    """Smallest integer M with amplitude_error_bound(a, M) <= amplitude_error (vectorised).

    Solves pi^2 x^2 + 2 pi s x - e = 0 for x = 1/M with s = sqrt(a(1-a)), in the form
    x = e / (pi (s + sqrt(s^2 + e))) (no cancellation for small e; the textbook root
    (-s + sqrt(s^2 + e)) / pi gives 0 below e ~ 1e-16 s^2). An error so small that M would pass
    1e300 raises QhlInputError (no finite budget); an error allowed above any bound needs one query.

    Example:
        >>> m = queries_for_amplitude_error(1e-3); bool(amplitude_error_bound(0.5, m) <= 1e-3)
        True
    """
    e = np.asarray(amplitude_error, float)
    a = np.clip(np.asarray(a, float), 0.0, 1.0)           # a probability (rounding may step outside)
    s = np.sqrt(a * (1 - a))
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        x = np.where(np.isposinf(e), np.inf, e / (np.pi * (s + np.sqrt(s**2 + e))))
        m = np.maximum(1.0, np.ceil(1.0 / x))       # at least one query (an error allowed above 1 needs no more)
    if np.any(~(m < 1e300)):
        worst = float(np.min(e))
        raise QhlInputError(f"an amplitude error of {worst:.3g} would need more than 1e300 amplitude-estimation "
                            f"queries: the target is below what a finite budget reaches (a much shorter time t "
                            f"makes every derivative, and so the error allowed on it, tiny)", key="--time")
    # guard against rounding just below the target
    m = np.where(amplitude_error_bound(a, m) > e, m + 1, m)
    return int(m) if np.ndim(m) == 0 else m


def phase_register_queries(queries):
    """(M' = 2^m, m) with m = ceil(log2 M): the canonical algorithm's iterate count and phase qubits.

    Example:
        >>> phase_register_queries(13539)
        (16384, 14)
    """
    m = np.ceil(np.log2(np.maximum(np.asarray(queries, float), 1.0)))
    out = 2.0 ** m
    if np.ndim(out) == 0:
        return int(out), int(m)
    return out, m


def median_repetitions(delta, success_probability=SUCCESS_PROBABILITY):
    """k = ceil(ln(1/delta) / (2 (p - 1/2)^2)) runs whose median fails with probability <= delta."""
    return int(math.ceil(math.log(1 / delta) / (2 * (success_probability - 0.5) ** 2)))
