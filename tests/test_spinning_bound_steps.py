"""Spinning experiments on clusters above the Richardson tier: Trotter steps from the rotor-bound Hamiltonian.

References (none imports qhl's computing code):
  * tests/reference_spinning.py: dipolar_factor (the rotor convention rebuilt with
    scipy.spatial.transform.Rotation) and dense_spinning_signal (time-ordered scipy expm propagation);
  * commutator scaling of the product-formula error: Childs, Su, Tran, Wiebe, Zhu, "Theory of Trotter
    error with commutator scaling", PRX 11, 011020 (2021): larger coefficients never shrink the bound;
  * signals of the compiled circuits: qiskit.quantum_info.Operator.
The cluster is invented: seven protons at made-up positions with made-up offsets.
"""

import json

import numpy as np
import pytest
from qiskit.quantum_info import Operator

from qhl.cli import main
from qhl.circuits.spinning_circuits import spinning_evolution, spinning_evolution_circuit
from qhl.costing.trotter_cost import rotor_bound_model, trotter_model
from qhl.spins.cluster_file import parse_cluster_toml
from qhl.spins.model import build_model

from reference_dense import initial_and_detection
from reference_spinning import dense_spinning_signal, dipolar_factor

POS = [(0.0, 0.0, 0.0), (2.3, 0.5, 1.2), (-1.7, 1.6, 0.4), (0.5, 2.7, -1.0), (2.9, 2.4, 0.9),
       (-0.8, -2.1, 1.3), (1.4, -1.2, -2.2)]
OFFSETS = [1500.0, -900.0, 300.0, 200.0, -650.0, 820.0, -240.0]


def _text(n, rate=12500.0, t_max=8e-5):
    out = ['name = "made-up-rotor-7"', "field_tesla = 9.4", 'observe = "1H"', "field_direction = [0.3, 0.2, 1.0]"]
    for k in range(n):
        out += ["[[spin]]", f'label = "P{k}"', 'isotope = "1H"', f"position_angstrom = {list(POS[k])}",
                f"offset_hz = {OFFSETS[k]}"]
    out += ["[[experiment]]", 'name = "mas"', f"t_max_s = {t_max}", "points = 8", f"spinning_hz = {rate}"]
    return "\n".join(out) + "\n"


def test_rotor_bound_coefficients_bound_the_time_dependent_hamiltonian():
    # every coupling of the rotor-bound model is >= its largest |h_n s_n(t)| over a rotor period (sampled on
    # 2,000 points by the dense reference's own rotor convention), and never below the static one
    c = parse_cluster_toml(_text(5), "made_up.toml")
    m = build_model(c)
    ex = c.experiments[0]
    bound = rotor_bound_model(m, ex).hamiltonian
    static = trotter_model(m, None).hamiltonian
    t = np.linspace(0, 1 / ex.spinning_hz, 2000)
    n = m.n_spins
    for p in m.parameters:
        if p.kind != "dipolar":
            continue
        i, j = (m.labels.index(s) for s in p.spins)
        zz = ["I"] * n
        zz[n - 1 - i] = zz[n - 1 - j] = "Z"
        label = "".join(zz)
        got = abs(bound.coeffs[list(bound.paulis.to_labels()).index(label)])
        peak = np.abs(dipolar_factor(c, ex, p.spins, t)).max() * abs(static.coeffs[list(static.paulis.to_labels())
                                                                                   .index(label)])
        assert got >= peak * (1 - 1e-9)
        assert got >= abs(static.coeffs[list(static.paulis.to_labels()).index(label)]) * (1 - 1e-12)


@pytest.mark.slow        # ~25 s on two cores: runs in CI's slow pass
def test_seven_spin_spinning_budget_steps_keep_the_signal_error_within_the_share(capsys, tmp_path):
    # seven spins: above the Richardson tier (6), so the steps come from the rotor-bound commutator bound with
    # ||U_r - U|| <= 0.25 eps / (2 kappa); the compiled circuit's signal at those steps (233 at eps = 0.2),
    # against the dense time-ordered propagation (100 midpoint slices per period, O(slice^2), its own error
    # well below 1e-3), stays within 0.25 eps (measured 1e-5 against an 800-slice reference: the bound is loose)
    path = tmp_path / "rotor7.toml"
    path.write_text(_text(7))
    eps = 0.2
    rc = main(["budget", str(path), "--precision", str(eps), "--json"])
    out = capsys.readouterr()
    assert rc == 0, out.err
    (e,) = json.loads(out.out)["spinning"]
    assert e["steps_from"].startswith("commutator bound")
    r = e["trotter_steps"]
    assert r > e["steps_rotor_rule"] == 8
    c = parse_cluster_toml(_text(7), "made_up.toml")
    m = build_model(c)
    ex = c.experiments[0]
    u = Operator(spinning_evolution_circuit(spinning_evolution(m, ex, ex.t_max_s, r, 2))).data
    rho, det = initial_and_detection(m)
    s_circ = np.trace(det @ u @ rho @ u.conj().T) / np.trace(det @ rho)
    s_ref = dense_spinning_signal(c, m, ex, [ex.t_max_s], slices_per_period=100)[0]
    assert abs(s_circ - s_ref) <= 0.25 * eps
    ft = e["fault_tolerant"]
    assert ft["trotter_steps"] >= r


def _random_text(n, seed=3, rate=20000.0, t_max=2e-4):
    """An invented n-proton cluster: random positions at least 1.6 A apart, random offsets."""
    rng = np.random.default_rng(seed)
    pts = []
    while len(pts) < n:
        p = rng.uniform(-1, 1, 3) * n ** (1 / 3) * 1.3
        if all(np.linalg.norm(p - q) > 1.6 for q in pts):
            pts.append(p)
    out = [f'name = "made-up-rotor-{n}"', "field_tesla = 9.4", 'observe = "1H"', "field_direction = [0.3, 0.2, 1.0]"]
    for k, p in enumerate(pts):
        out += ["[[spin]]", f'label = "H{k}"', 'isotope = "1H"',
                f"position_angstrom = [{p[0]:.3f}, {p[1]:.3f}, {p[2]:.3f}]", f"offset_hz = {rng.uniform(-2e3, 2e3):.1f}"]
    out += ["[[experiment]]", 'name = "mas"', f"t_max_s = {t_max}", "points = 16", f"spinning_hz = {rate}"]
    return "\n".join(out) + "\n"


def test_range_bound_is_the_integral_of_the_rotor_factor_and_bounds_the_compiled_range():
    # R_n <= 2 (2 pi ||g_n||_1) int_0^t |s_n| kappa unit_hz: the integral against scipy.integrate.quad of the
    # dense reference's |s_n(t)| (its own rotor convention); the compiled estimator's range (sum |beta_a| over
    # insertion points) at r steps lies below it and approaches it as r grows (triangle inequality per step)
    from scipy.integrate import quad
    from qhl.circuits.spinning_circuits import spinning_evolution, spinning_insertion_points
    from qhl.costing.budget import BudgetModel
    c = parse_cluster_toml(_text(4, t_max=1.3e-4), "made_up.toml")
    m = build_model(c)
    ex = c.experiments[0]
    bm = BudgetModel(c)
    kappa = float(sum(bool(o) for o in bm.model.observed))      # kappa = N_obs (qhl.costing.shots)
    bounds = bm._spinning_range_bounds(ex, ex.t_max_s, kappa)
    for p in m.parameters:
        if p.kind != "dipolar" or p.name not in bounds:
            continue
        f = lambda u: abs(dipolar_factor(c, ex, p.spins, u)[0])
        pts = np.linspace(0, ex.t_max_s, 41)
        integral = sum(quad(f, a, b, limit=200, epsabs=1e-14)[0] for a, b in zip(pts[:-1], pts[1:]))
        g1 = float(np.abs(p.generator.coeffs).sum())
        want = 2 * 2 * np.pi * g1 * integral * kappa * 1e3
        assert bounds[p.name] == pytest.approx(want, rel=1e-5)
        ranges = []
        for r in (8, 512):
            evo = spinning_evolution(m, ex, ex.t_max_s, r, 2)
            ranges.append(2 * sum(abs(a.beta) for a in spinning_insertion_points(evo, p.name)) * kappa * 1e3)
        assert ranges[0] <= bounds[p.name] * (1 + 1e-9) and ranges[1] <= bounds[p.name] * (1 + 1e-9)
        assert ranges[1] == pytest.approx(bounds[p.name], rel=1e-2)


def test_24_spin_spinning_budget_runs_on_the_count_rule(capsys, tmp_path):
    # 24 spins: no exact engine, no circuit listing; steps from the rotor-bound commutator bound, counts by the
    # rule, ranges by the integral bound (model-based estimates, said per quantity)
    path = tmp_path / "rotor24.toml"
    path.write_text(_random_text(24))
    rc = main(["budget", str(path), "--json"])
    out = capsys.readouterr()
    assert rc == 0, out.err
    (e,) = json.loads(out.out)["spinning"]
    assert e["signal_circuit"]["qubits"] == 24
    assert e["trotter_steps"] > e["steps_rotor_rule"] == 32
    assert e["steps_from"].startswith("commutator bound")
    assert e["counts_method"].startswith("count rule")
    assert e["near_term"]["method"].startswith("bound: 2 (2 pi")
    assert e["fault_tolerant"]["trotter_steps"] >= e["trotter_steps"]
    assert e["fault_tolerant"]["amplitude_estimation"]["t_count"] > e["signal_circuit"]["t_count"]
