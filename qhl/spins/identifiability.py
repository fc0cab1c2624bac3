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
the null space of the linear map v -> ([K, G_m], [K, rho0], [K, O]) (scipy.linalg.null_space).
A parameter is individually identifiable only if its unit vector is orthogonal to that null space.
"""

import numpy as np
from scipy.linalg import null_space
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


def _commutator_matrix(columns, tests) -> np.ndarray:
    """Matrix M with M[(test, pauli), c] = coefficient of that Pauli in [columns[c], tests[t]].

    For Pauli strings [P, Q] = 2 PQ when they anticommute and 0 when they commute; the symplectic
    test x_P.z_Q + z_P.x_Q (mod 2) decides which (qiskit.quantum_info.PauliList).
    """
    a, ca, oa = _stack(columns)
    b, cb, ob = _stack(tests)
    sym = (a.x.astype(np.int64) @ b.z.T.astype(np.int64) + a.z.astype(np.int64) @ b.x.T.astype(np.int64)) % 2
    ia, ib = np.nonzero(sym)
    if ia.size == 0:
        return np.zeros((0, len(columns)), complex)
    prod = a[ia].dot(b[ib])
    coef = 2 * ca[ia] * cb[ib] * (-1j) ** prod.phase
    keys = np.hstack([ob[ib][:, None], prod.x, prod.z]).astype(np.int64)
    uniq, row = np.unique(keys, axis=0, return_inverse=True)
    m = np.zeros((len(uniq), len(columns)), complex)
    np.add.at(m, (row.ravel(), oa[ia]), coef)
    return m


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
    tests = [p.generator for p in model.parameters]
    if obs:
        tests.append(SparsePauliOp.from_sparse_list([("X", [q], 1.0) for q in obs], num_qubits=n))
        tests.append(SparsePauliOp.from_sparse_list([("Y", [q], 1.0) for q in obs], num_qubits=n))
    by_name = {p.name: p for p in model.parameters}
    gens = [by_name[nm].generator for nm in names]
    dipolar = np.array([by_name[nm].kind == "dipolar" for nm in names])
    m = _commutator_matrix(gens, tests)
    # Experiments scale dipolar terms by s (Experiment.dipolar_scale). Requiring commutation at
    # s = 0 and s = 1 (the dipolar part and the rest separately) covers every s at once.
    m0 = m * np.where(dipolar, 0.0, 1.0)[None, :]
    stacked = np.vstack([m.real, m.imag, m0.real, m0.imag])
    if stacked.shape[0] == 0:
        return np.eye(len(names))
    # QR first: the tall matrix (one row per commutator Pauli) reduces to a P x P triangle with
    # the same null space, so the SVD stays small.
    r = np.linalg.qr(stacked, mode="r")
    return null_space(r, rcond=1e-10)


def unidentifiable_parameters(model, names=None) -> list:
    """Names among `names` (default the free set) with weight in an invisible combination."""
    names = list(model.free if names is None else names)
    basis = invisible_directions(model, names)
    if basis.size == 0:
        return []
    weight = np.sqrt(np.sum(basis ** 2, axis=1))
    return [nm for nm, w in zip(names, weight) if w > WEIGHT_TOL]
