"""Shots through SamplerV2 (qhl.emulation.sampler_path) against today's runner and exact values.

References: the dense Trotterised derivatives (qhl.circuits.trotter_reference, checked against
scipy.linalg.expm / expm_frechet in tests/test_emulator.py), qiskit's own reference sampler
(qiskit.primitives.StatevectorSampler, an implementation of SamplerV2 independent of qiskit-aer)
and exact readout arithmetic. Statistics: means of i.i.d. (or stratified) shots are normal to
good approximation (central limit theorem; common practice), so with fixed seeds a |z| < 4
comparison fails for 6.3e-5 of seeds; each test states how many comparisons it makes.
"""

import numpy as np
import pytest

from qhl.base.errors import QhlInputError
from qhl.circuits.gradient_circuits import gradient_circuit, signal_circuit
from qhl.circuits.trotter_reference import trotter_gradient_exact, trotter_signal_exact
from qhl.emulation import FamilyRunner, NoiseSpec, emulate_gradient, estimate_family
from qhl.emulation.sampler_path import SamplerRunner, pub_plan

from made_up_clusters import small_model

T, R = 0.3, 2


@pytest.fixture(scope="module")
def small():
    model, ex = small_model(False, 3)
    name = list(model.free)[3]
    family = gradient_circuit(model, ex, name, T, R)
    _, g = trotter_gradient_exact(model, ex, T, R, 1, [name])
    return model, ex, name, family, complex(g[0])


def _z(a, b):
    return (a.value - b.value) / np.hypot(a.stderr, b.stderr)


def test_pub_plan_keeps_every_setting_and_respects_the_caps():
    """Bookkeeping (common practice): one PUB per distinct shot count by default; with S shots per
    PUB, setting g appears ceil(n_g / S) times; no job holds more than max_circuits rows."""
    counts = np.array([3, 1, 3, 7, 1, 3])
    plan = pub_plan(counts)
    assert len(plan) == 1 and sorted(n for _, n in plan[0]) == [1, 3, 7]
    for idx, n in plan[0]:
        assert np.all(counts[idx] == n)
    plan = pub_plan(counts, shots_per_pub=2, max_circuits=4)
    rows = np.concatenate([idx for job in plan for idx, _ in job])
    assert all(sum(len(idx) for idx, _ in job) <= 4 for job in plan) and len(plan) == 3   # 12 rows
    np.testing.assert_array_equal(np.bincount(rows, minlength=6), [2, 1, 2, 4, 1, 2])
    assert {n for job in plan for _, n in job} == {2}


def test_sampler_and_runner_give_equal_estimates(small):
    """Same family, same N = 6000 shots per part, fixed seeds: the SamplerV2 path (Aer's SamplerV2)
    and today's runner (numpy fast path) agree, |z| < 4 on Re and Im (2 comparisons: false
    failure 1.3e-4), and the sampler path matches the Trotterised value (2 more; 2.5e-4 in all)."""
    model, ex, name, family, ref = small
    a = estimate_family(family, 6000, 11, method="sampler")
    b = estimate_family(family, 6000, 12)
    for part in ("re", "im"):
        za = _z(a.part(part), b.part(part))
        zr = (a.part(part).value - getattr(ref, "real" if part == "re" else "imag")) / a.part(part).stderr
        print(f"\n  {part}: sampler {a.part(part).value:.4f} +- {a.part(part).stderr:.4f}, runner "
              f"{b.part(part).value:.4f} +- {b.part(part).stderr:.4f}, z {za:.2f}; vs exact z {zr:.2f}")
        assert abs(za) < 4 and abs(zr) < 4
    assert a.shots == b.shots == 12000
    # the stratified standard error is the runner's: per-shot variances agree within 10% (common practice:
    # the sample variance of 6000 shots scatters by ~2% here)
    assert a.re.variance == pytest.approx(b.re.variance, rel=0.1)


def test_fixed_shots_per_pub_and_batching_stay_unbiased(small):
    """S = 16 shots per PUB and at most 7 circuits per job (random subsets of each setting's shots,
    sampler_path docstring): |z| < 4 against the Trotterised Re value (false failure 6.3e-5); the
    job and PUB counts follow pub_plan."""
    model, ex, name, family, ref = small
    runner = SamplerRunner(family, shots_per_pub=16, max_circuits=7)
    e = runner.run(4000, np.random.default_rng(5), "re")
    assert abs(e.value - ref.real) < 4 * e.stderr and e.shots == 4000
    # one fixed-shot block, so one PUB per job, and at least ceil(distinct settings / 7) jobs
    assert runner.pubs_run == runner.jobs_run >= -(-e.circuits_run // 7)


def test_a_user_sampler_runs_the_same_code_path(small):
    """qiskit's StatevectorSampler (qiskit.primitives; a SamplerV2 independent of Aer) passed from
    Python: |z| < 4 against the Trotterised Re value (false failure 6.3e-5)."""
    from qiskit.primitives import StatevectorSampler
    model, ex, name, family, ref = small
    e = emulate_gradient(model, ex, name, T, R, 3000, seed=2, method="sampler",
                         sampler_options={"sampler": StatevectorSampler(seed=3)})
    print(f"\n  StatevectorSampler: {e.re.value:.4f} +- {e.re.stderr:.4f}, exact {ref.real:.4f}")
    assert abs(e.re.value - ref.real) < 4 * e.re.stderr


def test_readout_error_through_the_sampler_is_exact_shrink():
    """Symmetric readout flips q = 0.1 on one measured Z multiply it by 1 - 2q = 0.8 exactly
    (common practice). Signal family, 20000 shots: |value - 0.8 S| < 4 stderr (false failure 6.3e-5)
    and the unshrunk value is rejected (|value - S| > 4 stderr)."""
    model, ex = small_model(False, 3)
    s = trotter_signal_exact(model, ex, 0.1, 3)
    e = SamplerRunner(signal_circuit(model, ex, 0.1, 3), NoiseSpec(0.0, 0.1)).run(20000, np.random.default_rng(7))
    print(f"\n  readout: {e.value:.4f} +- {e.stderr:.4f}, 0.8 S = {0.8 * s.real:.4f}, S = {s.real:.4f}")
    assert abs(e.value - 0.8 * s.real) < 4 * e.stderr
    assert abs(e.value - s.real) > 4 * e.stderr


def test_runner_and_sampler_agree_under_gate_noise(small):
    """Depolarising p = 0.01 (NoiseSpec): today's runner (Aer trajectories) and the SamplerV2 path
    (Aer's SamplerV2, same noise model) estimate the same noisy value, |z| < 4 (false failure 6.3e-5)."""
    model, ex, name, family, ref = small
    noise = NoiseSpec(0.01, 0.0)
    a = SamplerRunner(family, noise).run(3000, np.random.default_rng(21), "re")
    b = FamilyRunner(family, noise, threads=1).run(3000, np.random.default_rng(22), "re")
    print(f"\n  noisy: sampler {a.value:.4f} +- {a.stderr:.4f}, runner {b.value:.4f} +- {b.stderr:.4f}")
    assert abs(_z(a, b)) < 4


def test_bad_options_are_refused(small):
    model, ex, name, family, ref = small
    with pytest.raises(QhlInputError, match="shots_per_pub"):
        SamplerRunner(family, shots_per_pub=0)
    with pytest.raises(QhlInputError, match="max_circuits"):
        SamplerRunner(family, max_circuits=2.5)
    with pytest.raises(QhlInputError, match="leave out"):
        SamplerRunner(family, NoiseSpec(0.01, 0.0), device="fake_lima")
