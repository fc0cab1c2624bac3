"""The purified (coherent) input: the amplitude amplitude estimation sees, against the exact derivative.

Reference: the exact engine's derivative (qhl.exact.engine, Daleckii-Krein divided differences)
against the purified Hadamard test evaluated with qiskit Statevector (scipy expm evolutions,
numpy Gauss-Legendre quadrature of the insertion time).
"""

import pytest

from qhl import ExactEngine, build_model
from qhl.costing import BudgetModel, BudgetSettings
from qhl.costing.coherent_input import coherent_amplitude, coherent_input_counts
from qhl.spins.cluster import Cluster, Experiment, Spin


def cluster(n, scale):
    """Invented protons (made-up geometry and offsets)."""
    pos = [(0.0, 0.0, 0.0), (1.9, 0.0, 0.3), (0.4, 2.0, 0.5), (2.2, 1.8, -1.0)]
    off = [-300.0, 250.0, 600.0, -80.0]
    spins = tuple(Spin("ABCD"[i], "1H", pos[i], off[i]) for i in range(n))
    return Cluster(9.4, "1H", spins, (), (Experiment("fid", 2e-4, 16, scale, 1e-3),), name=f"p{n}")


@pytest.mark.parametrize("n, scale, names", [(3, 1.0, ("dipolar:A-B", "offset:C")),
                                             (3, -0.5, ("dipolar:A-C",)),
                                             (4, 0.7, ("offset:B",))])
def test_amplitude_equals_the_exact_derivative(n, scale, names):
    c = cluster(n, scale)
    model = build_model(c)
    ex = c.experiments[0]
    t = 1.2e-4
    for name in names:
        _, g = ExactEngine(model).gradient(ex, times=[t], parameters=[name])
        for part, exact in (("re", g[0, 0].real * 1e3), ("im", g[0, 0].imag * 1e3)):
            a, r = coherent_amplitude(model, ex, name, t, part)
            assert 0 <= a <= 1
            assert r * (2 * a - 1) == pytest.approx(exact, rel=1e-8, abs=1e-10 * r)


def test_range_and_counts_enter_the_budget():
    # the coherent range equals the near-term single-shot range (same R, kappa = N_obs), and the
    # budget's logical qubits include the n partners, the pair register and the flag
    c = cluster(3, 1.0)
    model = build_model(c)
    _, r = coherent_amplitude(model, c.experiments[0], "dipolar:A-B", 1e-4, nodes=2)
    st = BudgetSettings(empirical_trotter=False, circuit_variance_max_spins=0, hessian_exact=False)
    bm = BudgetModel(c, settings=st)
    ft = bm.budget(1e-4, 0.01).fault_tolerant
    assert ft["worst_component"]["range"] == pytest.approx(r, rel=1e-12)
    extra = coherent_input_counts(3, 3)
    assert extra["qubits"] == 3 + 2 * 2 + 1 and extra["t_count"] == 16
    assert ft["logical_qubits"] >= 2 * 3 + 1 + extra["qubits"] - 3 + ft["phase_qubits"]
