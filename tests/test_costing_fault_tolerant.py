"""Amplitude estimation, rotation synthesis and surface-code formulas against their sources."""

import math

import numpy as np
import pytest
from scipy.stats import binom

from qhl.costing.amplitude_estimation import (SUCCESS_PROBABILITY, amplitude_error_bound, median_repetitions,
                                              queries_for_amplitude_error)
from qhl.costing.surface_code import (THRESHOLD, code_distance_for, distilled_error, logical_error_rate,
                                      surface_code_estimate)
from qhl.costing.synthesis import t_count_per_rotation
from qhl.base.errors import QhlInputError


def test_ross_selinger_about_100_t_at_1e_10():
    # Ross and Selinger, Quantum Inf. Comput. 16, 901 (2016): about 100 T gates at eps = 1e-10
    assert 99 <= t_count_per_rotation(1e-10) <= 101
    assert t_count_per_rotation(1e-10) == pytest.approx(3 * math.log2(1e10))


def test_mixed_fallback_about_28_t_at_1e_10():
    # Kliuchnikov, Lauter, Minko, Paetznick, Petit, Quantum 7, 1208 (2023): 0.57 log2(1/eps) + 8.83
    assert round(t_count_per_rotation(1e-10, "mixed")) == 28
    with pytest.raises(QhlInputError):
        t_count_per_rotation(1e-10, "nonsense")


def test_queries_are_the_smallest_meeting_the_bound():
    # Brassard, Hoyer, Mosca, Tapp, Contemp. Math. 305 (2002), Theorem 12
    for e in (1e-2, 3e-4, 1e-6):
        for a in (0.5, 0.1, 0.9):
            m = queries_for_amplitude_error(e, a)
            assert amplitude_error_bound(a, m) <= e < amplitude_error_bound(a, m - 1)
    # worst case a = 1/2: M ~ pi / eps (BHMT 2002)
    assert queries_for_amplitude_error(1e-6) * 1e-6 == pytest.approx(math.pi, rel=1e-3)


def test_amplitude_estimation_success_probability_from_its_output_distribution():
    # BHMT 2002 Theorem 12: the phase-estimation output y (M queries) gives a~ = sin^2(pi y / M)
    # within the bound with probability >= 8/pi^2. The output distribution is computed here
    # directly from the eigenphases +-theta_a of the Grover iterate (sin^2(pi theta_a) = a),
    # P(y) = sum_sign 1/2 |(1/M) sum_k exp(2 pi i k (sign theta_a - y/M))|^2.
    m = 64
    y = np.arange(m)
    k = np.arange(m)
    for a in np.linspace(0.02, 0.98, 25):
        theta = math.asin(math.sqrt(a)) / math.pi
        p = np.zeros(m)
        for sign in (1, -1):
            amp = np.exp(2j * np.pi * np.outer(y / m - sign * theta, -k)).sum(axis=1) / m
            p += 0.5 * np.abs(amp) ** 2
        assert p.sum() == pytest.approx(1.0, abs=1e-9)
        est = np.sin(np.pi * y / m) ** 2
        ok = np.abs(est - a) <= amplitude_error_bound(a, m) + 1e-12
        assert p[ok].sum() >= SUCCESS_PROBABILITY - 1e-9


def test_median_repetitions_against_the_binomial_tail():
    # Hoeffding 1963 gives k; the exact binomial tail (scipy.stats.binom) must be within delta.
    for delta in (0.05, 0.01, 1e-4):
        k = median_repetitions(delta)
        assert binom.cdf((k - 1) // 2, k, SUCCESS_PROBABILITY) <= delta
    assert median_repetitions(0.05) == 16   # ceil(ln 20 / (2 (8/pi^2 - 1/2)^2)) = ceil(15.53) [derived]


def test_surface_code_d27_at_1e_3():
    # Gidney and Ekera, Quantum 5, 433 (2021): d = 27 at p = 1e-3 gives p_L about 1e-15
    assert logical_error_rate(1e-3, 27) == pytest.approx(1e-15, rel=1e-9)
    assert code_distance_for(1e-3, 1.0001e-15) == 27
    assert code_distance_for(1e-3, 0.9e-15) == 29


def test_distillation_35_p_cubed():
    # 15-to-1 distillation output error 35 p^3 (Gidney and Ekera 2021)
    assert distilled_error(1e-3, 1) == pytest.approx(3.5e-8)
    assert distilled_error(1e-3, 2) == pytest.approx(35 * 3.5e-8**3)


@pytest.mark.parametrize("p", [THRESHOLD, 0.02, 0.5])
def test_rates_at_or_above_threshold_are_refused_with_a_reason(p):
    with pytest.raises(QhlInputError, match="threshold"):
        surface_code_estimate(10, 1000, 1000, physical_error=p)


def test_surface_code_estimate_is_consistent():
    # common practice: a lower physical error needs a smaller distance; footprint >= 2 d^2 per patch
    lo = surface_code_estimate(40, 1e9, 1e10, physical_error=1e-4)
    hi = surface_code_estimate(40, 1e9, 1e10, physical_error=1e-3)
    assert lo.code_distance < hi.code_distance
    for est in (lo, hi):
        assert est.physical_qubits >= 2 * est.code_distance**2 * 40
        # the data-error share of the failure budget is met
        assert 2 * 40 * est.code_cycles * est.logical_error_per_cycle <= est.failure_budget / 2 * (1 + 1e-9)
        assert est.wall_time_s == pytest.approx(est.code_cycles * 1e-6)
