"""Shot-count formulas of qhl.costing.shots against outside references and independent sampling."""

import math

import numpy as np
import pytest

from qhl.costing import BudgetModel, BudgetSettings
from qhl.costing.shots import (gradient_shot_range, hoeffding_shots, optimal_allocation, optimal_allocation_shots,
                               two_valued_variance, uniform_allocation_shots, variance_shots)
from qhl import build_model, demo_cluster


def test_hoeffding_reference_value():
    # Hoeffding, J. Amer. Statist. Assoc. 58, 13 (1963): eps = 0.01, delta = 0.05, R = 1 -> 73,778
    assert hoeffding_shots(1.0, 0.01, 0.05) == 73778
    # independent evaluation of 2 R^2 ln(2/delta)/eps^2 for another range (Hoeffding 1963)
    assert hoeffding_shots(3.0, 0.02, 0.01) == math.ceil(2 * 9 * math.log(200) / 0.02**2)


def test_hoeffding_count_covers_sampled_coins():
    # Hoeffding 1963: with N shots of a fair +-1 coin, P(|mean| >= eps) <= delta. Seeded; the true
    # exceedance rate is ~0.005 at these settings, so observing > 0.05 in 4000 trials has
    # probability < 1e-30 (binomial tail): no false failures.
    n = hoeffding_shots(1.0, 0.1, 0.05)
    rng = np.random.default_rng(11)
    means = (2 * rng.binomial(n, 0.5, size=4000) - n) / n
    assert np.mean(np.abs(means) >= 0.1) <= 0.05


def test_two_valued_variance_against_sampling():
    # Var of a +-R variable with mean mu is R^2 - mu^2 (common practice); checked with numpy.var on
    # 400,000 seeded samples, tolerance 1% (relative std of the sample variance ~0.3%).
    rng = np.random.default_rng(3)
    r, mu = 2.5, 1.1
    x = np.where(rng.random(400_000) < (1 + mu / r) / 2, r, -r)
    assert np.var(x) == pytest.approx(two_valued_variance(r, mu), rel=0.01)


def test_variance_count_reaches_the_standard_error():
    # N = Var/eps^2 gives standard error eps (common practice): 2000 seeded repetitions of the
    # N-shot mean, their std within 5% of eps (sampling std of the std ~1.6%: 3 sigma).
    r, mu, eps = 1.0, 0.3, 0.02
    n = int(math.ceil(variance_shots(two_valued_variance(r, mu), eps)))
    rng = np.random.default_rng(5)
    means = (2 * rng.binomial(n, (1 + mu / r) / 2, size=2000) - n) * r / n
    assert np.std(means) == pytest.approx(eps, rel=0.05)
    assert np.mean(means) == pytest.approx(mu, abs=4 * eps / math.sqrt(2000))


def test_optimal_allocation_beats_uniform_and_reaches_eps():
    # Stratified sampling (Wecker, Hastings, Troyer, PRA 92, 042303 (2015), from memory):
    # n_k proportional to |w_k| sigma_k gives Var = sum w_k^2 sigma_k^2 / n_k = eps^2 at
    # N = (sum |w_k| sigma_k)^2 / eps^2; by Cauchy-Schwarz never more than uniform allocation.
    rng = np.random.default_rng(0)
    w = rng.normal(size=30)
    s = rng.random(30) * 3
    eps = 0.01
    n_opt = optimal_allocation_shots(w, s, eps)
    n_k = optimal_allocation(w, s, n_opt)
    assert np.sum(w**2 * s**2 / n_k) == pytest.approx(eps**2, rel=1e-12)
    assert n_opt < uniform_allocation_shots(w, s, eps)
    flat = np.full(10, 0.5)
    assert optimal_allocation_shots(flat, flat, eps) == pytest.approx(uniform_allocation_shots(flat, flat, eps))


@pytest.mark.parametrize("scale", [1.0, -0.5])
def test_range_is_that_of_the_compiled_hadamard_test(scale):
    # The single-shot range of the compiled Hadamard-test family (qhl.circuits.gradient_circuits,
    # its own weights, via qhl.costing.family_variance) against the range formula, for a positive
    # and a negative dipolar scale (a range is a magnitude).
    from qhl.costing.family_variance import component_circuit_variance
    from qhl.spins.cluster import Cluster, Experiment, Spin
    spins = (Spin("A", "1H", (0.0, 0.0, 0.0), -200.0), Spin("B", "1H", (1.9, 0.0, 0.3), 310.0),
             Spin("C", "1H", (0.2, 2.0, 0.0), 90.0))
    c = Cluster(9.4, "1H", spins, (), (Experiment("fid", 2e-4, 16, scale, 1e-3),), name="three")
    model = build_model(c)
    t = 1.5e-4
    for name in ("dipolar:A-B", "offset:B"):
        _, r_circ, _ = component_circuit_variance(model, c.experiments[0], name, t, 4, 2, 1e3)
        l1 = float(np.sum(np.abs(model.parameter(name).generator.coeffs)))
        s = scale if name.startswith("dipolar") else 1.0
        r = gradient_shot_range(t, l1, s, float(sum(model.observed)), 1e3)
        assert r > 0
        assert r == pytest.approx(r_circ, rel=1e-9)


@pytest.fixture(scope="module")
def demo_budget_model():
    return BudgetModel(demo_cluster(), settings=BudgetSettings(empirical_trotter=False))


def test_exact_derivatives_lie_within_the_single_shot_range(demo_budget_model):
    # The estimator's mean is the exact derivative, so |dS/dh| (exact engine) can never exceed
    # the single-shot range R (Banchi and Crooks 2021): checked on every experiment, time point
    # and free parameter of the demo, first and second derivatives.
    nt = demo_budget_model.near
    for x, ex in enumerate(nt.experiments):
        _, g = nt.engine.gradient(ex)
        r = gradient_shot_range(ex.times_s[None, :], nt.l1[:, None], nt.scales[x][:, None], nt.kappa, nt.unit_hz)
        assert np.all(np.abs(g * nt.unit_hz) <= r * (1 + 1e-12) + 1e-15)
        t = ex.times_s[-1]
        _, _, h = nt.engine.hessian(ex, times=[t])
        assert np.all(np.abs(h[:, :, 0] * nt.unit_hz**2) <= nt.hessian_ranges(t)[x] * (1 + 1e-12) + 1e-15)


def _four(scale):
    from qhl.spins.cluster import Cluster, Experiment, Spin
    spins = (Spin("A", "1H", (0.0, 0.0, 0.0), -350.0), Spin("B", "1H", (1.8, 0.1, 0.0), 120.0),
             Spin("C", "1H", (0.4, 2.1, 0.5), 560.0), Spin("D", "1H", (2.1, 1.9, -1.1), -60.0))
    return Cluster(9.4, "1H", spins, (), (Experiment("fid", 2e-4, 32, scale, 1e-3),), name="four")


def test_budget_ranges_do_not_depend_on_the_sign_of_the_dipolar_scale():
    # A range is a magnitude (Banchi and Crooks 2021: +-2 t ||c||_1 |s|): the range-based counts and
    # the worst component of s = -1 equal those of s = +1 (exact-variance counts may differ: H differs).
    st = BudgetSettings(empirical_trotter=False, circuit_variance_max_spins=0, hessian_exact=False)
    plus, minus = (BudgetModel(_four(s), settings=st).budget(2e-4, 0.01) for s in (1.0, -1.0))
    for key in ("shots_per_component_bound", "shots_per_gradient_bound", "shots_per_hessian_entry_bound",
                "component_range"):
        assert minus.near_term[key] == pytest.approx(plus.near_term[key], rel=1e-12), key
    assert minus.fault_tolerant["worst_component"] == plus.fault_tolerant["worst_component"]
