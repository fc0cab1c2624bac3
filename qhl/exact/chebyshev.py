"""Chebyshev propagation exp(-i A tau) x for a real operator A with spectrum in [lo, hi].

Series (H. Tal-Ezer and R. Kosloff, J. Chem. Phys. 81, 3967 (1984)): with A = c + w S,
c = (hi + lo)/2, w = (hi - lo)/2, the spectrum of S in [-1, 1],
    exp(-i A tau) = exp(-i c tau) sum_k a_k T_k(S),  a_0 = J_0(w tau),  a_k = 2 (-i)^k J_k(w tau),
with Bessel functions J_k and the recursion T_{k+1} = 2 S T_k - T_{k-1}. The series is cut
after the first K with sum_{k > K} (1 + k^2 / (w tau)) |a_k| < tol for the largest tau of the
window. The k^2 / (w tau) term bounds the relative error of the derivative of the polynomial
(|T_k'| <= k^2 on [-1, 1], and d/dlambda exp(-i lambda tau) has size tau), so the same cut also
bounds the error of the Frechet derivative when A is the block-triangular operator
[[H, 0], [G, H]] (its exponential holds exp(-iHt) and d exp(-i(H + hG)t)/dh in one matrix,
C. F. Van Loan, IEEE Trans. Autom. Control 23, 395 (1978)). The half-width w is kept at least
1e-3 / tau_max so that a one-point spectrum (a one-state sector) still carries the derivative.

A is real, so complex vectors are carried as real arrays [Re | Im] (columns) and every
product is a real sparse-times-dense product (no complex copy of the matrix).
"""

import numpy as np
from scipy.special import jv

__all__ = ["chebyshev_window", "chebyshev_terms"]


def chebyshev_terms(w_tau_max: float, tol: float) -> int:
    """Number of terms the cut rule keeps for the largest w*tau of a window."""
    z = float(max(w_tau_max, 1e-300))
    kmax = int(z + 12 * max(z, 1.0) ** (1 / 3) + 60)
    k = np.arange(kmax + 1)
    a = np.abs(jv(k, z)) * np.where(k == 0, 1.0, 2.0) * (1.0 + k.astype(float) ** 2 / z)
    tail = np.cumsum(a[::-1])[::-1]          # tail[k] = sum_{j >= k} a_j
    over = np.flatnonzero(tail >= tol)
    return int(over[-1] + 1) if over.size else 1


def chebyshev_window(apply, x0, taus, lo: float, hi: float, tol: float = 1e-10, on_term=None):
    """exp(-i A tau) x0 for each offset tau in `taus` (one shared series).

    Args:
        apply: function Y -> A @ Y on real arrays of shape (d, 2M).
        x0: real array (d, 2M): real parts in columns [:M], imaginary parts in [M:].
        taus: offsets in seconds (>= 0); A in rad/s.
        lo, hi: bounds of the spectrum of A (rad/s), e.g. Gershgorin discs.
        on_term: optional callback(k) after each product with A (progress, Ctrl-C point).

    Returns:
        complex array (len(taus), d, M).
    """
    taus = np.asarray(taus, float)
    d, two_m = x0.shape
    m = two_m // 2
    c = 0.5 * (hi + lo)
    tmax = float(taus.max(initial=0.0))
    w = max(0.5 * (hi - lo), 1e-3 / tmax if tmax > 0 else 1.0)
    K = chebyshev_terms(w * tmax, tol)
    k = np.arange(K)
    coef = jv(k[:, None], w * taus[None, :]) * ((-1j) ** k)[:, None]
    coef[1:] *= 2.0
    coef *= np.exp(-1j * c * taus)[None, :]
    out = np.zeros((taus.size, d, m), complex)

    def add(k_, y):
        z = y[:, :m] + 1j * y[:, m:]
        for j in range(taus.size):
            out[j] += coef[k_, j] * z

    def scaled(y):
        return (apply(y) - c * y) / w

    prev = x0
    add(0, prev)
    if K == 1:
        return out
    cur = scaled(prev)
    if on_term:
        on_term(1)
    add(1, cur)
    for kk in range(2, K):
        nxt = 2.0 * scaled(cur) - prev
        prev, cur = cur, nxt
        add(kk, cur)
        if on_term:
            on_term(kk)
    return out
