"""Emulated derivatives against exact ones: the rows of `qhl check`.

For each parameter (and part Re / Im) at one time t with r Trotter steps:
    exact          dS/dh_n(t) of the continuous-time evolution (qhl.exact.engine.ExactEngine)
    trotter_exact  dS_trot/dh_n(t) of the product formula (dense, qhl.circuits.trotter_reference)
    emulated       the shot estimate (qhl.emulation.derivatives) and its standard error
    z              (emulated - trotter_exact) / stderr          (noiseless: ~ N(0, 1))
    trotter_bias   trotter_exact - exact
With `hessian`, rows for every entry (m, n), m <= n, of d2S/dh_m dh_n are added.

Spinning experiments (spinning_hz > 0): exact is the exact spinning engine's derivative
(qhl.exact.spinning_engine), trotter_exact the compiled time-dependent family's exact mean
(qhl.circuits.spinning_circuits; circuit_family.exact_expectation, method 'density', up to
SPINNING_CHECK_MAX_SPINS spins), emulated its shot estimate; gradients only, one family at a time
(no Hessian rows, device or routing for them yet: refused with one line).

Device mode (`device=NAME`, an offline fake backend; qhl.emulation.sampler_path): each family is
transpiled for the device and run through SamplerV2 on its noise model. The reference is then
    predicted      trotter_exact * attenuation, attenuation = F R of the transpiled circuit from
                   the device's calibrated gate and readout errors (qhl.emulation.device_fidelity over
                   qhl.circuits.circuit_fidelity: global-depolarising approximation, a pessimistic
                   bound for unital noise, its measured accuracy stated there)
    z              (emulated - predicted) / stderr
and each row also carries attenuation, measured_attenuation = emulated / trotter_exact and its
stderr. The prediction is a pessimistic bound (the true shrink lies between F R and 1 for unital
noise; on fake_lima it measured 1.23 F R), so device rows are tested against that interval
(DEVICE_RULE): a row fails when its value lies beyond predicted (towards 0) or beyond trotter_exact
(away from 0) by Z_LIMIT standard errors; z_noiseless = (emulated - trotter_exact) / stderr is
reported beside z. A FAIL there means the emulation under the device's noise lies outside what the
attenuation bound allows: more damping than the bound, or a gain.

Target (`target=NAME`, qhl.circuits.targets: line, ring, grid, heavy-hex or an offline fake backend):
each checked family (the circuit of each row pair) is also routed for that target with the preset
pass manager and the coupling-strength layout search (qhl.circuits.routing.routed_family_counts);
the report's `routing` lists, per family, the routed counts of the whole circuit and of one Trotter
step beside the all-to-all two-qubit count. Counts only: the emulation itself is unchanged.

Batching (`batch`, default BATCH families; noisy runs, `noise` with a nonzero rate): the families
(one per row pair) are taken in consecutive groups of `batch` and run together through
qhl.emulation.runner.run_batch, one Aer run call per shot count for the whole group (runtime
parameter binding, cached transpiled templates). Every family draws its settings from the same
streams as one at a time (batch=0, estimate_family per family), so the rows agree in distribution
(tests/test_check_batch.py). Rows are added per finished group, so Ctrl-C keeps every group done
before it; progress is reported after each group. Noiseless runs stay one family at a time (the
numpy fast path has no per-call cost to share; Ctrl-C keeps every finished family). In device
mode the PUBs of a group's families go to the sampler together
(qhl.emulation.sampler_path.run_sampler_batch: as few sampler jobs as `max_circuits` allows, one
without it), the same streams drawing the settings.

Power and bias (POWER_RULE, BIAS_RULE): a row can detect an error as large as the value it tests
only when stderr <= max(|exact|, |trotter_exact|) / POWER_RATIO (an error of 100% of the value then
gives |z| >= POWER_RATIO; common practice for a 3-sigma test). When no row can, the verdict is
INCONCLUSIVE, whatever the z values. A Trotter bias larger than the value, |trotter_exact - exact|
> |exact| (which includes a sign flip between exact and Trotterised), is flagged: the check then
tests the product formula, not the derivative the fit needs.
"""

from dataclasses import dataclass, field
import time as _time

import numpy as np

from ..exact.engine import ExactEngine
from ..base.errors import QhlInputError
from ..spins.model import build_model
from ..spins.spinning import is_spinning
from .derivatives import as_generator, check_shots, emulate_gradient, emulate_hessian
from .noise import NoiseSpec
from ..circuits import MAX_BUILT_STEPS
from ..circuits.circuit_fidelity import MODEL
from ..circuits.trotter_reference import trotter_gradient_exact, trotter_hessian_exact

__all__ = ["CheckReport", "check_derivatives", "ATTENUATION_MODEL", "DEVICE_RULE", "Z_LIMIT", "POWER_RATIO", "POWER_RULE", "BIAS_RULE",
           "annotate_row", "BATCH"]

Z_LIMIT = 4.0
SPINNING_CHECK_MAX_SPINS = 8     # the dense (density-operator) exact mean of a spinning family
BATCH = 8            # families per Aer batch (benchmarks/bench_emulator.py part 7)
POWER_RATIO = 3.0
POWER_RULE = (f"power: stderr <= |value|/{POWER_RATIO:g} with |value| = max(|exact|, |trotter_exact|), so an "
              f"error as large as the value gives |z| >= {POWER_RATIO:g}; a standard error that is undefined or 0 "
              f"(one shot, or a few shots that all agree) gives no power and no z")
ATTENUATION_MODEL = MODEL + " (qhl.circuits.circuit_fidelity; rates: the device's calibration)"
DEVICE_RULE = (f"device rows: the value must lie in [predicted, trotter_exact] (the attenuation F R is a "
               f"pessimistic bound, the true shrink lies between it and 1) within {Z_LIMIT:g} standard errors")
BIAS_RULE = "BIAS>VALUE: |trotter_exact - exact| > |exact| (includes a sign flip)"


def _testable(stderr) -> bool:
    """A standard error that can carry a test: finite and above 0 (one shot gives none; a few shots that all
    agree give 0, which says nothing about the spread)."""
    return bool(stderr is not None and np.isfinite(stderr) and stderr > 0)


def _passes(row: dict) -> bool:
    """|z| < Z_LIMIT; device rows (with 'z_noiseless'): inside [predicted, trotter_exact] within Z_LIMIT sd.
    A row without a usable standard error (_testable) cannot fail: it has no power (POWER_RULE)."""
    if not _testable(row["stderr"]):
        return True
    if "z_noiseless" not in row:
        return bool(abs(row["z"]) < Z_LIMIT)
    sign = -1.0 if row["trotter_exact"] < 0 else 1.0
    return bool(sign * row["z"] > -Z_LIMIT and sign * row["z_noiseless"] < Z_LIMIT)


def annotate_row(row: dict) -> dict:
    """Add 'power', 'bias_exceeds_value' and 'sign_flip' to a row (module docstring)."""
    size = max(abs(row["exact"]), abs(row["trotter_exact"]))
    row["power"] = bool(size > 0 and _testable(row["stderr"]) and row["stderr"] <= size / POWER_RATIO)
    row["sign_flip"] = bool(row["exact"] * row["trotter_exact"] < 0)
    # a sign flip is a bias above the value even where rounding makes |trotter - exact| equal |exact|
    row["bias_exceeds_value"] = bool(abs(row["trotter_bias"]) > abs(row["exact"]) or row["sign_flip"])
    return row


@dataclass
class CheckReport:
    """Rows (dicts with parameter, part, exact, trotter_exact, emulated, stderr, z, trotter_bias,
    shots, circuits_run, seconds, power, bias_exceeds_value, sign_flip), totals and whether the
    run was interrupted before all rows were done."""

    rows: list = field(default_factory=list)
    shots: int = 0
    circuits_run: int = 0
    seconds: float = 0.0
    time_s: float = 0.0
    steps: int = 1
    interrupted: bool = False
    planned: int = 0
    device: str | None = None
    target: str | None = None
    routing: list | None = None
    sampler_jobs: int | None = None
    sampler_pubs: int | None = None

    @property
    def failed(self) -> list:
        return [r for r in self.rows if not _passes(r)]

    @property
    def without_power(self) -> list:
        return [r for r in self.rows if not r.get("power", True)]

    @property
    def biased(self) -> list:
        return [r for r in self.rows if r.get("bias_exceeds_value")]

    @property
    def status(self) -> str:
        """'fail' (some |z| >= Z_LIMIT; device rows: DEVICE_RULE), 'inconclusive' (no row has power, POWER_RULE) or 'pass'."""
        if self.failed:
            return "fail"
        if not self.rows or len(self.without_power) == len(self.rows):
            return "inconclusive"
        return "pass"

    def verdict(self) -> str:
        done = f"{len(self.rows)} of {self.planned} rows" if self.interrupted else f"{len(self.rows)} rows"
        if self.status == "fail":
            if self.device is not None:
                names = ", ".join(f"{r['parameter']} ({r['part']}, z = {r['z']:.2f}, z_noiseless = "
                                  f"{r['z_noiseless']:.2f})" for r in self.failed)
                return (f"FAIL: outside [predicted, trotter_exact] by {Z_LIMIT:g} standard errors for {names} "
                        f"({done})")
            names = ", ".join(f"{r['parameter']} ({r['part']}, z = {r['z']:.2f})" for r in self.failed)
            return f"FAIL: |z| >= {Z_LIMIT:g} for {names} ({done})"
        bias = f"; Trotter bias larger than the value in {len(self.biased)}" if self.biased else ""
        if self.status == "inconclusive":
            return (f"INCONCLUSIVE: all |z| < {Z_LIMIT:g}, but no row could detect an error as large as its "
                    f"value (stderr > |value|/{POWER_RATIO:g}); use more --shots ({done}{bias})")
        weak = len(self.without_power)
        note = f"; {weak} without power" if weak else ""
        if self.device is not None:
            return f"PASS: every value within [predicted, trotter_exact] +- {Z_LIMIT:g} sd ({done}{note}{bias})"
        return f"PASS: all |z| < {Z_LIMIT:g} ({done}{note}{bias})"

    def warnings(self) -> list:
        """One line per row whose Trotter bias exceeds its value (BIAS_RULE)."""
        return [f"Trotter bias {r['trotter_bias']:.2e} larger than the value {r['exact']:.2e} for "
                f"{r['parameter']} ({r['part']}){', sign flipped' if r['sign_flip'] else ''}: use more --steps "
                f"or --order 2" for r in self.biased]

    def to_json(self) -> dict:
        return {"rows": self.rows, "status": self.status, "verdict": self.verdict(),
                "warnings": self.warnings(), "power_rule": POWER_RULE, "bias_rule": BIAS_RULE,
                "shots": self.shots, "circuits_run": self.circuits_run, "seconds": self.seconds,
                "time_s": self.time_s, "steps": self.steps, "interrupted": self.interrupted,
                "planned": self.planned, "device": self.device,
                "reference": "trotter_exact" if self.device is None else "trotter_exact * attenuation",
                "attenuation_model": None if self.device is None else ATTENUATION_MODEL,
                "device_rule": None if self.device is None else DEVICE_RULE,
                "target": self.target, "routing": self.routing, "sampler_jobs": self.sampler_jobs,
                "sampler_pubs": self.sampler_pubs}


def _device_estimate(model, ex, kind, pars, t, steps, order, shots, rng, device, sampler_options):
    """(ComplexEstimate through SamplerV2 on the device's noise model, predicted Attenuation, the runner)."""
    from ..circuits.gradient_circuits import gradient_circuit, hessian_circuit
    from .derivatives import estimate_family
    from .device_fidelity import target_attenuation
    from .sampler_path import SamplerRunner
    family = gradient_circuit(model, ex, pars[0], t, steps, order) if kind == "gradient" else \
        hessian_circuit(model, ex, tuple(pars), t, steps, order)
    runner = SamplerRunner(family, device=device, **(sampler_options or {}))
    est = estimate_family(family, shots, rng, runner=runner)
    atten = target_attenuation(runner.transpiled, runner.measured_physical_qubits(), runner.masks,
                               runner.backend.target)
    return est, atten, runner


def _device_batch(model, ex, group, t, steps, order, shots, rng, device, sampler_options):
    """({(kind, pars): (ComplexEstimate, predicted Attenuation)}, sampler jobs, PUBs) of a group of
    families in device mode, their PUBs sent together (qhl.emulation.sampler_path.run_sampler_batch).
    Settings come from the same streams as one family at a time (_device_estimate); the sampler
    seeds from one further stream."""
    from ..circuits.gradient_circuits import gradient_circuit, hessian_circuit
    from .device_fidelity import target_attenuation
    from .estimate import ComplexEstimate
    from .sampler_path import SamplerRunner, run_sampler_batch
    jobs, runners = [], []
    for kind, pars in group:
        family = gradient_circuit(model, ex, pars[0], t, steps, order) if kind == "gradient" else \
            hessian_circuit(model, ex, tuple(pars), t, steps, order)
        runner = SamplerRunner(family, device=device, **(sampler_options or {}))
        re, im = rng.spawn(2)
        jobs += [(runner, shots, re, "re"), (runner, shots, im, "im")]
        runners.append(runner)
    got, n_jobs, n_pubs = run_sampler_batch(jobs, rng.spawn(1)[0])
    out = {}
    for n, (task, runner) in enumerate(zip(group, runners)):
        atten = target_attenuation(runner.transpiled, runner.measured_physical_qubits(), runner.masks,
                                   runner.backend.target)
        out[task] = (ComplexEstimate(got[2 * n], got[2 * n + 1]), atten)
    return out, n_jobs, n_pubs


def _groups(tasks, batch):
    """The tasks in consecutive groups of `batch` families (0: one at a time)."""
    size = int(batch) if batch else 1
    return [tasks[i:i + size] for i in range(0, len(tasks), size)]


def _batched_estimates(model, ex, group, t, steps, order, shots, rng, noise) -> dict:
    """{(kind, pars): ComplexEstimate} of a group of families, their Aer shots in one run_batch.

    Every family draws its settings from the same two streams as the one-at-a-time path
    (rng.spawn(2) per family, in task order; estimate_family), so fast-path rows are identical to
    it; Aer seeds of the group come from one further stream, spawned only when some family of the
    group runs on Aer.
    """
    from ..circuits.gradient_circuits import gradient_circuit, hessian_circuit
    from .estimate import ComplexEstimate
    from .runner import FamilyRunner, run_batch
    jobs = []
    for kind, pars in group:
        family = gradient_circuit(model, ex, pars[0], t, steps, order) if kind == "gradient" else \
            hessian_circuit(model, ex, tuple(pars), t, steps, order)
        runner = FamilyRunner(family, noise)
        re, im = rng.spawn(2)
        jobs += [(runner, shots, re, "re"), (runner, shots, im, "im")]
    on_aer = any(not runner.uses_fast_path for runner, _, _, _ in jobs)
    got = run_batch(jobs, rng.spawn(1)[0] if on_aer else None)
    return {task: ComplexEstimate(got[2 * n], got[2 * n + 1]) for n, task in enumerate(group)}


def _add_rows(report, label, kind, exact, trot, est, atten) -> None:
    """The Re and Im rows of one family's estimate (module docstring), and the report's totals."""
    for part in ("re", "im"):
        e = est.part(part)
        pick = (lambda z: z.real) if part == "re" else (lambda z: z.imag)
        ref = pick(trot) * (1.0 if atten is None else atten.total)
        z = (e.value - ref) / e.stderr if _testable(e.stderr) else float("nan")
        row = {"parameter": label, "part": part, "kind": kind, "exact": pick(exact),
               "trotter_exact": pick(trot), "emulated": e.value, "stderr": e.stderr,
               "z": float(z), "trotter_bias": pick(trot) - pick(exact),
               "shots": e.shots, "circuits_run": e.circuits_run, "seconds": e.seconds}
        if atten is not None:
            size = pick(trot)
            row.update(predicted=ref, attenuation=atten.total, attenuation_gates=atten.gates,
                       attenuation_readout=atten.readout, two_qubit_gates=atten.two_qubit_gates,
                       z_noiseless=float((e.value - size) / e.stderr) if _testable(e.stderr) else float("nan"),
                       measured_attenuation=e.value / size if size else float("nan"),
                       measured_attenuation_stderr=e.stderr / abs(size) if size else float("nan"))
        report.rows.append(annotate_row(row))
    report.shots += est.shots
    report.circuits_run += est.circuits_run


def _routed(model, ex, kind, pars, t, steps, order, target, label) -> dict:
    """Routed counts of one checked family on `target` (module docstring)."""
    from ..circuits.circuit_counts import family_counts, transpile_for_counts
    from ..circuits.gradient_circuits import gradient_circuit, hessian_circuit
    from ..circuits.routing import routed_family_counts
    family = gradient_circuit(model, ex, pars[0], t, steps, order) if kind == "gradient" else \
        hessian_circuit(model, ex, tuple(pars), t, steps, order)
    plain = family_counts(family, transpile_for_counts(family.with_measurements(family.representative())))
    routed = routed_family_counts(family, target)
    return {"parameter": label, "kind": kind, "all_to_all_two_qubit": int(plain["cx"]),
            "whole": routed["whole"].to_dict(), "per_step": routed["per_step"].to_dict()}


def _experiment(cluster, name):
    if name is None:
        return cluster.experiments[0] if cluster.experiments else None
    return cluster.experiment(name)


def check_time(time) -> float:
    t = float(time)
    if not np.isfinite(t) or t <= 0:
        raise QhlInputError(f"expected a finite time > 0 s the exact engine can evaluate, got {time!r}", key="--time")
    return t


def check_derivatives(cluster, time, steps, shots, seed=0, noise: NoiseSpec | None = None, hessian=False,
                      parameters=None, experiment=None, order: int = 1, progress=None,
                      reference_progress=None, device: str | None = None,
                      sampler_options: dict | None = None, target: str | None = None,
                      batch: int = BATCH) -> CheckReport:
    """Emulated dS/dh_n (and Hessian entries) at one time against the exact and Trotterised values.

    Args:
        cluster: Cluster; time: t (s, > 0); steps: r; shots: per part of each estimate.
        seed: int; noise: NoiseSpec or None; hessian: also every entry m <= n.
        parameters: names (default the cluster's free offsets and dipolar couplings).
        experiment: name (default the first; none: dipolar scale 1).
        progress: callable(done, total, label) after each row pair.
        reference_progress: callable(done, total) during the dense Trotterised reference (slots of
            its forward and backward sweeps; minutes for 12 spins).
        device: name of an offline fake backend (device mode, module docstring); excludes noise.
        sampler_options: further SamplerRunner options in device mode (shots_per_pub,
            max_circuits, simulator_options, seed_transpiler, optimization_level).
        target: also route every checked family for this target (module docstring; None or
            'all-to-all': no routing).

    Returns:
        CheckReport (partial, interrupted=True, after Ctrl-C).

    Raises:
        QhlInputError: bad time, shots, steps, unknown parameter or experiment; an unknown device or
            target (listing the valid names) or a cluster wider than the device or target (both numbers).
        batch: families per Aer or sampler batch of noisy and device runs (module docstring; 0: one
            family at a time through estimate_family, the previous scheme).
    """
    t = check_time(time)
    routing_target = None
    if target is not None and target != "all-to-all":
        from ..circuits.targets import resolve_target
        anc = 2 if hessian else 1
        routing_target = resolve_target(target, len(cluster.spins) + anc, key="--target",
                                        what=f"{len(cluster.spins)} spins + {anc} ancilla{'s' if anc > 1 else ''}")
    if device is not None:
        from .sampler_path import device_backend
        if noise is not None and not noise.is_noiseless:
            raise QhlInputError("--device brings the device's noise model: leave out --noise", key="--device")
        anc = 2 if hessian else 1
        device = device_backend(device, len(cluster.spins) + anc,
                       needs=f"{len(cluster.spins)} spins + {anc} ancilla{'s' if anc > 1 else ''}").name
    shots = check_shots(shots)
    if isinstance(batch, bool) or int(batch) != batch or batch < 0:
        raise QhlInputError(f"expected a batch of >= 0 families, got {batch!r}", key="batch")
    if int(steps) != steps or steps < 1:
        raise QhlInputError(f"expected steps >= 1, got {steps!r}", key="--steps")
    ex = _experiment(cluster, experiment)
    spinning = is_spinning(ex)
    if spinning:
        for bad, what in ((hessian, "Hessian rows"), (device is not None, "--device"),
                          (routing_target is not None, "--target")):
            if bad:
                raise QhlInputError(f"experiment '{ex.name}' spins: {what} are not available for spinning "
                                    "experiments (gradient rows are)", key="experiment.spinning_hz")
        if len(cluster.spins) > SPINNING_CHECK_MAX_SPINS:
            raise QhlInputError(f"experiment '{ex.name}' spins: the exact mean of its circuits is dense, up to "
                                f"{SPINNING_CHECK_MAX_SPINS} spins (this cluster has {len(cluster.spins)})",
                                key="experiment.spinning_hz")
        from ..circuits.spinning_circuits import steps_rule
        steps = steps_rule(ex.spinning_hz, t, steps)        # r = max(requested, ceil(8 nu_r t)) (README)
        if steps > MAX_BUILT_STEPS:
            raise QhlInputError(f"experiment '{ex.name}' spins at {ex.spinning_hz:g} Hz: the rotor rule (8 steps "
                                f"per period) needs {steps:,} Trotter steps over {t:g} s; at most "
                                f"{MAX_BUILT_STEPS:,} are built: choose a shorter --time", key="--time")
    base = build_model(cluster)
    names = list(base.free) if not parameters else list(dict.fromkeys(parameters))
    for nm in names:
        base.parameter(nm)
    model = build_model(cluster, free=names)
    free = list(model.free)         # the exact engine's rows follow the model's parameter order
    engine = ExactEngine(model)
    rng = as_generator(seed)
    tasks = [("gradient", (nm,)) for nm in names]
    if hessian:
        tasks += [("hessian", (a, b)) for i, a in enumerate(names) for b in names[i:]]
    report = CheckReport(time_s=t, steps=int(steps), planned=2 * len(tasks), device=device,
                         target=None if routing_target is None else routing_target.name,
                         routing=None if routing_target is None else [])
    start = _time.perf_counter()
    try:
        _, grad_exact = engine.gradient(ex, [t])
        if spinning:
            from ..circuits.circuit_family import exact_expectation
            from ..circuits.spinning_circuits import spinning_gradient_circuit
            grad_trot = np.array([exact_expectation(spinning_gradient_circuit(model, ex, nm, t, steps, order),
                                                    method="density") for nm in names])
        else:
            _, grad_trot = trotter_gradient_exact(model, ex, t, steps, order, names, progress=reference_progress)
        if hessian:
            _, _, hess_exact = engine.hessian(ex, [t])
            hess_trot = trotter_hessian_exact(model, ex, t, steps, order, names)
        k = 0
        batched = bool(batch) and not spinning and (device is not None or (noise is not None and not noise.is_noiseless))
        for group in _groups(tasks, batch if batched else 0):
            if batched and device is not None:
                ests, n_jobs, n_pubs = _device_batch(model, ex, group, t, steps, order, shots, rng, device,
                                                     sampler_options)
                report.sampler_jobs = (report.sampler_jobs or 0) + n_jobs
                report.sampler_pubs = (report.sampler_pubs or 0) + n_pubs
            elif batched:
                ests = _batched_estimates(model, ex, group, t, steps, order, shots, rng, noise)
            for kind, pars in group:
                if kind == "gradient":
                    i, fi = names.index(pars[0]), free.index(pars[0])
                    exact, trot = complex(grad_exact[fi, 0]), complex(grad_trot[i])
                    label = pars[0]
                else:
                    i, j = names.index(pars[0]), names.index(pars[1])
                    fi, fj = free.index(pars[0]), free.index(pars[1])
                    exact, trot = complex(hess_exact[fi, fj, 0]), complex(hess_trot[i, j])
                    label = f"{pars[0]} x {pars[1]}"
                atten = None
                if batched and device is not None:
                    est, atten = ests[(kind, pars)]
                elif device is not None:
                    est, atten, runner = _device_estimate(model, ex, kind, pars, t, steps, order, shots, rng, device,
                                                          sampler_options)
                    report.sampler_jobs = (report.sampler_jobs or 0) + runner.jobs_run
                    report.sampler_pubs = (report.sampler_pubs or 0) + runner.pubs_run
                elif batched:
                    est = ests[(kind, pars)]
                elif kind == "gradient":
                    est = emulate_gradient(model, ex, pars[0], t, steps, shots, rng, order, noise)
                else:
                    est = emulate_hessian(model, ex, pars, t, steps, shots, rng, order, noise)
                _add_rows(report, label, kind, exact, trot, est, atten)
                if routing_target is not None:
                    report.routing.append(_routed(model, ex, kind, pars, t, steps, order, routing_target, label))
                k += 1
                if progress is not None:
                    progress(k, len(tasks), label)
    except KeyboardInterrupt:
        report.interrupted = True
    report.seconds = _time.perf_counter() - start
    return report
