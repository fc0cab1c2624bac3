"""T gates per single-qubit Z rotation synthesised to operator-norm error eps.

Methods:
    'ross-selinger' (default): T-count about 3 log2(1/eps) + O(log log(1/eps)) (N. J. Ross and
        P. Selinger, "Optimal ancilla-free Clifford+T approximation of z-rotations", Quantum Inf.
        Comput. 16, 901 (2016)); the O(log log) term is left out here.
    'mixed': the mixed fallback of Kliuchnikov, Lauter, Minko, Paetznick, Petit, "Shorter quantum
        circuits via single-qubit gate approximation", Quantum 7, 1208 (2023): expected T-count
        0.57 log2(1/eps) + 8.83.
"""

import numpy as np

from ..base.errors import QhlInputError

__all__ = ["SYNTHESIS_METHODS", "t_count_per_rotation", "ASSUMPTIONS"]

SYNTHESIS_METHODS = ("ross-selinger", "mixed")

ASSUMPTIONS = {
    "ross-selinger": "T per rotation = 3 log2(1/eps_rot), O(log log) term neglected (Ross and Selinger, "
                     "Quantum Inf. Comput. 16, 901 (2016))",
    "mixed": "T per rotation = 0.57 log2(1/eps_rot) + 8.83 (Kliuchnikov, Lauter, Minko, Paetznick, Petit, "
             "Quantum 7, 1208 (2023))",
    "synthesis_error": "rotation errors add (triangle inequality): eps_rot = synthesis share / rotations",
}


def t_count_per_rotation(eps, method: str = "ross-selinger"):
    """Expected T gates for one Z rotation to error eps (float or array; not rounded).

    Example:
        >>> round(float(t_count_per_rotation(1e-10)))
        100
        >>> round(float(t_count_per_rotation(1e-10, "mixed")))
        28
    """
    e = np.asarray(eps, float)
    if np.any(e <= 0) or np.any(e >= 1):
        raise QhlInputError(f"rotation error must be in (0, 1), got {eps!r}", key="synthesis")
    bits = np.log2(1.0 / e)
    if method == "ross-selinger":
        out = 3.0 * bits
    elif method == "mixed":
        out = 0.57 * bits + 8.83
    else:
        raise QhlInputError(f"unknown synthesis method {method!r}: expected one of {', '.join(SYNTHESIS_METHODS)}",
                            key="synthesis")
    return float(out) if np.ndim(out) == 0 else out
