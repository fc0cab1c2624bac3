"""Learnability map: one cluster over a control axis, with learnability, ergodicity and both costs.

At each value of the control axis one experiment is built (`experiment_at`: the axis
'dipolar_scale' of a free-induction decay with t_max_s, points and noise, or 'spinning_hz', the
same FID of a sample spinning at the magic angle, 0 = static), and four things are computed for it:
    learnability   smallest Fisher eigenvalue (1/Hz^2) and median Cramer-Rao bound (Hz) of the
                   free parameters (qhl.survey.diagnostics.diagnose: the Fisher information of
                   qhl.exact.likelihood);
    ergodicity     mean spacing ratio <r> (Poisson 0.3863, GOE 0.5307) and the mean D2 of the
                   eigenstates beside the random-vector value D2_GOE at the same dimensions
                   (qhl.survey.diagnostics); for a spinning sample the same of the Floquet
                   quasi-energies and states of one rotor period, beside the circular unitary
                   ensemble's values (<r> = GUE 0.5996, D2_CUE) (`mean_r_random`, `level_kind`);
    classical cost the best classical route's time and memory for one signal
                   (qhl.costing.classical_cost: estimates from rates measured on this machine);
                   for a spinning sample that of the same static FID, a lower bound (the time
                   dependence only adds work: slices per rotor period);
    quantum cost   the fault-tolerant T-count of estimating the worst gradient component to
                   `precision` (per unit_hz) at t = t_max_s, and the near-term shots of a whole
                   learning run (qhl.costing.budget.BudgetModel; model-based, bound or exact tier
                   as that module says); for a spinning sample the T-count of the budget's
                   'spinning' entry (amplitude estimation of its worst gradient component on the
                   time-dependent Trotter circuit) and no learning-run shots (nan: not covered).
The window (thresholds are arguments, defaults stated in WINDOW_DEFAULTS):
    learnable        median CRB <= max_median_crb_hz and softest bound 1/sqrt(lambda_min) <= max_softest_bound_hz;
    classically hard best classical route above hard_seconds or hard_memory_bytes
                     (defaults: a day or 1 TiB, as qhl.costing.classical_cost.beyond_reach);
    affordable       fault-tolerant T-count <= max_t_count.

A new control axis (a sequence cycle time) is one more branch of `experiment_at` (and of the
diagnose call in `_map_points`).
"""

from dataclasses import dataclass, field, replace
import math
import time as _time

import numpy as np

from ..base.errors import QhlInputError
from ..costing.budget import BudgetModel, BudgetSettings
from ..costing.classical_cost import classical_cost
from ..spins.cluster import Experiment, check_experiment
from .diagnostics import GOE_MEAN_R, GUE_MEAN_R, POISSON_MEAN_R, diagnose

__all__ = ["AXES", "WINDOW_DEFAULTS", "MapPoint", "LearnabilityMap", "experiment_at", "learnability_map",
           "plot_learnability_map"]

AXES = ("dipolar_scale", "spinning_hz")
WINDOW_DEFAULTS = {
    "max_median_crb_hz": 10.0,        # a choice: bounds of 10 Hz resolve couplings of a few hundred Hz
    "max_softest_bound_hz": 100.0,    # a choice: no parameter combination worse than 100 Hz
    "hard_seconds": 86400.0,          # a day (qhl.costing.classical_cost.beyond_reach)
    "hard_memory_bytes": float(2 ** 40),   # 1 TiB (same)
    "max_t_count": 1e12,              # a choice: T gates one fault-tolerant estimate may use
}


def experiment_at(axis: str, value: float, t_max_s: float, points: int, noise: float) -> Experiment:
    """The experiment at one value of the control axis (module docstring)."""
    if axis == "dipolar_scale":
        ex = Experiment(name=f"map_{axis}_{value:.4g}", t_max_s=float(t_max_s), points=int(points),
                        dipolar_scale=float(value), noise=float(noise))
        check_experiment(ex, "map")
        return ex
    if axis == "spinning_hz":
        ex = Experiment(name=f"map_{axis}_{value:.4g}", t_max_s=float(t_max_s), points=int(points),
                        noise=float(noise), spinning_hz=float(value))
        check_experiment(ex, "map")
        return ex
    raise QhlInputError(f"unknown control axis {axis!r}: expected one of {', '.join(AXES)}", key="map")


@dataclass
class MapPoint:
    """Everything at one value of the axis (module docstring); `window` = learnable and hard and affordable."""

    value: float
    fisher_min_eigenvalue: float
    median_crb_hz: float
    softest_bound_hz: float
    mean_r: float
    mean_d2: float
    mean_d2_random: float
    classical_method: str
    classical_seconds: float
    classical_memory_bytes: float
    t_count: float
    near_term_shots: float
    learnable: bool
    classically_hard: bool
    affordable: bool
    mean_r_random: float = GOE_MEAN_R
    level_kind: str = "eigenvalues of H"

    @property
    def window(self) -> bool:
        return self.learnable and self.classically_hard and self.affordable

    def to_json(self) -> dict:
        return {**self.__dict__, "window": self.window}


@dataclass
class LearnabilityMap:
    """A learnability map (module docstring). `window`: the axis values inside the window."""

    cluster: str
    axis: str
    points: list
    thresholds: dict
    experiment: dict
    seconds: float
    assumptions: dict = field(default_factory=dict)
    interrupted: bool = False

    @property
    def values(self) -> np.ndarray:
        return np.array([p.value for p in self.points])

    @property
    def window(self) -> list:
        return [p.value for p in self.points if p.window]

    def to_json(self) -> dict:
        return {"cluster": self.cluster, "axis": self.axis, "experiment": self.experiment,
                "thresholds": self.thresholds, "points": [p.to_json() for p in self.points],
                "window": self.window, "poisson_mean_r": POISSON_MEAN_R, "goe_mean_r": GOE_MEAN_R,
                "gue_mean_r": GUE_MEAN_R,
                "seconds": self.seconds, "assumptions": self.assumptions, "interrupted": self.interrupted}


def learnability_map(cluster, axis: str = "dipolar_scale", values=(0.0, 0.2, 0.4, 0.6, 0.8, 1.0), *,
                     t_max_s: float = 5e-4, points: int = 64, noise: float = 1e-3,
                     free=("offset:*", "dipolar:*"), precision: float = 0.01, thresholds=None,
                     progress=None) -> LearnabilityMap:
    """Learnability, ergodicity, classical and quantum cost of `cluster` over a control axis.

    Args:
        cluster: the Cluster (its own experiments are not used).
        axis: one of AXES; values: the axis values.
        t_max_s, points, noise: the experiment at each value.
        free: glob patterns of the free parameters.
        precision: eps of the fault-tolerant gradient component (per unit_hz of qhl.costing.budget).
        thresholds: overrides of WINDOW_DEFAULTS.
        progress: optional callable(str) for stage messages.

    Returns:
        LearnabilityMap.

    Raises:
        QhlInputError: unknown axis or threshold, no values, values out of the cluster file's ranges.
    """
    start = _time.perf_counter()
    say = progress or (lambda msg: None)
    th = dict(WINDOW_DEFAULTS)
    for k, v in (thresholds or {}).items():
        if k not in th:
            raise QhlInputError(f"unknown threshold {k!r}: expected one of {', '.join(th)}", key="thresholds")
        if not (isinstance(v, (int, float)) and math.isfinite(v) and v >= 0):
            raise QhlInputError(f"threshold {k} must be a finite number >= 0, got {v!r}", key=k)
        th[k] = float(v)
    vals = [float(v) for v in np.atleast_1d(values)]
    if not vals:
        raise QhlInputError("no values of the control axis", key="map")
    exps = [experiment_at(axis, v, t_max_s, points, noise) for v in vals]
    spinning = [ex for ex in exps if ex.spinning_hz > 0]
    if spinning:                  # refuse up front what a spinning value cannot do (no pair direction, ...)
        from ..spins.model import build_model
        from ..spins.spinning import spinning_factors
        spinning_factors(build_model(cluster), spinning[0])
    settings = BudgetSettings(empirical_trotter=False, hessian_exact=False, circuit_variance_max_spins=0,
                              classical_meter=False)
    out = []
    interrupted = False
    try:
        _map_points(cluster, axis, vals, exps, t_max_s, points, noise, free, precision, settings, th, out, say, start)
    except KeyboardInterrupt:                 # Ctrl-C keeps the values already done
        if not out:
            raise
        interrupted = True
        say(f"interrupted: {len(out)} of {len(vals)} values done")
    assumptions = {
        "learnability": f"one FID of {points} points over {t_max_s:g} s, noise {noise:g} per Re/Im part "
                        "(qhl.survey.diagnostics.diagnose)",
        "classical": "qhl.costing.classical_cost: best route's time and memory (estimates from measured rates); "
                     "a spinning sample: the static FID's cost, a lower bound",
        "quantum": f"qhl.costing.budget: fault-tolerant T-count of the worst gradient component at eps "
                   f"{precision:g} per kHz, t = {t_max_s:g} s; near-term shots of a learning run (model-based)",
    }
    return LearnabilityMap(cluster.name, axis, out, th, {"t_max_s": t_max_s, "points": points, "noise": noise,
                                                         "free": list(free), "precision": precision},
                           _time.perf_counter() - start, assumptions, interrupted)


def _map_points(cluster, axis, vals, exps, t_max_s, points, noise, free, precision, settings, th, out, say, start):
    """Append one MapPoint per value to `out` (so an interrupted map keeps the finished ones)."""
    for i, (v, ex) in enumerate(zip(vals, exps)):
        say(f"{axis} = {v:g} ({i + 1}/{len(vals)}, {_time.perf_counter() - start:.0f} s): Fisher and levels")
        d = diagnose(cluster, ex.dipolar_scale, t_max_s=t_max_s, points=points, noise=noise, free=free,
                     spinning_hz=ex.spinning_hz)
        s = d.summary()
        lam = s["fisher_min_eigenvalue"]
        softest = 1.0 / math.sqrt(lam) if lam > 0 else math.inf
        one = replace(cluster, experiments=(ex,))
        say(f"{axis} = {v:g}: classical cost")
        cc = classical_cost(replace(one, experiments=(replace(ex, spinning_hz=0.0),)))   # spinning: a lower bound
        say(f"{axis} = {v:g}: quantum budget")
        b = BudgetModel(one, free=free, settings=settings).budget(ex.t_max_s, precision)
        if ex.spinning_hz > 0:
            t_count = float(b.spinning[0]["fault_tolerant"]["amplitude_estimation"]["t_count"])
            shots = math.nan                      # learning-run shots: not covered for spinning samples
        else:
            t_count = float(b.fault_tolerant["t_count"])
            shots = float(b.near_term.get("shots_per_learning_run", math.nan))
        learnable = bool(s["median_crb_hz"] <= th["max_median_crb_hz"] and softest <= th["max_softest_bound_hz"])
        hard = bool(cc.seconds > th["hard_seconds"] or cc.memory_bytes > th["hard_memory_bytes"])
        out.append(MapPoint(v, lam, s["median_crb_hz"], softest, s["mean_r"], s["mean_d2"], s["mean_d2_random"],
                            cc.method, float(cc.seconds), float(cc.memory_bytes), t_count, shots, learnable,
                            hard, bool(t_count <= th["max_t_count"]), float(s["mean_r_random"]), s["level_kind"]))


def plot_learnability_map(lmap: LearnabilityMap, path):
    """Four panels over the axis (learnability, ergodicity, classical cost, quantum cost), the window shaded."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    x = lmap.values
    P = lmap.points
    fig, axes = plt.subplots(4, 1, figsize=(7, 10), sharex=True)

    def pos(a):
        a = np.asarray(a, float)
        return np.where((a > 0) & np.isfinite(a), a, np.nan)

    ax = axes[0]
    ax.semilogy(x, pos([p.median_crb_hz for p in P]), "o-", label="median CRB (Hz)")
    ax.semilogy(x, pos([p.softest_bound_hz for p in P]), "s--", label="softest bound 1/sqrt(lambda_min) (Hz)")
    ax.axhline(lmap.thresholds["max_median_crb_hz"], color="C0", lw=0.8, ls=":")
    ax.axhline(lmap.thresholds["max_softest_bound_hz"], color="C1", lw=0.8, ls=":")
    ax.set_ylabel("learnability")
    ax.legend(fontsize=7)
    ax = axes[1]
    ax.plot(x, [p.mean_r for p in P], "o-", label="<r>")
    ax.axhline(POISSON_MEAN_R, color="gray", lw=0.8, ls=":", label="Poisson 0.386")
    ax.axhline(GOE_MEAN_R, color="gray", lw=0.8, ls="--", label="GOE 0.531")
    if any(p.level_kind != "eigenvalues of H" for p in P):
        ax.axhline(GUE_MEAN_R, color="gray", lw=0.8, ls="-.", label="CUE (GUE) 0.600: Floquet levels")
    ax.plot(x, [p.mean_d2 for p in P], "s-", label="mean D2")
    ax.plot(x, [p.mean_d2_random for p in P], "s:", label="D2 of random vectors")
    ax.set_ylabel("ergodicity")
    ax.legend(fontsize=7, ncol=2)
    ax = axes[2]
    ax.semilogy(x, pos([p.classical_seconds for p in P]), "o-", label="classical time (s)")
    ax.axhline(lmap.thresholds["hard_seconds"], color="C0", lw=0.8, ls=":", label="hard above")
    ax.set_ylabel("classical cost")
    ax.legend(fontsize=7)
    ax = axes[3]
    ax.semilogy(x, pos([p.t_count for p in P]), "o-", label="fault-tolerant T-count")
    ax.semilogy(x, pos([p.near_term_shots for p in P]), "s--", label="near-term shots (learning run)")
    ax.axhline(lmap.thresholds["max_t_count"], color="C0", lw=0.8, ls=":", label="affordable below")
    ax.set_ylabel("quantum cost")
    ax.set_xlabel(lmap.axis)
    ax.legend(fontsize=7)
    step = float(np.min(np.diff(np.sort(x)))) / 2 if len(x) > 1 else 0.05
    for p in P:
        if p.window:
            for a in axes:
                a.axvspan(p.value - step, p.value + step, color="green", alpha=0.15)
    fig.suptitle(f"{lmap.cluster}: learnable, classically hard and affordable window "
                 f"({'none' if not lmap.window else ', '.join(f'{v:g}' for v in lmap.window)})", fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
