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

Amplitude estimation: the canonical phase-estimation variant (Brassard, Hoyer, Mosca, Tapp 2002)
with an m-qubit phase register, M = 2^m applications of the Grover iterate Q = A S_0 A^dag S_chi
per run (controlled Q^(2^j): only the two reflections need the control, since A A^dag = 1), the
inverse QFT on m qubits, and k runs whose median reaches confidence 1 - delta (all k in the totals).

Counts of one run (M iterate applications, calls = 2M + 1 of A or A^dag):
    rotations per call  R_A = r R_step + P_prep, P_prep = (r + 1) + L_n + S (state-preparation
        angles of the time, term and stratum registers);
    T-count  calls (r T_step + P_prep T_rot + 4 (K - 1)) + M 4 (Q - 1) + m (m - 1) T_rot,
    T-depth  calls (r D_step + P_prep T_rot + 2 (K - 1)) + M 2 (Q - 1) + m (m - 1) T_rot,
    with T_step / D_step the synthesised T-count / T-depth of one step (qhl.costing.synthesis),
    K = (r + 1) L_n S select branches by unary iteration (Babbush et al., PRX 8, 041015 (2018):
    K - 1 temporary ANDs of 4 T, T-depth 2 each, in sequence; from memory), the controlled
    reflection about |0..0> on Q + 1 qubits by a ladder of Q - 1 ANDs (same costs, from memory),
    and the inverse QFT's m (m - 1) / 2 controlled phases as two rotations each (placed in series);
    Clifford layers  calls (r C_step + 2K) + M 2 (Q + 1);  gate layers = T-depth + Clifford layers;
    logical qubits Q + m, Q = n + 1 + ceil(log2(r + 1)) + ceil(log2 L_n) + ceil(log2 S) + ceil(log2 K)
        + the coherent input's qubits (qhl.costing.coherent_input: n partners, the (j, k) pair
        register and a parity flag; its T-count and T-depth are added to every call of A).
Totals multiply one run by the k median repetitions.
"""

import numpy as np

from .amplitude_estimation import median_repetitions, phase_register_queries, queries_for_amplitude_error
from ..circuits.step_counts import rotation_profile_rule
from .trotter_cost import TRANSPILE_MAX_QUBITS
from .synthesis import measured_t_per_rotation, rotation_depth_profile, synthesised_step, t_count_per_rotation
from .trotter_cost import ORDERS

__all__ = ["DEFAULT_SPLIT", "ft_cost_arrays", "fixed_circuit_ft_counts", "choose_order", "step_profile", "ASSUMPTIONS"]

DEFAULT_SPLIT = {"trotter": 0.25, "synthesis": 0.05, "estimation": 0.70}
_PROFILE_TIME_S = 1e-6      # generic duration: no rotation angle is a Clifford multiple of pi/2

ASSUMPTIONS = {
    "error_split": "eps = e_Trotter + e_synthesis + e_estimation, default 0.25/0.05/0.70 of eps (a choice, not optimised)",
    "error_propagation": "||A~ - A|| <= delta moves the amplitude by <= 2 delta and the component by 4 R delta",
    "quadrature": "trapezoid rule over the r+1 step boundaries: error R t^2 max|g''|/(12 r^2), "
                  "|g''| <= 2||[H,[H,P]]|| + 2||[H,P]||^2 (Pauli 1-norm bounds)",
    "select": "unary iteration over K = (r+1) L S branches: K-1 temporary ANDs, 4 T and T-depth 2 each, in "
              "sequence (Babbush et al., PRX 8, 041015 (2018), from memory)",
    "reflection": "controlled reflection about |0...0> on Q+1 qubits: Q-1 ANDs, 4(Q-1) T, T-depth 2(Q-1) (from memory)",
    "ae_circuit": "canonical phase-estimation AE: M = 2^m iterate applications per run (2M+1 calls of A or A^dag), "
                  "m phase qubits, inverse QFT m(m-1)/2 controlled phases (2 rotations each); only the reflections "
                  "are controlled; k median runs, all in the totals",
    "logical_qubits": "n + 1 ancilla + ceil(log2(r+1)) time register + ceil(log2 L) term register + "
                      "ceil(log2 S) strata + ceil(log2 K) unary-iteration work qubits + m phase qubits + the "
                      "purified input's n partners, pair register and parity flag",
    "trotter_steps_used": "the smaller of the commutator-bound count and the exact-propagator count (both valid; the "
                          "exact one where the dense propagator fits, n <= 8), never below the quadrature count",
}


def _clog2(x):
    return np.ceil(np.log2(np.maximum(np.asarray(x, float), 1.0)))


def step_profile(trotter, order):
    """Marginal {rotations, rotation_depth, clifford_layers} of one step of `order` (cached on `trotter`):
    from the decomposed step circuit up to TRANSPILE_MAX_QUBITS qubits, from the count rule above."""
    cache = trotter.__dict__.setdefault("_ft_step_profile", {})
    if order not in cache:
        if trotter.terms.n_qubits > TRANSPILE_MAX_QUBITS:      # no circuit is built for large clusters
            cache[order] = rotation_profile_rule(trotter.terms, order)
        else:
            cache[order] = rotation_depth_profile(trotter.terms, order, _PROFILE_TIME_S)
    return cache[order]


def ft_cost_arrays(value_range, t, eps, trotter, quadrature, n_terms_insert, n_qubits, split=None,
                   synthesis="ross-selinger", orders=ORDERS, extra_select=1.0, delta=0.05, trotter_steps=None,
                   synthesise=False, n_observed=None):
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
        synthesis: 'ross-selinger' (measured gridsynth counts; the only unitary synthesis allowed).
        extra_select: S, extra select branches multiplying K (strata of a coherent sum; 1 for one component).
        delta: failure probability of the median of k runs.
        trotter_steps: optional {order: r} from the exact propagator at the same operator-norm error;
            the smaller valid count is used (scalar budgets only).
        synthesise: synthesise the actual rotations of one step at the budgeted error (scalar inputs;
            otherwise the median measured T per rotation times the step's rotation depth).
        n_observed: observed spins; when given, the purified coherent input of
            qhl.costing.coherent_input is counted in every call of A (qubits, T, T-depth, Cliffords).

    Returns:
        {order: dict of arrays}: queries (per run), runs, queries_total, steps, steps_trotter,
        steps_trotter_bound, steps_quadrature, rotations, t_count, t_depth, clifford_layers,
        gate_layers (= depth), depth_steps, logical_qubits, phase_qubits, t_per_rotation,
        t_per_rotation_rule, rotation_error, step_t_count, step_t_depth, step_rotation_depth,
        layers_per_shot; and 'split' the three error shares.
    """
    from ..base.errors import QhlInputError
    if synthesis != "ross-selinger":
        raise QhlInputError(f"synthesis {synthesis!r} cannot be used inside coherent amplitude estimation "
                            "(a mixed fallback is a probabilistic mixture, not one unitary)", key="synthesis")
    s = dict(DEFAULT_SPLIT if split is None else split)
    r_range = np.asarray(value_range, float)
    t = np.asarray(t, float)
    eps = np.asarray(eps, float)
    e_t, e_s, e_e = s["trotter"] * eps, s["synthesis"] * eps, s["estimation"] * eps
    safe_r = np.maximum(r_range, 1e-300)
    m_bhmt = np.asarray(queries_for_amplitude_error(np.minimum(e_e / (2 * safe_r), 0.5)), float)
    queries, m_bits = phase_register_queries(m_bhmt)
    runs = float(median_repetitions(delta))
    c1, c2 = quadrature
    g2 = 2 * c2 + 2 * c1**2
    r_quad = np.maximum(np.ceil(np.sqrt(r_range * t**2 * g2 / (6 * e_t))), 1.0)
    scalar = r_range.size == 1 and t.size == 1 and eps.size == 1
    from .coherent_input import coherent_input_counts
    cin = coherent_input_counts(n_qubits, n_observed) if n_observed else \
        {"qubits": 0, "t_count": 0, "t_depth": 0, "rotations": 0, "clifford_layers": 0}
    out = {}
    for p in orders:
        r_bound = trotter.steps(p, t, e_t / (8 * safe_r))
        r_trot = r_bound
        if trotter_steps and trotter_steps.get(p) and scalar:
            r_trot = np.minimum(r_bound, float(trotter_steps[p]))
        r = np.maximum(r_trot, r_quad)
        prof = step_profile(trotter, p)
        k = (r + 1) * n_terms_insert * extra_select
        n_prep = (r + 1) + n_terms_insert + extra_select + cin["rotations"]
        rot_a = r * prof["rotations"] + n_prep
        eps_rot = np.minimum(e_s / (4 * safe_r) / rot_a, 0.5)
        t_rot = np.asarray(measured_t_per_rotation(eps_rot), float)
        step_t = prof["rotations"] * t_rot
        step_d = prof["rotation_depth"] * t_rot
        step_c = prof["clifford_layers"] + 0 * t_rot
        if synthesise and scalar:
            ss = synthesised_step(trotter.terms, p, float(t) / float(r), float(eps_rot))
            step_t, step_d, step_c = (np.asarray(float(v)) for v in (ss.t_count, ss.t_depth, ss.clifford_layers))
            t_rot = np.asarray(ss.t_per_rotation)
        q = n_qubits + 1 + _clog2(r + 1) + _clog2(n_terms_insert) + _clog2(extra_select) + _clog2(k) + cin["qubits"]
        calls = 2 * queries + 1
        qft_rot = m_bits * (m_bits - 1)
        t_run, td_run, cl_run = _run_counts(queries, m_bits, q, k, t_rot, r * step_t + n_prep * t_rot + cin["t_count"],
                                            r * step_d + n_prep * t_rot + cin["t_depth"],
                                            r * step_c + cin["clifford_layers"])
        out[p] = {"queries": queries, "queries_bhmt": m_bhmt, "runs": runs + 0 * queries,
                  "queries_total": runs * queries, "steps": r, "steps_trotter": r_trot,
                  "steps_trotter_bound": r_bound, "steps_quadrature": r_quad,
                  "rotations": runs * (calls * rot_a + qft_rot), "t_count": runs * t_run, "t_depth": runs * td_run,
                  "clifford_layers": runs * cl_run, "gate_layers": runs * (td_run + cl_run),
                  "depth_steps": runs * calls * r, "logical_qubits": q + m_bits, "phase_qubits": m_bits + 0 * q,
                  "t_per_rotation": t_rot, "t_per_rotation_rule": t_count_per_rotation(eps_rot),
                  "rotation_error": eps_rot, "step_t_count": step_t, "step_t_depth": step_d,
                  "step_rotation_depth": prof["rotation_depth"] + 0 * t_rot,
                  "layers_per_shot": r * trotter.layers_per_step(p)}
    out["split"] = {"trotter": e_t, "synthesis": e_s, "estimation": e_e}
    return out


def _run_counts(queries, m_bits, q, k, t_rot, call_t, call_td, call_cl):
    """(T-count, T-depth, Clifford layers) of one amplitude-estimation run (module docstring): 2M + 1 calls of
    A (its own T, T-depth and Clifford layers call_*, plus the select over K branches), M controlled
    reflections on Q + 1 qubits and the inverse QFT on m phase qubits."""
    calls = 2 * queries + 1
    qft_rot = m_bits * (m_bits - 1)
    ands = np.maximum(q - 1, 0)
    t_run = calls * (call_t + 4 * (k - 1)) + queries * 4 * ands + qft_rot * t_rot
    td_run = calls * (call_td + 2 * (k - 1)) + queries * 2 * ands + qft_rot * t_rot
    cl_run = calls * (call_cl + 2 * k) + queries * 2 * (q + 1)
    return t_run, td_run, cl_run


def fixed_circuit_ft_counts(value_range, eps, steps, rotations, depth, n_terms_insert, n_qubits, n_observed=None,
                            split=None, delta=0.05):
    """Fault-tolerant counts of amplitude estimation on a given gradient circuit (scalars).

    For circuits whose rotations are counted, not modelled per step (a pulse-sequence experiment's
    gradient circuit: Trotterised delays and acquisition, the pulses' single-qubit rotations and the
    controlled-Pauli gadget; `rotations` of them per call of A). The same model as ft_cost_arrays
    (module docstring): queries M from e_E / (2R), k median runs, the time register over steps + 1
    insertion points and the term register (P_prep = steps + 1 + L_n more rotations, K = (steps + 1)
    L_n select branches), every rotation synthesised to e_S / (4R) / (rotations + P_prep) at the
    measured gridsynth T per rotation, the purified input when n_observed is given.
    T-depth is a bound here: the rotations of A are placed in series (their depth is not counted);
    Clifford layers per call are bounded by the circuit's gate depth `depth`.

    Returns:
        {queries, runs, rotations_per_call, rotation_error, t_per_rotation, t_count_per_call, t_count,
         t_depth_bound, clifford_layers, logical_qubits}.
    """
    s = dict(DEFAULT_SPLIT if split is None else split)
    r_range = max(float(value_range), 1e-300)
    e_s, e_e = s["synthesis"] * eps, s["estimation"] * eps
    queries, m_bits = phase_register_queries(queries_for_amplitude_error(min(e_e / (2 * r_range), 0.5)))
    runs = median_repetitions(delta)
    from .coherent_input import coherent_input_counts
    cin = coherent_input_counts(n_qubits, n_observed) if n_observed else \
        {"qubits": 0, "t_count": 0, "t_depth": 0, "rotations": 0, "clifford_layers": 0}
    k = (steps + 1) * n_terms_insert
    rot_a = rotations + (steps + 1) + n_terms_insert + cin["rotations"]
    eps_rot = min(e_s / (4 * r_range) / rot_a, 0.5)
    t_rot = float(measured_t_per_rotation(eps_rot))
    q = n_qubits + 1 + _clog2(steps + 1) + _clog2(n_terms_insert) + _clog2(k) + cin["qubits"]
    call_t = rot_a * t_rot + cin["t_count"]
    t_run, td_run, cl_run = _run_counts(queries, m_bits, q, k, t_rot, call_t, call_t, depth + cin["clifford_layers"])
    return {"queries": int(queries), "runs": int(runs), "rotations_per_call": int(rot_a),
            "rotation_error": float(eps_rot), "t_per_rotation": t_rot, "t_count_per_call": float(call_t),
            "t_count": float(runs * t_run), "t_depth_bound": float(runs * td_run),
            "clifford_layers": float(runs * cl_run), "logical_qubits": int(q + m_bits)}


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
