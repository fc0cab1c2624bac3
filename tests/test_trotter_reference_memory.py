"""Memory model of the dense Trotterised reference (qhl.circuits.trotter_reference) against the
peak measured with Python's tracemalloc (numpy registers its buffers with it), and the up-front
refusal of a job that would not fit.

Tolerance: the model must lie within a factor 1.5 of the measured peak (either side).
"""

import tracemalloc

import numpy as np
import pytest

import qhl.base.memory as memory
from qhl.base.errors import MemoryBudgetError
from qhl.spins.cluster import Cluster, Experiment, Spin
from qhl.spins.model import build_model
from qhl.circuits.trotter_reference import (reference_memory_bytes, trotter_gradient_exact,
                                            trotter_signal_exact)
from qhl.circuits.trotter import trotter_terms, product_formula_slots


def chain(n):
    """An invented zig-zag chain of n protons 1.8 A apart."""
    rng = np.random.default_rng(n)
    spins = tuple(Spin(f"H{i + 1}", "1H", (1.8 * i, 0.3 * (i % 2), 0.0), float(rng.uniform(-500, 500)))
                  for i in range(n))
    return Cluster(9.4, "1H", spins, (), (Experiment("fid", 2e-4, 8, 1.0, 1e-3),), name=f"chain{n}")


def _peak(fn):
    tracemalloc.start()
    try:
        fn()
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def _check(n):
    c = chain(n)
    m, ex = build_model(c), c.experiments[0]
    pairs = (("signal", lambda: trotter_signal_exact(m, ex, 1e-4, 2, 2)),
             ("gradient", lambda: trotter_gradient_exact(m, ex, 1e-4, 2, 2, ["dipolar:H1-H2", "offset:H1"])))
    for kind, fn in pairs:
        ratio = _peak(fn) / reference_memory_bytes(n, kind)
        assert 1 / 1.5 < ratio < 1.5, (n, kind, ratio)


@pytest.mark.parametrize("n", [8, 9])
def test_memory_model_matches_tracemalloc_peak(n):
    _check(n)


@pytest.mark.slow
def test_memory_model_matches_tracemalloc_peak_10_spins():
    _check(10)


def test_no_cache_of_slot_unitaries_grows_with_slots():
    """The old cache held one 4^n matrix per (group, duration): ~70 for 12 spins. The model is
    now independent of the number of groups and slots, and so is the measured peak."""
    c = chain(8)
    m, ex = build_model(c), c.experiments[0]
    slots = product_formula_slots(len(trotter_terms(m, ex).groups), 1e-4, 4, 2)
    assert len({(s.group, s.duration) for s in slots}) > 30
    few = _peak(lambda: trotter_signal_exact(m, ex, 1e-4, 1, 1))
    many = _peak(lambda: trotter_signal_exact(m, ex, 1e-4, 4, 2))
    assert many < 1.2 * few


def test_twelve_spins_refused_up_front_with_estimate(monkeypatch):
    """With 1 GiB free the 12-spin gradient (5 x 16 x 4^12 bytes = 1.25 GiB) is refused before work."""
    monkeypatch.setattr(memory, "available_memory_bytes", lambda: float(2 ** 30))
    c = chain(12)
    m = build_model(c)
    assert reference_memory_bytes(12, "gradient") == pytest.approx(5 * 16 * 4.0 ** 12)
    with pytest.raises(MemoryBudgetError, match=r"1\.25 GiB"):
        trotter_gradient_exact(m, c.experiments[0], 1e-4, 4, 1, ["dipolar:H1-H2"])
