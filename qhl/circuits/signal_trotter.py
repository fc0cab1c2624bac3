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
SIGNAL_MAX_SPINS spins (dense 2^n reference), within a time limit (each evaluation costs ~ r: the
search stops before a doubling whose predicted cost would pass it).
"""

import time as _time

import numpy as np

from .trotter_reference import trotter_gradient_exact

__all__ = ["signal_trotter_steps", "SIGNAL_MAX_SPINS", "SIGNAL_ORDERS", "ASSUMPTIONS"]

SIGNAL_MAX_SPINS = 8
SIGNAL_ORDERS = (1, 2)

ASSUMPTIONS = {
    "signal_trotter_steps": "smallest r with |S_trot - S| and |dS_trot/dh - dS/dh| (per unit_hz) within the "
                            "Trotter share of eps at t, every free parameter, from the exact engine and the dense "
                            "Trotterised reference (n <= 8, orders 1 and 2); error assumed to fall with r, checked at "
                            "r and r - 1; valid for the estimated quantities at this t, not for every observable",
}


def signal_trotter_steps(model, experiment, engine, time_s: float, order: int, target: float,
                         unit_hz: float = 1e3, r_max: int = 1 << 14, time_limit_s: float = 5.0):
    """Smallest r whose Trotterised S(t) and dS/dh (per unit_hz) are within `target` (module docstring).

    Args:
        model: HamiltonianModel (its free parameters are differentiated).
        experiment: the Experiment (dipolar scale); engine: qhl.exact.engine.ExactEngine of `model`.
        time_s: t (s); order: 1 or 2; target: allowed error (units of S and of dS/dh per unit_hz).
        r_max, time_limit_s: give up (None) beyond these (a budget passes the valid operator-norm count
            as r_max: a larger r is never needed).

    Returns:
        (r, error at r), or (None, None) when the cluster is too large, the order unsupported or a
        limit was reached.
    """
    if model.n_spins > SIGNAL_MAX_SPINS or order not in SIGNAL_ORDERS or target <= 0:
        return None, None
    s_exact, g_exact = engine.gradient(experiment, times=[time_s])
    s_exact, g_exact = complex(s_exact[0]), np.asarray(g_exact)[:, 0]
    start = _time.perf_counter()
    cache = {}
    per_step = [0.0]                      # seconds per Trotter step of one evaluation (cost ~ r)

    def err(r):
        if r not in cache:
            t0 = _time.perf_counter()
            s, g = trotter_gradient_exact(model, experiment, time_s, r, order)
            per_step[0] = max(per_step[0], (_time.perf_counter() - t0) / r)
            cache[r] = max(abs(s - s_exact), float(np.max(np.abs(g - g_exact))) * unit_hz)
        return cache[r]

    def affordable(r):                    # the doubling and the bisection below it, predicted
        return _time.perf_counter() - start + 2.5 * r * per_step[0] <= time_limit_s

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
