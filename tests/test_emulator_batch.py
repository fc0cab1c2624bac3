"""The batched, runtime-bound Aer path against the previous per-setting path and qiskit's binding.

References: qiskit's QuantumCircuit.assign_parameters (each setting bound by qiskit and simulated
alone by Aer's density-matrix or statevector method, save_probabilities; qiskit and qiskit-aer
documentation), the numpy fast path (itself checked against Aer in tests/test_emulator_fast.py)
and the Trotterised derivative (qhl.circuits.trotter_reference). Statistics: the central limit
theorem for two independent estimates of the same quantity (common practice): |z| < 4 has a
false-failure rate 6e-5 per comparison.
"""

import numpy as np
import pytest

from qhl.circuits.gradient_circuits import gradient_circuit
from qhl.emulation import FamilyRunner, NoiseSpec
from qhl.emulation.runner import _distinct_settings, clear_templates, run_batch

from made_up_clusters import small_model

T, R = 0.3, 3


@pytest.fixture(scope="module")
def small():
    model, ex = small_model(False, 3)
    return model, ex, list(model.free)


def settings_rows(fam, shots, seed):
    """(parameter rows, insertion rows) of the distinct settings of one stratified draw."""
    s = fam.sample(np.random.default_rng(seed), shots, "re", "stratified")
    first, _ = _distinct_settings(s, fam._index["prep"])
    return s.values[first], s.insertion_rows[first]


@pytest.mark.parametrize("noise", [NoiseSpec(), NoiseSpec(0.02)])
def test_runtime_binding_gives_qiskit_bound_probabilities(small, noise):
    """A random audit subset of 12 distinct settings: Aer's runtime-bound probabilities (density
    matrix under noise) equal those of the same settings bound by qiskit one by one to 1e-10."""
    model, ex, names = small
    fam = gradient_circuit(model, ex, names[3], T, R)
    runner = FamilyRunner(fam, noise, method="aer")
    rows, ins_rows = settings_rows(fam, 2000, 3)
    pick = np.random.default_rng(0).choice(len(rows), 12, replace=False)
    ref = runner.template_probabilities(rows[pick], binding="qiskit")
    got = runner.template_probabilities(rows[pick], binding="runtime")
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-10)
    assert np.allclose(ref.sum(axis=1), 1.0)
    if noise.is_noiseless:     # the noiseless template also gives the fast path's probabilities
        fast = FamilyRunner(fam).fast
        angles, inputs = np.unique(rows[pick][:, fam._index["prep"]], axis=0, return_inverse=True)
        p_fast = fast.probabilities(angles, ins_rows[pick], inputs.ravel(), "re")
        np.testing.assert_allclose(got, p_fast, rtol=0, atol=1e-10)


@pytest.mark.parametrize("noise", [NoiseSpec(), NoiseSpec(0.02, 0.01)])
def test_batched_runtime_path_agrees_with_per_setting_path(small, noise):
    """Fixed seeds: two parameters x Re/Im through run_batch (runtime binding, one Aer call per
    shot count) against the previous per-setting path; |z| < 4 on all 4 comparisons."""
    model, ex, names = small
    jobs, old = [], []
    for k, nm in enumerate((names[0], names[3])):
        fam = gradient_circuit(model, ex, nm, T, R)
        new = FamilyRunner(fam, noise, method="aer")
        prev = FamilyRunner(fam, noise, method="aer", binding="per-setting")
        for part in ("re", "im"):
            jobs.append((new, 3000, np.random.default_rng(10 + k), part))
            old.append(prev.run(3000, np.random.default_rng(20 + k), part))
    got = run_batch(jobs, np.random.default_rng(1))
    for a, b in zip(got, old):
        assert a.shots == b.shots == 3000
        z = (a.value - b.value) / np.hypot(a.stderr, b.stderr)
        assert abs(z) < 4, (a.value, b.value, z)


def test_batch_is_one_aer_call_per_shot_count(small, monkeypatch):
    """Noiseless: every family of the batch in one Aer run call; noisy: one trajectory call per
    distinct shot count below the density-matrix threshold (each setting gets exactly its shots)
    and one density-matrix call for the settings above it; same seeds give the same numbers."""
    model, ex, names = small
    fams = [gradient_circuit(model, ex, nm, T, R) for nm in names[:3]]
    for noise in (NoiseSpec(), NoiseSpec(0.01)):
        runners = [FamilyRunner(f, noise, method="aer") for f in fams]
        calls = []

        def counting(sim, kind):
            real = sim.run

            def run(circuits, *a, **kw):
                calls.append((kind, len(circuits), kw["shots"],
                              sum(len(next(iter(b.values()))) for b in kw["parameter_binds"])))
                return real(circuits, *a, **kw)
            monkeypatch.setattr(sim, "run", run)

        counting(runners[0].simulator, "shots")
        if not noise.is_noiseless:
            counting(runners[0].density_simulator, "density")
        shots = (600, 60, 60)      # 4 qubits: density matrices from 8 shots per setting (72 settings)
        out = run_batch([(r, n, np.random.default_rng(k), "re") for k, (r, n) in enumerate(zip(runners, shots))],
                        np.random.default_rng(7))
        first = list(calls)
        again = run_batch([(r, n, np.random.default_rng(k), "re") for k, (r, n) in enumerate(zip(runners, shots))],
                          np.random.default_rng(7))
        assert [e.value for e in out] == [e.value for e in again]
        settings = sum(e.circuits_run for e in out)
        assert sum(c[3] for c in first) == settings
        if noise.is_noiseless:
            assert len(first) == 1 and first[0][1] == 3
        else:
            counts = [c[2] for c in first if c[0] == "shots"]
            dense = [c for c in first if c[0] == "density"]
            assert runners[0].density_from == 8
            assert len(set(counts)) == len(counts) and len(dense) == 1 and len(first) < settings
            assert max(counts) < runners[0].density_from <= dense[0][2]
        monkeypatch.undo()


def test_template_is_transpiled_once_per_circuit(small):
    model, ex, names = small
    clear_templates()
    a = FamilyRunner(gradient_circuit(model, ex, names[1], T, R), NoiseSpec(0.01), method="aer")
    b = FamilyRunner(gradient_circuit(model, ex, names[1], T, R), NoiseSpec(0.02), method="aer")
    c = FamilyRunner(gradient_circuit(model, ex, names[1], T, R + 1), NoiseSpec(0.01), method="aer")
    assert a.transpiled is b.transpiled and a.transpiled is not c.transpiled
    assert a.template.global_phase == 0 and len(a.template.parameters) == len(a.transpiled.parameters)
