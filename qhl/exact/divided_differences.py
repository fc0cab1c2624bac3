"""Divided differences of f(E) = exp(-i E tau), evaluated stably (no cancellation).

They give the exact derivatives of U = exp(-i H tau) in the eigenbasis of H (Daleckii-Krein):
    (V^dag dU V)_{ab} = (V^dag dH V)_{ab} f[E_a, E_b],
    (V^dag d2U V)_{ab} = sum_c (X_ac Y_cb + Y_ac X_cb) f[E_a, E_c, E_b]
(R. Bhatia, "Matrix Analysis", Springer 1997, ch. V).
"""

import numpy as np

__all__ = ["first_divided_difference", "second_divided_difference", "phase_sinc_tables"]

_TAYLOR_BELOW = 1e-3   # |gap * tau| below which the second difference uses its Taylor series
_SINC_SERIES_BELOW = 0.2   # |u| below which sin(u)/u comes from its Taylor series (terms to u^12: error < 1e-22)


def first_divided_difference(x, y, tau):
    """f[x, y] = (f(x) - f(y)) / (x - y) = -i tau exp(-i tau (x+y)/2) sinc((x-y) tau / 2)."""
    x, y = np.asarray(x, float), np.asarray(y, float)
    u = (x - y) * tau / 2
    return -1j * tau * np.exp(-0.5j * tau * (x + y)) * np.sinc(u / np.pi)


def second_divided_difference(x, y, z, tau):
    """f[x, y, z], symmetric in its arguments, by the largest-gap recursion or a Taylor series."""
    x, y, z = np.broadcast_arrays(np.asarray(x, float), np.asarray(y, float), np.asarray(z, float))
    gxy, gyz, gxz = np.abs(x - y), np.abs(y - z), np.abs(x - z)
    big = np.maximum(np.maximum(gxy, gyz), gxz)
    out = np.empty(x.shape, dtype=complex)
    f1 = first_divided_difference
    with np.errstate(divide="ignore", invalid="ignore"):
        # choose the two arguments farthest apart as the outer pair of the recursion
        v_xz = (f1(x, y, tau) - f1(y, z, tau)) / (x - z)
        v_xy = (f1(x, z, tau) - f1(z, y, tau)) / (x - y)
        v_yz = (f1(y, x, tau) - f1(x, z, tau)) / (y - z)
    out = np.where(gxz == big, v_xz, np.where(gxy == big, v_xy, v_yz))
    small = big * abs(tau) < _TAYLOR_BELOW
    if np.any(small):
        m = (x + y + z) / 3
        dx, dy, dz = x - m, y - m, z - m
        h2 = dx * dx + dy * dy + dz * dz + dx * dy + dx * dz + dy * dz
        it = -1j * tau
        taylor = np.exp(-1j * tau * m) * (it**2 / 2 + it**4 / 24 * h2)
        out = np.where(small, taylor, out)
    return out


def phase_sinc_tables(e, tau):
    """(P, S) for stacks of levels e (M, d) and tau scalar or (M,): P_ab = exp(-i u_ab), S_ab = sin(u_ab) / u_ab,
    u_ab = (e_a - e_b) tau / 2, both (M, d, d); then exp(i e_b tau) f[e_a, e_b] = -i tau P S and
    exp(i e_a tau) f[e_a, e_b] = -i tau conj(P) S (the first divided difference above).

    No transcendental function per entry: P is the outer product of the per-level phases exp(-i e tau / 2)
    (absolute error a few 1e-16), S = sin(u) / u = -Im(P) / u where |u| >= _SINC_SERIES_BELOW (relative error
    below ~2e-15) and the Taylor series of sin(u)/u below."""
    e = np.asarray(e, float)
    tau = np.broadcast_to(np.asarray(tau, float), e.shape[:1])[:, None]
    half = e * (tau / 2)
    h = np.exp(-1j * half)
    p = h[:, :, None] * h.conj()[:, None, :]
    u = half[:, None, :] - half[:, :, None]                     # -u: sin(u)/u = Im(P) / (-u)
    small = np.abs(u) < _SINC_SERIES_BELOW
    s = p.imag / np.where(small, 1.0, u)
    if small.any():
        z = u[small] ** 2
        s[small] = 1 + z * (-1 / 6 + z * (1 / 120 + z * (-1 / 5040 + z * (1 / 362880 + z * (-1 / 39916800
                                                                                        + z / 6227020800)))))
    return p, s
