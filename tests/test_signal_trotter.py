"""Trotter steps from the error of the signal and its gradient (qhl.circuits.signal_trotter).

Independent references (tests/reference_dense.py and tests/reference_trotter.py import nothing of
qhl): the exact S and dS/dh from dense expm with central differences, and the Trotterised S and
dS_trot/dh from the dense product formula with the Frechet derivative of each factor
(scipy.linalg.expm_frechet; Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 30, 1639 (2009)); the
product formulas are those of Childs, Su, Tran, Wiebe, Zhu, Phys. Rev. X 11, 011020 (2021).
"""

import numpy as np
import pytest

from qhl import ExactEngine
from qhl.circuits.signal_trotter import signal_trotter_steps

from made_up_clusters import small_model
from reference_dense import central_difference, dense_signal
from reference_trotter import trotter_gradient, trotter_signal

T = 0.3


def _independent_error(model, ex, r, order):
    exact_s = dense_signal(model, ex, [T])[0]
    exact_g = central_difference(lambda v: dense_signal(model, ex, [T], v), model.free_values_hz, 1e-5)[:, 0]
    trot_s = trotter_signal(model, ex, T, r, order)
    trot_g = np.array([trotter_gradient(model, ex, T, r, order, name) for name in model.free])
    return max(abs(trot_s - exact_s), float(np.max(np.abs(trot_g - exact_g))))


@pytest.mark.parametrize("hetero,order", [(False, 1), (False, 2), (True, 2)])
def test_steps_meet_the_target_and_one_fewer_does_not(hetero, order):
    model, ex = small_model(hetero, n=3)
    target = 2e-3                                  # S is O(1) and dS/dh O(1/Hz) at t = 0.3 s (unit_hz = 1)
    r, err = signal_trotter_steps(model, ex, ExactEngine(model), T, order, target, unit_hz=1.0)
    assert r is not None and r > 1
    # central differences (step 1e-5 Hz) carry ~1e-9 error: far below the target
    assert _independent_error(model, ex, r, order) <= target * (1 + 1e-4)
    assert _independent_error(model, ex, r - 1, order) > target * (1 - 1e-4)
    assert err == pytest.approx(_independent_error(model, ex, r, order), abs=1e-7)


def test_large_clusters_and_order_4_are_declined():
    model, ex = small_model(False, n=3)
    assert signal_trotter_steps(model, ex, ExactEngine(model), T, 4, 1e-3, unit_hz=1.0) == (None, None)


def test_the_search_limit_is_a_cost_model_not_a_clock(monkeypatch):
    # common practice (reproducibility): the same input gives the same r whatever the machine's load;
    # the limit used to be a wall clock, so a loaded machine gave up (then the bound's r and another
    # Trotter order) where an idle one found r
    import time

    import qhl.circuits.signal_trotter as st
    model, ex = small_model(False, n=3)
    engine = ExactEngine(model)
    quick = signal_trotter_steps(model, ex, engine, T, 1, 2e-3, unit_hz=1.0)
    real = st.trotter_gradient_exact

    def slow(*args, **kwargs):                    # a machine 50 times busier (the clock gave up at r = 32)
        t0 = time.perf_counter()
        out = real(*args, **kwargs)
        time.sleep(49 * (time.perf_counter() - t0))
        return out
    monkeypatch.setattr(st, "trotter_gradient_exact", slow)
    assert signal_trotter_steps(model, ex, engine, T, 1, 2e-3, unit_hz=1.0, cost_limit_s=5.0) == quick
    monkeypatch.setattr(st, "trotter_gradient_exact", real)
    r = quick[0]
    # the model's limit: a search whose next doubling is predicted above the limit gives up
    tight = 2.5 * r * st.step_seconds(model.n_spins, len(model.free)) / 4
    assert signal_trotter_steps(model, ex, engine, T, 1, 2e-3, unit_hz=1.0, cost_limit_s=tight) == (None, None)
