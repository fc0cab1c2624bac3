"""Hessians of pulse-sequence experiments (Richardson differences of exact gradients).

Reference: second central differences of tests/reference_pulses.py's dense signal (scipy expm,
Kronecker pulse matrices; imports nothing of qhl), step 2e-3 Hz: truncation ~ step^2 S''''/12
~ 1e-6 of |H| here, rounding ~ 1e-16 / step^2 ~ 3e-11.
"""

import numpy as np
import pytest

from qhl import ExactEngine, build_model
from qhl.exact.likelihood import Dataset, negative_log_likelihood
from qhl.spins.cluster import Delay, Experiment, Pulse
from qhl.spins.sequences import named_block

from made_up_clusters import small_cluster
from reference_pulses import dense_sequence_signal

FREE = ["offset:*", "dipolar:*", "j:*"]


def _dense_hessian(model, ex, t, values, step=2e-3):
    p = values.size
    out = np.zeros((p, p, t.size), complex)
    f = lambda v: dense_sequence_signal(model, ex, t, v)
    for m in range(p):
        for n in range(m, p):
            acc = 0
            for sm, sn, w in ((1, 1, 1), (1, -1, -1), (-1, 1, -1), (-1, -1, 1)):
                v = values.copy()
                v[m] += sm * step
                v[n] += sn * step
                acc = acc + w * f(v)
            out[m, n] = out[n, m] = acc / (4 * step * step)
    return out


@pytest.mark.parametrize("hetero", [False, True])
def test_sequence_hessian_equals_dense_second_differences(hetero):
    c = small_cluster(hetero, 3)
    model = build_model(c, free=FREE)
    steps = (Delay(0.06), Pulse(180, 90), Delay(0.04), Pulse(63, 20, "13C" if hetero else None, 0.01))
    ex = Experiment("s", 0.2, 3, 0.8, steps=steps)
    sig, grad, hess = ExactEngine(model).hessian(ex)
    ref = _dense_hessian(model, ex, ex.times_s, model.free_values_hz)
    scale = np.abs(ref).max()
    np.testing.assert_allclose(hess, ref, atol=2e-5 * scale)
    np.testing.assert_allclose(hess, hess.transpose(1, 0, 2), atol=0)
    np.testing.assert_allclose(sig, dense_sequence_signal(model, ex, ex.times_s), atol=1e-12)


def test_nll_hessian_of_a_sequence_experiment_is_positive_at_the_truth():
    # common practice: at noiseless data the NLL Hessian equals the Gauss-Newton (Fisher) matrix,
    # sum Re[conj(g) g] / sigma^2 (the residual term vanishes), so it is symmetric positive semi-definite
    c = small_cluster(False, 3)
    model = build_model(c, free=FREE)
    ex = Experiment("w", 0.2, 6, 1.0, noise=1e-3, steps=(named_block("wahuha", 0.01, 2),))
    eng = ExactEngine(model)
    t = ex.times_s
    data = Dataset({ex.name: (t, eng.signal(ex), np.full(t.size, 1e-3))})
    nll, g, h = negative_log_likelihood(eng, [ex], data, order=2)
    _, jac = eng.gradient(ex)
    gn = np.real(np.conj(jac) @ jac.T) / 1e-6
    np.testing.assert_allclose(h, gn, rtol=1e-6, atol=1e-6 * np.abs(gn).max())
