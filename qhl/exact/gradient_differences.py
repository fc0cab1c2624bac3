"""Hessians of experiments without a closed form (pulse sequences): differences of exact gradients.

For a free-induction decay the engine's Hessian is exact (qhl.exact.engine.ExactEngine.hessian,
second divided differences). For an experiment with a preparation (pulses, delays, finite
pulses) it is built here from the engine's exact gradients g(h) = dS/dh, which are analytic in h:
    D(delta)_mn = [g_n(h + delta e_m) - g_n(h - delta e_m)] / (2 delta),
    H_mn = (4 D(delta) - D(2 delta)) / 3          (Richardson; error O(delta^4)),
symmetrised, H = (H + H^T) / 2. The step is delta = STEP_PHASE / (2 pi T_tot), T_tot the whole
evolution (preparation + latest sampling time): the phases h T_tot move by STEP_PHASE, so the
truncation error is of order STEP_PHASE^4 ~ 1e-9 of |H| and the rounding error of order
1e-16 / STEP_PHASE ~ 1e-13 of |g| / delta (common practice for central differences; the step
balance as in W. H. Press et al., "Numerical Recipes", 3rd ed. (2007), sec. 5.7). Checked against
second differences of a dense reference in tests/test_sequence_hessian.py.
Cost: 4 P exact gradients for P parameters.
"""

import numpy as np

from ..spins.cluster import Delay, Pulse, flat_steps

__all__ = ["hessian_from_gradients", "STEP_PHASE"]

STEP_PHASE = 3e-3


def _evolution_s(experiment, t):
    prep = sum(st.seconds if isinstance(st, Delay) else (st.duration_s or 0.0) if isinstance(st, Pulse) else 0.0
               for st in flat_steps(getattr(experiment, "steps", ()) or ()))
    return prep + float(np.max(np.abs(t))) if np.size(t) else prep


def hessian_from_gradients(engine, experiment, t, free_values_hz, names):
    """(signal (T,), gradient (P, T), Hessian (P, P, T)) of `names` (free parameters) by Richardson
    differences of exact gradients (module docstring)."""
    model = engine.model
    base = model.free_values_hz if free_values_hz is None else np.asarray(free_values_hz, float)
    sig, grad = engine.gradient(experiment, t, base, names)
    total = max(_evolution_s(experiment, t), 1e-300)
    delta = STEP_PHASE / (2 * np.pi * total)
    cols = [list(model.free).index(nm) for nm in names]
    hess = np.zeros((len(names), len(names), t.size), complex)
    for r, j in enumerate(cols):
        diffs = []
        for h in (delta, 2 * delta):
            up, down = base.copy(), base.copy()
            up[j] += h
            down[j] -= h
            diffs.append((engine.gradient(experiment, t, up, names)[1]
                          - engine.gradient(experiment, t, down, names)[1]) / (2 * h))
        hess[r] = (4 * diffs[0] - diffs[1]) / 3
    hess = 0.5 * (hess + hess.transpose(1, 0, 2))
    return sig, grad, hess
