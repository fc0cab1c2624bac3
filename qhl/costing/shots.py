"""Near-term shot counts: concentration bounds, exact variances and stratified allocation.

Conventions. A *component* is one real number: the real or the imaginary part of dS/dh_n at one
time in one experiment, with S the normalised signal (S(0) = 1, qhl.exact.engine) and h_n in units of
`unit_hz` (default 1 kHz, so components are "per kHz"). A single-shot estimator takes values in
[-R, R]; N shots give a mean with standard error sqrt(Var / N).

Formulas (each in one place):
    Hoeffding (W. Hoeffding, J. Amer. Statist. Assoc. 58, 13 (1963)), values in [-R, R]:
        N >= 2 R^2 ln(2/delta) / eps^2        for P(|mean - mu| >= eps) <= delta.
    Variance bound (Chebyshev / central limit, common practice): N = Var / eps^2 for standard error eps.
    A two-valued estimator (every shot is +R or -R) with mean mu has Var = R^2 - mu^2 exactly;
    for any estimator with values in [-R, R] and mean mu, R^2 - mu^2 is an upper bound
    (Bhatia and Davis, Amer. Math. Monthly 107, 353 (2000), from memory). The circuits of
    qhl.circuits.gradient_circuits (product inputs, summed read-out) are of the second kind, so there the
    "exact-variance" count is the tightest range-based count, not the circuit's exact variance.
    Stratified sum g = sum_k w_k mu_k with stratum standard deviations sigma_k:
        optimal allocation n_k proportional to |w_k| sigma_k, N = (sum_k |w_k| sigma_k)^2 / eps^2
        (Wecker, Hastings, Troyer, PRA 92, 042303 (2015), from memory; Neyman allocation);
        uniform allocation n_k = N / K, N = K sum_k w_k^2 sigma_k^2 / eps^2.
    Hadamard-test gradient estimator (Banchi and Crooks, Quantum 5, 386 (2021); vetted in the
    project's references): for U = exp(-i t (H0 + theta P)), P = sum_k c_k P_k with the term k
    drawn with probability |c_k| / ||c||_1 and the insertion time s ~ U[0, t], each shot is
    +-2 t ||c||_1 times the observable factor kappa = N_obs (observed spins) for the normalised
    signal (qhl.circuits.state_prep: one shot of the signal estimator lies in [-N_obs, N_obs]); this is the
    +-2 W N_obs range of qhl.circuits.gradient_circuits with W = t 2 pi |s_n| ||c||_1. A range is a
    magnitude: a negative scale factor (dipolar_scale < 0, legal for some decoupling sequences)
    enters as |s_n|.
"""

import math

import numpy as np

from ..base.errors import QhlInputError

__all__ = ["hoeffding_shots", "variance_shots", "two_valued_variance", "gradient_shot_range",
           "hessian_shot_range", "optimal_allocation_shots", "uniform_allocation_shots",
           "optimal_allocation", "observable_factor", "check_precision", "check_time", "ASSUMPTIONS"]

ASSUMPTIONS = {
    "hoeffding": "N >= 2 R^2 ln(2/delta)/eps^2 for values in [-R, R] (Hoeffding, J. Amer. Statist. "
                 "Assoc. 58, 13 (1963))",
    "variance_bound": "N = Var/eps^2 shots for standard error eps (common practice)",
    "two_valued_variance": "every shot is +R or -R, so Var = R^2 - mu^2 with mu from the exact engine",
    "gradient_range": "Hadamard test with controlled Pauli insertion at s ~ U[0,t], Pauli term drawn by "
                      "|c_k|: each shot is +-2 t ||c||_1 (2 pi s_n) kappa (Banchi and Crooks, Quantum 5, "
                      "386 (2021))",
    "hessian_range": "second derivative sampled from its four insertion terms: each shot is "
                     "+-(2t)^2 ||c_m||_1 ||c_n||_1 (2 pi)^2 s_m s_n kappa (bound ||dU/dtheta|| <= t ||P||)",
    "observable_factor": "kappa = number of observed spins N_obs: the signal estimator's single shot lies in "
                         "[-N_obs, N_obs] (qhl.circuits.state_prep), the same +-2 W N_obs range as qhl.circuits.gradient_circuits",
    "exact_variance_scope": "R^2 - mu^2 is exact for a two-valued (+-R) estimator and an upper bound for any "
                            "[-R, R]-valued one with mean mu (Bhatia and Davis, Amer. Math. Monthly 107, 353 "
                            "(2000), from memory), e.g. the product-input circuits of qhl.circuits.gradient_circuits",
    "allocation": "optimal allocation over strata N = (sum_k |w_k| sigma_k)^2/eps^2 (Wecker, Hastings, "
                  "Troyer, PRA 92, 042303 (2015), from memory) against uniform K sum_k w_k^2 sigma_k^2/eps^2",
}


def _shown(a):
    a = np.asarray(a, float)
    return f"{float(a):g}" if a.ndim == 0 else f"values from {np.nanmin(a):g} to {np.nanmax(a):g}"


def check_precision(eps, key="precision"):
    """Refuse a precision outside (0, 1) (all entries, for arrays)."""
    e = np.asarray(eps, float)
    if e.size == 0 or not np.all(np.isfinite(e)) or np.any(e <= 0) or np.any(e >= 1):
        raise QhlInputError(f"expected a precision strictly between 0 and 1, got {_shown(e)}", key=key)
    return eps


def check_time(t, key="time"):
    """Refuse an evolution time that is not positive and finite."""
    a = np.asarray(t, float)
    if a.size == 0 or not np.all(np.isfinite(a)) or np.any(a <= 0):
        raise QhlInputError(f"expected a positive, finite evolution time in seconds, got {_shown(a)}", key=key)
    return t


def hoeffding_shots(value_range, eps, delta):
    """Shots for |mean - mu| < eps with probability >= 1 - delta, values in [-R, R].

    Args:
        value_range: R (> 0).
        eps: half-width of the confidence interval (same units as R).
        delta: failure probability in (0, 1).

    Returns:
        int (or int array) ceil(2 R^2 ln(2/delta) / eps^2) (Hoeffding 1963).

    Example:
        >>> hoeffding_shots(1.0, 0.01, 0.05)
        73778
    """
    if not 0 < delta < 1:
        raise QhlInputError(f"expected a failure probability in (0, 1), got {delta!r}", key="delta")
    r = np.asarray(value_range, float)
    n = np.ceil(2.0 * r ** 2 * math.log(2.0 / delta) / np.asarray(eps, float) ** 2)
    n = np.where(r > 0, np.maximum(n, 1.0), n)       # an estimate needs a shot even where R^2 underflows
    return int(n) if np.ndim(n) == 0 else n.astype(np.int64)


def variance_shots(variance, eps):
    """Shots N = Var / eps^2 (float, not rounded: sweeps fit exponents to it) for standard error eps."""
    return np.asarray(variance, float) / np.asarray(eps, float) ** 2


def two_valued_variance(value_range, mean):
    """Var = R^2 - mu^2 of an estimator whose every shot is +R or -R and whose mean is mu."""
    r = np.asarray(value_range, float)
    mu = np.asarray(mean, float)
    return np.maximum(r**2 - mu**2, 0.0)


def observable_factor(n_observed: int) -> float:
    """kappa: single-shot magnitude factor of the normalised signal's estimator (see ASSUMPTIONS)."""
    return float(n_observed)


def gradient_shot_range(t, coefficient_l1, scale, kappa, unit_hz=1e3):
    """R = 2 t ||c||_1 (2 pi s) kappa unit_hz: single-shot range of dS/dh (per unit_hz) at time t (s).

    Args:
        t: evolution time(s) in seconds (broadcasts).
        coefficient_l1: ||c||_1 of the parameter's Pauli generator G = sum_k c_k P_k.
        scale: the experiment's scale factor s_n of the parameter (dipolar_scale or 1; its magnitude is used).
        kappa: observable factor (observable_factor).
        unit_hz: frequency unit of h (1e3: derivatives per kHz).
    """
    return 2.0 * np.asarray(t, float) * np.asarray(coefficient_l1, float) * 2 * np.pi * np.abs(np.asarray(scale, float)) \
        * kappa * unit_hz


def hessian_shot_range(t, l1_m, l1_n, scale_m, scale_n, kappa, unit_hz=1e3):
    """R = (2t)^2 ||c_m||_1 ||c_n||_1 (2 pi)^2 |s_m s_n| kappa unit_hz^2 for d2S/dh_m dh_n."""
    t = np.asarray(t, float)
    return (2 * t) ** 2 * np.asarray(l1_m, float) * np.asarray(l1_n, float) * (2 * np.pi) ** 2 \
        * np.abs(np.asarray(scale_m, float) * np.asarray(scale_n, float)) * kappa * unit_hz**2


def optimal_allocation_shots(weights, sigmas, eps, axis=-1):
    """N = (sum_k |w_k| sigma_k)^2 / eps^2 (optimal allocation over strata along `axis`)."""
    s = np.sum(np.abs(weights) * np.asarray(sigmas, float), axis=axis)
    return s**2 / np.asarray(eps, float) ** 2


def uniform_allocation_shots(weights, sigmas, eps, axis=-1):
    """N = K sum_k w_k^2 sigma_k^2 / eps^2 (the same number of shots in each of the K strata)."""
    w = np.abs(np.asarray(weights, float))
    sig = np.asarray(sigmas, float)
    k = np.sum(np.broadcast_to(w, np.broadcast_shapes(w.shape, sig.shape)) > 0, axis=axis)
    return k * np.sum((w * sig) ** 2, axis=axis) / np.asarray(eps, float) ** 2


def optimal_allocation(weights, sigmas, total_shots):
    """Shots per stratum n_k = N |w_k| sigma_k / sum_j |w_j| sigma_j (floats)."""
    a = np.abs(np.asarray(weights, float)) * np.asarray(sigmas, float)
    tot = a.sum()
    return np.zeros_like(a) if tot == 0 else total_shots * a / tot
