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
product is a real sparse-times-dense product (no complex copy of the matrix). A real start
vector needs no imaginary half at all: T_k(S) x0 stays real, only the coefficients a_k are
complex (real=True; half the columns). Columns are multiplied one at a time when there are
fewer than MULTI_COLUMNS of them (scipy's one-vector CSR kernel is faster per column than its
multi-vector one for so few columns: measured 10.8 ms per column against 16 ms per column for
two, d = 48,620, 82 entries per row).

Without a derivative to bound (derivative=False, signals only) the cut drops the k^2 / (w tau)
factor: sum_{k > K} |a_k| < tol.
"""

import numpy as np
from scipy.special import jv

__all__ = ["chebyshev_window", "chebyshev_terms", "lanczos_bounds", "sparse_times"]

MULTI_COLUMNS = 4


def sparse_times(mat, y):
    """mat @ y for a CSR matrix and a real (d, c) array, column by column below MULTI_COLUMNS."""
    c = y.shape[1]
    if c >= MULTI_COLUMNS:
        return mat @ y
    out = np.empty((mat.shape[0], c), np.result_type(mat.dtype, y.dtype))
    for j in range(c):
        out[:, j] = mat @ np.ascontiguousarray(y[:, j])
    return out


def chebyshev_terms(w_tau_max: float, tol: float, derivative: bool = True) -> int:
    """Number of terms the cut rule keeps for the largest w*tau of a window (derivative=False:
    without the k^2 / (w tau) factor)."""
    z = float(max(w_tau_max, 1e-300))
    kmax = int(z + 12 * max(z, 1.0) ** (1 / 3) + 60)
    k = np.arange(kmax + 1)
    a = np.abs(jv(k, z)) * np.where(k == 0, 1.0, 2.0)
    if derivative:
        a = a * (1.0 + k.astype(float) ** 2 / z)
    tail = np.cumsum(a[::-1])[::-1]          # tail[k] = sum_{j >= k} a_j
    over = np.flatnonzero(tail >= tol)
    return int(over[-1] + 1) if over.size else 1


def chebyshev_window(apply, x0, taus, lo: float, hi: float, tol: float = 1e-10, on_term=None,
                     block: int = 16, real: bool = False, derivative: bool = True):
    """exp(-i A tau) x0 for each offset tau in `taus` (one shared series).

    Args:
        apply: function Y -> A @ Y on real arrays of shape (d, 2M) (real=True: (d, M)).
        x0: real array (d, 2M): real parts in columns [:M], imaginary parts in [M:]; with
            real=True, (d, M) real start vectors (no imaginary half).
        taus: offsets in seconds (>= 0); A in rad/s.
        lo, hi: bounds of the spectrum of A (rad/s), e.g. Gershgorin discs.
        on_term: optional callback(k) after each product with A (progress, Ctrl-C point).
        block: terms collected before they are added to the outputs in one matrix product.
        real: x0 holds real vectors only (see the module docstring).
        derivative: cut with the derivative factor (needed when A is block-triangular).

    Returns:
        complex array (len(taus), d, M).
    """
    taus = np.asarray(taus, float)
    d, two_m = x0.shape
    m = two_m if real else two_m // 2
    c = 0.5 * (hi + lo)
    tmax = float(taus.max(initial=0.0))
    w = max(0.5 * (hi - lo), 1e-3 / tmax if tmax > 0 else 1.0)
    K = chebyshev_terms(w * tmax, tol, derivative)
    k = np.arange(K)
    coef = jv(k[:, None], w * taus[None, :]) * ((-1j) ** k)[:, None]
    coef[1:] *= 2.0
    coef *= np.exp(-1j * c * taus)[None, :]
    block = max(1, min(int(block), K))
    if real:
        # out = coef^T Y with Y real: one real product of [Re coef | Im coef] (2T rows)
        acc = np.zeros((2 * taus.size, d * m))
        coef2 = np.concatenate([coef.real, coef.imag], axis=1)
        buf = np.empty((block, d, m))
    else:
        out = np.zeros((taus.size, d * m), complex)
        buf = np.empty((block, d, m), complex)
    state = {"n": 0, "k0": 0}

    def add(y):
        if real:
            buf[state["n"]] = y
        else:
            buf[state["n"]].real = y[:, :m]
            buf[state["n"]].imag = y[:, m:]
        state["n"] += 1
        if state["n"] == block:
            flush()

    def flush():
        nb, k0 = state["n"], state["k0"]
        if nb and real:
            acc[:] += coef2[k0:k0 + nb].T @ buf[:nb].reshape(nb, -1)
        elif nb:
            out[:] += coef[k0:k0 + nb].T @ buf[:nb].reshape(nb, -1)
        state["k0"] += nb
        state["n"] = 0

    def step(y, prev):
        z = apply(y)
        z -= c * y
        z *= 2.0 / w
        z -= prev
        return z

    prev = x0
    add(prev)
    if K > 1:
        cur = apply(prev)
        cur -= c * prev
        cur /= w
        add(cur)
        if on_term:
            on_term(1)
        for kk in range(2, K):
            prev, cur = cur, step(cur, prev)
            add(cur)
            if on_term:
                on_term(kk)
    flush()
    if real:
        out = np.empty((taus.size, d * m), complex)
        out.real = acc[:taus.size]
        out.imag = acc[taus.size:]
        del acc
    return out.reshape(taus.size, d, m)


def lanczos_bounds(mat, steps: int = 30, seed: int = 0):
    """Estimated (lo, hi) of a real symmetric matrix: extreme Ritz values of a short Lanczos run
    (C. Lanczos, J. Res. Natl. Bur. Stand. 45, 255 (1950)) widened by their residuals plus 2 %
    of the width. An estimate, not a bound: callers check the norm after propagation and fall
    back to Gershgorin bounds when it grew (a component outside [lo, hi] grows like cosh(k ...)).
    """
    d = mat.shape[0]
    if d <= 2:
        e = np.linalg.eigvalsh(mat.toarray()) if d else np.zeros(1)
        return float(e[0]), float(e[-1])
    rng = np.random.default_rng(seed)
    v = rng.standard_normal(d)
    v /= np.linalg.norm(v)
    v_prev = np.zeros(d)
    alpha, beta = [], []
    b = 0.0
    for _ in range(min(steps, d)):
        wv = mat @ v - b * v_prev
        a = float(v @ wv)
        wv -= a * v
        alpha.append(a)
        b = float(np.linalg.norm(wv))
        beta.append(b)
        if b < 1e-12 * max(1.0, abs(a)):
            break
        v_prev, v = v, wv / b
    t = np.diag(alpha) + np.diag(beta[:-1], 1) + np.diag(beta[:-1], -1)
    e, vec = np.linalg.eigh(t)
    res = abs(beta[-1]) * np.abs(vec[-1])
    lo, hi = e[0] - res[0], e[-1] + res[-1]
    pad = 0.02 * (hi - lo)
    return float(lo - pad), float(hi + pad)
