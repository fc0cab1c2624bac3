"""Commutator bounds on product-formula error and the Trotter steps they require.

Source: Childs, Su, Tran, Wiebe, Zhu, "Theory of Trotter error with commutator scaling",
Phys. Rev. X 11, 011020 (2021), the tight first- and second-order bounds. For H = sum_g H_g
in product order (qhl.circuits.trotter: H_1 acts first) and one step of duration tau:
    first order   ||S1(tau) - e^{-i tau H}|| <= alpha_1 tau^2,
                  alpha_1 = (1/2) sum_g || [ sum_{g'>g} H_g', H_g ] ||
    second order  ||S2(tau) - e^{-i tau H}|| <= alpha_2 tau^3,
                  alpha_2 = (1/12) sum_g || [ sum_{g''>g} H_g'', [ sum_{g'>g} H_g', H_g ] ] ||
                          + (1/24) sum_g || [ H_g, [ H_g, sum_{g'>g} H_g' ] ] ||
Over r steps errors add (unitaries, triangle inequality): eps(t, r) <= r alpha_p (t/r)^(p+1)
= alpha_p t^(p+1) / r^p, so r = ceil((alpha_p t^(p+1) / eps)^(1/p)).

Assumptions: spectral norm (operator 2-norm) of a unitary difference; H in rad/s, t in s.
Norms of the commutators are either bounded by the 1-norm of their Pauli coefficients
(norm='pauli', always an upper bound since ||P|| = 1; computed in the symplectic representation
by qhl.circuits.pauli_commutators, which falls back to its locality bound for very large
clusters) or computed exactly from the dense matrix (norm='exact', n <= EXACT_NORM_MAX_QUBITS);
'auto' picks exact when small enough.
Because the bound is even in t, it also bounds the reversed product.
"""

import math

import numpy as np
from qiskit.quantum_info import SparsePauliOp

from ..base.blas import single_thread_blas
from ..base.errors import QhlInputError
from ..base.memory import require_memory
from .pauli_commutators import trotter_prefactor
from .trotter import TrotterTerms

__all__ = ["commutator", "operator_norm", "commutator_prefactor", "prefactor_and_method", "trotter_error_bound",
           "trotter_steps_for", "EXACT_NORM_MAX_QUBITS"]

EXACT_NORM_MAX_QUBITS = 8
_ZERO = 1e-12


def commutator(a: SparsePauliOp, b: SparsePauliOp) -> SparsePauliOp:
    """[a, b] = ab - ba, simplified (coefficients below 1e-12 relative dropped)."""
    c = (a.compose(b) - b.compose(a))
    scale = max(float(np.max(np.abs(a.coeffs))) if a.size else 0.0, 1.0) * \
        max(float(np.max(np.abs(b.coeffs))) if b.size else 0.0, 1.0)
    return c.simplify(atol=_ZERO * scale, rtol=0)


def operator_norm(op: SparsePauliOp, norm: str = "auto") -> float:
    """Spectral norm of `op`: exact (dense) or the Pauli-coefficient 1-norm upper bound.

    Args:
        norm: 'pauli', 'exact' or 'auto' (exact up to EXACT_NORM_MAX_QUBITS qubits).
    """
    if norm not in ("pauli", "exact", "auto"):
        raise QhlInputError(f"unknown norm '{norm}': expected pauli, exact or auto", key="norm")
    coeffs = np.abs(op.coeffs)
    if op.size == 0 or not np.any(coeffs > 0):
        return 0.0
    one_norm = float(np.sum(coeffs))
    if norm == "pauli" or (norm == "auto" and op.num_qubits > EXACT_NORM_MAX_QUBITS):
        return one_norm
    require_memory("an exact commutator norm", 16.0 * 4 ** op.num_qubits * 3)
    mat = op.to_matrix()
    # Commutators of Hermitian operators are anti-Hermitian: i[A, B] is Hermitian.
    herm = np.allclose(mat, mat.conj().T, atol=1e-12 * one_norm)
    anti = np.allclose(mat, -mat.conj().T, atol=1e-12 * one_norm)
    if herm or anti:
        ev = np.linalg.eigvalsh(mat if herm else 1j * mat)
        return float(np.max(np.abs(ev)))
    return float(np.linalg.norm(mat, 2))


def _operators(terms):
    if isinstance(terms, TrotterTerms):
        return terms.operators()
    ops = list(terms)
    if not ops or not all(isinstance(o, SparsePauliOp) for o in ops):
        raise QhlInputError("expected TrotterTerms or a non-empty list of SparsePauliOp", key="terms")
    return ops


def commutator_prefactor(terms, order: int, norm: str = "auto") -> float:
    """alpha_p of the module docstring: one-step error <= alpha_p tau^(p+1).

    Args:
        terms: TrotterTerms or a list of SparsePauliOp H_1..H_G (rad/s) in product order.
        order: 1 or 2.
        norm: see operator_norm.

    Returns:
        alpha_p in (rad/s)^(p+1).

    Example:
        >>> from qiskit.quantum_info import SparsePauliOp
        >>> round(commutator_prefactor([SparsePauliOp("XI", 0.5), SparsePauliOp("ZZ", 0.5)], 2), 6)
        0.0625
    """
    return prefactor_and_method(terms, order, norm)[0]


def prefactor_and_method(terms, order: int, norm: str = "auto"):
    """(alpha_p, method): method 'spectral' (dense norms), 'pauli-1-norm' or 'locality-bound'
    (qhl.circuits.pauli_commutators)."""
    if norm not in ("pauli", "exact", "auto"):
        raise QhlInputError(f"unknown norm '{norm}': expected pauli, exact or auto", key="norm")
    if order not in (1, 2):
        raise QhlInputError(f"expected product-formula order 1 or 2, got {order!r}", key="order")
    ops = _operators(terms)
    n = ops[0].num_qubits
    if norm == "pauli" or (norm == "auto" and n > EXACT_NORM_MAX_QUBITS):
        return trotter_prefactor(ops, order)
    with single_thread_blas(2 ** n):
        return _dense_prefactor(ops, order, norm), "spectral"


def _dense_prefactor(ops, order, norm):
    """alpha_p from SparsePauliOp commutators and dense spectral norms (small n)."""
    n = ops[0].num_qubits
    zero = SparsePauliOp("I" * n, 0.0)
    tails = [zero] * len(ops)
    acc = zero
    for g in range(len(ops) - 1, -1, -1):
        tails[g] = acc
        acc = (acc + ops[g]).simplify(atol=0)
    if order == 1:
        return 0.5 * sum(operator_norm(commutator(tails[g], ops[g]), norm) for g in range(len(ops)))
    if order == 2:
        total = 0.0
        for g, h in enumerate(ops):
            inner = commutator(tails[g], h)
            total += operator_norm(commutator(tails[g], inner), norm) / 12
            total += operator_norm(commutator(h, commutator(h, tails[g])), norm) / 24
        return total
    raise QhlInputError(f"expected product-formula order 1 or 2, got {order!r}", key="order")


def trotter_error_bound(terms, time: float, steps: int, order: int, norm: str = "auto") -> float:
    """Upper bound on ||U_trot(t) - e^{-i t H}|| for r = steps: alpha_p t^(p+1) / r^p.

    Example (H = 0.5 XI + 0.5 ZZ, t = 2, second order, r = 8: 1/128):
        >>> from qiskit.quantum_info import SparsePauliOp
        >>> h = [SparsePauliOp("XI", 0.5), SparsePauliOp("ZZ", 0.5)]
        >>> round(trotter_error_bound(h, 2.0, 8, 2), 7)
        0.0078125
    """
    if not np.isfinite(time) or time < 0:
        raise QhlInputError(f"expected a finite time >= 0 s, got {time!r}", key="time")
    if int(steps) != steps or steps < 1:
        raise QhlInputError(f"expected an integer number of steps >= 1, got {steps!r}", key="steps")
    alpha = commutator_prefactor(terms, order, norm)
    return alpha * time ** (order + 1) / steps ** order


def trotter_steps_for(terms, time: float, eps: float, order: int, norm: str = "auto") -> int:
    """Fewest steps r whose commutator bound is <= eps (relative slack 1e-12 for rounding).

    Args:
        terms: TrotterTerms or list of SparsePauliOp (rad/s) in product order.
        time: t in seconds (>= 0); eps: target spectral-norm error (> 0); order: 1 or 2.

    Returns:
        r >= 1 (1 when the terms commute, alpha_p = 0).

    Raises:
        QhlInputError: non-positive eps, bad time or order.

    Example (first order needs 100 steps; the second-order formula gives 8):
        >>> from qiskit.quantum_info import SparsePauliOp
        >>> h = [SparsePauliOp("XI", 0.5), SparsePauliOp("ZZ", 0.5)]
        >>> trotter_steps_for(h, 2.0, 0.01, 1), trotter_steps_for(h, 2.0, 0.01, 2)
        (100, 8)
    """
    if not np.isfinite(eps) or eps <= 0:
        raise QhlInputError(f"expected a target error > 0, got {eps!r}", key="eps")
    if not np.isfinite(time) or time < 0:
        raise QhlInputError(f"expected a finite time >= 0 s, got {time!r}", key="time")
    alpha = commutator_prefactor(terms, order, norm)
    total = alpha * time ** (order + 1)
    if total <= eps:
        return 1
    r = max(1, math.ceil((total / eps) ** (1.0 / order)))
    while r > 1 and total / (r - 1) ** order <= eps * (1 + 1e-12):
        r -= 1
    while total / r ** order > eps * (1 + 1e-12):
        r += 1
    return r
