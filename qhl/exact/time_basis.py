"""Windowed low-rank bases of the time tables exp(i E_b t) of one sector.

For energies E_b (ascending, rad/s) and times t_1..t_T the real table X = [cos(E t) | sin(E t)]
(d x 2T) is split into W windows of consecutive levels; the rows of each window are replaced by
their truncated singular value decomposition (Eckart-Young: the best rank-r approximation in the
2-norm, error s_(r+1); G. H. Golub and C. F. Van Loan, "Matrix Computations", 4th ed., 2013,
thm. 2.4.8):
    X[w] ~ U[w, J_w] B[J_w],   U orthonormal columns (zero outside the window), B = S Vh,
keeping the singular values above rtol * sqrt(T) (each row of X has norm sqrt(T), so every row
keeps a relative 2-norm error below about rtol). A window of levels spread over an energy
width D needs about D t_max / pi + O(log(1/rtol)) terms (the time-bandwidth product; exp(i E t)
is entire in E), so narrow windows need few terms each, while the total count grows with W.

The gradient (qhl.exact.engine, ExactEngine._gradient_basis) pays for a basis of sector p in two
ways: products R_w diag(u_j) R_w^T over the window's columns (cost ~ d_s^2 nnz(U) / 2) and
contractions of every parameter's eigen-generator with them (cost ~ P d_s^2 J). plan_basis
picks W from WINDOW_CHOICES by that model, the ranks estimated from the eigenvalues of each
window's Gram matrix at a subsample of the times (cheaper than the SVD; only for the choice).
"""

import numpy as np
import scipy.linalg as sla

__all__ = ["TimeBasis", "BasisPlan", "plan_basis", "time_basis", "WINDOW_CHOICES", "PRODUCT_RATE", "CONTRACT_RATE", "GEMM_RATE",
           "CALL_SECONDS"]

WINDOW_CHOICES = (1, 2, 4, 8, 16)
# relative speeds measured on one core (float32, d ~ 900, this machine): symmetric rank-k products
# d^2 k / t ~ 75e9 (that is, flops counted as for a full product), batched contractions and
# general products 2 m n k / t ~ 50e9 and 100e9
PRODUCT_RATE, CONTRACT_RATE, GEMM_RATE = 75e9, 50e9, 100e9
_NOISE = 8 * np.finfo(float).eps      # singular values below this times the largest are rounding noise
CALL_SECONDS = 2e-4         # fixed cost of one product R diag(u) R^T (measured at d = 252: 0.27 ms)
_ESTIMATE_POINTS = 96       # time points (a subsample) for the rank estimates of plan_basis


class TimeBasis:
    """U (d, J) float64 with orthonormal windowed columns, B (J, 2T) float64 with X ~ U B, and per
    column j the level range [lo_j, hi_j) of its window."""

    def __init__(self, u, b, lo, hi):
        self.u, self.b, self.lo, self.hi = u, b, lo, hi

    @property
    def size(self):
        return self.u.shape[1]

    @property
    def nnz(self):
        """Stored entries of U (rows of each column's window)."""
        return int(np.sum(self.hi - self.lo))

    def windows(self):
        """(lo, hi, first column, end column) per window."""
        starts = np.flatnonzero(np.diff(self.lo, prepend=-1))
        ends = np.append(starts[1:], self.size)
        return [(int(self.lo[a]), int(self.hi[a]), int(a), int(b)) for a, b in zip(starts, ends)]


def _table(e, t):
    ph = np.outer(e, t)
    return np.concatenate([np.cos(ph), np.sin(ph)], axis=1)


def _edges(d, w):
    return np.linspace(0, d, w + 1).round().astype(int)


def _rank_estimate(x, cut2):
    """Number of squared singular values of x above cut2 (eigenvalues of the smaller Gram matrix)."""
    g = x @ x.T if x.shape[0] <= x.shape[1] else x.T @ x
    ev = sla.eigvalsh(g)
    return int(np.count_nonzero(ev > max(cut2, 1e-13 * ev[-1]))) if ev.size else 0


class BasisPlan:
    """The chosen window count and the estimated nnz(U) and column count of a sector's basis."""

    def __init__(self, windows, nnz, size):
        self.windows, self.nnz, self.size = windows, nnz, size


def plan_basis(e, t, rtol, n_params):
    """BasisPlan with the window count W (of WINDOW_CHOICES, at most d) of lowest modelled cost."""
    d = len(e)
    ts = t[::max(1, t.size // _ESTIMATE_POINTS)]      # the ranks depend on E t_max, not on T
    x = _table(e, ts)
    cut2 = (rtol**2) * ts.size
    best, best_cost = None, np.inf
    for w in WINDOW_CHOICES:
        if w > d:
            break
        edges = _edges(d, w)
        ranks = [max(1, min(_rank_estimate(x[a:b], cut2), b - a)) for a, b in zip(edges[:-1], edges[1:])]
        nnz = sum(r * (b - a) for r, a, b in zip(ranks, edges[:-1], edges[1:]))
        cost = nnz / PRODUCT_RATE + 2 * n_params * sum(ranks) / CONTRACT_RATE + CALL_SECONDS * sum(ranks) / (d * d)
        if cost < best_cost:
            best, best_cost = BasisPlan(w, nnz, sum(ranks)), cost
    return best


def time_basis(e, t, rtol, n_params=None, windows=None):
    """TimeBasis of the levels e (ascending) at times t (module docstring), with `windows` windows
    (default: plan_basis's choice for n_params parameters)."""
    d = len(e)
    x = _table(e, t)
    w = windows if windows is not None else plan_basis(e, t, rtol, n_params).windows
    edges = _edges(d, w)
    us, bs, lo, hi = [], [], [], []
    cut = rtol * np.sqrt(t.size)
    for a, b in zip(edges[:-1], edges[1:]):
        if b <= a:
            continue
        uu, s, vh = sla.svd(x[a:b], full_matrices=False, lapack_driver="gesdd")
        r = max(1, int(np.count_nonzero(s > max(cut, _NOISE * s[0]))))
        col = np.zeros((d, r))
        col[a:b] = uu[:, :r]
        us.append(col)
        bs.append(s[:r, None] * vh[:r])
        lo += [a] * r
        hi += [b] * r
    return TimeBasis(np.concatenate(us, axis=1), np.concatenate(bs, axis=0), np.array(lo), np.array(hi))
