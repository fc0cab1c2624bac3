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
fewer than MULTI_COLUMNS of them: scipy's one-vector CSR kernel costs about 0.7 ns per entry
and column, its multi-vector kernel about 3 ns per entry for 1-8 columns together (measured
at d = 184,756, 101 entries per row, float64: one column 12.9 ms; 2, 4, 8 columns 58, 60,
67 ms against 32, 55, 113 ms one at a time; float32 one column 11.3 ms). The vectors are kept
with contiguous columns (Fortran order) so the one-column calls copy nothing.

Threads: every step of the recursion is row-local except the product's input, so rows are
split into parts (RowApply, row_parts) that run on separate threads; each part computes its
rows of the next term, stores them and adds them to the outputs. scipy's CSR kernels, numpy's
element-wise operations and BLAS release the GIL (measured: 8 one-column products on two
threads 79 ms against 117 ms on one, float64; 51 against 91 ms, float32, d = 184,756).

precision="single": float32 terms, buffer and outputs (complex64); the coefficients are
rounded to float32 too. Rounding adds a relative error of order K eps_32 (eps_32 = 6e-8).

Without a derivative to bound (derivative=False, signals only) the cut drops the k^2 / (w tau)
factor: sum_{k > K} |a_k| < tol.
"""

import math

import numpy as np
from scipy.special import jv

__all__ = ["chebyshev_window", "chebyshev_terms", "lanczos_bounds", "sparse_times", "RowApply",
           "row_parts", "csr_rows", "PRECISIONS", "Workspace"]

MULTI_COLUMNS = 5
MIN_PART_ROWS = 4000
FLUSH_ROWS = 1 << 15        # rows per product when stored terms are added to the outputs
# Lanczos steps of lanczos_bounds: measured at 18 spins (sectors of 816, 18,564 and 48,620 states,
# the benchmark cluster) the Chebyshev term count at tol 1e-8 with 20 steps is that of 30 steps to
# one term (89/89, 103/102, 102/102; 10 steps: 89, 103, 104), every interval containing scipy
# eigsh's extreme eigenvalues; each step is one one-column product, a third saved.
LANCZOS_STEPS = 20
PRECISIONS = {"double": (np.float64, np.complex128), "single": (np.float32, np.complex64)}


class Workspace:
    """Named arrays kept from call to call and handed out as views (the engines' large buffers).

    An array of more than 32 MiB gets its own fresh mapping from the C allocator (glibc's largest
    mmap threshold), and every 4 KiB page of a fresh mapping is faulted in and zeroed by the kernel
    when first written: about 5 us per page on this virtual machine, 1.4 s per GiB of system time.
    The typical engine's outputs (64 time points of a sector) and the flush products are of that
    size and were allocated once per sector or per flush; measured at 20 spins (2 replicas, single
    precision, 2 threads) 5.0 GiB of page faults and 6.9 s of system time in a 27 s run. A
    Workspace keeps one buffer per name, grown when a larger one is asked for, so each page is
    faulted once per estimate instead of once per sector.
    The caller owns the lifetime: a view is valid until the same name is taken again.
    """

    def __init__(self):
        self._bufs = {}

    def take(self, name, shape, dtype, zero: bool = False):
        """A C-contiguous array of `shape` and `dtype` on the buffer `name` (zero-filled if asked)."""
        dtype = np.dtype(dtype)
        n = int(np.prod(shape, dtype=np.int64)) * dtype.itemsize
        buf = self._bufs.get(name)
        if buf is None or buf.nbytes < n:
            self._bufs.pop(name, None)
            del buf
            buf = self._bufs[name] = np.empty(max(n, 1), np.uint8)
        arr = buf[:n].view(dtype).reshape(shape)
        if zero:
            arr.fill(0)
        return arr

    def reserve(self, name, shape, dtype):
        """Grow buffer `name` to hold `shape` of `dtype` now (one allocation instead of one per
        growth when the sizes asked for rise step by step)."""
        self.take(name, shape, dtype)


def _matvec_kernel():
    """scipy's CSR kernel y += A x (sparsetools, what `mat @ x` calls), or None where it moved."""
    try:
        from scipy.sparse._sparsetools import csr_matvec
    except ImportError:  # pragma: no cover - other scipy layouts
        return None
    return csr_matvec


_CSR_MATVEC = _matvec_kernel()


def _matvec_into(mat, x, out):
    """out[:] = mat @ x for a CSR matrix and contiguous 1-D x, out of mat's dtype: written in place
    by scipy's kernel (no fresh result vector and no copy of it per product). Measured: the 20-spin
    pure-state signal 5 % faster (interleaved fresh processes); at 24 spins no gain was shown and
    the system time (13 %, page faults) did not drop, so those faults come from elsewhere."""
    if (_CSR_MATVEC is None or mat.format != "csr" or not (x.dtype == out.dtype == mat.dtype)
            or not (x.flags.c_contiguous and out.flags.c_contiguous)):
        out[:] = mat @ x
        return
    out.fill(0)
    _CSR_MATVEC(mat.shape[0], mat.shape[1], mat.indptr, mat.indices, mat.data, x, out)


def sparse_times(mat, y, out=None):
    """mat @ y for a CSR matrix and a real (d, c) array, column by column below MULTI_COLUMNS
    (the result has contiguous columns then; pass y with contiguous columns to avoid copies).
    `out`: optional (d, c) array with contiguous columns to write the result into (below
    MULTI_COLUMNS)."""
    c = y.shape[1]
    if c >= MULTI_COLUMNS:
        return mat @ y
    dt = np.result_type(mat.dtype, y.dtype)
    if out is None or out.shape != (mat.shape[0], c) or out.dtype != dt:
        out = np.empty((mat.shape[0], c), dt, order="F")
    for j in range(c):
        _matvec_into(mat, y[:, j], out[:, j])
    return out


def row_parts(d: int, threads: int, min_rows: int | None = None):
    """Rows 0..d split into at most `threads` contiguous parts of at least min_rows rows each
    (default MIN_PART_ROWS: below it a thread hand-off costs more than the part's product)."""
    min_rows = MIN_PART_ROWS if min_rows is None else min_rows
    k = max(1, min(int(threads), d // max(int(min_rows), 1)))
    edges = np.linspace(0, d, k + 1).astype(int)
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:])]


def csr_rows(mat, r0: int, r1: int):
    """Rows r0:r1 of a CSR matrix as a CSR matrix sharing its data and column indices."""
    import scipy.sparse as sps
    a, b = int(mat.indptr[r0]), int(mat.indptr[r1])
    if (r0, r1) == (0, mat.shape[0]):
        return mat
    # the constructor copies a slice smaller than half its base (scipy's pruning), so the
    # views are set directly: no second copy of the matrix
    sub = sps.csr_matrix((r1 - r0, mat.shape[1]), dtype=mat.dtype)
    sub.data, sub.indices = mat.data[a:b], mat.indices[a:b]
    sub.indptr = (mat.indptr[r0:r1 + 1] - mat.indptr[r0]).astype(mat.indptr.dtype)
    sub.has_sorted_indices = mat.has_sorted_indices
    return sub


class RowApply:
    """Y -> A @ Y by row parts. `parts` lists (r0, r1); calling with (Y, i) returns rows r0:r1 of
    A @ Y for part i. chebyshev_window runs the parts on separate threads (scipy's CSR products,
    numpy's element-wise operations and BLAS release the GIL). A plain function Y -> A @ Y is
    one part."""

    def __init__(self, mat, parts=None):
        self.parts = list(parts) if parts is not None else [(0, mat.shape[0])]
        self.mats = [csr_rows(mat, a, b) for a, b in self.parts]
        self._out = [None] * len(self.parts)

    def __call__(self, y, i):
        """Rows of part i of A @ Y, in a buffer of that part reused from call to call (the caller
        copies what it keeps before the next call; chebyshev_window does)."""
        self._out[i] = sparse_times(self.mats[i], y, self._out[i])
        return self._out[i]


TERMS_WINDOW_MAX_Z = 1e10     # chebyshev_terms: Bessel terms evaluated up to this w tau, scaled beyond


def chebyshev_terms(w_tau_max: float, tol: float, derivative: bool = True) -> int:
    """Number of terms the cut rule keeps for the largest w*tau of a window (derivative=False:
    without the k^2 / (w tau) factor).

    Only the terms from k0 = z - 20 z^(1/3) on are evaluated (z = w tau): J_k(z) turns from
    oscillation to decay within a few z^(1/3) of k = z (its Airy transition region; F. W. J. Olver,
    Phil. Trans. R. Soc. A 247, 328 (1954), from memory), so the cut lies above k0 and the terms below
    it do not enter the tails that decide it; the cost is ~32 z^(1/3) terms instead of z (a classical-
    cost estimate for w tau ~ 1e9 allocated 1e9 terms). Above TERMS_WINDOW_MAX_Z the count is scaled
    from that point as K(z) = z + (K(z1) - z1) (z / z1)^(1/3) (relative error below 1e-6 there)."""
    z = float(max(w_tau_max, 1e-300))
    if z > TERMS_WINDOW_MAX_Z:
        z1 = TERMS_WINDOW_MAX_Z
        return int(math.ceil(z + (chebyshev_terms(z1, tol, derivative) - z1) * (z / z1) ** (1 / 3)))
    kmax = int(z + 12 * max(z, 1.0) ** (1 / 3) + 60)
    k0 = max(0, int(z - 20 * max(z, 1.0) ** (1 / 3)))
    k = np.arange(k0, kmax + 1)
    a = np.abs(jv(k, z)) * np.where(k == 0, 1.0, 2.0)
    if derivative:
        a = a * (1.0 + k.astype(float) ** 2 / z)
    tail = np.cumsum(a[::-1])[::-1]          # tail[i] = sum_{j >= k0 + i} a_j
    over = np.flatnonzero(tail >= tol)
    return int(k0 + over[-1] + 1) if over.size else max(1, k0)


def chebyshev_window(apply, x0, taus, lo: float, hi: float, tol: float = 1e-10, on_term=None,
                     block: int = 16, real: bool = False, derivative: bool = True,
                     precision: str = "double", pool=None, work=None, slot: str = "out"):
    """exp(-i A tau) x0 for each offset tau in `taus` (one shared series).

    Args:
        apply: function Y -> A @ Y on real arrays of shape (d, 2M) (real=True: (d, M)), or a
            RowApply-like object (attribute `parts`, call (Y, i) -> rows of part i).
        x0: real array (d, 2M): real parts in columns [:M], imaginary parts in [M:]; with
            real=True, (d, M) real start vectors (no imaginary half).
        taus: offsets in seconds (>= 0); A in rad/s.
        lo, hi: bounds of the spectrum of A (rad/s), e.g. Gershgorin discs.
        on_term: optional callback(k) after each product with A (progress, Ctrl-C point).
        block: terms collected before they are added to the outputs in one matrix product.
        real: x0 holds real vectors only (see the module docstring).
        derivative: cut with the derivative factor (needed when A is block-triangular).
        precision: "double" or "single" (float32 vectors, terms and outputs; the caller's
            operator should then hold float32 data).
        pool: optional concurrent.futures executor that runs the row parts of `apply`.
        work, slot: optional Workspace: the outputs are a view of its buffer `slot` (valid until
            that slot is taken again), and the flush products use its buffers "flush<i>". The
            buffer of waiting terms stays a fresh array per call: held between calls it stays
            alive while the caller builds the next matrix and sums its inner products (a tried
            version that also held it and the CSR arrays peaked at 3.28 GiB at 22 spins, against
            2.61 GiB with this split).

    Returns:
        complex array (len(taus), d, M) (complex64 for precision="single").
    """
    rdt, cdt = PRECISIONS[precision]
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
    if hasattr(apply, "parts"):
        parts, rows_of = apply.parts, apply
    else:
        parts, rows_of = [(0, d)], (lambda y, i: apply(y))
    nt = taus.size
    if work is None:
        work = Workspace()
    out = work.take(slot, (nt, d, m), cdt, zero=True)
    rows = min(FLUSH_ROWS, d)
    if real:
        # out = coef^T Y with Y real: one real product of [Re coef | Im coef] (2T rows)
        coef2 = np.ascontiguousarray(np.concatenate([coef.real, coef.imag], axis=1).T, rdt)   # (2T, K)
        buf = np.empty((block, d, m), rdt)
        prods = [work.take(f"flush{i}", (2 * nt, rows * m), rdt) for i in range(len(parts))]
    else:
        coefc = np.ascontiguousarray(coef.T, cdt)                                             # (T, K)
        buf = np.empty((block, d, m), cdt)
        prods = [work.take(f"flush{i}", (nt, rows * m), cdt) for i in range(len(parts))]
    prev = np.array(x0, rdt, order="F")
    cur = np.empty_like(prev)
    c_r, w_r = rdt(c), rdt(w)

    def store(pos, y, r0, r1):
        if real:
            buf[pos, r0:r1] = y
        else:
            buf[pos, r0:r1].real = y[:, :m]
            buf[pos, r0:r1].imag = y[:, m:]

    def flush(nb, k0, r0, r1, i):
        # products into the part's own buffer (a fresh 2T x FLUSH_ROWS x M result per call would be
        # a fresh mapping each time: the Workspace docstring)
        for a in range(r0, r1, FLUSH_ROWS):
            b = min(a + FLUSH_ROWS, r1)
            terms = buf[:nb, a:b].reshape(nb, -1)
            prod = prods[i][:, :(b - a) * m]
            if real:
                np.matmul(coef2[:, k0:k0 + nb], terms, out=prod)
                prod = prod.reshape(2 * nt, b - a, m)
                out[:, a:b].real += prod[:nt]
                out[:, a:b].imag += prod[nt:]
            else:
                np.matmul(coefc[:, k0:k0 + nb], terms, out=prod)
                out[:, a:b] += prod.reshape(nt, b - a, m)

    def part(i, kk):
        r0, r1 = parts[i]
        if kk == 0:
            y = prev[r0:r1]
        elif kk == 1:
            y = rows_of(prev, i)
            y -= c_r * prev[r0:r1]
            y /= w_r
            cur[r0:r1] = y
        else:                         # T_{k+1} = 2 S T_k - T_{k-1}, written over T_{k-1}
            y = rows_of(cur, i)
            y -= c_r * cur[r0:r1]
            y *= 2 / w_r
            y -= prev[r0:r1]
            prev[r0:r1] = y
        pos = kk % block
        store(pos, y, r0, r1)
        if pos == block - 1 or kk == K - 1:
            flush(pos + 1, kk - pos, r0, r1, i)

    for kk in range(K):
        if pool is not None and len(parts) > 1:
            list(pool.map(part, range(len(parts)), [kk] * len(parts)))
        else:
            for i in range(len(parts)):
                part(i, kk)
        if kk >= 2:
            prev, cur = cur, prev
        if on_term and kk:
            on_term(kk)
    return out


def lanczos_bounds(mat, steps: int = LANCZOS_STEPS, seed: int = 0, pool=None, threads: int = 1):
    """Estimated (lo, hi) of a real symmetric matrix: extreme Ritz values of a short Lanczos run
    (C. Lanczos, J. Res. Natl. Bur. Stand. 45, 255 (1950)) widened by their residuals plus 2 %
    of the width. An estimate, not a bound: callers check the norm after propagation and fall
    back to Gershgorin bounds when it grew (a component outside [lo, hi] grows like cosh(k ...)).
    A float32 matrix is multiplied with float32 copies of the Lanczos vectors (scipy would
    otherwise convert the whole matrix to float64 at every product); the recursion stays in
    float64, and the product's rounding (~1e-7 of the norm) is far inside the 2 % margin.
    pool, threads: optional executor: the products run by row parts (row_parts) on its threads;
    every row is computed as in one product, so the result does not depend on the threads.
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
    parts = row_parts(d, threads if pool is not None else 1)
    subs = [csr_rows(mat, r0, r1) for r0, r1 in parts]
    prod = np.empty(d, mat.dtype)

    def times(x):
        if len(parts) == 1:
            return mat @ x
        xc = np.ascontiguousarray(x)
        for _ in pool.map(lambda i: _matvec_into(subs[i], xc, prod[parts[i][0]:parts[i][1]]), range(len(parts))):
            pass
        return prod

    for _ in range(min(steps, d)):
        wv = times(v.astype(mat.dtype)).astype(float) - b * v_prev
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
