"""Shot-count formulas of qhl.costing.shots against outside references and independent sampling."""

import math

import numpy as np
import pytest

from qhl.costing import BudgetModel, BudgetSettings
from qhl.costing.shots import (gradient_shot_range, hoeffding_shots, optimal_allocation, optimal_allocation_shots,
                               two_valued_variance, uniform_allocation_shots, variance_shots)
from qhl import demo_cluster


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


def test_hadamard_range_formula():
    # +-2 t ||c||_1 single-shot values (Banchi and Crooks, Quantum 5, 386 (2021); vetted in the
    # project's references), times 2 pi s (H = 2 pi h G), kappa and the unit.
    assert gradient_shot_range(1e-4, 0.75, 1.0, 1.0, 1.0) == pytest.approx(2e-4 * 0.75 * 2 * math.pi)


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
