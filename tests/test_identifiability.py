"""What the observed signal can and cannot see (qhl.spins.identifiability), the default free set,
and fits that diverge (qhl.learning.fitting).

References:
- If K commutes with H, rho0 and O then Tr[O e^{-i(H+aK)t} rho0 e^{i(H+aK)t}] does not depend on
  a (Heisenberg picture; Levitt, "Spin Dynamics", 2nd ed., 2008, ch. 15; common practice). The
  checks below compute the signal independently with scipy.linalg.expm on dense matrices built
  from qiskit's SparsePauliOp.to_matrix, and the commutators with qiskit's Pauli algebra.
- Secular high-field heteronuclear couplings are 2 Iz Sz (Levitt 2008; REFERENCES.md).
"""

import json

import numpy as np
import pytest
from scipy.linalg import expm

from qhl.cli import main
from qhl.spins.cluster import Cluster, Experiment, Spin
from qhl.spins.model import build_model
from qhl.spins.identifiability import invisible_directions, unidentifiable_parameters
from qhl.learning.fitting import fit, learn, GradientProvider
from qhl.exact.likelihood import Dataset


def hc_cluster():
    """Invented 1H-observed CH3-like cluster: three protons and one 13C."""
    spins = (Spin("H1", "1H", (0, 0, 0), -300.0), Spin("H2", "1H", (1.8, 0, 0), 250.0),
             Spin("H3", "1H", (0.4, 2.1, 0.5), 600.0), Spin("C1", "13C", (0.9, 1.0, 0.3), 1200.0))
    exps = (Experiment("static", 4e-4, 64, 1.0, 1e-3), Experiment("scaled", 1.5e-3, 64, 0.3, 1e-3))
    return Cluster(9.4, "1H", spins, (), exps, name="hc4")


def cnh_fragment():
    """Invented 13C-observed fragment: two 13C, two 1H, one 15N."""
    spins = (Spin("C1", "13C", (0, 0, 0), -800.0), Spin("C2", "13C", (1.52, 0, 0), 1500.0),
             Spin("H1", "1H", (-0.5, 0.95, 0.3), 200.0), Spin("H2", "1H", (-0.45, -0.9, 0.4), -150.0),
             Spin("N1", "15N", (2.1, 1.2, 0.2), 300.0))
    exps = (Experiment("static", 1e-3, 96, 1.0, 1e-3), Experiment("scaled", 4e-3, 96, 0.2, 1e-3))
    return Cluster(9.4, "13C", spins, (), exps, name="cnh")


def dense_signal(model, values, times):
    """Tr[O e^{-iHt} rho0 e^{iHt}] with scipy's expm (independent of qhl's engines)."""
    h = model.hamiltonian(None, values).to_matrix()
    rho = model.initial_operator().to_matrix()
    o = model.detection_operator().to_matrix()
    out = []
    for t in times:
        u = expm(-1j * h * t)
        out.append(np.trace(o @ u @ rho @ u.conj().T))
    return np.array(out)


def test_unobserved_lone_offset_is_invisible_and_dense_signal_agrees():
    model = build_model(hc_cluster(), free="*")
    assert unidentifiable_parameters(model) == ["offset:C1"]
    # Independent check: moving offset:C1 by 5 kHz leaves the dense signal unchanged, moving a
    # proton offset by 5 Hz does not.
    times = np.linspace(0, 4e-4, 9)
    v = model.values_hz
    base = dense_signal(model, v, times)
    k_c, k_h = model.names.index("offset:C1"), model.names.index("offset:H1")
    moved_c, moved_h = v.copy(), v.copy()
    moved_c[k_c] += 5000.0
    moved_h[k_h] += 5.0
    np.testing.assert_allclose(dense_signal(model, moved_c, times), base, atol=1e-9)
    assert np.max(np.abs(dense_signal(model, moved_h, times) - base)) > 1e-3


def test_fragment_invisible_combinations():
    """13C observed: the 15N offset, the sum of the 1H offsets and the sum of the H-N couplings."""
    model = build_model(cnh_fragment(), free="*")
    basis = invisible_directions(model)
    assert basis.shape[1] == 3
    names = list(model.free)
    expect = {("offset:N1",): [1.0], ("offset:H1", "offset:H2"): [1, 1], ("dipolar:H1-N1", "dipolar:H2-N1"): [1, 1]}
    proj = basis @ basis.T
    for group, w in expect.items():
        v = np.zeros(len(names))
        for g, x in zip(group, w):
            v[names.index(g)] = x
        v /= np.linalg.norm(v)
        assert np.linalg.norm(proj @ v - v) < 1e-9, group        # inside the invisible span
    # The difference of the H offsets is visible (1H-1H flip-flops feel it): it is not in the span.
    d = np.zeros(len(names))
    d[names.index("offset:H1")], d[names.index("offset:H2")] = 1, -1
    assert np.linalg.norm(proj @ d) < 1e-9
    # Independent check with dense matrices: shifting both H offsets by 3 kHz changes nothing.
    times = np.linspace(0, 1e-3, 7)
    v0 = model.values_hz
    v1 = v0.copy()
    v1[model.names.index("offset:H1")] += 3000.0
    v1[model.names.index("offset:H2")] += 3000.0
    np.testing.assert_allclose(dense_signal(model, v1, times), dense_signal(model, v0, times), atol=1e-9)


def test_default_free_set_leaves_out_invisible_parameters():
    m = build_model(hc_cluster())
    assert m.hidden == ("offset:C1",) and "offset:C1" not in m.free and "dipolar:H1-C1" in m.free
    f = build_model(cnh_fragment())
    assert set(f.hidden) == {"offset:H1", "offset:H2", "offset:N1", "dipolar:H1-N1", "dipolar:H2-N1"}
    # an explicit free set keeps every match
    assert "offset:C1" in build_model(hc_cluster(), free=["offset:*"]).free


@pytest.mark.parametrize("cluster", [hc_cluster, cnh_fragment])
def test_default_learn_converges_on_heteronuclear_clusters(cluster):
    """Before: offset:C1 ran to 1e16 Hz (1H/13C) and the fragment to 1e17 Hz."""
    rep = learn(cluster(), max_iter=60, seed=1)
    assert rep.fit.converged and not rep.fit.diverged
    assert rep.relative_error < 5 * rep.crb_relative_error
    assert np.all(np.isfinite(rep.fit.stderr_hz))


def test_explicitly_freed_invisible_parameter_is_fixed_with_note(capsys):
    rep = learn(hc_cluster(), free=["offset:*"], max_iter=40)
    assert rep.fixed_unlearnable == ("offset:C1",) and "offset:C1" not in rep.fit.names
    assert rep.fit.converged


def test_cli_notes_for_hidden_and_fixed(tmp_path, capsys):
    toml = tmp_path / "hc.toml"
    toml.write_text("""name = "hc"
field_tesla = 9.4
observe = "1H"
[[spin]]
label = "H1"
isotope = "1H"
position_angstrom = [0, 0, 0]
offset_hz = -300.0
[[spin]]
label = "H2"
isotope = "1H"
position_angstrom = [1.8, 0, 0]
offset_hz = 250.0
[[spin]]
label = "C1"
isotope = "13C"
position_angstrom = [0.9, 1.0, 0.3]
offset_hz = 1200.0
[[experiment]]
name = "static"
t_max_s = 4e-4
points = 48
noise = 1e-3
""")
    assert main(["learn", str(toml)]) == 0
    cap = capsys.readouterr()
    assert "left out of the default free set" in cap.err and "offset:C1" in cap.err
    assert "offset:C1" not in cap.out
    assert main(["fisher", str(toml), "--free", "offset:*"]) == 0
    cap = capsys.readouterr()
    assert "UNLEARNABLE" in cap.out and "offset:C1" in cap.err


class _Runaway(GradientProvider):
    """S = 100 Hz / h on one point with data 0: the cost falls towards 0 only as h runs to infinity
    (each Gauss-Newton step doubles h)."""

    parameter_names = ("a",)

    def signals_and_gradients(self, values_hz, times):
        h = values_hz[0]
        return {"x": (np.array([100.0 / h + 0j]), np.array([[-100.0 / h**2 + 0j]]))}


def test_diverging_fit_stops_and_says_so():
    data = Dataset({"x": (np.array([0.0]), np.array([0.0 + 0j]), 1e-6)})
    res = fit(_Runaway(), data, [10.0], max_iter=500)
    assert res.diverged and not res.converged and "diverged" in res.message
    assert res.iterations < 500


def test_cli_diverged_fit_exits_nonzero_without_table(monkeypatch, capsys):
    import qhl.learning.fitting as fitting
    monkeypatch.setattr(fitting, "DIVERGENCE_FACTOR", 1e-9)     # any step counts as a runaway
    assert main(["learn", "--max-iter", "3"]) == 1
    cap = capsys.readouterr()
    assert "diverged" in cap.err and "fitted (Hz)" not in cap.out
    assert main(["learn", "--max-iter", "3", "--json"]) == 1
    assert json.loads(capsys.readouterr().out)["diverged"] is True


def test_local_minimum_is_flagged_by_goodness_of_fit(capsys):
    """Seed 0 on the fragment stops in a local minimum (cost ~1056 nats for 384 data values).
    Reference: 2C ~ chi-square(N - P) at the optimum (Kay 1993, ch. 7), p from scipy.stats.chi2."""
    from scipy.stats import chi2
    bad = learn(cnh_fragment(), max_iter=60, seed=0)
    good = learn(cnh_fragment(), max_iter=60, seed=1)
    assert bad.goodness_of_fit["dof"] == 384 - 10
    assert bad.goodness_of_fit["p_value"] == pytest.approx(chi2.sf(2 * bad.fit.cost, 374))
    assert bad.goodness_of_fit["p_value"] < 1e-6 < good.goodness_of_fit["p_value"]
