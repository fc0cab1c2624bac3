"""Learnability map over the cycle time of a multiple-pulse sequence (axis 'cycle_time_s').

Checks: the cycle (Floquet) propagator against the zeroth-order average Hamiltonian built here with
dense numpy/scipy matrices (nothing of qhl); the map's Fisher numbers against the exact engine's
gradients of the pulse-sequence experiments "k cycles, then read at t = 0"; the CLI rows against the
API; bad input refused in one line.
"""

import json

import numpy as np
import pytest
import scipy.linalg as sla

from qhl.base.errors import QhlInputError
from qhl.spins.cluster import Cluster, Experiment, Pair, Spin

# ---------------------------------------------------------------- an invented three-proton cluster

OFFSETS_HZ = (1200.0, -700.0, 400.0)
DIPOLAR_HZ = {(0, 1): 3000.0, (1, 2): -2000.0, (0, 2): 1500.0}
J_HZ = {(0, 1): 7.0}


def _trio():
    spins = tuple(Spin(f"S{i}", "1H", None, v) for i, v in enumerate(OFFSETS_HZ))
    pairs = tuple(Pair((f"S{i}", f"S{j}"), j_hz=J_HZ.get((i, j)), dipolar_hz=d) for (i, j), d in DIPOLAR_HZ.items())
    return Cluster(9.4, "1H", spins, pairs, (Experiment("fid", 1e-3, 8, 1.0, 1e-3),), name="trio")


# ---------------------------------------------------------------- dense reference (numpy/scipy only)

_P = {"x": np.array([[0, 1], [1, 0]], complex) / 2, "y": np.array([[0, -1j], [1j, 0]]) / 2,
      "z": np.array([[1, 0], [0, -1]], complex) / 2}


def _op(axis, q, n):
    """I_axis of spin q in qiskit's order (qubit q is bit q: the rightmost Kronecker factor is qubit 0)."""
    out = np.ones((1, 1), complex)
    for k in range(n - 1, -1, -1):
        out = np.kron(out, _P[axis] if k == q else np.eye(2))
    return out


def _parts(n=3):
    """(offset part, dipolar part, J part) of H in rad/s: offsets nu_i Iz_i, secular homonuclear dipolar
    d (2 IzIz - IxIx - IySy), J (I.I), each times 2 pi (the convention of qhl's docs, retyped as data)."""
    off = sum(2 * np.pi * v * _op("z", i, n) for i, v in enumerate(OFFSETS_HZ))
    dip = sum(2 * np.pi * d * (2 * _op("z", i, n) @ _op("z", j, n) - _op("x", i, n) @ _op("x", j, n)
                               - _op("y", i, n) @ _op("y", j, n)) for (i, j), d in DIPOLAR_HZ.items())
    jj = sum(2 * np.pi * v * sum(_op(a, i, n) @ _op(a, j, n) for a in "xyz") for (i, j), v in J_HZ.items())
    return off, dip, jj


def _pulse(angle_deg, phase_deg, n=3):
    th, ph = np.deg2rad(angle_deg), np.deg2rad(phase_deg)
    g = sum(np.cos(ph) * _op("x", q, n) + np.sin(ph) * _op("y", q, n) for q in range(n))
    return sla.expm(-1j * th * g)


# WAHUHA (Waugh, Huber and Haeberlen, PRL 20, 180 (1968)): tau - 90x - tau - 90(-y) - 2 tau - 90y - tau - 90(-x) - tau,
# written here as (delay in units of tau, or (angle, phase)) from the paper's timing.
_WAHUHA = (1, (90, 0), 1, (90, 270), 2, (90, 90), 1, (90, 180), 1)


def _average_hamiltonian(h, steps=_WAHUHA):
    """Zeroth-order average Hamiltonian (U. Haeberlen and J. S. Waugh, Phys. Rev. 175, 453 (1968)):
    H_avg = sum_j (tau_j / t_c) R_j^dag H R_j, R_j the product of the pulses before window j (toggling frame)."""
    r = np.eye(h.shape[0], dtype=complex)
    total = sum(s for s in steps if not isinstance(s, tuple))
    out = np.zeros_like(h)
    for s in steps:
        if isinstance(s, tuple):
            r = _pulse(*s) @ r
        else:
            out += (s / total) * (r.conj().T @ h @ r)
    return out


def test_wahuha_average_hamiltonian_is_the_paper_s():
    # Waugh, Huber and Haeberlen (1968): the zeroth-order average removes the secular dipolar term, keeps
    # the isotropic J term, and turns each offset Omega Iz into Omega (+-Ix +-Iy +-Iz)/3, a rotation at
    # Omega/sqrt(3). Checked on the dense reference built here (self-consistency of the reference).
    off, dip, jj = _parts()
    assert np.max(np.abs(_average_hamiltonian(dip))) < 1e-9 * np.max(np.abs(dip))
    assert np.allclose(_average_hamiltonian(jj), jj, atol=1e-9 * np.max(np.abs(jj)))
    one = _average_hamiltonian(_op("z", 0, 3))
    assert np.sort(np.linalg.eigvalsh(one))[[0, -1]] == pytest.approx([-0.5 / np.sqrt(3), 0.5 / np.sqrt(3)],
                                                                       abs=1e-12)


def test_cycle_propagator_tends_to_the_average_hamiltonian():
    # As t_c -> 0 the cycle propagator U_c -> exp(-i t_c H_avg) (average Hamiltonian theory, Haeberlen
    # and Waugh 1968). WAHUHA's toggling frames run z, y, x, y, z (a symmetric cycle), so the first-order
    # Magnus term vanishes and the effective Hamiltonian differs from H_avg by O(t_c^2 ||H||^3): the
    # propagator error is O((t_c ||H||)^3) (W. K. Rhim, D. D. Elleman and R. W. Vaughan, J. Chem. Phys. 59,
    # 3740 (1973), symmetric cycles; from memory). Tolerance: 0.01 (t_c ||H||)^3 with ||H|| the spectral
    # norm (measured 0.0015 (t_c ||H||)^3 on this cluster at t_c = 1-4 us, ||H|| t_c <= 0.11); order check:
    # halving t_c divides the error by at least 6 (measured 8.0, a pure cubic term; the same cycle with its
    # windows reordered asymmetrically (2 tau, tau, tau, tau, tau) measured 4.0, a first-order term).
    from qhl.exact.engine import ExactEngine
    from qhl.exact.stroboscopic import cycle_propagator
    from qhl.spins.model import build_model
    from qhl.spins.sequences import named_block

    off, dip, jj = _parts()
    h = off + dip + jj
    h_avg = _average_hamiltonian(h)
    norm = np.linalg.norm(h, 2)
    engine = ExactEngine(build_model(_trio(), free=("offset:*",)))
    errors = []
    for tc in (4e-6, 2e-6, 1e-6):
        u = cycle_propagator(engine, named_block("wahuha", tc / 6))
        err = np.linalg.norm(u - sla.expm(-1j * tc * h_avg), 2)
        assert err <= 0.01 * (tc * norm) ** 3, (tc, err, (tc * norm) ** 3)
        errors.append(err)
    assert errors[0] / errors[1] > 6 and errors[1] / errors[2] > 6
    # and not trivially: the free evolution over t_c is far from the average (dipolar term present)
    assert np.linalg.norm(sla.expm(-1j * 1e-6 * h) - sla.expm(-1j * 1e-6 * h_avg), 2) > 100 * errors[2]


# ---------------------------------------------------------------- the map against the exact engine


FREE = ("offset:*", "dipolar:*")


@pytest.fixture(scope="module")
def small_map():
    from qhl.survey.learnability_map import learnability_map
    return learnability_map(_trio(), "cycle_time_s", (2e-5, 5e-5), t_max_s=2e-4, noise=1e-3, free=FREE,
                            sequence="solid-echo", thresholds={"max_t_count": 1e30})


def test_map_crbs_equal_the_exact_engine_fisher(small_map):
    # Consistency with the exact engine: at each cycle time the Fisher matrix is
    # F = sum_k Re[conj(dS_k) dS_k^T] / sigma^2 (qhl.exact.likelihood's definition; Cramer 1946, Rao 1945)
    # over the samples S_k = the pulse-sequence experiment "k cycles, then acquisition at t = 0",
    # k = 1 ... floor(t_max / t_c), each computed here by ExactEngine.gradient (one experiment per sample).
    from qhl.exact.engine import ExactEngine
    from qhl.exact.likelihood import cramer_rao_bounds
    from qhl.spins.model import build_model
    from qhl.spins.sequences import CYCLE_TAUS, named_block

    engine = ExactEngine(build_model(_trio()).with_free(FREE))
    assert [p.cycles for p in small_map.points] == [10, 4]
    for p in small_map.points:
        tau = p.value / CYCLE_TAUS["solid-echo"]
        fisher = np.zeros((len(engine.model.free),) * 2)
        for k in range(1, p.cycles + 1):
            ex = Experiment(f"k{k}", 1e-6, 2, 1.0, 1e-3, steps=(named_block("solid-echo", tau, k),))
            _, g = engine.gradient(ex, times=[0.0])
            fisher += np.real(np.conj(g) @ g.T) / 1e-3**2
        crb, evals, _, _ = cramer_rao_bounds(0.5 * (fisher + fisher.T))
        assert np.all(np.isfinite(crb))
        assert p.fisher_min_eigenvalue == pytest.approx(float(evals[0]), rel=1e-8)
        assert p.median_crb_hz == pytest.approx(float(np.median(crb)), rel=1e-8)
        assert p.softest_bound_hz == pytest.approx(1 / np.sqrt(evals[0]), rel=1e-8)
        assert p.level_kind == "Floquet quasi-energies of one cycle" and 0 < p.mean_r < 1
        assert p.t_count > 0 and p.classical_seconds > 0
    out = small_map.to_json()
    assert out["experiment"]["sequence"] == "solid-echo" and out["points"][0]["cycles"] == 10


def test_stroboscopic_signal_is_the_dense_propagator_power():
    # S_k = Tr[O U_c^k rho0 U_c^-k] / Tr[O rho0] (module docstring of qhl.exact.stroboscopic), with U_c
    # built here from the dense reference (numpy/scipy) for MLEV-4 (Levitt, Freeman and Frenkiel, J. Magn.
    # Reson. 47, 328 (1982)): tau - 180x - 2 tau - 180x - 2 tau - 180(-x) - 2 tau - 180(-x) - tau.
    from qhl.exact.engine import ExactEngine
    from qhl.exact.stroboscopic import stroboscopic_signal
    from qhl.spins.model import build_model
    from qhl.spins.sequences import named_block

    tau = 7e-6
    off, dip, jj = _parts()
    h = off + dip + jj
    u = np.eye(8, dtype=complex)
    for s in (1, (180, 0), 2, (180, 0), 2, (180, 180), 2, (180, 180), 1):
        u = (_pulse(*s) if isinstance(s, tuple) else sla.expm(-1j * h * s * tau)) @ u
    rho = sum(_op("x", q, 3) for q in range(3))
    obs = sum(_op("x", q, 3) + 1j * _op("y", q, 3) for q in range(3))
    ref = []
    uk = np.eye(8, dtype=complex)
    for _ in range(6):
        uk = u @ uk
        ref.append(np.trace(obs @ uk @ rho @ uk.conj().T) / np.trace(obs @ rho))
    got = stroboscopic_signal(ExactEngine(build_model(_trio())), named_block("mlev-4", tau), 6)
    assert np.max(np.abs(got - np.array(ref))) < 1e-12


# ---------------------------------------------------------------- CLI


def _trio_file(tmp_path):
    lines = ['name = "trio"', 'field_tesla = 9.4', 'observe = "1H"']
    for i, v in enumerate(OFFSETS_HZ):
        lines += ["[[spin]]", f'label = "S{i}"', 'isotope = "1H"', f"offset_hz = {v}"]
    for (i, j), d in DIPOLAR_HZ.items():
        lines += ["[[pair]]", f'spins = ["S{i}", "S{j}"]', f"dipolar_hz = {d}"]
        if (i, j) in J_HZ:
            lines.append(f"j_hz = {J_HZ[(i, j)]}")
    lines += ["[[experiment]]", 'name = "fid"', "t_max_s = 1e-3", "points = 8", "noise = 1e-3"]
    path = tmp_path / "trio.toml"
    path.write_text("\n".join(lines) + "\n")
    return str(path)


def test_cli_rows_equal_the_api(small_map, tmp_path, capsys):
    # the --json rows are the API's MapPoint.to_json (the CLI is a thin layer; RULES)
    from qhl.cli import main
    from qhl.cli.common import print_json
    argv = ["design", _trio_file(tmp_path), "--map", "cycle_time_s", "--values", "2e-5:5e-5:2", "--t-max", "2e-4",
            "--map-noise", "1e-3", "--sequence", "solid-echo", "--max-t-count", "1e30", "--json"]
    assert main(argv) == 0
    got = json.loads(capsys.readouterr().out)
    print_json(small_map.to_json())
    want = json.loads(capsys.readouterr().out)
    assert got["axis"] == "cycle_time_s" and got["experiment"]["sequence"] == "solid-echo"
    assert len(got["points"]) == 2
    for a, b in zip(got["points"], want["points"]):
        assert a.keys() == b.keys()
        for key in a:
            if isinstance(a[key], float):
                assert a[key] == pytest.approx(b[key], rel=1e-9), key
            else:
                assert a[key] == b[key], key


@pytest.mark.parametrize("extra, needle", [
    (["--values=-1e-5"], "cycle time"),                        # negative cycle time
    (["--values", "0"], "cycle time"),                          # zero cycle time
    (["--values", "1e-3", "--t-max", "5e-4"], "shorter than one cycle"),   # cycle longer than the window
    (["--values", "1e-5", "--sequence", "no-such-cycle"], "sequence"),     # unknown sequence name
])
def test_cli_refuses_bad_cycle_input_in_one_line(extra, needle, capsys):
    from qhl.cli import main
    try:
        rc = main(["design", "--map", "cycle_time_s", *extra])
    except SystemExit as e:          # argparse's own errors (the --sequence choices): one line, status 2
        rc = e.code
    err = capsys.readouterr().err.strip()
    assert rc == 2
    assert len(err.splitlines()) == 1 and needle in err and "Traceback" not in err


def test_api_refuses_bad_cycle_input():
    from qhl.survey.learnability_map import cycle_train, learnability_map
    with pytest.raises(QhlInputError, match="unknown sequence 'nope'"):
        learnability_map(_trio(), "cycle_time_s", (1e-5,), sequence="nope")
    with pytest.raises(QhlInputError, match="expected a number > 0"):
        cycle_train(-1e-5, 5e-4)
    with pytest.raises(QhlInputError, match="expected a number > 0"):
        cycle_train(float("nan"), 5e-4)
    with pytest.raises(QhlInputError, match="shorter than one cycle"):
        cycle_train(6e-4, 5e-4)
    train = cycle_train(1e-4, 5e-4, "wahuha")       # 5 cycles exactly fill the window
    assert (train.cycles, train.tau_s) == (5, pytest.approx(1e-4 / 6))


def test_floquet_levels_split_by_the_unpulsed_isotope():
    # A cycle that pulses 1H only keeps the total Iz of 13C: the secular H commutes with each isotope's total
    # Iz and the pulses do not touch 13C (common practice), so U_c has no element between different 13C
    # magnetisations and its levels split into those sectors (qhl.survey.diagnostics.cycle_floquet_levels).
    from made_up_clusters import random_cluster
    from qhl.exact.engine import ExactEngine
    from qhl.exact.stroboscopic import cycle_propagator
    from qhl.spins.model import build_model
    from qhl.spins.sequences import named_block
    from qhl.survey.diagnostics import cycle_floquet_levels

    cluster = random_cluster(np.random.default_rng(3), 4, hetero=True)      # S2 is 13C
    engine = ExactEngine(build_model(cluster))
    block = named_block("wahuha", 2e-6)
    u = cycle_propagator(engine, block)
    up = (np.arange(16) >> 2) & 1                                         # 13C spin S2 is qubit 2
    assert np.max(np.abs(u[np.ix_(up == 0, up == 1)])) < 1e-12
    assert np.max(np.abs(u[np.ix_(up == 0, up == 0)] - np.eye(8))) > 1e-3     # the 1H block does evolve
    levels = cycle_floquet_levels(engine, block)
    assert sorted(len(ph) for ph, _ in levels) == [8, 8]
    ref = np.sort(np.mod(-np.angle(np.linalg.eigvals(u)), 2 * np.pi))
    assert np.allclose(np.sort(np.concatenate([ph for ph, _ in levels])), ref, atol=1e-10)


def test_cli_refuses_a_sequence_on_another_axis(capsys):
    # common practice: an option that the chosen map would ignore is refused in one line, not dropped
    from qhl.cli import main
    rc = main(["design", "--map", "spinning_hz", "--values", "0", "--sequence", "wahuha"])
    err = capsys.readouterr().err.strip()
    assert rc == 2
    assert len(err.splitlines()) == 1 and "cycle_time_s only" in err and "Traceback" not in err
