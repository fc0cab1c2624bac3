"""Fault-tolerant cost of estimating gradient components by amplitude estimation (vectorised).

Circuit A (one query): system (n qubits) + Hadamard ancilla + insertion-time register (r + 1
Trotter step boundaries, trapezoid weights) + Pauli-term register (|c_k| weights); r Trotter
steps of order p with a controlled Pauli inserted at the selected boundary. The ancilla's
amplitude a = (1 + mu / R) / 2 holds the component mu (range R, qhl.costing.shots).

Error budget for a target |mu~ - mu| <= eps, split eps = e_T + e_S + e_E (defaults 0.25, 0.05,
0.70 of eps; all three reported):
    estimation  e_E: amplitude error e_E / (2R) -> queries M (qhl.costing.amplitude_estimation);
    Trotter     e_T: an implemented A~ with ||A~ - A|| <= delta shifts a by <= 2 delta, so mu by
                4 R delta; half of e_T goes to the product formula (delta = e_T / (8R)) and half to
                the trapezoid rule over insertion times, whose error is
                R t^2 max|g''| / (12 r^2) with |g''| <= 2 ||[H,[H,P]]|| + 2 ||[H,P]||^2
                (g(s): the ancilla signal with the insertion at s; Pauli 1-norms bound the norms);
    synthesis   e_S: the same propagation, delta_S = e_S / (4R) shared by every rotation of A.
AE estimates the amplitude of the A~ actually built, so these biases do not grow with M.

Counts per component (M queries, no phase register: maximum-likelihood / iterative variants):
    A calls 2M + 1; rotations (2M + 1) (r * rotations per step + r + 1 + L_n preparation angles);
    T-count (2M + 1) (rotations per A * T per rotation + 4 (K - 1)) + M * 4 (Q - 2),
    with K = (r + 1) L_n select branches by unary iteration (Babbush et al., PRX 8, 041015 (2018),
    4(K-1) T gates, from memory) and the reflection about |0..0> on Q qubits by a Toffoli ladder
    (4 T per Toffoli, from memory);
    depth in Trotter steps (2M + 1) r; gate layers (2M + 1)(r * layers per step + 2K) + M * 2Q;
    logical qubits n + 1 + ceil(log2(r + 1)) + ceil(log2 L_n) + ceil(log2 K) (unary-iteration work).
"""

import numpy as np

from .amplitude_estimation import queries_for_amplitude_error
from .synthesis import t_count_per_rotation
from .trotter_cost import ORDERS

__all__ = ["DEFAULT_SPLIT", "ft_cost_arrays", "choose_order", "ASSUMPTIONS"]

DEFAULT_SPLIT = {"trotter": 0.25, "synthesis": 0.05, "estimation": 0.70}

ASSUMPTIONS = {
    "error_split": "eps = e_Trotter + e_synthesis + e_estimation, default 0.25/0.05/0.70 of eps (a choice, not optimised)",
    "error_propagation": "||A~ - A|| <= delta moves the amplitude by <= 2 delta and the component by 4 R delta",
    "quadrature": "trapezoid rule over the r+1 step boundaries: error R t^2 max|g''|/(12 r^2), "
                  "|g''| <= 2||[H,[H,P]]|| + 2||[H,P]||^2 (Pauli 1-norm bounds)",
    "select": "unary iteration over K = (r+1) L_n branches: 4(K-1) T per query (Babbush et al., PRX 8, "
              "041015 (2018), from memory)",
    "reflection": "reflection about |0...0> on Q qubits: Toffoli ladder, 4(Q-2) T (from memory)",
    "ae_circuit": "2M+1 calls of A or A^dag, no phase register (iterative or maximum-likelihood AE)",
    "logical_qubits": "n + 1 ancilla + ceil(log2(r+1)) time register + ceil(log2 L) term register + "
                      "ceil(log2 K) unary-iteration work qubits",
}


def _clog2(x):
    return np.ceil(np.log2(np.maximum(np.asarray(x, float), 1.0)))


def ft_cost_arrays(value_range, t, eps, trotter, quadrature, n_terms_insert, n_qubits, split=None,
                   synthesis="ross-selinger", orders=ORDERS, extra_select=1.0):
    """Fault-tolerant counts for every order (arrays broadcast over value_range/t and eps).

    Args:
        value_range: R of the estimated quantity (per unit), array broadcastable with t.
        t: evolution time (s).
        eps: target error on the quantity.
        trotter: qhl.costing.trotter_cost.TrotterModel of the Hamiltonian.
        quadrature: (max ||[H,P]||, max ||[H,[H,P]]||) over inserted Pauli terms (rad/s units).
        n_terms_insert: L_n, Pauli terms of the inserted generator.
        n_qubits: system qubits n.
        split: {'trotter', 'synthesis', 'estimation'} fractions of eps.
        extra_select: extra select branches multiplying K (strata of a coherent sum; 1 for one component).

    Returns:
        {order: dict of arrays}: queries, steps, steps_trotter, steps_quadrature, rotations,
        t_count, depth_steps, gate_layers, logical_qubits, t_per_rotation, rotation_error, and
        'split' the three error shares.
    """
    s = dict(DEFAULT_SPLIT if split is None else split)
    r_range = np.asarray(value_range, float)
    t = np.asarray(t, float)
    eps = np.asarray(eps, float)
    e_t, e_s, e_e = s["trotter"] * eps, s["synthesis"] * eps, s["estimation"] * eps
    safe_r = np.maximum(r_range, 1e-300)
    queries = queries_for_amplitude_error(np.minimum(e_e / (2 * safe_r), 0.5))
    queries = np.asarray(queries, float)
    c1, c2 = quadrature
    g2 = 2 * c2 + 2 * c1**2
    r_quad = np.maximum(np.ceil(np.sqrt(r_range * t**2 * g2 / (6 * e_t))), 1.0)
    out = {}
    for p in orders:
        r_trot = trotter.steps(p, t, e_t / (8 * safe_r))
        r = np.maximum(r_trot, r_quad)
        k = (r + 1) * n_terms_insert * extra_select
        rot_a = r * trotter.rotations_per_step(p) + (r + 1) + n_terms_insert + extra_select
        eps_rot = np.minimum(e_s / (4 * safe_r) / rot_a, 0.5)
        t_rot = np.ceil(t_count_per_rotation(eps_rot, synthesis))
        q = n_qubits + 1 + _clog2(r + 1) + _clog2(n_terms_insert) + _clog2(extra_select) + _clog2(k)
        calls = 2 * queries + 1
        t_count = calls * (rot_a * t_rot + 4 * (k - 1)) + queries * 4 * np.maximum(q - 2, 0)
        layers = calls * (r * trotter.layers_per_step(p) + 2 * k) + queries * 2 * q
        out[p] = {"queries": queries, "steps": r, "steps_trotter": r_trot, "steps_quadrature": r_quad,
                  "rotations": calls * rot_a, "t_count": t_count, "depth_steps": calls * r,
                  "gate_layers": layers, "logical_qubits": q, "t_per_rotation": t_rot,
                  "rotation_error": eps_rot, "layers_per_shot": r * trotter.layers_per_step(p)}
    out["split"] = {"trotter": e_t, "synthesis": e_s, "estimation": e_e}
    return out


def choose_order(costs, orders=ORDERS, key="t_count"):
    """Per grid point, the order with the least `key`; returns (order array, dict of chosen arrays)."""
    stack = np.stack([np.broadcast_to(costs[p][key], np.broadcast(*[costs[q][key] for q in orders]).shape)
                      for p in orders])
    best = np.argmin(stack, axis=0)
    chosen = {}
    for name in costs[orders[0]]:
        vals = np.stack([np.broadcast_to(costs[p][name], best.shape) for p in orders])
        chosen[name] = np.take_along_axis(vals, best[None], axis=0)[0]
    return np.asarray(orders)[best], chosen
