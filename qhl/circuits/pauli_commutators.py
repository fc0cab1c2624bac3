"""Commutator sums of Pauli-term Hamiltonians in the symplectic (x|z bit) representation.

Convention. A Hermitian Pauli string is stored as two bit rows x, z (qubit i in bit i, packed into
uint64 words), per qubit P = i^(x z) X^x Z^z (so x = z = 1 is Y). Two strings anticommute iff
the symplectic product sum_i (x_a z_b + z_a x_b) is odd; then [A, B] = 2 A B, and
    A B = i^k C,   k = |x_a & z_a| + |x_b & z_b| + 2 |z_a & x_b| - |x_c & z_c|   (mod 4),
with x_c = x_a ^ x_b, z_c = z_a ^ z_b (from X Z = -i Y per qubit; |.| counts set bits). Commuting
strings give [A, B] = 0. Only strings that share a qubit can anticommute, so candidate pairs come
from the qubit-incidence matrix (scipy.sparse), never from all pairs or from dense matrices.
(Symplectic representation: Dehaene and De Moor, Phys. Rev. A 68, 042318 (2003).)

Sums (H = sum_g H_g in product order, T_g = sum_{g' > g} H_g'; Childs, Su, Tran, Wiebe, Zhu,
Phys. Rev. X 11, 011020 (2021), the first- and second-order bounds):
    alpha_1 = 1/2  sum_g ||[T_g, H_g]||
    alpha_2 = 1/12 sum_g ||[T_g, [T_g, H_g]]|| + 1/24 sum_g ||[H_g, [H_g, T_g]]||
and, for the time quadrature of inserted Paulis P (qhl.costing.fault_tolerant),
    c1 = max_P ||[H, P]||,  c2 = max_P ||[H, [H, P]]||.
Norms here are Pauli-coefficient 1-norms (an upper bound on the spectral norm, ||P|| = 1).

Two methods:
    'pauli-1-norm'   the exact 1-norm of each commutator after combining equal strings (the same
                     number a SparsePauliOp computation gives); used while the number of products
                     stays below `max_products`;
    'locality-bound' the triangle inequality on the innermost level and, for the outer level,
                     ||[A, K]|| <= 2 ||K||_1 Lambda(supp K) with Lambda(S) = sum over qubits u in S
                     of Lambda_u, Lambda_u the 1-norm of all terms touching u, and
                     supp(q h) within supp(q) + supp(h). Always >= the first method; its cost grows
                     with the number of anticommuting pairs (about L times the terms per qubit).
"""

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from qiskit.quantum_info import SparsePauliOp

__all__ = ["PauliArrays", "pauli_arrays", "shared_qubit_pairs", "anticommuting", "product_phase",
           "trotter_prefactor", "quadrature_norms", "METHODS", "DEFAULT_MAX_PRODUCTS", "QUADRATURE_MAX_PRODUCTS"]

METHODS = ("pauli-1-norm", "locality-bound")
DEFAULT_MAX_PRODUCTS = 3e7
QUADRATURE_MAX_PRODUCTS = 3e6
_CHUNK = 1 << 20          # candidate pairs handled at once
_DROP_RTOL = 1e-12        # combined coefficients below this (relative) count as zero


@dataclass
class PauliArrays:
    """Pauli terms as packed bits.

    Attributes:
        x, z: (L, W) uint64 bit rows.
        coeffs: (L,) complex coefficients of the Hermitian strings.
        group: (L,) int group index of each term (0 when not grouped).
        n_qubits: number of qubits.
    """

    x: np.ndarray
    z: np.ndarray
    coeffs: np.ndarray
    group: np.ndarray
    n_qubits: int

    def __len__(self):
        return len(self.coeffs)

    def support(self):
        """(L, n) CSR incidence matrix: term k touches qubit u."""
        bits = _unpack(self.x | self.z, self.n_qubits)
        return sp.csr_matrix(bits, dtype=np.float64)

    def qubit_weights(self):
        """Lambda_u = sum of |c| over the terms that touch qubit u (n,)."""
        return np.asarray(self.support().T @ np.abs(self.coeffs)).ravel()


def _pack(bits):
    """(L, n) bool -> (L, W) uint64, qubit i in bit i."""
    L, n = bits.shape
    w = max(1, -(-n // 64))
    padded = np.zeros((L, 64 * w), dtype=bool)
    padded[:, :n] = bits
    return np.packbits(padded, axis=1, bitorder="little").view(np.uint64).reshape(L, w)


def _unpack(words, n):
    b = np.unpackbits(np.ascontiguousarray(words).view(np.uint8), axis=1, bitorder="little")
    return b[:, :n].astype(bool)


def pauli_arrays(operators, groups=None) -> PauliArrays:
    """Pack one SparsePauliOp, or a list of them (one group each), dropping identity and zero terms.

    Args:
        operators: SparsePauliOp or a sequence of SparsePauliOp on the same qubits.
        groups: optional group index per operator (default 0, 1, 2, ...).
    """
    if isinstance(operators, SparsePauliOp):
        operators = [operators]
        groups = [0] if groups is None else groups
    ops = list(operators)
    groups = list(range(len(ops))) if groups is None else list(groups)
    n = ops[0].num_qubits
    xs, zs, cs, gs = [], [], [], []
    for g, op in zip(groups, ops):
        op = op.simplify(atol=0)
        c = op.coeffs * (-1j) ** op.paulis.phase
        keep = (op.paulis.x | op.paulis.z).any(axis=1) & (np.abs(c) > 0)
        xs.append(op.paulis.x[keep])
        zs.append(op.paulis.z[keep])
        cs.append(c[keep])
        gs.append(np.full(int(keep.sum()), g, dtype=np.int64))
    return PauliArrays(_pack(np.concatenate(xs)), _pack(np.concatenate(zs)), np.concatenate(cs).astype(complex),
                       np.concatenate(gs), n)


def _popcount(words):
    return np.bitwise_count(words).sum(axis=-1, dtype=np.int64)


def anticommuting(xa, za, xb, zb):
    """Row-wise: True where string a anticommutes with string b (odd symplectic product)."""
    return (_popcount((xa & zb) ^ (za & xb)) & 1).astype(bool)


def product_phase(xa, za, xb, zb):
    """(x_c, z_c, k) with A B = i^k C row-wise (see the module docstring)."""
    xc, zc = xa ^ xb, za ^ zb
    k = _popcount(xa & za) + _popcount(xb & zb) + 2 * _popcount(za & xb) - _popcount(xc & zc)
    return xc, zc, np.mod(k, 4)


_I_POW = np.array([1, 1j, -1, -1j])


def shared_qubit_pairs(a: PauliArrays, b: PauliArrays, rows=None):
    """Yield (i, j) index arrays of term pairs (a_i, b_j) that share at least one qubit.

    Args:
        rows: optional subset of a's rows. Pairs come in chunks of about 2^20.
    """
    sa = a.support()
    sb = b.support().T.tocsc()
    idx = np.arange(len(a)) if rows is None else np.asarray(rows)
    deg = np.asarray(sa[idx].sum(axis=1)).ravel()
    per_qubit = np.asarray(sb.sum(axis=1)).ravel()
    per_row = np.maximum(deg * max(1.0, float(per_qubit.max(initial=1))), 1)
    start = 0
    while start < idx.size:
        stop = start + max(1, int(_CHUNK // per_row[start]))
        block = idx[start:stop]
        m = (sa[block] @ sb).tocoo()
        yield block[m.row], m.col.astype(np.int64)
        start = stop


def _anticommuting_pairs(a, b, rows=None, keep=None):
    """Chunks of anticommuting (i, j); `keep(i, j)` filters pairs before the bit test."""
    for i, j in shared_qubit_pairs(a, b, rows):
        if keep is not None:
            m = keep(i, j)
            i, j = i[m], j[m]
        m = anticommuting(a.x[i], a.z[i], b.x[j], b.z[j])
        yield i[m], j[m]


def _commutator_terms(a, i, b, j):
    """Strings and coefficients of [a_i, b_j] = 2 a_i b_j for anticommuting pairs."""
    xc, zc, k = product_phase(a.x[i], a.z[i], b.x[j], b.z[j])
    return xc, zc, 2.0 * a.coeffs[i] * b.coeffs[j] * _I_POW[k]


def _combine(group, xc, zc, coeffs):
    """Sum coefficients of equal (group, string) rows: (group, x, z, coeffs) of the distinct rows."""
    if coeffs.size == 0:
        return group, xc, zc, coeffs
    key = np.concatenate([group[:, None].astype(np.uint64), xc, zc], axis=1)
    key = np.ascontiguousarray(key).view(np.dtype((np.void, key.dtype.itemsize * key.shape[1]))).ravel()
    uniq, first, inv = np.unique(key, return_index=True, return_inverse=True)
    c = np.bincount(inv, weights=coeffs.real, minlength=uniq.size) \
        + 1j * np.bincount(inv, weights=coeffs.imag, minlength=uniq.size)
    scale = float(np.max(np.abs(coeffs)))
    ok = np.abs(c) > _DROP_RTOL * scale
    first = first[ok]
    return group[first], xc[first], zc[first], c[ok]


def _per_group_norm(n_groups, group, coeffs):
    return np.bincount(group, weights=np.abs(coeffs), minlength=n_groups)


def _inner(terms, rows=None):
    """[T_g, H_g] for the groups of `rows`: combined PauliArrays (group = g)."""
    gx, gz, gc, gg = [], [], [], []
    later = lambda i, j: terms.group[j] > terms.group[i]      # noqa: E731  (a: H_g term, b: T_g term)
    for i, j in _anticommuting_pairs(terms, terms, rows, later):
        xc, zc, c = _commutator_terms(terms, j, terms, i)     # [q, h] with q in T_g
        gx.append(xc), gz.append(zc), gc.append(c), gg.append(terms.group[i])
    if not gc:
        w = terms.x.shape[1]
        return PauliArrays(np.zeros((0, w), np.uint64), np.zeros((0, w), np.uint64), np.zeros(0, complex),
                           np.zeros(0, np.int64), terms.n_qubits)
    g, x, z, c = _combine(np.concatenate(gg), np.concatenate(gx), np.concatenate(gz), np.concatenate(gc))
    return PauliArrays(x, z, c, g, terms.n_qubits)


CHUNK_PRODUCTS = 2e6      # products held at once by the exact method (about 100 bytes each)


def _group_chunks(terms, per_term):
    """Row index arrays, whole groups at a time, each with sum(per_term) <= CHUNK_PRODUCTS (or one group)."""
    order = np.argsort(terms.group, kind="stable")
    g = terms.group[order]
    bounds = np.flatnonzero(np.diff(g)) + 1
    starts = np.concatenate([[0], bounds])
    ends = np.concatenate([bounds, [g.size]])
    cost = np.add.reduceat(np.asarray(per_term, float)[order], starts) if g.size else np.zeros(0)
    chunk, acc = [], 0.0
    for a, b, c in zip(starts, ends, cost):
        if chunk and acc + c > CHUNK_PRODUCTS:
            yield np.concatenate(chunk)
            chunk, acc = [], 0.0
        chunk.append(order[a:b])
        acc += c
    if chunk:
        yield np.concatenate(chunk)


def _partners(terms):
    """Per term: the number of terms touching its qubits (an upper estimate of its partners)."""
    sup = terms.support()
    deg = np.asarray(sup.sum(axis=0)).ravel()
    return np.asarray(sup @ deg).ravel(), float(deg.max(initial=0))


def _commutator_group_norms(terms, inner, n_groups, keep):
    """Per-group 1-norms of sum [terms_j, inner_k] over anticommuting pairs with keep(k, j)."""
    pieces = [[], [], [], []]
    for k, j in _anticommuting_pairs(inner, terms, None, keep):
        xc, zc, c = _commutator_terms(terms, j, inner, k)
        for lst, v in zip(pieces, (inner.group[k], xc, zc, c)):
            lst.append(v)
    if not pieces[3]:
        return np.zeros(n_groups)
    g, _, _, c = _combine(*(np.concatenate(p) for p in pieces))
    return _per_group_norm(n_groups, g, c)


def _exact_order2(terms, inner, n_groups):
    if len(inner) == 0:
        return 0.0
    outer = _commutator_group_norms(terms, inner, n_groups, lambda k, j: terms.group[j] > inner.group[k])
    own = _commutator_group_norms(terms, inner, n_groups, lambda k, j: terms.group[j] == inner.group[k])
    return float(np.sum(outer) / 12 + np.sum(own) / 24)


def _bound_order(terms, order):
    """Locality bound on alpha_1 or alpha_2 from the anticommuting (h, q) pairs alone."""
    absc = np.abs(terms.coeffs)
    n_groups = int(terms.group.max()) + 1
    lam_term = np.asarray(terms.support() @ terms.qubit_weights()).ravel()     # Lambda(supp t)
    group_l1 = np.bincount(terms.group, weights=absc, minlength=n_groups)
    later = lambda i, j: terms.group[j] > terms.group[i]      # noqa: E731
    total = 0.0
    for i, j in _anticommuting_pairs(terms, terms, None, later):
        w = 2.0 * absc[i] * absc[j]                            # ||[q, h]||
        if order == 1:
            total += 0.5 * float(np.sum(w))
        else:
            total += float(np.sum(w * 2.0 * (lam_term[i] + lam_term[j]))) / 12
            total += float(np.sum(w * 2.0 * group_l1[terms.group[i]])) / 24
    return total


def trotter_prefactor(operators, order: int, max_products: float = DEFAULT_MAX_PRODUCTS):
    """alpha_p (Pauli 1-norms) of the groups H_1..H_G in product order, and the method used.

    Args:
        operators: list of SparsePauliOp H_g (rad/s), or a PauliArrays with group indices in product order.
        order: 1 or 2.
        max_products: above this many estimated products the locality bound is used.

    Returns:
        (alpha, method) with method in METHODS.

    Example (the qhl.circuits.trotter_bounds docstring case):
        >>> a, m = trotter_prefactor([SparsePauliOp("XI", 0.5), SparsePauliOp("ZZ", 0.5)], 2)
        >>> round(a, 6), m
        (0.0625, 'pauli-1-norm')
    """
    terms = operators if isinstance(operators, PauliArrays) else pauli_arrays(operators)
    if len(terms) == 0:
        return 0.0, METHODS[0]
    if order not in (1, 2):
        raise ValueError(f"order must be 1 or 2, got {order!r}")
    n_pairs = sum(i.size for i, _ in _anticommuting_pairs(terms, terms, None,
                                                          lambda i, j: terms.group[j] > terms.group[i]))
    partners, deg_max = _partners(terms)
    n_groups = int(terms.group.max()) + 1
    if order == 1:
        if n_pairs > max_products:
            return _bound_order(terms, 1), METHODS[1]
        total = 0.0
        for rows in _group_chunks(terms, partners):
            inner = _inner(terms, rows)
            total += float(np.sum(_per_group_norm(n_groups, inner.group, inner.coeffs)))
        return 0.5 * total, METHODS[0]
    if n_pairs * 4 * deg_max > max_products:
        return _bound_order(terms, 2), METHODS[1]
    total = 0.0
    for rows in _group_chunks(terms, partners * 4 * deg_max):
        total += _exact_order2(terms, _inner(terms, rows), n_groups)
    return total, METHODS[0]


def quadrature_norms(hamiltonian, inserted, max_products: float = QUADRATURE_MAX_PRODUCTS):
    """(c1, c2, method): max over inserted Paulis P of ||[H, P]|| and ||[H, [H, P]]|| (Pauli 1-norms).

    Args:
        hamiltonian: SparsePauliOp or PauliArrays (one group) of H (rad/s).
        inserted: SparsePauliOp or PauliArrays of the inserted strings (coefficients ignored: P has norm 1).

    c1 is exact in both methods (distinct terms Q of H give distinct strings Q P). c2 is the exact
    1-norm while the products stay below `max_products`, else the locality bound
    sum over Q anticommuting with P of 2 |c_Q| * 2 (Lambda(supp P) + Lambda(supp Q)).
    """
    h = hamiltonian if isinstance(hamiltonian, PauliArrays) else pauli_arrays(hamiltonian)
    p = inserted if isinstance(inserted, PauliArrays) else pauli_arrays(inserted)
    if len(h) == 0 or len(p) == 0:
        return 0.0, 0.0, METHODS[0]
    h = PauliArrays(h.x, h.z, h.coeffs, np.zeros(len(h), np.int64), h.n_qubits)
    ones = PauliArrays(p.x, p.z, np.ones(len(p), complex), np.arange(len(p)), p.n_qubits)
    absh = np.abs(h.coeffs)
    lam_h = np.asarray(h.support() @ h.qubit_weights()).ravel()
    lam_p = np.asarray(ones.support() @ h.qubit_weights()).ravel()
    c1 = np.zeros(len(p))
    c2b = np.zeros(len(p))
    n_pairs = 0
    for i, j in _anticommuting_pairs(ones, h):
        n_pairs += i.size
        w = 2.0 * absh[j]
        c1 += np.bincount(i, weights=w, minlength=len(p))
        c2b += np.bincount(i, weights=w * 2.0 * (lam_p[i] + lam_h[j]), minlength=len(p))
    if n_pairs == 0:
        return 0.0, 0.0, METHODS[0]
    deg = np.asarray(h.support().sum(axis=0)).ravel()
    if float(n_pairs) * 4 * float(deg.max()) > max_products:
        return float(c1.max()), float(c2b.max()), METHODS[1]
    partners, deg_max = _partners(ones)
    c2 = 0.0
    for rows in _group_chunks(ones, partners * 4 * deg_max):
        pieces = [[], [], [], []]
        for i, j in _anticommuting_pairs(ones, h, rows):
            xc, zc, c = _commutator_terms(h, j, ones, i)
            for lst, v in zip(pieces, (i, xc, zc, c)):
                lst.append(v)
        if not pieces[3]:
            continue
        g, x, z, c = _combine(*(np.concatenate(v) for v in pieces))
        k1 = PauliArrays(x, z, c, g, p.n_qubits)
        gx, gz, gc, gg = [], [], [], []
        for k, j in _anticommuting_pairs(k1, h):
            xc, zc, cc = _commutator_terms(h, j, k1, k)
            gx.append(xc), gz.append(zc), gc.append(cc), gg.append(k1.group[k])
        if gc:
            g, _, _, c = _combine(np.concatenate(gg), np.concatenate(gx), np.concatenate(gz), np.concatenate(gc))
            c2 = max(c2, float(_per_group_norm(len(p), g, c).max()))
    return float(c1.max()), c2, METHODS[0]
