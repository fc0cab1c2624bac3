"""Shot-based estimates of S_trot(t), dS_trot/dh_n and d2S_trot/dh_m dh_n on the emulator.

Each function compiles one circuit family (qhl.circuits.gradient_circuits: Hadamard-test insertion of the
generator's Pauli terms at a slot drawn with weight |beta_a|, i.e. uniformly over the Trotter
steps in [0, t] and by |c_k| / ||c||_1 over the terms within a step; input states from the
rho0 ensemble) and estimates its Re and Im parts with `shots` shots each, on independent
random streams spawned from `seed` (numpy SeedSequence), so equal seeds give equal numbers.
The estimates are unbiased for the Trotterised quantities (qhl.circuits.trotter_reference),
not for the continuous-time ones: the difference is the Trotter bias.

Emulator options (keywords of every function here; see qhl.emulation.runner.FamilyRunner):
method 'auto' (numpy fast path when noiseless, else Aer), 'fast', 'aer' or 'sampler' (through a
SamplerV2, qhl.emulation.sampler_path; `sampler_options` go to its SamplerRunner: sampler,
device, backend, shots_per_pub, max_circuits, simulator_options); sampling
'stratified' (default) or 'iid' (the original scheme); audit: settings per run re-checked on Aer.
`emulate_gradients` batches every parameter and time of a gradient: the families of one time
share one cached evolution (qhl.emulation.fast_path.EvolutionTables).
"""

import numpy as np

from ..circuits.circuit_family import PARTS
from ..base.errors import QhlInputError
from ..circuits.gradient_circuits import gradient_circuit, hessian_circuit, signal_circuit
from .estimate import ComplexEstimate
from .noise import NoiseSpec
from .runner import FamilyRunner, run_batch
from ..spins.spinning import is_spinning

__all__ = ["as_generator", "estimate_family", "emulate_signal", "emulate_gradient", "emulate_hessian",
           "emulate_gradients"]


def as_generator(seed) -> np.random.Generator:
    """A numpy Generator from an int seed (or the Generator itself)."""
    if isinstance(seed, np.random.Generator):
        return seed
    if isinstance(seed, (bool, float)) or seed is None:
        raise QhlInputError(f"expected an integer seed, got {seed!r}", key="--seed")
    return np.random.default_rng(int(seed))


def check_shots(shots) -> int:
    if isinstance(shots, bool) or int(shots) != shots or shots < 1:
        raise QhlInputError(f"expected shots >= 1, got {shots!r}", key="--shots")
    return int(shots)


def estimate_family(family, shots: int, seed=0, noise: NoiseSpec | None = None, parts=PARTS,
                    runner: FamilyRunner | None = None, *, method: str = "auto", sampling: str = "stratified",
                    audit: int = 0, sampler_options: dict | None = None) -> ComplexEstimate:
    """Re and Im of a CircuitFamily's X with `shots` shots per part (see qhl.emulation.runner).

    Args:
        family: CircuitFamily; shots: per part (>= 1); seed: int or Generator.
        noise: NoiseSpec or None; parts: subset of ('re', 'im') (a part left out stays empty).
        runner: a FamilyRunner of this family to reuse (transpiled once); method, sampling,
            audit: FamilyRunner options (ignored when `runner` is given); method 'sampler' builds
            a qhl.emulation.sampler_path.SamplerRunner with `sampler_options`.

    Returns:
        ComplexEstimate.

    Raises:
        QhlInputError: shots < 1, bad seed or part.
    """
    shots = check_shots(shots)
    rng = as_generator(seed)
    if runner is None and method == "sampler":
        from .sampler_path import SamplerRunner
        runner = SamplerRunner(family, noise, sampling=sampling, **(sampler_options or {}))
    runner = runner or FamilyRunner(family, noise, method=method, sampling=sampling, audit=audit)
    streams = dict(zip(PARTS, rng.spawn(2)))
    out = {}
    for p in parts:
        if p not in PARTS:
            raise QhlInputError(f"unknown part '{p}': expected re or im", key="part")
        out[p] = runner.run(shots, streams[p], p)
    return ComplexEstimate(**out)


def emulate_signal(model, experiment, time, steps, shots, seed=0, order=1, noise=None, *, method="auto",
                   sampling="stratified", audit=0, sampler_options=None, **compile_options):
    """S_trot(t) with `shots` shots per part. compile_options go to signal_circuit."""
    family = signal_circuit(model, experiment, time, steps, order, **compile_options)
    return estimate_family(family, shots, seed, noise, method=method, sampling=sampling, audit=audit,
                           sampler_options=sampler_options)


def emulate_gradient(model, experiment, parameter, time, steps, shots, seed=0, order=1, noise=None, *,
                     method="auto", sampling="stratified", audit=0, sampler_options=None, **compile_options):
    """dS_trot/dh_n (1/Hz) with `shots` shots per part (Hadamard-test family by default; a spinning
    experiment's time-dependent family, qhl.circuits.spinning_circuits, where it spins).

    Example:
        >>> from qhl import demo_cluster, build_model
        >>> c = demo_cluster(); m = build_model(c)
        >>> e = emulate_gradient(m, c.experiments[0], "offset:H1", 1e-4, 2, 200, seed=1)
        >>> e.shots, e.value == emulate_gradient(m, c.experiments[0], "offset:H1", 1e-4, 2, 200, seed=1).value
        (400, True)
    """
    if is_spinning(experiment):       # the time-dependent family (qhl.circuits.spinning_circuits)
        from ..circuits.spinning_circuits import spinning_gradient_circuit
        family = spinning_gradient_circuit(model, experiment, parameter, time, steps, order, **compile_options)
    else:
        family = gradient_circuit(model, experiment, parameter, time, steps, order, **compile_options)
    return estimate_family(family, shots, seed, noise, method=method, sampling=sampling, audit=audit,
                           sampler_options=sampler_options)


def emulate_hessian(model, experiment, parameters, time, steps, shots, seed=0, order=1, noise=None, *,
                    method="auto", sampling="stratified", audit=0, sampler_options=None, **compile_options):
    """d2S_trot/dh_m dh_n (1/Hz^2) with `shots` shots per part (two-ancilla family)."""
    family = hessian_circuit(model, experiment, tuple(parameters), time, steps, order, **compile_options)
    return estimate_family(family, shots, seed, noise, method=method, sampling=sampling, audit=audit,
                           sampler_options=sampler_options)


def emulate_gradients(model, experiment, parameters, times, steps, shots, seed=0, order=1, noise=None, *,
                      method="auto", sampling="stratified", audit=0, progress=None, sampler_options=None,
                      **compile_options):
    """dS_trot/dh_n for every parameter and time in one call (one estimate per entry).

    Every (parameter, time) family gets its own random stream spawned from `seed` (row-major),
    and the families of one time share the cached evolution of the fast path, so the forward
    states and suffix unitaries are built once per time. Families on the Aer path (noise,
    method 'aer' or 'mps') are run together at the end (qhl.emulation.runner.run_batch: one
    Aer run call per shot count for all of them, runtime parameter binding).

    Args:
        parameters: names; times: seconds (> 0); steps: r (int) or one r per time.
        progress: callable(done, total, label) after each entry (e.g. a stderr progress line).
        Other arguments as in emulate_gradient.

    Returns:
        (len(parameters), len(times)) object array of ComplexEstimate.

    Raises:
        QhlInputError: bad shots, seed, steps, time or parameter.
    """
    shots = check_shots(shots)
    names = list(parameters)
    times = np.atleast_1d(np.asarray(times, float))
    steps_of = np.broadcast_to(np.asarray(steps), times.shape)
    streams = as_generator(seed).spawn(len(names) * len(times) + 1)     # the last one seeds Aer
    out = np.empty((len(names), len(times)), object)
    done = 0
    batch, where = [], []
    for k, (t, r) in enumerate(zip(times, steps_of)):
        if int(r) != r or r < 1:
            raise QhlInputError(f"expected steps >= 1, got {r!r}", key="--steps")
        for p, nm in enumerate(names):
            family = gradient_circuit(model, experiment, nm, float(t), int(r), order, **compile_options)
            stream = streams[p * len(times) + k]
            if method != "sampler":
                runner = FamilyRunner(family, noise, method=method, sampling=sampling, audit=audit)
                if not runner.uses_fast_path:
                    re, im = stream.spawn(2)
                    batch += [(runner, shots, re, "re"), (runner, shots, im, "im")]
                    where.append((p, k, nm, t))
                    continue
            else:
                runner = None
            out[p, k] = estimate_family(family, shots, stream, noise, runner=runner, method=method,
                                        sampling=sampling, audit=audit, sampler_options=sampler_options)
            done += 1
            if progress is not None:
                progress(done, out.size, f"{nm} at t = {t:g} s")
    if batch:
        got = run_batch(batch, streams[-1])
        for j, (p, k, nm, t) in enumerate(where):
            out[p, k] = ComplexEstimate(got[2 * j], got[2 * j + 1])
            done += 1
            if progress is not None:
                progress(done, out.size, f"{nm} at t = {t:g} s")
    return out
