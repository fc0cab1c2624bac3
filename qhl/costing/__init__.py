"""Costing: near-term shot budgets and fault-tolerant resources for Hamiltonian learning.

Modules: shots (concentration bounds, exact variances, allocation), family_variance (shots from
the compiled estimator's exact variance, small clusters), near_term (per-cluster
variances over t), amplitude_estimation, synthesis (T per rotation), trotter_order4 and
trotter_cost (Trotter steps, gates per step), fault_tolerant (AE circuit counts), surface_code
(physical footprint), budget (the Budget API and sweeps), budget_plots (log-log PNGs).

Imports: qhl.base, qhl.spins, qhl.exact, qhl.circuits, qhl.emulation.
"""

_PUBLIC = {name: ".budget" for name in ("Budget", "BudgetModel", "BudgetSettings", "BudgetSweep", "all_assumptions",
                                          "fit_exponents")}
__all__ = list(_PUBLIC)


from ..base.lazy import lazy_attributes  # noqa: E402

__getattr__, __dir__ = lazy_attributes(__name__, _PUBLIC)
