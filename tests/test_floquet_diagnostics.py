"""Level statistics of spinning samples: Floquet quasi-energies (qhl.survey.diagnostics) and the map axis.

References:
  * tests/reference_spinning.py: the dense time-ordered propagator over one rotor period (midpoint
    slices, scipy expm; imports nothing of qhl).
  * Atas, Bogomolny, Giraud and Roux, "Distribution of the ratio of consecutive level spacings in
    random matrix ensembles", PRL 110, 084101 (2013): <r> = 0.5996 (GUE; the circular unitary
    ensemble has the same local statistics at large N, from memory), Poisson 2 ln 2 - 1 = 0.3863.
  * scipy.stats.unitary_group (Haar-random unitaries, F. Mezzadri, Notices AMS 54, 592 (2007)).
"""

import json

import numpy as np
import pytest
from scipy.stats import unitary_group

from qhl.cli import main
from qhl.exact.engine import ExactEngine
from qhl.spins.model import build_model
from qhl.survey.diagnostics import (GUE_MEAN_R, POISSON_MEAN_R, circular_spacing_ratios, diagnose,
                                    floquet_sector_levels, inverse_participation_ratio, random_complex_vector_d2)
from qhl.survey.learnability_map import learnability_map

from reference_spinning import dense_period_propagator
import test_spinning_engine as se


def _circular_distance(a, b):
    d = np.abs(np.mod(a - b + np.pi, 2 * np.pi) - np.pi)
    return d


@pytest.mark.parametrize("spins,rate", [(se.THREE, 12500.0), (se.FOUR, 5000.0)])
def test_quasi_energies_equal_the_dense_period_propagator(spins, rate):
    # every engine quasi-energy (pooled over sectors) matches one eigenphase of the dense U(T_R) and vice
    # versa; the reference's midpoint slices err by O(slice^2): measured 1.0e-4, 2.2e-5, 2.5e-6 rad at 400,
    # 800, 1600 slices per period for the four-spin case at 5 kHz; run at 800, tolerance 1e-4 rad
    c, m, eng, ex = se._setup(spins, rate=rate)
    eng.spinning_slices_per_period = 64
    levels = floquet_sector_levels(eng, ex)
    got = np.concatenate([ph for ph, _ in levels])
    want = np.mod(-np.angle(np.linalg.eigvals(dense_period_propagator(c, m, ex, slices_per_period=800))),
                  2 * np.pi)
    assert got.size == want.size == 2 ** len(spins)
    assert max(_circular_distance(g, want).min() for g in got) < 1e-4
    assert max(_circular_distance(w, got).min() for w in want) < 1e-4
    # the Floquet states are unit vectors
    for _, v in levels:
        np.testing.assert_allclose(np.linalg.norm(v, axis=0), 1.0, atol=1e-12)


def test_circular_ratios_of_haar_unitaries_and_of_uniform_phases():
    # Atas et al. (2013): <r> 0.5996 for the unitary class, 2 ln 2 - 1 for Poisson. 20 Haar unitaries of
    # size 200 give 4,000 ratios (std of r about 0.25: standard error 0.004); tolerance 0.015 (> 3.5
    # standard errors: false-failure rate below 1e-3), seeds fixed.
    rng = np.random.default_rng(11)
    r = np.concatenate([circular_spacing_ratios(np.angle(np.linalg.eigvals(
        unitary_group.rvs(200, random_state=rng)))) for _ in range(20)])
    assert r.size == 4000
    assert abs(r.mean() - GUE_MEAN_R) < 0.015
    p = np.concatenate([circular_spacing_ratios(rng.uniform(0, 2 * np.pi, 200)) for _ in range(20)])
    assert abs(p.mean() - POISSON_MEAN_R) < 0.015


def test_random_complex_vector_d2_against_haar_columns():
    # a Haar unitary's columns are random complex unit vectors: mean IPR 2/(N+1) (common practice);
    # 2,000 columns at N = 100: relative standard error of the mean about 0.5 %; tolerance 3 %
    rng = np.random.default_rng(5)
    ipr = np.concatenate([inverse_participation_ratio(unitary_group.rvs(100, random_state=rng)) for _ in range(20)])
    d2 = -np.log(ipr.mean()) / np.log(100)
    assert ipr.mean() == pytest.approx(2 / 101, rel=0.03)
    assert float(random_complex_vector_d2(100)) == pytest.approx(d2, abs=0.01)


def test_diagnose_a_spinning_sample_and_its_static_limit():
    c, m, eng, ex = se._setup(se.FOUR)
    d = diagnose(c, 1.0, t_max_s=4e-4, points=24, spinning_hz=12500.0)
    s = d.summary()
    assert s["level_kind"] == "Floquet quasi-energies" and s["mean_r_random"] == GUE_MEAN_R
    assert d.n_ratios > 0 and 0 < d.mean_r < 1
    # Fisher information from the exact spinning engine: the same as fisher_information of that experiment
    from qhl.exact.likelihood import fisher_information
    from qhl.spins.cluster import Experiment
    ex2 = Experiment("scan", 4e-4, 24, noise=1e-3, spinning_hz=12500.0)
    f = fisher_information(ExactEngine(build_model(c).with_free(d.free)), [ex2])
    np.testing.assert_allclose(d.fisher_eigenvalues, np.linalg.eigvalsh(f), rtol=1e-8,
                               atol=1e-10 * np.abs(f).max())
    static = diagnose(c, 1.0, t_max_s=4e-4, points=24)
    assert static.level_kind == "eigenvalues of H"


def test_learnability_map_over_the_spinning_rate(capsys, tmp_path):
    # fast magic-angle spinning averages the dipolar couplings away (Maricq and Waugh, J. Chem. Phys. 70,
    # 3300 (1979)): what the FID teaches about them shrinks, so the median Cramer-Rao bound grows
    c = se._cluster(se.THREE)
    lm = learnability_map(c, "spinning_hz", (0.0, 100e3), t_max_s=4e-4, points=24)
    p0, p1 = lm.points
    assert p0.level_kind == "eigenvalues of H" and p1.level_kind == "Floquet quasi-energies"
    assert p1.median_crb_hz > 3 * p0.median_crb_hz
    assert p1.t_count > 0 and np.isnan(p1.near_term_shots)
    path = tmp_path / "rotor.toml"
    path.write_text(se.HEADER + "".join(se.SPIN.format(label=a, iso=b, pos=list(cc), shift=d)
                                        for a, b, cc, d in se.THREE))
    rc = main(["design", str(path), "--map", "spinning_hz", "--values", "0:50000:2", "--t-max", "4e-4",
               "--map-points", "24", "--json"])
    assert rc == 0
    d = json.loads(capsys.readouterr().out)
    assert d["axis"] == "spinning_hz" and d["gue_mean_r"] == GUE_MEAN_R
    assert [p["level_kind"] for p in d["points"]] == ["eigenvalues of H", "Floquet quasi-energies"]
    with pytest.raises(SystemExit):
        main(["design", str(path), "--map", "spinning_hz", "--values", "0:2e6:2"])


def test_map_refuses_a_spinning_axis_without_pair_directions_before_any_work():
    # a pair given by dipolar_hz alone has no direction, so its rotor modulation is unknown: one error, up front
    from qhl.base.errors import QhlInputError
    from qhl.spins.cluster import Cluster, Experiment, Pair, Spin
    c = Cluster(9.4, "1H", (Spin("A", "1H", None, 100.0), Spin("B", "1H", None, -200.0)),
                (Pair(("A", "B"), dipolar_hz=3000.0),), (Experiment("x", 1e-4, 8),))
    calls = []
    with pytest.raises(QhlInputError, match="no positions"):
        learnability_map(c, "spinning_hz", (0.0, 1e4), progress=calls.append)
    assert calls == []
