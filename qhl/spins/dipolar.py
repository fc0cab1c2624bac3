"""The dipolar coupling constant and its orientation factor: one place for both formulas.

Convention (secular, high field; e.g. M. H. Levitt, "Spin Dynamics", 2nd ed., 2008):
    b_ij = -(mu0 / 4 pi) gamma_i gamma_j hbar / r_ij^3          (rad/s)
    coupling h_ij = (b_ij / 2 pi) (3 cos^2 theta_ij - 1) / 2      (Hz)
theta_ij is the angle between the internuclear vector and the static field.
"""

import numpy as np
import scipy.constants as const

__all__ = ["dipolar_constant_hz", "orientation_factor", "dipolar_coupling_hz"]

_MU0_OVER_4PI = const.mu_0 / (4 * np.pi)


def dipolar_constant_hz(gamma_i: float, gamma_j: float, distance_angstrom: float) -> float:
    """b_ij / 2 pi in Hz for gyromagnetic ratios in rad s^-1 T^-1 and a distance in angstrom.

    Negative for two nuclei of positive gamma (two protons at 1.00 A: -120.1 kHz).
    """
    r = distance_angstrom * 1e-10
    b = -_MU0_OVER_4PI * gamma_i * gamma_j * const.hbar / r**3
    return b / (2 * np.pi)


def orientation_factor(vector, field_direction) -> float:
    """(3 cos^2 theta - 1) / 2 for the angle between `vector` and `field_direction`."""
    v = np.asarray(vector, dtype=float)
    f = np.asarray(field_direction, dtype=float)
    c = float(v @ f) / (np.linalg.norm(v) * np.linalg.norm(f))
    return 0.5 * (3 * c * c - 1)


def dipolar_coupling_hz(gamma_i, gamma_j, position_i, position_j, field_direction=(0, 0, 1)) -> float:
    """Secular dipolar coupling h_ij = (b_ij / 2 pi)(3 cos^2 theta - 1)/2 in Hz."""
    d = np.asarray(position_j, float) - np.asarray(position_i, float)
    return dipolar_constant_hz(gamma_i, gamma_j, float(np.linalg.norm(d))) * orientation_factor(
        d, field_direction)
