"""Sparse operators restricted to magnetisation sectors, built from Pauli strings with bit operations.

Basis convention (as qhl.exact.sectors): basis index x holds qubit i in bit i (qiskit's
little-endian order); bit value 0 is spin up. A Pauli string with X-or-Y bits `xm`, Z-or-Y bits
`zm` and nY factors Y acts on a basis state as
    P |x> = i^nY (-1)^popcount(x & zm) |x ^ xm>
(from X|b> = |1-b>, Z|b> = (-1)^b |b>, Y = iXZ; Nielsen & Chuang, "Quantum Computation and
Quantum Information", 2000, sec. 2.1.3). Terms with the same `xm` fill the same matrix entries,
so an operator is held as groups {xm: [(zm, coefficient * i^nY)]} and a sector block is built
over blocks of rows without ever forming a 2^n x 2^n matrix. A group's value on row y depends
only on y's bits in S = xm | (its zm's), so for |S| <= TABLE_BITS it is a lookup in a table of
2^|S| values; the diagonal (Z strings of at most two qubits) is c0 + z.h + z^T C z with
z_i = (-1)^bit_i (measured: the 20-spin central sector, 18.7 M entries, built 1.3-1.7x faster
than group by group with popcounts, the 18-spin one 1.7x).

Sectors here are lean: a sector is the list of basis indices with the same number of down spins
(bits set) per isotope (the same sectors as qhl.exact.sectors, found with popcounts instead of a 2^n x n
bit table, so n = 26 needs 2^n small integers, not 2^n * n).
"""

import itertools

import numpy as np
import scipy.sparse as sps

from ..base.errors import QhlInputError
from .chebyshev import csr_rows, row_parts

__all__ = ["SectorSpace", "pauli_groups", "sector_matrix", "ladder_block", "csr_bytes"]


def _isotope_masks(isotopes):
    groups = {}
    for i, iso in enumerate(isotopes):
        groups.setdefault(iso, []).append(i)
    return [sum(1 << i for i in g) for g in groups.values()], [len(g) for g in groups.values()]


class SectorSpace:
    """Magnetisation sectors of n spins: labels, dimensions and basis indices on demand.

    Args:
        isotopes: isotope symbol per spin.
        conserving: False puts the whole space in one sector (for terms that mix sectors).

    Attributes:
        labels: tuple of down-counts (bits set) per isotope group, one per sector (sorted).
        dims: dimension of each sector.
    """

    def __init__(self, isotopes, conserving: bool = True):
        self.n = len(isotopes)
        if conserving:
            self.masks, sizes = _isotope_masks(isotopes)
        else:
            self.masks, sizes = [], []
        self.labels = list(itertools.product(*[range(s + 1) for s in sizes]))
        from math import comb
        self.dims = [int(np.prod([comb(s, k) for s, k in zip(sizes, lab)])) if lab else 2**self.n
                     for lab in self.labels]
        self._key = None
        self._lut = None

    def _stride(self):
        out, acc = [], 1
        for m in self.masks:
            out.append(acc)
            acc *= bin(m).count("1") + 1
        return out

    def key_of(self, states):
        """Sector key (an integer) of each basis index in `states`."""
        states = np.asarray(states)
        key = np.zeros(states.shape, np.int32)
        for m, s in zip(self.masks, self._stride()):
            key += s * np.bitwise_count(states & m).astype(np.int32)
        return key

    def label_key(self, label) -> int:
        return int(sum(s * k for s, k in zip(self._stride(), label)))

    def keys(self):
        """Sector key of every basis index (2^n int32, built once)."""
        if self._key is None:
            self._key = self.key_of(np.arange(2**self.n, dtype=np.int64))
        return self._key

    def states(self, k: int) -> np.ndarray:
        """Basis indices (ascending, int64) of sector number k."""
        if not self.masks:
            return np.arange(2**self.n, dtype=np.int64)
        return np.flatnonzero(self.keys() == self.label_key(self.labels[k])).astype(np.int64)

    def rank_table(self) -> np.ndarray:
        """rank[x] = position of basis index x inside its own sector (2^n int32)."""
        if self._lut is None:
            lut = np.empty(2**self.n, np.int32)
            for k in range(len(self.labels)):
                st = self.states(k)
                lut[st] = np.arange(st.size, dtype=np.int32)
            self._lut = lut
        return self._lut

    def index_bytes(self) -> float:
        """Memory of the key and rank tables (bytes)."""
        return 8.0 * 2**self.n


def pauli_groups(op, scale: float = 1.0) -> dict:
    """{xm: [(zm, complex coefficient * i^nY * scale), ...]} of a SparsePauliOp."""
    labels = op.paulis.to_labels()
    groups = {}
    for lab, c in zip(labels, op.coeffs):
        if c == 0:
            continue
        if lab[0] in "-i":
            raise QhlInputError(f"Pauli label with a phase prefix: {lab}", key="operator")
        xm = zm = ny = 0
        for q, ch in enumerate(reversed(lab)):
            if ch in "XY":
                xm |= 1 << q
            if ch in "ZY":
                zm |= 1 << q
            ny += ch == "Y"
        groups.setdefault(xm, []).append((zm, complex(c) * (1j**ny) * scale))
    return groups


def _group_values(states, xm, terms):
    """Matrix elements <y| sum_terms |y ^ xm> for rows y = `states` (complex or real array)."""
    cols = states ^ xm
    val = None
    for zm, c in terms:
        sign = 1.0 - 2.0 * (np.bitwise_count(cols & zm) & 1)
        part = c.real * sign if c.imag == 0 else c * sign
        val = part if val is None else val + part
    return cols, val


TABLE_BITS = 4          # groups whose values depend on at most this many bits use a lookup table


def _group_table(xm, terms):
    """(bit positions S, values over the 2^|S| patterns of those bits) when every term's Z bits
    lie in S = xm | zm...: then <y ^ xm| terms |y> depends on y's bits in S only (the sign
    (-1)^popcount((y ^ xm) & zm) does). None when |S| > TABLE_BITS."""
    smask = xm
    for zm, _ in terms:
        smask |= zm
    bits = [b for b in range(smask.bit_length()) if smask >> b & 1]
    if len(bits) > TABLE_BITS:
        return None
    table = np.zeros(1 << len(bits), complex)
    for p in range(table.size):
        y = sum(((p >> i) & 1) << b for i, b in enumerate(bits))
        table[p] = sum(c * (1 - 2 * (bin((y ^ xm) & zm).count("1") & 1)) for zm, c in terms)
    return bits, table


def _diagonal_form(terms, n):
    """(c0, h (n,), C (n, n)) with <y| sum_terms |y> = c0 + z.h + z^T C z, z_i = (-1)^bit_i(y), for
    real Z terms of at most two qubits (C symmetric, zero diagonal), or None otherwise."""
    c0, h1, cc = 0.0, np.zeros(n), np.zeros((n, n))
    for zm, c in terms:
        q = [b for b in range(n) if zm >> b & 1]
        if c.imag != 0 or len(q) > 2:
            return None
        if not q:
            c0 += c.real
        elif len(q) == 1:
            h1[q[0]] += c.real
        else:
            cc[q[0], q[1]] += 0.5 * c.real
            cc[q[1], q[0]] += 0.5 * c.real
    return c0, h1, cc


def _diagonal_values(states, form, n):
    """The diagonal c0 + z.h + z^T C z of the rows `states` (dense products; _diagonal_form)."""
    c0, h1, cc = form
    z = 1.0 - 2.0 * ((states[:, None] >> np.arange(n, dtype=states.dtype)) & 1)
    return c0 + z @ h1 + np.einsum("ri,ri->r", z @ cc, z)


def _real_values(val):
    if np.iscomplexobj(val):
        if np.any(np.abs(val.imag) > 1e-12 * max(1.0, float(np.max(np.abs(val), initial=0.0)))):
            raise QhlInputError("the typical engine needs a real Hamiltonian (no y-axis terms)",
                                key="hamiltonian")
        val = val.real
    return val


def _flip_leaves(space, bits, xm, p):
    """True when flipping xm on pattern p (bits S) changes some isotope's down count."""
    y = sum(((p >> i) & 1) << b for i, b in enumerate(bits))
    return any(bin((y ^ xm) & m).count("1") != bin(y & m).count("1") for m in space.masks)


class _BuildPlan:
    """How sector_matrix evaluates the groups of one operator on blocks of rows.

    Column 0 (when present) is the diagonal: a quadratic form in z_i = +-1 (Z strings of at most
    two qubits). Groups whose values depend on at most TABLE_BITS bits (_group_table: offsets,
    Ising, flip-flop and the other NMR terms) are looked up in one flat table per block of rows,
    at offset(group) + sum_i bit_(S_i)(y) 2^i (bits shifted out of y for all groups at once;
    unused slots of S point at bit 62, always 0). Any other group is evaluated term by term with
    popcounts (_group_values). Tables are real-checked once, when the plan is made."""

    def __init__(self, space, groups, tol):
        n = space.n
        self.space, self.tol, self.n = space, tol, n
        self.diag_form = None
        self.generic = []                       # [(xm, terms)]
        tabled = []                             # [(xm, bits, table)]
        for xm, terms in groups.items():
            if xm == 0:
                self.diag_form = _diagonal_form(terms, n)
                if self.diag_form is not None:
                    continue
            tab = None if xm == 0 else _group_table(xm, terms)
            if tab is None:
                self.generic.append((xm, terms))
            else:
                tabled.append((xm, tab[0], _real_values(tab[1])))
        self.width = max([len(b) for _, b, _ in tabled], default=0)
        g = len(tabled)
        self.sel = np.full((max(self.width, 1), g), 62, np.int64)       # bit 62: always zero
        flat, leave = [], []
        self.offset = np.arange(g, dtype=np.int64) << self.width     # every table padded to 2^width
        for j, (xm, bits, table) in enumerate(tabled):
            self.sel[:len(bits), j] = bits
            full = np.zeros(1 << self.width)
            full[:table.size] = table
            flat.append(full)
            leave.append([bool(space.masks) and abs(full[p]) > tol and p < table.size
                          and _flip_leaves(space, bits, xm, p) for p in range(full.size)])
        self.table = np.concatenate(flat) if flat else np.zeros(0)
        self.leave_table = np.array(sum(leave, []), bool) if leave else np.zeros(0, bool)
        self.any_leave = bool(self.leave_table.any())
        n_diag = 1 if self.diag_form is not None else 0
        self.xm = np.array([0] * n_diag + [xm for xm, _ in self.generic] + [xm for xm, _, _ in tabled], np.int64)
        self.first_table = n_diag + len(self.generic)
        self.n_diag = n_diag

    def rows_per_block(self):
        # blocks of about 2^17 values (1 MiB arrays): larger temporaries cost page faults on
        # every fresh allocation (measured 6 ns per value at 2^17 against 36 ns at 2^19, 18 spins)
        return int(max(64, (1 << 17) // max(self.xm.size, 1)))

    def evaluate(self, y, key):
        """(values (B, G), kept (B, G)) for the rows y (basis indices) of one block."""
        g0 = self.first_table
        vals = np.empty((y.size, self.xm.size))
        if self.n_diag:
            vals[:, 0] = _diagonal_values(y, self.diag_form, self.n)
        for j, (xm, terms) in enumerate(self.generic):
            cols, val = _group_values(y, xm, terms)
            val = _real_values(val)
            vals[:, self.n_diag + j] = val
            if self.space.masks and xm:
                keep = np.abs(val) > self.tol
                if not np.all(self.space.key_of(cols[keep]) == key):
                    raise QhlInputError("a term connects different magnetisation sectors", key="hamiltonian")
        if self.xm.size > g0:
            yc = y[:, None]
            idx = np.right_shift(yc, self.sel[0])
            idx &= 1
            tmp = np.empty_like(idx)
            for i in range(1, self.width):
                np.right_shift(yc, self.sel[i], out=tmp)
                tmp &= 1
                tmp <<= i
                idx |= tmp
            del tmp
            idx += self.offset
            vals[:, g0:] = self.table.take(idx)
            if self.any_leave and np.any(self.leave_table.take(idx)):
                raise QhlInputError("a term connects different magnetisation sectors", key="hamiltonian")
        kept = np.abs(vals) > self.tol
        return vals, kept


def _each(pool, fn, items):
    """fn(item) for every item, on the pool's threads when one is given (results discarded)."""
    for _ in (map(fn, items) if pool is None else pool.map(fn, items)):
        pass


def sector_matrix(space: SectorSpace, k: int, groups: dict, states=None, tol: float = 0.0,
                  bounds: bool = False, dtype=np.float64, pool=None, threads: int = 1, sort: bool = True):
    """The block of the operator `groups` on sector k as a real CSR matrix (int32 indices).

    With bounds=True also returns the Gershgorin bounds (lo, hi) of its spectrum:
    min/max over rows of H_yy -/+ sum_{x != y} |H_yx| (S. Gershgorin, 1931; Horn and Johnson,
    "Matrix Analysis", 2nd ed., 2013, thm. 6.1.1).

    Raises QhlInputError when the operator is complex or connects sector k to another sector.
    Two passes over blocks of rows (count the entries of every row, then fill the CSR block by
    block, contiguously) keep the peak memory at the CSR itself plus one block; the values come
    from _BuildPlan (lookup tables over the few bits a group depends on, the diagonal as a
    quadratic form), checked against qiskit's dense matrices in the tests.
    dtype: of the stored entries (np.float32 halves the data; the bounds are computed in double).
    pool, threads: optional concurrent.futures executor and its thread count: the blocks of both
    passes and the sorting of the column indices (by `threads` row parts) run on its threads (numpy's operations on the blocks and scipy's
    sort release the GIL; every block writes its own rows, so the matrix is the same).
    sort: sort the column indices of every row (scipy's canonical form). The products do not need
    it: measured at 20 and 22 spins (middle sector, float32, two columns) rows in random order
    multiply in the same time as sorted ones (29-32 ms against 30-32 ms; 191-206 ms against
    193-199 ms), while the sort was 23 % of the build; the typical engine passes sort=False.
    """
    st = space.states(k) if states is None else states
    d = st.size
    lut = space.rank_table()
    key = space.label_key(space.labels[k]) if space.masks else 0
    plan = _BuildPlan(space, groups, tol)
    step = plan.rows_per_block()
    starts = range(0, d, step)
    counts = np.zeros(d, np.int64)

    def count(a):
        counts[a:a + step] = plan.evaluate(st[a:a + step], key)[1].sum(axis=1)
    _each(pool, count, starts)
    indptr = np.zeros(d + 1, np.int64)
    np.cumsum(counts, out=indptr[1:])
    del counts
    nnz = int(indptr[-1])
    idx_dtype = np.int32 if nnz < 2**31 else np.int64
    indices = np.empty(nnz, idx_dtype)
    data = np.empty(nnz, dtype)
    diag = np.zeros(d) if bounds else None
    offabs = np.zeros(d) if bounds else None

    def fill(a):
        y = st[a:a + step]
        vals, kept = plan.evaluate(y, key)
        flat = np.flatnonzero(kept)             # row-major: the block's entries in CSR order
        r, g = np.divmod(flat, plan.xm.size)
        lo, hi = int(indptr[a]), int(indptr[a + y.size])
        indices[lo:hi] = lut.take(y.take(r) ^ plan.xm.take(g))
        data[lo:hi] = vals.ravel().take(flat)
        if bounds:
            if plan.n_diag:
                diag[a:a + y.size] = vals[:, 0]
            offabs[a:a + y.size] = np.where(kept[:, plan.n_diag:], np.abs(vals[:, plan.n_diag:]), 0.0).sum(axis=1)
    _each(pool, fill, starts)
    mat = sps.csr_matrix((data, indices, indptr.astype(idx_dtype)), shape=(d, d))
    # sorted columns make the products faster; in place, by row parts on the pool's threads
    parts = row_parts(d, threads if pool is not None else 1)
    if not sort:
        mat.has_sorted_indices = False
    elif len(parts) > 1:
        _each(pool, lambda p: csr_rows(mat, *p).sort_indices(), parts)
        mat.has_sorted_indices = True
    else:
        mat.sort_indices()
    if not bounds:
        return mat
    lo = float(np.min(diag - offabs)) if d else 0.0
    hi = float(np.max(diag + offabs)) if d else 0.0
    return mat, lo, hi


def ladder_block(space: SectorSpace, row_k: int, col_k: int, qubits, raising: bool,
                 row_states=None, col_states=None):
    """sum_{i in qubits} I+_i (raising) or I-_i restricted to sector col_k -> sector row_k (CSR).

    I+ = |0><1| (spin down -> up), I- = |1><0|; both are real 0/1 matrices.
    """
    cs = space.states(col_k) if col_states is None else col_states
    rs = space.states(row_k) if row_states is None else row_states
    lut = space.rank_table()
    rkey = space.label_key(space.labels[row_k]) if space.masks else 0
    rows_all, cols_all = [], []
    for q in qubits:
        bit = 1 << q
        sel = np.flatnonzero((cs & bit) != 0) if raising else np.flatnonzero((cs & bit) == 0)
        tgt = cs[sel] ^ bit
        if space.masks:
            ok = space.key_of(tgt) == rkey
            sel, tgt = sel[ok], tgt[ok]
        rows_all.append(lut[tgt])
        cols_all.append(sel)
    rows = np.concatenate(rows_all) if rows_all else np.zeros(0, np.int64)
    cols = np.concatenate(cols_all) if cols_all else np.zeros(0, np.int64)
    m = sps.coo_matrix((np.ones(rows.size), (rows, cols)), shape=(rs.size, cs.size)).tocsr()
    m.sum_duplicates()
    return m


def csr_bytes(nnz: float, rows: float, item: float = 8.0) -> float:
    """Memory of a CSR matrix with `item`-byte data (8: float64) and int32 indices."""
    return (item + 4.0) * nnz + 4.0 * (rows + 1)
