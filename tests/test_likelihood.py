"""Likelihood, its derivatives and the Fisher information against finite differences and the
textbook identity E[grad grad^T] = F (S. M. Kay, "Fundamentals of Statistical Signal
Processing: Estimation Theory", 1993, ch. 3)."""

import numpy as np
import pytest

from qhl import ExactEngine, build_model
from qhl.exact.divided_differences import first_divided_difference, second_divided_difference
from qhl.exact.likelihood import cramer_rao_bounds, fisher_information, negative_log_likelihood, synthetic_dataset

from made_up_clusters import random_cluster
from reference_dense import central_difference


@pytest.fixture(scope="module")
def setup():
    c = random_cluster(np.random.default_rng(5), 4)
    model = build_model(c)
    eng = ExactEngine(model)
    data = synthetic_dataset(eng, c.experiments, seed=1, sigma=0.01)
    x = model.free_values_hz * (1 + 0.01 * np.random.default_rng(2).normal(size=len(model.free)))
    return c, eng, data, x


def test_nll_gradient_and_hessian_match_differences(setup):
    c, eng, data, x = setup
    nll, g, h = negative_log_likelihood(eng, c.experiments, data, x, order=2)
    fd_g = central_difference(lambda y: np.array(negative_log_likelihood(eng, c.experiments, data, y, 0)[0]), x, 1e-2)
    np.testing.assert_allclose(g, fd_g, rtol=1e-5, atol=1e-6 * np.abs(fd_g).max())
    fd_h = central_difference(lambda y: negative_log_likelihood(eng, c.experiments, data, y, 1)[1], x, 1e-2)
    np.testing.assert_allclose(h, fd_h, rtol=1e-5, atol=1e-6 * np.abs(fd_h).max())


def test_fisher_equals_expected_outer_product_of_scores(setup):
    # Kay 1993, eq. 3.23: F = E[score score^T]; Monte Carlo over 400 noise draws, tolerance 15%
    # of the largest entry (relative MC error ~ sqrt(2/400) = 7%; false-failure rate < 1e-3)
    c, eng, _, _ = setup
    x0 = eng.model.free_values_hz
    fisher = fisher_information(eng, c.experiments, sigma=0.01)
    scores = []
    for seed in range(400):
        d = synthetic_dataset(eng, c.experiments, seed=100 + seed, sigma=0.01)
        scores.append(negative_log_likelihood(eng, c.experiments, d, x0, order=1)[1])
    scores = np.array(scores)
    emp = scores.T @ scores / len(scores)
    assert np.abs(emp - fisher).max() < 0.15 * np.abs(fisher).max()


def test_cramer_rao_flags_parameter_without_effect():
    # a spin of another isotope with no couplings cannot change the observed signal
    from qhl.spins.cluster import Cluster, Experiment, Spin
    spins = (Spin("H", "1H", None, 300.0), Spin("C", "13C", None, 50.0))
    c = Cluster(9.4, "1H", spins, (), (Experiment("e", 1e-2, 32, noise=0.01),))
    eng = ExactEngine(build_model(c, free=["offset:*"]))
    bounds, evals, evecs, bad = cramer_rao_bounds(fisher_information(eng, c.experiments))
    assert np.isinf(bounds[1]) and np.isfinite(bounds[0]) and bad.sum() == 1


def test_divided_differences_against_direct_formulas():
    # f[x,y] = (f(x)-f(y))/(x-y); f[x,y,z] = (f[x,y]-f[y,z])/(x-z) (common practice), well separated points
    f = lambda e, t: np.exp(-1j * e * t)  # noqa: E731
    x, y, z, t = 3.0, -1.0, 7.5, 0.37
    assert first_divided_difference(x, y, t) == pytest.approx((f(x, t) - f(y, t)) / (x - y), rel=1e-13)
    d2 = ((f(x, t) - f(y, t)) / (x - y) - (f(y, t) - f(z, t)) / (y - z)) / (x - z)
    for args in [(x, y, z), (z, x, y), (y, z, x)]:
        assert second_divided_difference(*args, t) == pytest.approx(d2, rel=1e-12)
    # confluent limits: f'(x) and f''(x)/2
    assert first_divided_difference(x, x, t) == pytest.approx(-1j * t * f(x, t), rel=1e-14)
    assert second_divided_difference(x, x, x, t) == pytest.approx((-1j * t) ** 2 * f(x, t) / 2, rel=1e-14)
    # continuity across the Taylor switch (|gap * t| = 1e-3)
    for gap in [0.9e-3 / t, 1.1e-3 / t]:
        a = second_divided_difference(x, x + gap, x + 0.3 * gap, t)
        import mpmath as mp
        mp.mp.dps = 40
        F = lambda e: mp.exp(-1j * e * t)  # noqa: E731
        X, Y, Z = mp.mpf(x), mp.mpf(x + gap), mp.mpf(x + 0.3 * gap)
        exact = ((F(X) - F(Y)) / (X - Y) - (F(Y) - F(Z)) / (Y - Z)) / (X - Z)
        assert abs(a - complex(exact)) < 1e-11 * abs(complex(exact))
