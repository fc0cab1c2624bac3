"""Conserved magnetisation sectors of the secular Hamiltonian.

The secular Hamiltonian commutes with the total Iz of each isotope, so the computational basis
splits into sectors labelled by the number of spins up per isotope. Basis index k holds qubit i
in bit i (qiskit's little-endian order); bit value 0 is spin up (Iz = +1/2).
"""

import numpy as np
from qiskit.quantum_info import SparsePauliOp

__all__ = ["magnetisation_sectors", "conserves_magnetisation", "full_space"]


def _isotope_groups(isotopes):
    groups = {}
    for i, iso in enumerate(isotopes):
        groups.setdefault(iso, []).append(i)
    return list(groups.values())


def conserves_magnetisation(operators, isotopes, atol: float = 1e-12) -> bool:
    """True when every operator commutes with the total Z of every isotope group."""
    n = len(isotopes)
    for group in _isotope_groups(isotopes):
        zsum = SparsePauliOp.from_sparse_list([("Z", [i], 1.0) for i in group], num_qubits=n)
        for op in operators:
            comm = (op.compose(zsum) - zsum.compose(op)).simplify(atol=atol)
            if np.any(np.abs(comm.coeffs) > atol):
                return False
    return True


def magnetisation_sectors(isotopes) -> list:
    """Index arrays of the basis states in each sector, sorted by sector label."""
    n = len(isotopes)
    k = np.arange(2**n, dtype=np.int64)
    bits = (k[:, None] >> np.arange(n)[None, :]) & 1
    keys = np.stack([bits[:, g].sum(axis=1) for g in _isotope_groups(isotopes)], axis=1)
    _, inverse = np.unique(keys, axis=0, return_inverse=True)
    inverse = inverse.ravel()
    order = np.argsort(inverse, kind="stable")
    bounds = np.flatnonzero(np.diff(inverse[order])) + 1
    return np.split(order, bounds)


def full_space(n: int) -> list:
    """The whole space as a single 'sector' (for Hamiltonians without the symmetry)."""
    return [np.arange(2**n, dtype=np.int64)]
