"""Amplitude estimation, rotation synthesis and surface-code formulas against their sources."""

import math

import numpy as np
import pytest
from scipy.stats import binom

from qhl.costing.amplitude_estimation import (SUCCESS_PROBABILITY, amplitude_error_bound, median_repetitions,
                                              phase_register_queries, queries_for_amplitude_error)
from qhl.costing.surface_code import (THRESHOLD, code_distance_for, distilled_error, logical_error_rate,
                                      surface_code_estimate)
from qhl.costing.synthesis import t_count_per_rotation
from qhl.base.errors import QhlInputError


def test_ross_selinger_about_100_t_at_1e_10():
    # Ross and Selinger, Quantum Inf. Comput. 16, 901 (2016): about 100 T gates at eps = 1e-10
    assert 99 <= t_count_per_rotation(1e-10) <= 101
    assert t_count_per_rotation(1e-10) == pytest.approx(3 * math.log2(1e10))


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


def test_distillation_output_error_from_the_code():
    # 15-to-1 distillation (Bravyi and Kitaev, PRA 71, 022316 (2005)): Z errors on the 15 input
    # states pass the X checks of the [[15,1,3]] Reed-Muller code when they form a word of the
    # Hamming [15,11] code (parity checks: the 4 x 15 matrix of all non-zero 4-bit columns);
    # odd-weight words flip the output. Exact failure-given-acceptance, enumerated here, against
    # the 35 p^3 rule (leading term: the 35 weight-3 Hamming words).
    cols = np.array([[(j >> b) & 1 for b in range(4)] for j in range(1, 16)]).T      # 4 x 15
    words = np.array([[(w >> i) & 1 for i in range(15)] for w in range(1 << 15)])
    code = words[np.all((cols @ words.T) % 2 == 0, axis=0)]
    weights = code.sum(axis=1)
    assert len(code) == 2**11 and int(np.sum(weights == 3)) == 35
    for p in (1e-4, 1e-3):
        prob = p**weights * (1 - p) ** (15 - weights)
        fail, accept = prob[weights % 2 == 1].sum(), prob.sum()
        assert distilled_error(p, 1) == pytest.approx(fail / accept, rel=50 * p)
    assert distilled_error(1e-3, 2) == pytest.approx(distilled_error(distilled_error(1e-3, 1), 1))


def test_wall_time_limited_by_reaction_code_cycles_or_factories():
    # common practice: a T layer cannot finish before the decoder's reaction; few factories slow
    # the T supply. Gidney and Ekera 2021: 10 us reaction, 1 us cycles.
    fast = surface_code_estimate(40, 2e9, 1e10, physical_error=1e-3, t_depth=1e9, reaction_time_s=1e-6)
    slow = surface_code_estimate(40, 2e9, 1e10, physical_error=1e-3, t_depth=1e9, reaction_time_s=1e-3)
    assert fast.limited_by == "code cycles" and slow.limited_by == "reaction"
    assert slow.wall_time_s >= 1e9 * 1e-3
    assert fast.wall_time_s == pytest.approx(2e9 * fast.code_distance * 1e-6)
    capped = surface_code_estimate(40, 2e9, 1e10, physical_error=1e-3, t_depth=1e9, max_factories=1)
    assert capped.limited_by == "factories" and capped.factories == 1
    assert capped.wall_time_s > fast.wall_time_s
    # the data-error share of the failure budget holds over the whole (longer) wall time
    assert 2 * 40 * capped.code_cycles * capped.logical_error_per_cycle <= capped.failure_budget / 2 * (1 + 1e-9)


def test_phase_register_queries_and_median_runs_reach_the_confidence():
    # BHMT 2002 Theorem 12 with M = 2^m: the exact phase-estimation output distribution (as in
    # the test above) at a = 1/2 gives the per-run success probability; the median of k runs
    # (scipy.stats.binom) then fails with probability <= delta.
    m_min = queries_for_amplitude_error(1e-2)
    m, bits = phase_register_queries(m_min)
    assert m == 2**bits and m_min <= m < 2 * m_min
    y = np.arange(m)
    k = np.arange(m)
    a = 0.5
    theta = math.asin(math.sqrt(a)) / math.pi
    p = np.zeros(m)
    for sign in (1, -1):
        p += 0.5 * np.abs(np.exp(2j * np.pi * np.outer(y / m - sign * theta, -k)).sum(axis=1) / m) ** 2
    ok = np.abs(np.sin(np.pi * y / m) ** 2 - a) <= 1e-2
    success = p[ok].sum()
    runs = median_repetitions(0.05)
    assert binom.cdf((runs - 1) // 2, runs, success) <= 0.05


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
