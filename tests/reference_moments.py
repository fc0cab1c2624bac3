"""Short-time moments of the NMR signal from Pauli algebra alone (an independent reference).

Imports nothing of qhl that computes: the Hamiltonian is rebuilt here from the parameter list
read as data (kind, spins, value in Hz) with the textbook spin operators (I = sigma/2):
    offset      2 pi h Iz_i
    dipolar     2 pi h s (3 Iz_i Iz_j - I_i.I_j)    (same isotope; s = the experiment's dipolar scale)
                2 pi h s 2 Iz_i Iz_j                 (different isotopes)
    j           2 pi h I_i.I_j  /  2 pi h Iz_i Iz_j  (same / different isotopes)
(M. H. Levitt, "Spin Dynamics", 2nd ed., 2008, ch. 9 and 14.)

Moments (J. H. Van Vleck, Phys. Rev. 74, 1168 (1948); A. Abragam, "The Principles of Nuclear
Magnetism", 1961, ch. IV): with ad_H(A) = [H, A],
    S(t) = sum_k (-i t)^k / k! M_k,   M_k = Tr[O ad_H^k(rho0)] / Tr[O rho0],
    Tr[O ad_H^(j+k)(rho0)] = (-1)^j Tr[ad_H^j(O) ad_H^k(rho0)]   (cyclic trace),
rho0 = sum Ix, O = sum I+ over the observed spins. Traces of Pauli strings: Tr[P Q] = 2^n delta_PQ.
"""

import numpy as np
from qiskit.quantum_info import SparsePauliOp


def _op(n, terms):
    return SparsePauliOp.from_sparse_list(terms, num_qubits=n)


def hamiltonian_from_parameters(labels, isotopes, parameters, dipolar_scale=1.0):
    """H (rad/s) from [(kind, (spin labels), value_hz), ...]."""
    n = len(labels)
    idx = {lab: i for i, lab in enumerate(labels)}
    terms = []
    for kind, spins, value in parameters:
        w = 2 * np.pi * value
        if kind == "offset":
            terms.append(("Z", [idx[spins[0]]], 0.5 * w))
            continue
        i, j = idx[spins[0]], idx[spins[1]]
        homo = isotopes[i] == isotopes[j]
        if kind == "dipolar":
            w *= dipolar_scale
            if homo:   # 3 IzIz - (IxIx + IyIy + IzIz) = 2 IzIz - IxIx - IyIy; IaIb = sigma sigma / 4
                terms += [("ZZ", [i, j], 0.5 * w), ("XX", [i, j], -0.25 * w), ("YY", [i, j], -0.25 * w)]
            else:
                terms.append(("ZZ", [i, j], 0.5 * w))
        elif kind == "j":
            if homo:
                terms += [(p, [i, j], 0.25 * w) for p in ("XX", "YY", "ZZ")]
            else:
                terms.append(("ZZ", [i, j], 0.25 * w))
        else:
            raise ValueError(kind)
    return _op(n, terms).simplify()


def _ad(h, a):
    return (h.dot(a) - a.dot(h)).simplify(atol=1e-12)      # dot = matrix product h @ a


def _trace_product(a, b):
    """Tr[A B] / 2^n from matching Pauli labels."""
    table = dict(zip(a.paulis.to_labels(), a.coeffs))
    total = 0j
    for lab, c in zip(b.paulis.to_labels(), b.coeffs):
        if lab in table:
            total += table[lab] * c
    return total


def signal_moments(labels, isotopes, observed, parameters, dipolar_scale=1.0):
    """(M_0 .. M_4) with M_k = Tr[O ad^k rho0] / Tr[O rho0] (rad/s)^k; M_0 = 1."""
    n = len(labels)
    h = hamiltonian_from_parameters(labels, isotopes, parameters, dipolar_scale)
    obs = [i for i in range(n) if observed[i]]
    rho = _op(n, [("X", [i], 0.5) for i in obs])
    o = _op(n, [("X", [i], 0.5) for i in obs] + [("Y", [i], 0.5j) for i in obs])
    rho1 = _ad(h, rho)
    rho2 = _ad(h, rho1)
    o1 = _ad(h, o)
    o2 = _ad(h, o1)
    norm = _trace_product(o, rho)
    m = [1.0 + 0j,
         _trace_product(o, rho1) / norm,
         -_trace_product(o1, rho1) / norm,
         -_trace_product(o1, rho2) / norm,
         _trace_product(o2, rho2) / norm]
    return np.array(m)


def taylor_signal(moments, t, order=4):
    """sum_{k <= order} (-i t)^k / k! M_k."""
    from math import factorial
    t = np.asarray(t, float)
    return sum((-1j * t) ** k / factorial(k) * moments[k] for k in range(order + 1))
