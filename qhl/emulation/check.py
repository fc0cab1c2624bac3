"""Emulated derivatives against exact ones: the rows of `qhl check`.

For each parameter (and part Re / Im) at one time t with r Trotter steps:
    exact          dS/dh_n(t) of the continuous-time evolution (qhl.exact.engine.ExactEngine)
    trotter_exact  dS_trot/dh_n(t) of the product formula (dense, qhl.circuits.trotter_reference)
    emulated       the shot estimate (qhl.emulation.derivatives) and its standard error
    z              (emulated - trotter_exact) / stderr          (noiseless: ~ N(0, 1))
    trotter_bias   trotter_exact - exact
With `hessian`, rows for every entry (m, n), m <= n, of d2S/dh_m dh_n are added.
"""

from dataclasses import dataclass, field
import time as _time

import numpy as np

from ..exact.engine import ExactEngine
from ..base.errors import QhlInputError
from ..spins.model import build_model
from .derivatives import as_generator, check_shots, emulate_gradient, emulate_hessian
from .noise import NoiseSpec
from ..circuits.trotter_reference import trotter_gradient_exact, trotter_hessian_exact

__all__ = ["CheckReport", "check_derivatives", "Z_LIMIT"]

Z_LIMIT = 4.0


@dataclass
class CheckReport:
    """Rows (dicts with parameter, part, exact, trotter_exact, emulated, stderr, z, trotter_bias),
    totals and whether the run was interrupted before all rows were done."""

    rows: list = field(default_factory=list)
    shots: int = 0
    circuits_run: int = 0
    seconds: float = 0.0
    time_s: float = 0.0
    steps: int = 1
    interrupted: bool = False
    planned: int = 0

    @property
    def failed(self) -> list:
        return [r for r in self.rows if not (abs(r["z"]) < Z_LIMIT)]

    def verdict(self) -> str:
        done = f"{len(self.rows)} of {self.planned} rows" if self.interrupted else f"{len(self.rows)} rows"
        if not self.failed:
            return f"PASS: all |z| < {Z_LIMIT:g} ({done})"
        names = ", ".join(f"{r['parameter']} ({r['part']}, z = {r['z']:.2f})" for r in self.failed)
        return f"FAIL: |z| >= {Z_LIMIT:g} for {names} ({done})"


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
                      parameters=None, experiment=None, order: int = 1, progress=None) -> CheckReport:
    """Emulated dS/dh_n (and Hessian entries) at one time against the exact and Trotterised values.

    Args:
        cluster: Cluster; time: t (s, > 0); steps: r; shots: per part of each estimate.
        seed: int; noise: NoiseSpec or None; hessian: also every entry m <= n.
        parameters: names (default the cluster's free offsets and dipolar couplings).
        experiment: name (default the first; none: dipolar scale 1).
        progress: callable(done, total, label) after each row pair.

    Returns:
        CheckReport (partial, interrupted=True, after Ctrl-C).

    Raises:
        QhlInputError: bad time, shots, steps, unknown parameter or experiment.
    """
    t = check_time(time)
    shots = check_shots(shots)
    if int(steps) != steps or steps < 1:
        raise QhlInputError(f"expected steps >= 1, got {steps!r}", key="--steps")
    ex = _experiment(cluster, experiment)
    base = build_model(cluster)
    names = list(base.free) if not parameters else list(dict.fromkeys(parameters))
    for nm in names:
        base.parameter(nm)
    model = build_model(cluster, free=names)
    engine = ExactEngine(model)
    rng = as_generator(seed)
    tasks = [("gradient", (nm,)) for nm in names]
    if hessian:
        tasks += [("hessian", (a, b)) for i, a in enumerate(names) for b in names[i:]]
    report = CheckReport(time_s=t, steps=int(steps), planned=2 * len(tasks))
    start = _time.perf_counter()
    try:
        _, grad_exact = engine.gradient(ex, [t])
        _, grad_trot = trotter_gradient_exact(model, ex, t, steps, order, names)
        if hessian:
            _, _, hess_exact = engine.hessian(ex, [t])
            hess_trot = trotter_hessian_exact(model, ex, t, steps, order, names)
        for k, (kind, pars) in enumerate(tasks):
            if kind == "gradient":
                i = names.index(pars[0])
                exact, trot = complex(grad_exact[i, 0]), complex(grad_trot[i])
                est = emulate_gradient(model, ex, pars[0], t, steps, shots, rng, order, noise)
                label = pars[0]
            else:
                i, j = names.index(pars[0]), names.index(pars[1])
                exact, trot = complex(hess_exact[i, j, 0]), complex(hess_trot[i, j])
                est = emulate_hessian(model, ex, pars, t, steps, shots, rng, order, noise)
                label = f"{pars[0]} x {pars[1]}"
            for part in ("re", "im"):
                e = est.part(part)
                pick = (lambda z: z.real) if part == "re" else (lambda z: z.imag)
                z = (e.value - pick(trot)) / e.stderr if e.stderr > 0 else (0.0 if e.value == pick(trot) else np.inf)
                report.rows.append({"parameter": label, "part": part, "kind": kind, "exact": pick(exact),
                                    "trotter_exact": pick(trot), "emulated": e.value, "stderr": e.stderr,
                                    "z": float(z), "trotter_bias": pick(trot) - pick(exact),
                                    "shots": e.shots, "circuits_run": e.circuits_run, "seconds": e.seconds})
            report.shots += est.shots
            report.circuits_run += est.circuits_run
            if progress is not None:
                progress(k + 1, len(tasks), label)
    except KeyboardInterrupt:
        report.interrupted = True
    report.seconds = _time.perf_counter() - start
    return report
