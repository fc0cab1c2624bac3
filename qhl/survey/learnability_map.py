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

Axis 'cycle_time_s' (`sequence`, default DEFAULT_SEQUENCE, one of qhl.spins.sequences.NAMED_SEQUENCES):
at a cycle time t_c the experiment is the named cycle with tau = t_c / CYCLE_TAUS[sequence], repeated
K = floor(t_max_s / t_c) times after the excitation, sampled stroboscopically once per cycle (windowed
detection at the end of each cycle, k = 1 ... K; `points` is not used: the samples are the cycles), each
sample with noise `noise` per Re/Im part (`cycle_train`):
    learnability   the Fisher information of the K samples from the exact sequence engine
                   (qhl.exact.stroboscopic; qhl.survey.diagnostics.diagnose_cycle);
    ergodicity     <r> and D2 of the quasi-energies and states of the cycle propagator U_c beside the
                   circular unitary ensemble's values (as for a spinning sample);
    classical cost the exact route of a pulse sequence (qhl.exact.sequence_engine: dense density matrices,
                   the pulses mix the magnetisation sectors) for one K-sample signal, an estimate from this
                   machine's measured rates (qhl.costing.classical_cost.calibrate):
                       seconds = c_eigh sum_s d_s^3 + c_gemm 4 D (sum_s d_s^2) (pulse runs per cycle) K,
                       memory  = qhl.exact.sequence_engine.sequence_memory_bytes(n, 0, K),
                   D = 2^n, d_s the magnetisation sectors (each run of pulses moves the density matrix to
                   the computational basis and back: two products per sector on each side);
    quantum cost   the budget of the pulse-sequence experiment whose acquisition gives the last sample
                   (K - 1 cycles and the last cycle but its final delay tau, then acquisition t = tau;
                   every named cycle ends with a delay tau): the fault-tolerant T-count of its worst gradient
                   component to `precision` (qhl.costing.budget, SEQUENCE_GRADIENT_ASSUMPTION: Trotter steps
                   over the whole evolution K t_c, ideal pulses as exact single-qubit rotations; it grows with
                   the number of pulses and with K t_c); no learning-run shots (nan: not covered).
"""

from dataclasses import dataclass, field, replace
import math
import time as _time

import numpy as np

from ..base.errors import QhlInputError
from ..costing.budget import BudgetModel, BudgetSettings
from ..costing.classical_cost import classical_cost
from ..spins.cluster import Block, Delay, Experiment, check_experiment
from ..spins.sequences import CYCLE_TAUS, NAMED_SEQUENCES, named_block
from .diagnostics import GOE_MEAN_R, GUE_MEAN_R, POISSON_MEAN_R, diagnose, diagnose_cycle
from ..base.files import save_figure

__all__ = ["AXES", "WINDOW_DEFAULTS", "DEFAULT_SEQUENCE", "MapPoint", "LearnabilityMap", "CycleTrain", "cycle_train",
           "experiment_at", "learnability_map", "plot_learnability_map"]

AXES = ("dipolar_scale", "spinning_hz", "cycle_time_s")
DEFAULT_SEQUENCE = "wahuha"       # a dipolar-suppression cycle (qhl.spins.sequences)
WINDOW_DEFAULTS = {
    "max_median_crb_hz": 10.0,        # a choice: bounds of 10 Hz resolve couplings of a few hundred Hz
    "max_softest_bound_hz": 100.0,    # a choice: no parameter combination worse than 100 Hz
    "hard_seconds": 86400.0,          # a day (qhl.costing.classical_cost.beyond_reach)
    "hard_memory_bytes": float(2 ** 40),   # 1 TiB (same)
    "max_t_count": 1e12,              # a choice: T gates one fault-tolerant estimate may use
}


@dataclass(frozen=True)
class CycleTrain:
    """The stroboscopic experiment at one cycle time (module docstring): `cycles` repeats of `block` (one
    cycle of `sequence` with spacing tau_s), sampled at the end of each cycle."""

    sequence: str
    cycle_s: float
    tau_s: float
    cycles: int
    block: Block

    def last_sample_experiment(self, noise: float) -> Experiment:
        """The pulse-sequence experiment whose acquisition at t = tau_s is the last sample: K - 1 cycles and the
        last cycle without its final delay tau_s (the budget's experiment; module docstring)."""
        steps = self.block.steps
        if not (isinstance(steps[-1], Delay) and math.isclose(steps[-1].seconds, self.tau_s, rel_tol=1e-12)):
            raise QhlInputError(f"sequence {self.sequence!r} does not end with a delay tau", key="sequence")
        head = (Block(steps, self.cycles - 1, self.sequence),) if self.cycles > 1 else ()
        return Experiment(name=f"map_cycle_time_s_{self.cycle_s:.4g}", t_max_s=self.tau_s, points=2,
                          noise=float(noise), steps=head + (Block(steps[:-1], 1, self.sequence),))


def cycle_train(cycle_s: float, t_max_s: float, sequence: str = DEFAULT_SEQUENCE) -> CycleTrain:
    """The cycle train at cycle time `cycle_s` filling the window `t_max_s` (module docstring).

    Raises:
        QhlInputError: a cycle time that is not a number > 0, a sequence not in NAMED_SEQUENCES, a window
            shorter than one cycle.
    """
    if sequence not in NAMED_SEQUENCES:
        raise QhlInputError(f"unknown sequence {sequence!r}: expected one of {', '.join(sorted(NAMED_SEQUENCES))}",
                            key="sequence")
    try:
        tc = float(cycle_s)
    except (TypeError, ValueError):
        tc = math.nan
    if not (math.isfinite(tc) and tc > 0):
        raise QhlInputError(f"cycle time {cycle_s!r} s: expected a number > 0", key="map.cycle_time_s")
    if not (math.isfinite(t_max_s) and t_max_s > 0):
        raise QhlInputError(f"window {t_max_s!r} s: expected a number > 0", key="t_max_s")
    cycles = int(math.floor(t_max_s / tc * (1 + 1e-12)))
    if cycles < 1:
        raise QhlInputError(f"the window t_max_s = {t_max_s:g} s is shorter than one cycle of {sequence} "
                            f"({tc:g} s): expected a cycle time <= the window", key="map.cycle_time_s")
    from ..spins.cluster import MAX_REPEAT
    if cycles - 1 > MAX_REPEAT:              # the train repeats the cycle cycles - 1 times (experiment_at)
        raise QhlInputError(f"a cycle time of {tc:g} s repeats {cycles:,} times in the window t_max_s = "
                            f"{t_max_s:g} s; at most {MAX_REPEAT + 1:,} cycles are built: expected a cycle time "
                            f">= {t_max_s / (MAX_REPEAT + 1):.3g} s (or a shorter --t-max)", key="map.cycle_time_s")
    tau = tc / CYCLE_TAUS[sequence]
    return CycleTrain(sequence, tc, tau, cycles, named_block(sequence, tau))


def experiment_at(axis: str, value: float, t_max_s: float, points: int, noise: float,
                  sequence: str = DEFAULT_SEQUENCE) -> Experiment:
    """The experiment at one value of the control axis (module docstring); for 'cycle_time_s' the one whose
    acquisition gives the last stroboscopic sample (CycleTrain.last_sample_experiment, the budget's)."""
    if axis == "cycle_time_s":
        ex = cycle_train(value, t_max_s, sequence).last_sample_experiment(noise)
        check_experiment(ex, "map")
        return ex
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
    cycles: int | None = None           # cycle_time_s: samples, one per cycle (absent from JSON otherwise)

    @property
    def window(self) -> bool:
        return self.learnable and self.classically_hard and self.affordable

    def to_json(self) -> dict:
        out = {k: v for k, v in self.__dict__.items() if not (k == "cycles" and v is None)}
        return {**out, "window": self.window}


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
                     progress=None, sequence: str = DEFAULT_SEQUENCE) -> LearnabilityMap:
    """Learnability, ergodicity, classical and quantum cost of `cluster` over a control axis.

    Args:
        cluster: the Cluster (its own experiments are not used).
        axis: one of AXES; values: the axis values.
        t_max_s, points, noise: the experiment at each value (cycle_time_s: t_max_s is the window the
            cycles fill, one sample per cycle; points is not used).
        free: glob patterns of the free parameters.
        precision: eps of the fault-tolerant gradient component (per unit_hz of qhl.costing.budget).
        thresholds: overrides of WINDOW_DEFAULTS.
        progress: optional callable(str) for stage messages.
        sequence: the named cycle of axis 'cycle_time_s' (qhl.spins.sequences.NAMED_SEQUENCES).

    Returns:
        LearnabilityMap.

    Raises:
        QhlInputError: unknown axis or threshold, no values, values out of the cluster file's ranges;
            cycle_time_s: an unknown sequence, a cycle time <= 0 or longer than the window.
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
    exps = [experiment_at(axis, v, t_max_s, points, noise, sequence) for v in vals]
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
        _map_points(cluster, axis, vals, exps, t_max_s, points, noise, free, precision, settings, th, out, say, start,
                    sequence)
    except KeyboardInterrupt:                 # Ctrl-C keeps the values already done
        if not out:
            raise
        interrupted = True
        say(f"interrupted: {len(out)} of {len(vals)} values done")
    experiment = {"t_max_s": t_max_s, "points": points, "noise": noise, "free": list(free), "precision": precision}
    if axis == "cycle_time_s":
        experiment.update({"sequence": sequence, "cycle_taus": CYCLE_TAUS[sequence], "points": None,
                           "sampling": "stroboscopic, once per cycle (end of each cycle)"})
        assumptions = {
            "learnability": f"{sequence} cycles (tau = t_c / {CYCLE_TAUS[sequence]}) filling {t_max_s:g} s, sampled "
                            f"once per cycle, noise {noise:g} per Re/Im part of each sample (exact sequence engine; "
                            "qhl.survey.diagnostics.diagnose_cycle)",
            "ergodicity": "quasi-energies and states of the cycle propagator, per isotope left unpulsed; reference "
                          "the circular unitary ensemble (no antiunitary symmetry assumed)",
            "classical": "dense pulse-sequence route (qhl.exact.sequence_engine) for one K-sample signal: c_eigh sum "
                         "d_s^3 + c_gemm 4 D sum d_s^2 x pulse runs x K, measured rates (estimate)",
            "quantum": f"qhl.costing.budget of the experiment giving the last sample (K - 1 cycles, the last cycle "
                       f"to its final delay, acquisition tau): fault-tolerant T-count of the worst gradient component "
                       f"at eps {precision:g} per kHz over the whole evolution K t_c (model-based; bound and estimate "
                       "tiers as that module says); no learning-run shots",
        }
    else:
        assumptions = {
            "learnability": f"one FID of {points} points over {t_max_s:g} s, noise {noise:g} per Re/Im part "
                            "(qhl.survey.diagnostics.diagnose)",
            "classical": "qhl.costing.classical_cost: best route's time and memory (estimates from measured rates); "
                         "a spinning sample: the static FID's cost, a lower bound",
            "quantum": f"qhl.costing.budget: fault-tolerant T-count of the worst gradient component at eps "
                       f"{precision:g} per kHz, t = {t_max_s:g} s; near-term shots of a learning run (model-based)",
        }
    return LearnabilityMap(cluster.name, axis, out, th, experiment, _time.perf_counter() - start, assumptions,
                           interrupted)


def _map_points(cluster, axis, vals, exps, t_max_s, points, noise, free, precision, settings, th, out, say, start,
                sequence=DEFAULT_SEQUENCE):
    """Append one MapPoint per value to `out` (so an interrupted map keeps the finished ones)."""
    for i, (v, ex) in enumerate(zip(vals, exps)):
        say(f"{axis} = {v:g} ({i + 1}/{len(vals)}, {_time.perf_counter() - start:.0f} s): Fisher and levels")
        if axis == "cycle_time_s":
            out.append(_cycle_point(cluster, v, ex, t_max_s, noise, free, precision, settings, th, say, sequence))
            continue
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


def _cycle_point(cluster, v, ex, t_max_s, noise, free, precision, settings, th, say, sequence) -> MapPoint:
    """The MapPoint at cycle time v (module docstring, axis 'cycle_time_s'); `ex` the last sample's experiment."""
    train = cycle_train(v, t_max_s, sequence)
    d = diagnose_cycle(cluster, train.block, train.cycles, noise=noise, free=free)
    s = d.summary()
    lam = s["fisher_min_eigenvalue"]
    softest = 1.0 / math.sqrt(lam) if lam > 0 else math.inf
    say(f"cycle_time_s = {v:g}: classical cost ({train.cycles} cycles)")
    seconds, memory = sequence_classical_cost(cluster, train)
    say(f"cycle_time_s = {v:g}: quantum budget")
    one = replace(cluster, experiments=(ex,))
    b = BudgetModel(one, free=free, settings=settings).budget(ex.t_max_s, precision)
    t_count = float(b.fault_tolerant["t_count"])
    learnable = bool(s["median_crb_hz"] <= th["max_median_crb_hz"] and softest <= th["max_softest_bound_hz"])
    hard = bool(seconds > th["hard_seconds"] or memory > th["hard_memory_bytes"])
    return MapPoint(v, lam, s["median_crb_hz"], softest, s["mean_r"], s["mean_d2"], s["mean_d2_random"],
                    "pulse-sequence engine (dense)", float(seconds), float(memory), t_count, math.nan, learnable,
                    hard, bool(t_count <= th["max_t_count"]), float(s["mean_r_random"]), s["level_kind"],
                    train.cycles)


def sequence_classical_cost(cluster, train: CycleTrain) -> tuple:
    """(seconds, bytes) of one K-sample stroboscopic signal by the dense pulse-sequence route (module docstring:
    measured rates of qhl.costing.classical_cost.calibrate times the route's operation counts; an estimate)."""
    from ..costing.classical_cost import calibrate
    from ..exact.sequence_engine import _runs, sequence_memory_bytes
    from ..spins.cluster import flat_steps
    n = cluster.n_spins
    counts = {}
    for sp in cluster.spins:
        counts[sp.isotope] = counts.get(sp.isotope, 0) + 1
    # sector d_s = prod over isotopes of C(m_iso, up_iso): sums of d^p factor over the isotopes
    sum_d3 = math.prod(sum(math.comb(m, k) ** 3 for k in range(m + 1)) for m in counts.values())
    sum_d2 = math.prod(sum(math.comb(m, k) ** 2 for k in range(m + 1)) for m in counts.values())
    pulse_runs = sum(1 for kind, _ in _runs(flat_steps((train.block,))) if kind == "pulses")
    cal = calibrate()
    seconds = cal.c_eigh * float(sum_d3) + cal.c_gemm * 4.0 * 2.0**n * float(sum_d2) * pulse_runs * train.cycles
    return seconds, sequence_memory_bytes(n, 0, train.cycles)


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
    ax.set_xlabel(lmap.axis + (f" ({lmap.experiment['sequence']} cycles, one sample per cycle)"
                               if lmap.axis == "cycle_time_s" else ""))
    ax.legend(fontsize=7)
    step = float(np.min(np.diff(np.sort(x)))) / 2 if len(x) > 1 else 0.05
    for p in P:
        if p.window:
            for a in axes:
                a.axvspan(p.value - step, p.value + step, color="green", alpha=0.15)
    fig.suptitle(f"{lmap.cluster}: learnable, classically hard and affordable window "
                 f"({'none' if not lmap.window else ', '.join(f'{v:g}' for v in lmap.window)})", fontsize=9)
    fig.tight_layout()
    save_figure(fig, path, dpi=110)
    plt.close(fig)
    return path
