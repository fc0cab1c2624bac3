"""The fast path beyond 10 spins (streaming mode): its memory model against the measured peak, its
probabilities against Aer's, and the fall-back to Aer when the estimate does not fit.

References: tracemalloc (Python's allocation tracer, to which numpy reports its arrays) for the
peak, within 1.5x either way (the project's accuracy goal for memory models, common practice for
refusing jobs up front; as in tests/test_engine_memory.py); qiskit-aer's statevector method
(save_probabilities; qiskit-aer documentation) for the probabilities, to 1e-10.
"""

import tracemalloc

import numpy as np
import pytest

import qhl.emulation.fast_path as fast_path
from qhl import build_model
from qhl.base.errors import MemoryBudgetError
from qhl.circuits.gradient_circuits import gradient_circuit
from qhl.emulation import FamilyRunner
from qhl.emulation.fast_path import FastFamily, stream_memory_bytes
from qhl.emulation.runner import _distinct_settings
from qhl.spins.cluster import Cluster, Experiment, Pair, Spin


def chain_family(n, steps=1, parameter="dipolar:C0-C1", t=5e-4):
    """Invented: n protons in a chain, offsets up to 300 Hz, nearest-neighbour dipolar couplings."""
    rng = np.random.default_rng(n)
    spins = tuple(Spin(f"C{i}", "1H", None, float(rng.uniform(-300, 300))) for i in range(n))
    pairs = tuple(Pair((f"C{i}", f"C{i + 1}"), dipolar_hz=float(rng.uniform(-400, 400))) for i in range(n - 1))
    c = Cluster(9.4, "1H", spins, pairs, (Experiment("static", 1e-3, 8, 1.0, 1e-3),), name=f"chain{n}")
    return gradient_circuit(build_model(c), c.experiments[0], parameter, t, steps)


def distinct(fam, shots, seed, part="re"):
    s = fam.sample(np.random.default_rng(seed), shots, part, "stratified")
    first, _ = _distinct_settings(s, fam._index["prep"])
    params = s.values[first]
    angles, inputs = np.unique(params[:, fam._index["prep"]], axis=0, return_inverse=True)
    return params, angles, s.insertion_rows[first], inputs.ravel()


@pytest.mark.parametrize("n,chunk_bytes", [(11, 64 * 2 ** 20),
                                           pytest.param(12, 32 * 2 ** 20, marks=pytest.mark.slow)])
def test_stream_memory_model_within_1p5x_of_tracemalloc(n, chunk_bytes, monkeypatch):
    monkeypatch.setattr(fast_path, "STREAM_CHUNK_BYTES", chunk_bytes)
    fam = chain_family(n)
    fast = FastFamily(fam)
    assert fast.streaming and fast.chunk == fast_path.stream_chunk(n)
    _, angles, rows, inputs = distinct(fam, 3000, 1)
    assert len(rows) > fast.chunk            # several chunks, the model's peak is one full chunk
    tracemalloc.start()
    try:
        fast.probabilities(angles, rows, inputs, "re")
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    est = stream_memory_bytes(n, len(rows), fast.chunk, fast.n_outcomes)
    assert 1 / 1.5 < est / peak < 1.5, (peak, est)


def test_stream_probabilities_equal_aer_statevector():
    """11 spins + ancilla: 10 random distinct settings of each part, fast path vs Aer, 1e-10."""
    fam = chain_family(11)
    runner = FamilyRunner(fam)
    assert runner.uses_fast_path and runner.fast.streaming
    for part in ("re", "im"):
        params, angles, rows, inputs = distinct(fam, 400, 2, part)
        pick = np.random.default_rng(3).choice(len(rows), 10, replace=False)
        got = runner.fast.probabilities(angles, rows[pick], inputs[pick], part)
        ref = runner.aer_probabilities(params[pick])
        np.testing.assert_allclose(got, ref, rtol=0, atol=1e-10)


def test_falls_back_to_aer_with_a_note_when_the_estimate_does_not_fit(monkeypatch, capsys):
    fam = chain_family(11)
    monkeypatch.setattr("qhl.base.memory.available_memory_bytes", lambda: 1e6)
    runner = FamilyRunner(fam)
    again = FamilyRunner(fam)                 # the note is written once per process
    err = capsys.readouterr().err
    assert not runner.uses_fast_path and not again.uses_fast_path
    assert err.count("\n") == 1 and "Aer's statevector" in err
    with pytest.raises(MemoryBudgetError):
        FamilyRunner(fam, method="fast")


@pytest.mark.parametrize("n,steps", [(4, 40), (8, 3)])
def test_settings_memory_model_within_1p5x_of_tracemalloc_and_refusal(n, steps):
    # tracemalloc (as above): the per-shot settings of one run (sample, distinct settings, fast draws)
    from qhl.emulation.runner import settings_bytes
    fam = chain_family(n, steps=steps)
    runner = FamilyRunner(fam)
    runner.run(100, np.random.default_rng(0))                  # warm (reference tables, caches)
    shots = 200_000
    tracemalloc.start()
    try:
        runner.run(shots, np.random.default_rng(1))
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    est = settings_bytes(shots, fam.num_parameters, len(fam._index["prep"]))
    assert 1 / 1.5 < est / peak < 1.5, (peak, est)
    # 1e11 shots: refused up front, naming shots and what to change
    with pytest.raises(MemoryBudgetError) as err:
        runner.run(10**8 * 1000, np.random.default_rng(2))
    assert "shots" in str(err.value) and "fewer --shots or --steps" in str(err.value)
