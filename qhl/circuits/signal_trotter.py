"""Trotter steps a learner needs: the error of the signal and its gradient, not of the propagator.

The commutator bounds and the exact-propagator count (qhl.costing.trotter_cost) control the
operator-norm error ||S_p(t/r)^r - exp(-iHt)||, which bounds every observable at once. A learner
only needs the quantities it estimates to be right: the signal S(t) and the derivatives dS/dh_n
at the time t. This module finds the smallest r whose Trotterised values (the one Trotterised
reference, qhl.circuits.trotter_reference) are within `target` of the exact engine's
(qhl.exact.engine):
    err(r) = max(|S_trot(t) - S(t)|, max_n |dS_trot/dh_n - dS/dh_n| * unit_hz)
(derivatives per unit_hz, the units of eps). Search: r doubles from 1 until err(r) <= target, then
bisection to the exact integer (common practice: the error is taken to fall with r; it is checked
at the returned r and at r - 1). Orders 1 and 2 only (the reference builds those); clusters up to
SIGNAL_MAX_SPINS spins (dense 2^n reference), within a cost limit: each evaluation costs about r
times step_seconds(n, P), a model of this machine's time per Trotter step of the reference
(measured: 1.6 ms at 3 spins and 6 parameters, 3 ms at 4 and 10, 19-22 ms at 6 and 21, 0.55-0.60 s at
8 and 36, orders 1-2), and the search stops before a doubling whose predicted cost would pass the
limit. The limit is on the model, not on a clock, so the same input always gives the same r (a
clock made the answer depend on the machine's load: the same budget came out with order 1 or 2).
"""

import numpy as np

from .trotter_reference import trotter_gradient_exact

__all__ = ["signal_trotter_steps", "step_seconds", "SIGNAL_MAX_SPINS", "SIGNAL_ORDERS", "ASSUMPTIONS"]

SIGNAL_MAX_SPINS = 8
SIGNAL_ORDERS = (1, 2)
STEP_FIXED_S = 1.5e-3           # per Trotter step of the reference: fixed part (module docstring)
STEP_UNIT_S = 2.3e-7            # ... and per (1 + P) 4^n (dense 2^n x 2^n products for S and P derivatives)


def step_seconds(n_spins: int, n_parameters: int) -> float:
    """Model time (s) of one Trotter step of trotter_gradient_exact (module docstring)."""
    return STEP_FIXED_S + STEP_UNIT_S * (1 + n_parameters) * 4.0 ** n_spins

ASSUMPTIONS = {
    "signal_trotter_steps": "smallest r with |S_trot - S| and |dS_trot/dh - dS/dh| (per unit_hz) within the "
                            "Trotter share of eps at t, every free parameter, from the exact engine and the dense "
                            "Trotterised reference (n <= 8, orders 1 and 2); error assumed to fall with r, checked at "
                            "r and r - 1; valid for the estimated quantities at this t, not for every observable",
}


def signal_trotter_steps(model, experiment, engine, time_s: float, order: int, target: float,
                         unit_hz: float = 1e3, r_max: int = 1 << 14, cost_limit_s: float = 5.0):
    """Smallest r whose Trotterised S(t) and dS/dh (per unit_hz) are within `target` (module docstring).

    Args:
        model: HamiltonianModel (its free parameters are differentiated).
        experiment: the Experiment (dipolar scale); engine: qhl.exact.engine.ExactEngine of `model`.
        time_s: t (s); order: 1 or 2; target: allowed error (units of S and of dS/dh per unit_hz).
        r_max, cost_limit_s: give up (None) beyond r_max steps or beyond cost_limit_s seconds of the cost
            model step_seconds (deterministic; a budget passes the valid operator-norm count as r_max: a
            larger r is never needed).

    Returns:
        (r, error at r), or (None, None) when the cluster is too large, the order unsupported or a
        limit was reached.
    """
    if model.n_spins > SIGNAL_MAX_SPINS or order not in SIGNAL_ORDERS or target <= 0:
        return None, None
    s_exact, g_exact = engine.gradient(experiment, times=[time_s])
    s_exact, g_exact = complex(s_exact[0]), np.asarray(g_exact)[:, 0]
    cache = {}
    per_step = step_seconds(model.n_spins, len(model.free))

    def err(r):
        if r not in cache:
            s, g = trotter_gradient_exact(model, experiment, time_s, r, order)
            cache[r] = max(abs(s - s_exact), float(np.max(np.abs(g - g_exact))) * unit_hz)
        return cache[r]

    def affordable(r):                    # the doubling and the bisection below it, predicted by the model
        return (sum(cache) + 2.5 * r) * per_step <= cost_limit_s

    lo, hi = 0, 1
    while err(hi) > target:
        nxt = min(2 * hi, r_max)
        if hi >= r_max or not affordable(nxt):
            return None, None
        lo, hi = hi, nxt
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if err(mid) <= target:
            hi = mid
        else:
            lo = mid
    return hi, err(hi)
