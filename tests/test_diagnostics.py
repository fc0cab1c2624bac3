"""Diagnostics: level-spacing ratios, participation ratios, D2, Fisher spectra per dipolar scale."""

import math

import numpy as np
import pytest
from qiskit.quantum_info import SparsePauliOp

from qhl import Cluster, Experiment, Spin, build_model, demo_cluster, ExactEngine
from qhl.survey.diagnostics import (GOE_MEAN_R, POISSON_MEAN_R, diagnose, fractal_dimension_d2,
                             inverse_participation_ratio, mean_spacing_ratio, participation_ratio,
                             random_vector_d2, spacing_ratios, symmetry_sector_levels)


def _cluster(offsets_hz, seed=3, n=6):
    """A made-up cluster: n protons at random positions at least 1.6 A apart."""
    rng = np.random.default_rng(seed)
    pos = []
    while len(pos) < n:
        p = rng.uniform(0, 4.5, 3)
        if all(np.linalg.norm(p - q) > 1.6 for q in pos):
            pos.append(p)
    spins = tuple(Spin(f"H{i + 1}", "1H", tuple(p), float(o)) for i, (p, o) in enumerate(zip(pos, offsets_hz)))
    return Cluster(field_tesla=9.4, observe="1H", spins=spins)


def test_reference_values_from_the_ratio_distributions():
    # Atas, Bogomolny, Giraud, Roux, PRL 110, 084101 (2013): for Poisson levels the ratio
    # r~ = min/max has density 2/(1+r)^2 on [0, 1]; its mean, integrated here with scipy,
    # is 2 ln 2 - 1. The GOE 3x3 surmise P(r) = (27/8)(r + r^2)/(1 + r + r^2)^(5/2) on [0, inf)
    # gives <r~> = 4 - 2 sqrt 3 = 0.5359; large GOE matrices 0.5307, just below (same paper).
    from scipy.integrate import quad
    poisson = quad(lambda r: r * 2 / (1 + r) ** 2, 0, 1)[0]
    assert POISSON_MEAN_R == pytest.approx(poisson, abs=1e-9)
    surmise = lambda r: 27 / 8 * (r + r * r) / (1 + r + r * r) ** 2.5  # noqa: E731
    goe_surmise = quad(lambda r: r * 2 * surmise(r), 0, 1)[0]   # min(r, 1/r): fold [1, inf) onto [0, 1]
    assert goe_surmise == pytest.approx(4 - 2 * math.sqrt(3), abs=1e-9)
    assert goe_surmise - 0.01 < GOE_MEAN_R < goe_surmise


def test_random_vector_d2_against_sampled_vectors():
    # D2 of random real unit vectors (numpy samples, 400 vectors per N) against ln((N+2)/3)/ln N
    # (REFERENCES.md, derived and checked numerically): 0.74 at N = 70 (so D2 < 1 at one N alone
    # is no sign of multifractality). Tolerance 0.01 in D2 is > 5 standard errors.
    rng = np.random.default_rng(4)
    for n in (20, 70, 300):
        ipr = inverse_participation_ratio(rng.normal(size=(n, 400)))
        assert float(random_vector_d2(n)) == pytest.approx(-math.log(np.mean(ipr)) / math.log(n), abs=0.01)
    assert float(random_vector_d2(70)) == pytest.approx(0.74, abs=0.01)
    assert float(random_vector_d2(70)) == pytest.approx(1 - math.log(3) / math.log(70), abs=3 / 70)
    d = diagnose(_cluster(np.linspace(-500, 500, 6)), 1.0)
    s = d.summary()
    assert d.d2_random.shape == d.d2.shape
    assert 0 < s["mean_d2_random"] < 1 and np.isfinite(s["mean_d2"])


def test_goe_mean_ratio():
    # Atas, Bogomolny, Giraud, Roux, PRL 110, 084101 (2013); Oganesyan and Huse, PRB 75, 155111
    # (2007): <r> = 0.5307 for large GOE matrices. 16 matrices of 800, central 60 % of levels
    # (about 7600 ratios, standard error 0.003): tolerance 0.01 is 3.4 sigma, false-failure rate
    # below 0.1 % for a random seed (fixed seed here).
    rng = np.random.default_rng(2013)
    ratios = []
    for _ in range(16):
        a = rng.normal(size=(800, 800))
        e = np.linalg.eigvalsh((a + a.T) / 2)[160:-160]
        ratios.append(spacing_ratios(e))
    r = np.concatenate(ratios)
    assert r.size > 7000
    assert np.mean(r) == pytest.approx(0.5307, abs=0.01)


def test_poisson_mean_ratio():
    # Same sources: independent (Poisson) levels give 2 ln 2 - 1 = 0.3863. 20000 uniform levels,
    # standard error 0.002: tolerance 0.01 is 5 sigma (false-failure rate below 1e-6).
    e = np.random.default_rng(1963).uniform(0.0, 1.0, 20000)
    assert mean_spacing_ratio(e) == pytest.approx(0.3863, abs=0.01)


def test_spacing_ratio_small_cases():
    # Evenly spaced levels: every ratio is 1; spacings 1, 2: ratio 1/2 (definition, Oganesyan-Huse 2007).
    assert spacing_ratios(np.arange(10.0)).tolist() == [1.0] * 8
    assert spacing_ratios([0.0, 1.0, 3.0]).tolist() == [0.5]
    # Exact degeneracies give no ratio; too few levels: nan.
    assert spacing_ratios([0.0, 0.0, 0.0, 1.0]).tolist() == [0.0]
    assert math.isnan(mean_spacing_ratio([0.0, 1.0]))


def test_ipr_of_basis_state_is_one():
    # A computational basis state: IPR 1, D2 = 0 (definition; from memory per REFERENCES.md).
    states = np.eye(64)
    ipr = inverse_participation_ratio(states)
    assert np.allclose(ipr, 1.0)
    assert np.allclose(fractal_dimension_d2(ipr, 64), 0.0)


def test_ipr_of_random_real_vectors():
    # Random real unit vectors in dimension N: <IPR> = 3/(N+2) (from memory, REFERENCES.md).
    # 400 vectors of N = 256: the mean has a relative standard error of about 0.5 %, the 10 %
    # tolerance is far outside it (false-failure rate negligible).
    rng = np.random.default_rng(11)
    for n in (32, 256):
        ipr = inverse_participation_ratio(rng.normal(size=(n, 400)))
        assert np.mean(ipr) == pytest.approx(3 / (n + 2), rel=0.10)
    # A state spread evenly over N basis states: IPR 1/N, D2 = 1 (definition).
    assert fractal_dimension_d2(inverse_participation_ratio(np.ones((50, 1))), 50)[0] == pytest.approx(1.0)


def test_participation_ratio_counts_parameters():
    # PR = 1/sum v^4 of a unit vector: k equal weights give k (definition, common practice).
    v = np.zeros((6, 3))
    v[0, 0] = 1.0
    v[:2, 1] = 1 / np.sqrt(2)
    v[:, 2] = 1 / np.sqrt(6)
    assert participation_ratio(v) == pytest.approx([1.0, 2.0, 6.0])


def _dense_m0_levels_by_flip_parity(model, experiment):
    """Independent check: levels of the dense H on M = 0 states that are flip-even / flip-odd."""
    n = model.n_spins
    h = model.hamiltonian(experiment).to_matrix()
    f = SparsePauliOp("X" * n).to_matrix()
    idx = np.array([k for k in range(2**n) if bin(k).count("1") == n // 2])
    hm, fm = h[np.ix_(idx, idx)], f[np.ix_(idx, idx)]
    out = []
    for sign in (1, -1):
        w, u = np.linalg.eigh((np.eye(len(idx)) + sign * fm) / 2)
        basis = u[:, w > 0.5]
        out.append(np.sort(np.linalg.eigvalsh(basis.conj().T @ hm @ basis)))
    return out


def test_sector_levels_with_spin_flip_symmetry():
    # Zero offsets: H commutes with X...X, so the M = 0 sector splits into even and odd parts.
    cluster = _cluster([0.0] * 6)
    ex = Experiment("x", 1e-4, 4, dipolar_scale=1.0)
    model = build_model(cluster)
    engine = ExactEngine(model)
    levels = symmetry_sector_levels(engine, ex)
    assert len(levels) == len(engine.sectors) + 1
    full = np.sort(np.linalg.eigvalsh(model.hamiltonian(ex).to_matrix()))
    assert np.allclose(np.sort(np.concatenate(levels)), full, atol=1e-6 * np.max(np.abs(full)))
    # The two halves of the M = 0 sector (dimension 20) are its flip-even and flip-odd levels.
    halves = sorted((np.sort(e) for e in levels if len(e) == 10), key=lambda e: e[0])
    dense = sorted(_dense_m0_levels_by_flip_parity(model, ex), key=lambda e: e[0])
    assert len(halves) == 2
    for mine, ref in zip(halves, dense):
        assert np.allclose(mine, ref, atol=1e-6 * np.max(np.abs(full)))
    # With distinct offsets the symmetry is gone and only magnetisation sectors remain.
    other = ExactEngine(build_model(_cluster([-900.0, -400.0, 100.0, 500.0, 1100.0, 1600.0])))
    assert len(symmetry_sector_levels(other, ex)) == len(other.sectors)


def test_decoupled_cluster_has_basis_eigenstates_and_no_dipolar_information():
    # dipolar_scale 0 with distinct offsets: H = sum h_i Iz_i is diagonal, so eigenstates are
    # basis states (IPR 1, D2 0), and the signal cannot depend on dipolar couplings: exactly as
    # many unlearnable Fisher directions as dipolar parameters (15 for 6 spins).
    cluster = _cluster([-1500.0, -700.0, 150.0, 600.0, 1300.0, 2100.0])
    d = diagnose(cluster, 0.0, t_max_s=2e-3, points=48)
    assert np.allclose(d.ipr, 1.0)
    assert np.allclose(d.d2, 0.0)
    assert int(np.sum(d.unlearnable)) == 15
    assert len(d.free) == 21
    assert np.all(np.isinf(d.crb_hz[6:]))  # dipolar bounds infinite
    assert np.all(np.isfinite(d.crb_hz[:6]))


def test_level_statistics_scale_free_without_offsets():
    # With zero offsets H is proportional to the dipolar scale: <r> and IPR cannot change with
    # it (spacing ratios and eigenvectors are invariant under H -> c H), while the Fisher
    # information of a fixed FID window does.
    cluster = _cluster([0.0] * 6, seed=5)
    a, b = diagnose(cluster, 0.3, points=32), diagnose(cluster, 1.0, points=32)
    assert a.mean_r == pytest.approx(b.mean_r, abs=1e-9)
    assert np.mean(a.ipr) == pytest.approx(np.mean(b.ipr), abs=1e-9)
    assert not np.allclose(a.fisher_eigenvalues, b.fisher_eigenvalues)


def test_diagnose_demo_cluster_summary_consistent():
    d = diagnose(demo_cluster(), 0.5, points=48)
    s = d.summary()
    assert s["n_free"] == 21
    assert s["fisher_min_eigenvalue"] == d.fisher_eigenvalues[0] > 0
    assert s["median_crb_hz"] == pytest.approx(np.median(d.crb_hz))
    # Fisher eigenvectors are orthonormal and their PRs lie in [1, P].
    assert np.allclose(d.fisher_eigenvectors.T @ d.fisher_eigenvectors, np.eye(21), atol=1e-10)
    assert np.all((d.fisher_participation >= 1 - 1e-12) & (d.fisher_participation <= 21 + 1e-12))
    assert 0.0 < s["mean_r"] < 1.0 and s["n_ratios"] > 20
    assert 0.0 < s["mean_d2"] < 1.0
