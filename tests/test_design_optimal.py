"""Optimal shares on plain Fisher matrices (qhl.learning.design_optimal): textbook designs and closed forms.

None of these build a spin model: the Fisher matrices are written here from their definitions.
"""

import numpy as np
import pytest

from qhl.base.errors import QhlInputError
from qhl.learning.design_optimal import (criterion_value, efficient_rounding, equivalence_ratio,
                                         optimal_shares)


def _quadratic_regression(xs):
    """F(x) = f f^T with f = (1, x, x^2): one observation of y = a + b x + c x^2 + unit-variance noise."""
    return np.array([np.outer([1.0, x, x * x], [1.0, x, x * x]) for x in xs])


@pytest.mark.parametrize("method", ["multiplicative", "slsqp"])
def test_d_optimal_quadratic_regression_puts_one_third_on_minus_one_zero_plus_one(method):
    # Kiefer and Wolfowitz, Canad. J. Math. 12, 363 (1960): the D-optimal design for quadratic regression
    # on [-1, 1] puts weight 1/3 on each of -1, 0, +1. Candidates: a grid of 41 points including them.
    xs = np.linspace(-1, 1, 41)
    sol = optimal_shares(_quadratic_regression(xs), "D", method=method, tol=1e-7)
    for x0 in (-1.0, 0.0, 1.0):
        assert sol.shares[np.argmin(abs(xs - x0))] == pytest.approx(1 / 3, abs=2e-3)
    assert sol.shares.sum() == pytest.approx(1.0, abs=1e-12)
    # Equivalence theorem (Kiefer and Wolfowitz 1960): max_x d(x, w*) = p = 3, d(x, w) = f(x)^T M^-1 f(x).
    M = np.einsum("k,kij->ij", sol.shares, _quadratic_regression(xs))
    fine = np.linspace(-1, 1, 2001)
    f = np.stack([np.ones_like(fine), fine, fine ** 2])
    d = np.einsum("ik,ij,jk->k", f, np.linalg.inv(M), f)
    assert d.max() == pytest.approx(3.0, rel=1e-3)
    assert sol.equivalence == pytest.approx(1.0, abs=1e-3)
    # log det M at the optimum: M = [[1, 0, 2/3], [0, 2/3, 0], [2/3, 0, 2/3]], det = 4/27 (hand computation).
    assert sol.value == pytest.approx(-np.log(4 / 27), abs=1e-5)


def test_a_optimal_quadratic_regression_matches_closed_form():
    # Derived by hand: with symmetric shares w at +-1 and 1 - 2w at 0, M = [[1, 0, 2w], [0, 2w, 0],
    # [2w, 0, 2w]] and tr M^-1 = 1 / (2w) + (1 + 2w) / (2w (1 - 2w)) = 1 / (w (1 - 2w)), smallest at
    # w = 1/4: shares (1/4, 1/2, 1/4), tr M^-1 = 8. Equivalence check (also by hand): M^-2 gives
    # f^T M^-2 f = 8 - 20 x^2 + 20 x^4 <= 8 on [-1, 1], equality at -1, 0, 1; so (1/4, 1/2, 1/4) is
    # A-optimal over all of [-1, 1] (Kiefer 1974 equivalence theorem for A; Pukelsheim 1993, ch. 7).
    xs = np.linspace(-1, 1, 21)
    sol = optimal_shares(_quadratic_regression(xs), "A", tol=1e-9)
    for x0, w in ((-1.0, 0.25), (0.0, 0.5), (1.0, 0.25)):
        assert sol.shares[np.argmin(abs(xs - x0))] == pytest.approx(w, abs=2e-3)
    assert sol.value == pytest.approx(8.0, rel=1e-4)
    assert sol.equivalence == pytest.approx(1.0, abs=2e-3)


def test_a_optimal_two_separate_parameters_closed_form():
    # Derived by hand: F_1 = diag(a, 0), F_2 = diag(0, b): tr M^-1 = 1/(w a) + 1/((1 - w) b), smallest at
    # w = sqrt(b) / (sqrt(a) + sqrt(b)), value (1/sqrt(a) + 1/sqrt(b))^2.
    a, b = 9.0, 1.0
    F = np.array([np.diag([a, 0.0]), np.diag([0.0, b])])
    sol = optimal_shares(F, "A", tol=1e-10)
    assert sol.shares[0] == pytest.approx(np.sqrt(b) / (np.sqrt(a) + np.sqrt(b)), abs=1e-4)
    assert sol.value == pytest.approx((1 / np.sqrt(a) + 1 / np.sqrt(b)) ** 2, rel=1e-6)
    # worst variance of the two: max(1/(w a), 1/((1-w) b)) is smallest where they are equal,
    # w = b / (a + b), value (a + b) / (a b) (by hand).
    worst = optimal_shares(F, "worst", tol=1e-10)
    assert worst.shares[0] == pytest.approx(b / (a + b), abs=1e-4)
    assert worst.value == pytest.approx((a + b) / (a * b), rel=1e-5)


def test_single_sampling_time_of_a_decaying_frequency_is_t2():
    # Derived here: S(t) = exp(i omega t - t / T2) with complex Gaussian noise sigma per part. The Fisher
    # information of omega from one sample at t is |dS/domega|^2 / sigma^2 = t^2 exp(-2 t / T2) / sigma^2
    # (Kay 1993, ch. 3), whose derivative 2 t e^{-2t/T2} (1 - t / T2) / sigma^2 vanishes at t = T2: the
    # best single sampling time is T2. Candidates: a grid of times; every criterion must put all
    # shots on the grid point nearest T2.
    T2, sigma = 3.75e-3, 0.01   # grid times 3.6 and 3.8 ms: 3.8 ms is clearly nearest
    times = np.linspace(0.2e-3, 12e-3, 60)
    fishers = (times ** 2 * np.exp(-2 * times / T2) / sigma ** 2)[:, None, None]
    best = np.argmin(abs(times - T2))
    for criterion in ("D", "A", "worst"):
        sol = optimal_shares(fishers, criterion, tol=1e-9)
        assert int(np.argmax(sol.shares)) == best
        assert sol.shares[best] == pytest.approx(1.0, abs=1e-3)


def test_decaying_frequency_with_amplitude_satisfies_the_equivalence_theorem_on_a_fine_grid():
    # Two parameters (amplitude A and omega, S = A exp(i omega t - t / T2), A = 1): Re[conj(dS/dA)
    # dS/domega] = Re[conj(e) i t e] = 0, so each time's F is diagonal, F_AA = e^{-2t/T2},
    # F_ww = t^2 e^{-2t/T2} (derived here). No single time sees both: the D-optimal design spreads
    # over several times. Check the Kiefer-Wolfowitz equivalence theorem (Canad. J. Math. 12, 363
    # (1960)) on a grid 50x finer than the candidates: d(t) = F_AA(t)/M_AA + F_ww(t)/M_ww <= 2, written
    # from the diagonal form, and a near-optimal two-point design found by scipy's bounded scalar
    # minimiser is no better.
    from scipy.optimize import minimize_scalar
    T2 = 1.0
    times = np.linspace(0.0, 4.0, 81)
    e = np.exp(-2 * times / T2)
    F = np.array([np.diag([ei, t * t * ei]) for t, ei in zip(times, e)])
    sol = optimal_shares(F, "D", tol=1e-8)
    assert np.sum(sol.shares > 1e-3) >= 2
    m_aa, m_ww = sol.shares @ e, sol.shares @ (times ** 2 * e)
    fine = np.linspace(0.0, 4.0, 4001)
    ef = np.exp(-2 * fine / T2)
    assert np.max(ef / m_aa + fine ** 2 * ef / m_ww) == pytest.approx(2.0, abs=2e-3)
    j = int(np.argmin(abs(times - T2)))
    res = minimize_scalar(lambda w: -np.log(w * e[0] + (1 - w) * e[j]) - np.log((1 - w) * times[j] ** 2 * e[j]),
                          bounds=(1e-9, 1 - 1e-9), method="bounded", options={"xatol": 1e-10})
    assert sol.value <= res.fun + 1e-9


def test_criterion_value_and_equivalence_at_equal_shares_are_worse():
    xs = np.linspace(-1, 1, 11)
    F = _quadratic_regression(xs)
    eq = np.full(len(xs), 1 / len(xs))
    sol = optimal_shares(F, "D")
    assert criterion_value(F, sol.shares, "D") < criterion_value(F, eq, "D")
    assert equivalence_ratio(F, eq, "D") > 1.05     # equal shares are not D-optimal here


def test_singular_candidates_and_bad_input_are_refused():
    with pytest.raises(QhlInputError, match="singular"):
        optimal_shares(np.array([np.diag([1.0, 0.0])] * 3), "D")
    with pytest.raises(QhlInputError, match="criterion"):
        optimal_shares(np.array([np.eye(2)]), "E")
    with pytest.raises(QhlInputError, match="multiplicative"):
        optimal_shares(np.array([np.eye(2)]), "A", method="multiplicative")
    with pytest.raises(QhlInputError, match="shape"):
        optimal_shares(np.ones((3, 2)), "D")


def test_efficient_rounding_sums_to_n_and_follows_shares():
    # Pukelsheim and Rieder, Biometrika 79, 763 (1992): counts sum to n, zero shares stay zero.
    w = np.array([0.5, 0.3, 0.2, 0.0])
    n = efficient_rounding(w, 10)
    assert n.sum() == 10 and n[3] == 0
    assert list(n) == [5, 3, 2, 0]
    n7 = efficient_rounding(w, 7)
    assert n7.sum() == 7 and np.all(np.abs(n7 - 7 * w) <= 1)


@pytest.mark.parametrize("criterion, expected", [("D", (1 / 3, 1 / 3, 1 / 3)), ("A", (0.25, 0.5, 0.25))])
def test_many_candidates_go_through_the_growing_support(criterion, expected):
    # 201 candidates (more than ACTIVE_SET_MIN): the same closed forms as above (Kiefer and
    # Wolfowitz 1960 for D; the hand derivation for A), reached by SLSQP on a growing support.
    from qhl.learning import design_optimal
    xs = np.linspace(-1, 1, 201)
    assert len(xs) > design_optimal.ACTIVE_SET_MIN
    sol = optimal_shares(_quadratic_regression(xs), criterion, tol=1e-8)
    for x0, w in zip((-1.0, 0.0, 1.0), expected):
        assert sol.shares[np.argmin(abs(xs - x0))] == pytest.approx(w, abs=3e-3)
    assert sol.equivalence == pytest.approx(1.0, abs=2e-3)


def test_worst_variance_design_satisfies_its_weighted_equivalence_theorem():
    # Quadratic regression on [-1, 1], minimise the largest of the three variances. The optimum is
    # A-optimal for the weights of its multipliers (saddle point; Pukelsheim 1993, ch. 7): the weighted
    # equivalence ratio is 1, checked here on a fine grid of x with those weights, written out from
    # f(x) = (1, x, x^2).
    xs = np.linspace(-1, 1, 41)
    F = _quadratic_regression(xs)
    sol = optimal_shares(F, "worst", tol=1e-9)
    assert sol.equivalence == pytest.approx(1.0, abs=5e-3)
    mu = sol.multipliers
    assert mu.sum() == pytest.approx(1.0) and np.all(mu >= 0)
    Minv = np.linalg.inv(np.einsum("k,kij->ij", sol.shares, F))
    fine = np.linspace(-1, 1, 2001)
    g = Minv @ np.stack([np.ones_like(fine), fine, fine ** 2])          # M^-1 f(x), (3, X)
    assert np.max(mu @ g ** 2) == pytest.approx(mu @ np.diag(Minv), rel=5e-3)
    # symmetric problem: symmetric shares; and no worse than equal shares or the D optimum
    assert np.allclose(sol.shares, sol.shares[::-1], atol=5e-3)
    assert sol.value <= criterion_value(F, optimal_shares(F, "D").shares, "worst") + 1e-9
    assert sol.value < criterion_value(F, np.full(len(xs), 1 / len(xs)), "worst")
