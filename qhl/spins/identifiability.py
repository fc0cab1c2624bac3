"""Parameter combinations the observed signal cannot see, derived from the model's operators.

Signal S(t) = Tr[O exp(-iHt) rho0 exp(iHt)] with H = 2 pi sum_n s_n h_n G_n (qhl.spins.model).
If K = sum_n v_n s_n G_n commutes with every generator G_m, with rho0 and with O (for every
experiment's scale factors s_n), then H(h + a v) = H(h) + 2 pi a K with [K, H(h)] = 0, so
    exp(-iH(h + a v)t) = exp(-iH(h)t) exp(-2 pi i a K t)
and the extra factor cancels against rho0: S(h + a v) = S(h) for every a. Such a v is a
direction the data cannot determine, at any parameter values (exact symmetry, not a numerical
accident). Example: in the secular high-field Hamiltonian the offset of a lone spin of an
unobserved isotope, Iz_S, commutes with every coupling (heteronuclear terms are Iz Sz), with
rho0 = sum Ix over observed spins and with O = sum I+ over observed spins; for several spins of an
unobserved isotope joined by flip-flop terms only their sum sum Iz_S commutes. (Commutation
criterion: the Heisenberg-picture argument of any quantum-mechanics text, e.g. Levitt, "Spin
Dynamics", 2nd ed., 2008, ch. 15; common practice.)

The commutators are computed with qiskit's Pauli algebra (SparsePauliOp); the directions v are
the null space of the linear map v -> ([K, G_m], [K, rho0], [K, O]) (Gram-matrix eigenvectors).
A parameter is individually identifiable only if its unit vector is orthogonal to that null space.

Scaling (clusters of hundreds of spins): the null space is found in two exact stages. Stage 1
keeps the v with [K, rho0] = [K, O] = 0 (two test operators only); the commutator matrix is held
sparse and splits into connected components (parameters whose commutators share a Pauli string),
each solved densely. Stage 2 tests only those few candidate combinations against every generator.
"""

import numpy as np
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components
from qiskit.quantum_info import PauliList, SparsePauliOp

__all__ = ["invisible_directions", "unidentifiable_parameters", "WEIGHT_TOL"]

# A parameter whose unit vector has a component above this in an invisible direction is not
# individually identifiable (the null space is exact: components are 0 or O(1) in practice).
WEIGHT_TOL = 1e-6


def _stack(ops):
    """All Pauli terms of `ops` in one PauliList, with coefficients and the index of their operator."""
    paulis = PauliList.from_symplectic(np.vstack([o.paulis.z for o in ops]),
                                       np.vstack([o.paulis.x for o in ops]))
    coeffs = np.concatenate([o.coeffs * (-1j) ** o.paulis.phase for o in ops])
    owner = np.concatenate([np.full(len(o), k) for k, o in enumerate(ops)])
    return paulis, coeffs, owner


def _commutator_matrix(columns, tests) -> sp.csr_matrix:
    """Sparse M with M[(test, pauli), c] = coefficient of that Pauli in [columns[c], tests[t]].

    For Pauli strings [P, Q] = 2 PQ when they anticommute and 0 when they commute; the symplectic
    test x_P.z_Q + z_P.x_Q (mod 2) decides which (qiskit.quantum_info.PauliList).
    """
    a, ca, oa = _stack(columns)
    b, cb, ob = _stack(tests)
    # symplectic products by BLAS in float32 (exact: the counts are at most n < 2^24)
    ax, az = a.x.astype(np.float32), a.z.astype(np.float32)
    bx, bz = b.x.astype(np.float32).T, b.z.astype(np.float32).T
    ia_parts, ib_parts = [], []
    chunk = max(1, int(2e7 // max(1, len(b))))            # bounded work array (about 80 MB)
    for start in range(0, len(a), chunk):
        sym = np.rint(ax[start:start + chunk] @ bz + az[start:start + chunk] @ bx).astype(np.int64) % 2
        ia, ib = np.nonzero(sym)
        ia_parts.append(ia + start)
        ib_parts.append(ib)
    ia, ib = np.concatenate(ia_parts), np.concatenate(ib_parts)
    if ia.size == 0:
        return sp.csr_matrix((0, len(columns)), dtype=complex)
    prod = a[ia].dot(b[ib])
    coef = 2 * ca[ia] * cb[ib] * (-1j) ** prod.phase
    # one row per (test operator, Pauli string): bytes of the owner and the packed x|z bits
    keys = np.ascontiguousarray(np.hstack([ob[ib].astype(">u4").view(np.uint8).reshape(-1, 4),
                                           np.packbits(prod.x, axis=1), np.packbits(prod.z, axis=1)]))
    _, row = np.unique(keys.view(np.dtype((np.void, keys.shape[1]))).ravel(), return_inverse=True)
    row = row.ravel()
    uniq = np.arange(row.max() + 1)
    return sp.csr_matrix((coef, (row.ravel(), oa[ia])), shape=(len(uniq), len(columns)))


def _real_rows(m: sp.spmatrix, dipolar: np.ndarray) -> sp.csr_matrix:
    """Stack Re, Im of M and of M with the dipolar columns zeroed (scale s = 0 and s = 1)."""
    m0 = m @ sp.diags(np.where(dipolar, 0.0, 1.0))
    return sp.vstack([m.real, m.imag, m0.real, m0.imag]).tocsc()


# Null directions: singular values below this fraction of the largest. The matrices hold the
# generators' O(1) Pauli coefficients, so exact symmetries give singular values at rounding level
# and real constraints O(1e-2) or more: any cut in between gives the same answer.
NULL_RCOND = 1e-6


def _sparse_null_space(m: sp.csc_matrix) -> np.ndarray:
    """Orthonormal null space of sparse M, per connected component of its columns.

    Each component's null space is that of its Gram matrix M_c^T M_c (small and dense: one row and
    column per parameter of the component), keeping eigenvalues below NULL_RCOND^2 of the largest.
    """
    n_cols = m.shape[1]
    pattern = (abs(m) > 0).astype(np.int8)
    adjacency = (pattern.T @ pattern).tocsr()
    n_comp, label = connected_components(adjacency, directed=False)
    order = np.argsort(label, kind="stable")
    bounds = np.searchsorted(label[order], np.arange(n_comp + 1))
    touched = np.asarray(pattern.sum(axis=0)).ravel() > 0
    free_cols = np.flatnonzero(~touched)              # commutators all zero: null directions as they are
    blocks = []
    if free_cols.size:
        unit = np.zeros((n_cols, free_cols.size))
        unit[free_cols, np.arange(free_cols.size)] = 1.0
        blocks.append(unit)
    for comp in range(n_comp):
        cols = order[bounds[comp]:bounds[comp + 1]]
        if cols.size == 1:
            continue                                  # a lone column: zero (kept above) or not null
        sub = m[:, cols]
        gram = np.real((sub.conj().T @ sub).toarray())
        w, v = np.linalg.eigh(gram)
        keep = w <= NULL_RCOND ** 2 * max(float(w[-1]), 0.0) if w.size else np.zeros(0, bool)
        if np.any(keep):
            full = np.zeros((n_cols, int(keep.sum())))
            full[cols] = v[:, keep]
            blocks.append(full)
    return np.hstack(blocks) if blocks else np.zeros((n_cols, 0))


def invisible_directions(model, names=None) -> np.ndarray:
    """Orthonormal basis (P, k) of the combinations of `names` the signal cannot see.

    Args:
        model: a HamiltonianModel (its parameters, observed spins and scale factors).
        names: parameter names spanning the combinations (default the model's free set).

    Returns:
        (len(names), k) array, columns orthonormal; k = 0 when every combination is visible.
    """
    names = list(model.free if names is None else names)
    if not names:
        return np.zeros((0, 0))
    n = model.n_spins
    obs = model.observed_qubits()
    by_name = {p.name: p for p in model.parameters}
    gens = [by_name[nm].generator for nm in names]
    # Experiments scale dipolar terms by s (Experiment.dipolar_scale). Requiring commutation at
    # s = 0 and s = 1 (the dipolar part and the rest separately) covers every s at once.
    dipolar = np.array([by_name[nm].kind == "dipolar" for nm in names])
    # stage 1: commute with rho0 = sum Ix and O = sum I+ (both spanned by sum X, sum Y of the observed spins)
    if obs:
        probes = [SparsePauliOp.from_sparse_list([(axis, [q], 1.0) for q in obs], num_qubits=n) for axis in "XY"]
        candidates = _sparse_null_space(_real_rows(_commutator_matrix(gens, probes), dipolar))
    else:
        candidates = np.eye(len(names))
    if candidates.shape[1] == 0:
        return candidates
    # stage 2: the candidate combinations K_j (and their non-dipolar parts) against every generator
    combos, combos0 = [], []
    for j in range(candidates.shape[1]):
        idx = np.flatnonzero(np.abs(candidates[:, j]) > 0)
        ops = [gens[k] * candidates[k, j] for k in idx]
        ops0 = [gens[k] * candidates[k, j] for k in idx if not dipolar[k]]
        combos.append(SparsePauliOp.sum(ops).simplify(atol=0))
        combos0.append(SparsePauliOp.sum(ops0).simplify(atol=0) if ops0 else SparsePauliOp("I" * n, 0.0))
    tests = [p.generator for p in model.parameters]
    k = len(combos)
    m = _commutator_matrix(combos + combos0, tests).tocsc()
    stacked = sp.vstack([m[:, :k].real, m[:, :k].imag, m[:, k:].real, m[:, k:].imag]).tocsc()
    return candidates @ _sparse_null_space(stacked)


def unidentifiable_parameters(model, names=None) -> list:
    """Names among `names` (default the free set) with weight in an invisible combination."""
    names = list(model.free if names is None else names)
    basis = invisible_directions(model, names)
    if basis.size == 0:
        return []
    weight = np.sqrt(np.sum(basis ** 2, axis=1))
    return [nm for nm, w in zip(names, weight) if w > WEIGHT_TOL]
