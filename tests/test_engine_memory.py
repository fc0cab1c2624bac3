"""estimate_memory_bytes against the measured peak (tracemalloc, Python's allocation tracer, which
numpy reports its arrays to) of a full gradient, within 1.5x either way (the project's accuracy goal
for the memory model, common practice for refusing jobs up front), in the normal and the
memory-lean mode; and the n = 16 full gradient within a 24 GiB machine."""

import tracemalloc

import numpy as np
import pytest

import qhl.exact.engine as engine_module
from qhl import ExactEngine, build_model
from qhl.exact.engine import estimate_memory_bytes
from qhl.exact.sectors import magnetisation_sectors
from qhl.spins.cluster import Cluster, Experiment, Spin


def proton_cluster(n, points, seed=0):
    """Invented random protons (all offsets and dipolar couplings free: P = n (n + 1) / 2)."""
    rng = np.random.default_rng(seed)
    while True:
        pos = rng.uniform(0, 1, (n, 3)) * n ** (1 / 3) * 2.2
        d = np.linalg.norm(pos[:, None] - pos[None], axis=-1) + np.eye(n) * 9
        if d.min() > 1.5:
            break
    spins = tuple(Spin(f"H{i}", "1H", tuple(p), float(rng.normal(0, 1000))) for i, p in enumerate(pos))
    return Cluster(9.4, "1H", spins, (), (Experiment("fid", 2e-4, points),))


def measured_and_estimated(n, points, lean):
    c = proton_cluster(n, points)
    model = build_model(c)
    assert len(model.free) == n * (n + 1) // 2
    tracemalloc.start()
    try:
        eng = ExactEngine(model)
        assert eng.lean == lean
        eng.gradient(c.experiments[0], method="full")
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    dims = [len(ix) for ix in eng.sectors]
    return peak, estimate_memory_bytes(n, dims, points)


@pytest.mark.parametrize("n,points", [(10, 256), (11, 64)])
def test_estimate_within_1p5x_of_measured_peak(n, points):
    peak, est = measured_and_estimated(n, points, lean=False)
    assert 1 / 1.5 < est / peak < 1.5, (peak, est)


def test_lean_estimate_within_1p5x_of_measured_peak(monkeypatch):
    """Lowering the lean threshold puts an 11-spin engine and the estimate in the lean mode."""
    monkeypatch.setattr(engine_module, "LEAN_ABOVE_BYTES", 1 << 20)
    peak, est = measured_and_estimated(11, 64, lean=True)
    assert 1 / 1.5 < est / peak < 1.5, (peak, est)
    monkeypatch.undo()
    peak_full, _ = measured_and_estimated(11, 64, lean=False)
    assert peak < peak_full


@pytest.mark.slow
def test_estimate_within_1p5x_at_12_spins():
    peak, est = measured_and_estimated(12, 16, lean=False)
    assert 1 / 1.5 < est / peak < 1.5, (peak, est)


def test_sixteen_spin_full_gradient_fits_24_gib():
    dims = [len(s) for s in magnetisation_sectors(("1H",) * 16)]
    assert max(dims) == 12870                                   # binomial(16, 8)
    assert 8.0 * sum(d * d for d in dims) > engine_module.LEAN_ABOVE_BYTES   # lean mode at n = 16
    assert estimate_memory_bytes(16, dims, 256) < 0.8 * 24 * 2**30
