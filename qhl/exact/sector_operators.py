"""Sparse operators restricted to magnetisation sectors, built from Pauli strings with bit operations.

Basis convention (as qhl.exact.sectors): basis index x holds qubit i in bit i (qiskit's
little-endian order); bit value 0 is spin up. A Pauli string with X-or-Y bits `xm`, Z-or-Y bits
`zm` and nY factors Y acts on a basis state as
    P |x> = i^nY (-1)^popcount(x & zm) |x ^ xm>
(from X|b> = |1-b>, Z|b> = (-1)^b |b>, Y = iXZ; Nielsen & Chuang, "Quantum Computation and
Quantum Information", 2000, sec. 2.1.3). Terms with the same `xm` fill the same matrix entries,
so an operator is held as groups {xm: [(zm, coefficient * i^nY)]} and a sector block is built
row by row without ever forming a 2^n x 2^n matrix.

Sectors here are lean: a sector is the list of basis indices with the same number of down spins
(bits set) per isotope (the same sectors as qhl.exact.sectors, found with popcounts instead of a 2^n x n
bit table, so n = 26 needs 2^n small integers, not 2^n * n).
"""

import itertools

import numpy as np
import scipy.sparse as sps

from ..base.errors import QhlInputError

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


def sector_matrix(space: SectorSpace, k: int, groups: dict, states=None, tol: float = 0.0,
                  bounds: bool = False, dtype=np.float64):
    """The block of the operator `groups` on sector k as a real CSR matrix (int32 indices).

    With bounds=True also returns the Gershgorin bounds (lo, hi) of its spectrum:
    min/max over rows of H_yy -/+ sum_{x != y} |H_yx| (S. Gershgorin, 1931; Horn and Johnson,
    "Matrix Analysis", 2nd ed., 2013, thm. 6.1.1).

    Raises QhlInputError when the operator is complex or connects sector k to another sector.
    Two passes over the groups (count, then fill) keep the peak memory at the CSR itself.
    dtype: of the stored entries (np.float32 halves the data; the bounds are computed in double).
    """
    st = space.states(k) if states is None else states
    d = st.size
    lut = space.rank_table()
    key = space.label_key(space.labels[k]) if space.masks else 0
    counts = np.zeros(d, np.int64)
    keep_of = {}
    for xm, terms in groups.items():
        cols, val = _group_values(st, xm, terms)
        if np.iscomplexobj(val):
            if np.any(np.abs(val.imag) > 1e-12 * max(1.0, float(np.max(np.abs(val))))):
                raise QhlInputError("the typical engine needs a real Hamiltonian (no y-axis terms)",
                                    key="hamiltonian")
            val = val.real
        keep = np.abs(val) > tol
        if space.masks and xm:
            inside = space.key_of(cols[keep]) == key
            if not np.all(inside):
                raise QhlInputError("a term connects different magnetisation sectors", key="hamiltonian")
        counts += keep
        keep_of[xm] = np.packbits(keep)
    indptr = np.zeros(d + 1, np.int64)
    np.cumsum(counts, out=indptr[1:])
    del counts
    nnz = int(indptr[-1])
    idx_dtype = np.int32 if nnz < 2**31 else np.int64
    indptr = indptr.astype(idx_dtype)
    indices = np.empty(nnz, idx_dtype)
    data = np.empty(nnz, dtype)
    fill = indptr[:-1].astype(np.int64)
    diag = np.zeros(d) if bounds else None
    offabs = np.zeros(d) if bounds else None
    for xm in list(keep_of):
        terms = groups[xm]
        rows = np.flatnonzero(np.unpackbits(keep_of.pop(xm), count=d))
        cols, val = _group_values(st[rows], xm, terms)
        val = np.real(val)
        pos = fill[rows]
        indices[pos] = lut[cols]
        data[pos] = val
        fill[rows] += 1
        if bounds:
            if xm == 0:
                diag[rows] = val
            else:
                offabs[rows] += np.abs(val)
    mat = sps.csr_matrix((data, indices, indptr), shape=(d, d))
    mat.sort_indices()                      # in place; sorted columns make the products faster
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
