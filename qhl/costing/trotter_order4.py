"""Fourth-order Suzuki formula: the nested-commutator sum and its step-count bound.

Formula S4(tau) = S2(u tau)^2 S2((1 - 4u) tau) S2(u tau)^2 with u = 1 / (4 - 4^(1/3)) and S2 the
symmetric second-order formula (M. Suzuki, Phys. Lett. A 146, 319 (1990); J. Math. Phys. 32, 400
(1991)); Upsilon = 2 * 5 = 10 stages.

Bound (the published expression). Childs, Su, Tran, Wiebe, Zhu, "Theory of Trotter error with
commutator scaling", Phys. Rev. X 11, 011020 (2021), arXiv:1912.08854: their Theorem 6 (Theorem 11 of
the extended arXiv version) states the p-th order error as O(alpha_comm t^(p+1)); its proof, for
anti-Hermitian summands (a real-time evolution, summands -i H_g), gives the explicit constant of
arXiv:1912.08854 Eqs. (189) and (191):
    ||S_p(tau) - exp(-i tau H)|| <= (2 Upsilon^(p+1) / (p+1)!) alpha~_comm tau^(p+1),
    alpha~_comm = sum_{g_1..g_(p+1)=1..Gamma} || [H_g(p+1), ... [H_g2, H_g1]] ||,
the sum running over all ordered (p+1)-tuples of summands, Upsilon the number of stages of the
formula. Here p = 4, Upsilon = 10 (five S2 stages of two sweeps each), so
    C4 = 2 * 10^5 / 5! * alpha~_comm = (5000/3) alpha~_comm.
Provenance: the expression and equation numbers were read from a quotation of the paper found by
search (the paper's own text was not opened); they agree with the constant this module used before
from memory (2 Upsilon^5/5!), which is therefore no longer a guess: the factor 2 belongs to the
published expression. Summands: the Pauli strings of H (any grouping of them into commuting blocks
has a smaller alpha~_comm by the triangle inequality, and the same Upsilon, so the bound covers the
grouped circuits too). r steps: error <= r * C4 (t/r)^5 (unitarity and the triangle inequality,
PRX 11, 011020 Sec. V B). tests/test_trotter_order4.py checks the bound against the exact error of
S4 from dense matrices, and the dense S4 against the two-summand bound of the paper's Appendix M
(Eq. (M13), eight published coefficients).
Which number the budget uses: the exact-propagator step count at the same operator-norm error
wherever the dense propagator fits (n <= 8; qhl.costing.trotter_cost.empirical_trotter_steps),
which is valid by construction and far tighter (demo: 55 steps against 10,172 from this bound);
this bound only above that size (`trotter_steps_source` in the budget says which).

Nested commutators of Pauli strings are again Pauli strings (or zero), with norm 2^p times the
product of |coefficients|, so alpha_comm is summed exactly by a dynamic programme over the
Pauli products reached at each depth (symplectic bit vectors), not by enumerating L^(p+1) tuples.
"""

import math

import numpy as np
from qiskit.quantum_info import SparsePauliOp

__all__ = ["SUZUKI4_U", "SUZUKI4_STAGES", "ORDER4_BOUND_SOURCE", "nested_commutator_sum", "order4_step_error_constant",
           "pauli_term_arrays", "ASSUMPTIONS"]

SUZUKI4_U = 1.0 / (4.0 - 4.0 ** (1.0 / 3.0))
SUZUKI4_STAGES = 10
ORDER4_BOUND_SOURCE = ("Childs, Su, Tran, Wiebe, Zhu, Phys. Rev. X 11, 011020 (2021), arXiv:1912.08854 Eqs. (189), "
                       "(191): 2 Upsilon^(p+1)/(p+1)! alpha_comm t^(p+1), p = 4, Upsilon = 10")
_MAX_STATES_TIMES_TERMS = 4e7

ASSUMPTIONS = {
    "order4_bound": "||S4(tau) - e^{-i tau H}|| <= 2 Upsilon^5/5! alpha_comm tau^5, Upsilon = 10, alpha_comm over "
                    "all ordered 5-tuples of Pauli terms: the published expression, Childs, Su, Tran, Wiebe, Zhu, "
                    "PRX 11, 011020 (2021), arXiv:1912.08854 Eqs. (189), (191) (read from a quotation of the paper); "
                    "the budget uses the exact-propagator count instead wherever n <= 8 (valid and tighter)",
    "order4_formula": "Suzuki S4 = S2(u t)^2 S2((1-4u) t) S2(u t)^2, u = 1/(4 - 4^(1/3)) (Suzuki 1990)",
}


def pauli_term_arrays(op: SparsePauliOp):
    """Non-identity Pauli terms of a Hermitian operator as packed (x, z) ints and real coefficients."""
    op = op.simplify(atol=0)
    x = op.paulis.x
    z = op.paulis.z
    keep = (x | z).any(axis=1) & (np.abs(op.coeffs) > 0)
    weights = 1 << np.arange(x.shape[1], dtype=np.int64)
    xi = (x[keep].astype(np.int64) * weights).sum(axis=1)
    zi = (z[keep].astype(np.int64) * weights).sum(axis=1)
    return xi, zi, np.real(op.coeffs[keep]).astype(float)


def _anticommute(xa, za, xb, zb):
    """Boolean matrix: Pauli a anticommutes with Pauli b (symplectic product parity)."""
    s = (xa[:, None] & zb[None, :]) ^ (za[:, None] & xb[None, :])
    return (np.bitwise_count(s) & 1).astype(bool)


def nested_commutator_sum(op: SparsePauliOp, depth: int) -> float:
    """sum over ordered (depth+1)-tuples of Pauli terms of ||[P_(depth+1), ... [P_2, P_1]]||.

    Exact for the decomposition of `op` into single Pauli strings. If the number of Pauli products
    grows too large (many qubits, high depth), returns the cruder bound (2 Lambda)^depth Lambda with
    Lambda = sum |c_k| (triangle inequality).

    Example:
        >>> h = SparsePauliOp(["XI", "ZZ"], [0.5, 0.5])
        >>> nested_commutator_sum(h, 1)   # ||[XI,ZZ]/4|| + ||[ZZ,XI]/4|| = 0.5 + 0.5
        1.0
    """
    xt, zt, c = pauli_term_arrays(op)
    a = np.abs(c)
    if a.size == 0:
        return 0.0
    xs, zs, w = xt.copy(), zt.copy(), a.copy()
    for _ in range(depth):
        if xs.size * xt.size > _MAX_STATES_TIMES_TERMS:
            lam = float(a.sum())
            return (2 * lam) ** depth * lam
        mask = _anticommute(xs, zs, xt, zt)
        i, j = np.nonzero(mask)
        if i.size == 0:
            return 0.0
        nx, nz = xs[i] ^ xt[j], zs[i] ^ zt[j]
        nw = 2.0 * w[i] * a[j]
        key = nx * (1 << 31) + nz if xt.max(initial=0) < (1 << 31) else None
        uniq, inv = np.unique(key, return_inverse=True)
        w = np.bincount(inv, weights=nw)
        xs, zs = uniq // (1 << 31), uniq % (1 << 31)
    return float(w.sum())


def order4_step_error_constant(op: SparsePauliOp) -> float:
    """C4 with ||S4(tau) - exp(-i tau H)|| <= C4 tau^5 (H = op in rad/s, tau in s).

    C4 = 2 Upsilon^5 / 5! * alpha~_comm with Upsilon = 10 and alpha~_comm = nested_commutator_sum(op, 4):
    arXiv:1912.08854 Eqs. (189), (191) (module docstring), summands the Pauli strings of `op`.

    Example:
        >>> h = SparsePauliOp(["XI", "ZZ"], [0.5, 0.5])
        >>> round(order4_step_error_constant(h) / nested_commutator_sum(h, 4), 6)   # 2 * 10^5 / 120
        1666.666667
    """
    return 2.0 * SUZUKI4_STAGES**5 / math.factorial(5) * nested_commutator_sum(op, 4)
