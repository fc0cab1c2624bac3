"""`qhl check` with its Aer families batched (qhl.emulation.check, `batch`): the same rows as one family
at a time, in fewer Aer run calls, and Ctrl-C keeps the finished groups.

References: qiskit-aer's AerSimulator (the shots of both schemes come from it under the same noise
model; its `run` is wrapped to count calls), the central limit theorem for the comparison of two
estimates of one quantity (common practice), fixed seeds.
"""

import numpy as np
import pytest

from qhl.emulation.check import check_derivatives
from qhl.emulation.noise import NoiseSpec

from made_up_clusters import small_cluster

PARAMS = ["offset:S0", "offset:S1", "dipolar:S0-S1"]
NOISE = NoiseSpec(1e-3)


def _check(batch, shots=3000, seed=11, noise=NOISE, params=PARAMS, **kw):
    return check_derivatives(small_cluster(False, 3), 0.3, 2, shots, seed, noise=noise, parameters=params,
                             batch=batch, **kw)


@pytest.fixture
def aer_calls(monkeypatch):
    """Shot counts of every AerSimulator.run call (qiskit-aer's own method, wrapped)."""
    from qiskit_aer import AerSimulator
    calls = []
    real = AerSimulator.run

    def counted(self, circuits, *args, **kwargs):
        calls.append(int(kwargs.get("shots")))
        return real(self, circuits, *args, **kwargs)
    monkeypatch.setattr(AerSimulator, "run", counted)
    return calls


def test_batched_noisy_rows_agree_with_one_at_a_time():
    """3 spins + ancilla, depolarising 1e-3, 3 gradients (6 rows), 3000 shots per part, seed 11. Both
    schemes draw the same settings (same streams) and differ in Aer's outcomes only, so per row
    (batched - single) / sqrt(se_b^2 + se_s^2) is at most N(0, 1) (the shared settings correlate the
    two positively, which only shrinks the difference); |z| < 4 per row: false-failure rate
    <= 6 x 6.3e-5 = 4e-4 for the 6 rows (normal tail, common practice)."""
    one, batched = _check(0), _check(8)
    assert len(one.rows) == len(batched.rows) == 6
    for a, b in zip(one.rows, batched.rows):
        assert (a["parameter"], a["part"]) == (b["parameter"], b["part"])
        assert a["shots"] == b["shots"] == 3000 and a["trotter_exact"] == b["trotter_exact"]
        z = (b["emulated"] - a["emulated"]) / np.hypot(a["stderr"], b["stderr"])
        print(f"\n  {a['parameter']} {a['part']}: one {a['emulated']:.4f} +- {a['stderr']:.4f}, "
              f"batched {b['emulated']:.4f} +- {b['stderr']:.4f}, z {z:.2f}")
        assert abs(z) < 4
        assert b["stderr"] == pytest.approx(a["stderr"], rel=0.25)   # same estimator, same shots
    assert batched.status == one.status == "pass"


def test_batched_check_makes_one_aer_run_call_per_shot_count(aer_calls):
    """All 3 noisy families in one group: one AerSimulator.run call per distinct shot count (runtime
    parameter binding, qhl.emulation.runner.run_batch), against one per shot count per family and part
    one at a time."""
    _check(8, shots=800)
    batched = list(aer_calls)
    aer_calls.clear()
    _check(0, shots=800)
    single = list(aer_calls)
    print(f"\n  Aer run calls: batched {len(batched)}, one at a time {len(single)}")
    assert len(batched) == len(set(batched)) >= 1
    assert len(single) > 2 * len(batched)


def test_noiseless_batched_rows_equal_fast_path_rows(aer_calls):
    """Noiseless checks stay one family at a time on the numpy fast path (module docstring of
    qhl.emulation.check): `batch` changes no row, and Aer is never called."""
    one, batched = _check(0, noise=None, shots=500), _check(8, noise=None, shots=500)
    assert [r["emulated"] for r in one.rows] == [r["emulated"] for r in batched.rows]
    assert aer_calls == []


def test_interrupt_keeps_finished_groups(monkeypatch):
    """Ctrl-C during the second group (batch=2 of 3 families): the 4 rows of the first group are kept."""
    import qhl.emulation.runner as runner
    real, seen = runner.run_batch, []

    def interrupted(jobs, rng):
        seen.append(len(jobs))
        if len(seen) == 2:
            raise KeyboardInterrupt
        return real(jobs, rng)
    monkeypatch.setattr(runner, "run_batch", interrupted)
    rep = _check(2, shots=300)
    assert seen == [4, 2]                                 # 2 families x (re, im), then 1 family
    assert rep.interrupted and rep.planned == 6 and len(rep.rows) == 4
    assert [r["parameter"] for r in rep.rows] == ["offset:S0"] * 2 + ["offset:S1"] * 2
    assert rep.shots == 4 * 300


def test_bad_batch_is_refused():
    from qhl.base.errors import QhlInputError
    with pytest.raises(QhlInputError, match="batch"):
        _check(-1, shots=10)


def test_device_batched_rows_agree_and_share_sampler_jobs():
    """--device fake_lima (qiskit-ibm-runtime's offline snapshot, SamplerV2 on its noise model), 2 gradients,
    4000 shots per part, seed 5: the PUBs of both families (Re and Im) go in one sampler job instead of one
    job per family and part; rows agree with one family at a time within |z| < 4 (same settings, the
    sampler's outcomes differ; false-failure rate <= 4 x 6.3e-5, normal tail). With max_circuits the
    jobs are cut at that many bound circuits, as one at a time."""
    kw = dict(noise=None, params=PARAMS[:2], shots=4000, seed=5, device="fake_lima")
    one, batched = _check(0, **kw), _check(8, **kw)
    assert one.sampler_jobs == 4 and batched.sampler_jobs == 1
    assert batched.sampler_pubs == one.sampler_pubs
    for a, b in zip(one.rows, batched.rows):
        assert (a["parameter"], a["part"]) == (b["parameter"], b["part"])
        assert a["attenuation"] == b["attenuation"] and a["shots"] == b["shots"] == 4000
        z = (b["emulated"] - a["emulated"]) / np.hypot(a["stderr"], b["stderr"])
        print(f"\n  {a['parameter']} {a['part']}: one {a['emulated']:.4f} +- {a['stderr']:.4f}, "
              f"batched {b['emulated']:.4f} +- {b['stderr']:.4f}, z {z:.2f}")
        assert abs(z) < 4
    capped = _check(8, sampler_options={"max_circuits": 40}, **kw)
    circuits = sum(r["circuits_run"] for r in capped.rows)
    assert capped.sampler_jobs == -(-circuits // 40)


def test_noisy_hessian_rows_batched_with_gradients(aer_calls):
    """--hessian with noise: gradient (1 ancilla) and Hessian (2 ancillas) families share the group's Aer run
    calls (one per shot count); 2 parameters give 2 gradients + 3 entries = 10 rows, each within |z| < 4 of
    one family at a time (false-failure rate <= 10 x 6.3e-5, normal tail)."""
    kw = dict(params=PARAMS[:2], shots=1500, seed=4, hessian=True)
    batched = _check(8, **kw)
    calls = list(aer_calls)
    one = _check(0, **kw)
    assert len(calls) == len(set(calls)) and len(batched.rows) == len(one.rows) == 10
    assert [r["kind"] for r in batched.rows] == ["gradient"] * 4 + ["hessian"] * 6
    for a, b in zip(one.rows, batched.rows):
        assert (a["parameter"], a["part"]) == (b["parameter"], b["part"])
        assert abs(b["emulated"] - a["emulated"]) < 4 * np.hypot(a["stderr"], b["stderr"])
