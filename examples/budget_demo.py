"""How much would it cost to learn the demo cluster's Hamiltonian? (model-based estimates)

Near-term shot counts beside fault-tolerant resources at one (t, eps), then a small sweep with
the fitted scaling exponents. Every number is a model: see budget.assumptions for each formula
and its source.
"""

import numpy as np

from qhl import demo_cluster
from qhl.costing import BudgetModel, BudgetSettings

bm = BudgetModel(demo_cluster(), settings=BudgetSettings(physical_error=1e-3))
t = bm.default_time_s
b = bm.budget(t, 0.01)
nt, ft = b.near_term, b.fault_tolerant
print(f"{b.cluster}: t = {t:g} s, eps = 0.01 per kHz")
print(f"near-term: {nt['shots_per_component']:,} shots per component (bound {nt['shots_per_component_bound']:,}), "
      f"{nt['shots_per_gradient']:,} per gradient (uniform allocation {nt['shots_per_gradient_uniform']:,}), "
      f"{nt['shots_per_hessian_entry']:,} per Hessian entry")
print(f"fault-tolerant: order {ft['trotter_order']}, {ft['trotter_steps']:,} Trotter steps, "
      f"{ft['logical_qubits']} logical qubits, depth {ft['depth']:.3e} layers, T-count {ft['t_count']:.3e}")
for p, o in ft["orders"].items():
    print(f"  order {p}: bound {int(o['steps_trotter']):,} steps, exact propagator {o.get('steps_trotter_empirical')}")
print(f"error budget: {b.error_budget}")
sc = b.surface_code
print(f"surface code at p = 1e-3: distance {sc['code_distance']}, {sc['physical_qubits']:.3e} physical qubits")
sw = bm.sweep(np.geomspace(t / 10, t * 10, 8), np.geomspace(1e-3, 1e-1, 6))
for name, (bt, be, et, ee) in sw.exponents.items():
    print(f"{name:<32} t^{bt:.2f} (expected {et:.2f})  eps^{be:.2f} (expected {ee:.2f})")
print(f"{len(b.assumptions)} stated assumptions, e.g. hoeffding: {b.assumptions['hoeffding']}")
