"""Nuisance parameters (scale, phase, decay envelopes, dead time) fitted with the Hamiltonian.

Checks:
  * derivatives of the wrapped signal against central differences of the signal itself
    (numerical differentiation, common practice; the dead-time derivative against central
    differences of ExactEngine.signal in time, independent of the line-list route it uses);
  * recovery: data made with the exact engine, multiplied by a known scale, phase and exp(-t/T2)
    (and a Gaussian envelope and dead time in the slow test), plus Gaussian noise with a fixed seed,
    are fitted back within 3 Cramer-Rao bounds (Cramer 1946; Rao 1945). For an efficient estimate
    each |z| < 3 fails with probability 0.27% (normal distribution), so a test with K checked
    parameters fails falsely with probability at most K x 0.27% (union bound); the seed is fixed,
    so the outcome is deterministic.
"""

import numpy as np
import pytest

from qhl import QhlInputError, build_model, demo_cluster
from qhl.exact.engine import ExactEngine
from qhl.exact.likelihood import Dataset
from qhl.exact.provider import ExactGradientProvider
from qhl.learning.fitting import fit, learn
from qhl.learning.nuisance import NuisanceProvider, parse_nuisance


def _setup(free="offset:*", experiments=("static", "decoupled")):
    c = demo_cluster()
    exps = [c.experiment(n) for n in experiments]
    eng = ExactEngine(build_model(c, free=free))
    return c, exps, eng


def test_parse_nuisance_names_and_errors():
    assert parse_nuisance("phase, scale,t2") == ("scale", "phase", "decay")
    assert parse_nuisance("all") == ("scale", "phase", "decay", "gauss", "deadtime")
    assert parse_nuisance(None) == () and parse_nuisance("") == ()
    with pytest.raises(QhlInputError, match=r"--nuisance: unknown nuisance parameter 'tilt'"):
        parse_nuisance("scale,tilt")


def test_gradients_match_central_differences():
    c, exps, eng = _setup()
    p = NuisanceProvider(ExactGradientProvider(eng, exps), exps, "all")
    P = len(eng.model.free)
    # layout: static scale phase decay gauss, decoupled scale phase decay gauss, deadtime_us
    x = np.concatenate([eng.model.free_values_hz, [0.8, 0.3, 0.9, 0.4, 1.3, -0.2, 0.5, 0.7, 2.5]])
    times = {ex.name: ex.times_s[::16] for ex in exps}
    got = p.signals_and_gradients(x, times)
    for k in range(len(x)):
        step = 1e-3 if k < P else 1e-5
        up, dn = x.copy(), x.copy()
        up[k] += step
        dn[k] -= step
        fu, fd = p.signals_and_gradients(up, times), p.signals_and_gradients(dn, times)
        for name in times:
            numeric = (fu[name][0] - fd[name][0]) / (2 * step)
            exact = got[name][1][k]
            scale = max(np.max(np.abs(exact)), 1e-12)
            assert np.max(np.abs(numeric - exact)) < 1e-6 * scale + 1e-9, (p.parameter_names[k], name)


def test_deadtime_derivative_against_time_differences_of_the_engine():
    c, exps, eng = _setup()
    p = NuisanceProvider(ExactGradientProvider(eng, exps), exps, ("deadtime",))
    h = eng.model.free_values_hz
    t = exps[0].times_s[::24]
    tau_us = 3.0
    g = p.signals_and_gradients(np.append(h, tau_us), {"static": t})["static"][1][-1]
    d = 1e-9   # seconds
    numeric = (eng.signal(exps[0], t + tau_us * 1e-6 + d, h) - eng.signal(exps[0], t + tau_us * 1e-6 - d, h)) / (2 * d)
    np.testing.assert_allclose(g, 1e-6 * numeric, rtol=1e-5, atol=1e-9)


def _noisy_data(eng, exps, truth, seed, sigma=1e-3, tau_us=0.0):
    rng = np.random.default_rng(seed)
    out = {}
    for ex in exps:
        t = ex.times_s
        u = t + tau_us * 1e-6
        A, phi, T2, TG = truth[ex.name]
        env = np.exp(-u / T2) * (np.exp(-(u / TG) ** 2) if TG else 1.0)
        d = A * np.exp(1j * phi) * env * eng.signal(ex, u)
        d = d + sigma * (rng.normal(size=t.size) + 1j * rng.normal(size=t.size))
        out[ex.name] = (t, d, np.full(t.size, sigma))
    return Dataset(out)


def test_scale_phase_and_t2_recovered_within_three_bounds():
    c, exps, eng = _setup()
    truth = {"static": (0.7, 0.4, 5e-4, None), "decoupled": (1.3, -0.9, 2e-3, None)}
    data = _noisy_data(eng, exps, truth, seed=11)
    p = NuisanceProvider(ExactGradientProvider(eng, exps), exps, "scale,phase,t2")
    h0 = eng.model.free_values_hz
    start = np.concatenate([h0 + 2.0, p.start_values()])
    res = fit(p, data, start, max_iter=100)
    assert res.converged
    want = dict(zip(res.names, np.concatenate([h0, np.zeros(p.start_values().size)])))
    for ex in exps:
        A, phi, T2, _ = truth[ex.name]
        want[f"scale:{ex.name}"], want[f"phase:{ex.name}"], want[f"decay:{ex.name}"] = A, phi, ex.t_max_s / T2
    z = np.array([(v - want[n]) / e for n, v, e in zip(res.names, res.values_hz, res.stderr_hz)])
    assert np.all(np.isfinite(res.stderr_hz)) and res.fisher.shape == (len(res.names),) * 2
    assert np.max(np.abs(z)) < 3.0, dict(zip(res.names, np.round(z, 2)))   # 12 checks: <= 3.2% false failures
    # The bounds are not vacuous: the decay of the static window is known to better than 5%.
    k = res.names.index("decay:static")
    assert res.stderr_hz[k] < 0.05 * want["decay:static"]


def test_gaussian_envelope_and_dead_time_recovered_within_three_bounds():
    c, exps, eng = _setup()
    truth = {"static": (0.9, 0.2, 8e-4, 4e-4), "decoupled": (1.1, -0.3, 3e-3, 5e-3)}
    data = _noisy_data(eng, exps, truth, seed=5, tau_us=4.0)
    p = NuisanceProvider(ExactGradientProvider(eng, exps), exps, "all")
    h0 = eng.model.free_values_hz
    start = np.concatenate([h0 + 1.0, p.start_values()])
    res = fit(p, data, start, max_iter=150)
    assert res.converged
    want = dict(zip(eng.model.free, h0))
    for ex in exps:
        A, phi, T2, TG = truth[ex.name]
        want.update({f"scale:{ex.name}": A, f"phase:{ex.name}": phi, f"decay:{ex.name}": ex.t_max_s / T2,
                     f"gauss:{ex.name}": (ex.t_max_s / TG) ** 2})
    want["deadtime_us"] = 4.0
    z = np.array([(v - want[n]) / e for n, v, e in zip(res.names, res.values_hz, res.stderr_hz)])
    assert np.max(np.abs(z)) < 3.0, dict(zip(res.names, np.round(z, 2)))   # 15 checks: <= 4.1% false failures


def test_learn_reports_nuisance_rows_and_keeps_them_off_by_default():
    c = demo_cluster()
    plain = learn(c, free="offset:*", max_iter=20)
    assert plain.nuisance == [] and plain.to_json()["nuisance"] == []
    rep = learn(c, free="offset:*", max_iter=40, nuisance="scale,phase")
    js = rep.to_json()
    assert len(js["parameters"]) == 6 and len(js["nuisance"]) == 8
    rows = {r["name"]: r for r in js["nuisance"]}
    # Synthetic data carry no scale or phase: the fit finds scale 1 and phase 0 within 3 bounds.
    for ex in c.experiments:
        assert abs(rows[f"scale:{ex.name}"]["value"] - 1.0) < 3 * rows[f"scale:{ex.name}"]["stderr"]
        assert abs(rows[f"phase:{ex.name}"]["value"]) < 3 * rows[f"phase:{ex.name}"]["stderr"]
    assert rep.relative_error is not None and np.isfinite(rep.crb_relative_error)
