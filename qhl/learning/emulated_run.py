"""Emulated learning runs: the Trotter steps they use and their predicted time, before any shot.

Trotter steps. An emulated fit compares Trotterised estimates with data, so the Trotter error of
what it estimates, S(t) and dS/dh, must stay below a share of the precision asked of them:
    target = share * eps,  share = qhl.costing.fault_tolerant.DEFAULT_SPLIT['trotter'] (0.25),
    eps    = the smallest noise sigma of the data (the precision per point the fit is judged by),
with dS/dh measured per unit_hz (default 1 Hz, the unit of the parameters): a derivative error of
that size moves the model signal by at most `target` when a parameter moves by one unit_hz.
qhl.circuits.signal_trotter.signal_trotter_steps finds the fewest steps meeting it at each time
(exact engine + the Trotterised reference; qhl.emulation.provider falls back to the commutator bound
where that search declines). `steps` overrides it with one count for every time.

Time. predicted seconds = step search + evaluations x seconds per evaluation, with
    seconds per family = a + b r, for the signal family and for the gradient family of one free
        parameter of each kind (offset, dipolar, j) separately, measured by a calibration run of the
        same estimator at r = 1 and at the largest count (the search at each
        experiment's last time), after one unmeasured warm-up run at r = 1
        (qhl.emulation.provider.EmulatedGradientProvider.family_seconds; linear in r as the
        product-formula circuit is: a model);
    seconds per evaluation = sum over times of the signal family and every free parameter's gradient
        family (costed as its kind's);
    evaluations = max_iter + 1 (method 'gn': one evaluation per iteration plus the start; 'cg' and
        'lbfgs' can need more for their line searches, so for them it is a lower figure);
    step search = the search time measured at each experiment's last time x its number of times
        (an upper figure: earlier times need fewer steps).
Two stages, so that a hopeless run is refused within seconds: first the searches at the last times
only, with r(t) = ceil(r(t_last) t / t_last) for the other times (a model: step counts grow with t);
a run predicted above `max_minutes` there is refused before the other searches. Otherwise every
time is searched and the prediction is made again with the real counts (and checked again).
It is the time of a run that uses all its iterations: noisy fits usually stop earlier, at the
noise floor, so for 'gn' the prediction is an upper figure. Refusals raise QhlInputError with one
line giving the prediction, before any shot.
"""

import math
from dataclasses import dataclass

import numpy as np

from ..base.errors import QhlInputError
from ..base.progress import format_seconds
from ..costing.fault_tolerant import DEFAULT_SPLIT

__all__ = ["EmulatedRunPlan", "trotter_signal_target", "plan_emulated_run", "DEFAULT_MAX_MINUTES",
           "TROTTER_SHARE"]

DEFAULT_MAX_MINUTES = 60.0
TROTTER_SHARE = DEFAULT_SPLIT["trotter"]


def trotter_signal_target(dataset, share: float = TROTTER_SHARE) -> float:
    """share x the smallest noise sigma of `dataset` (module docstring): the allowed Trotter error."""
    sig = min(float(np.min(np.asarray(v[2], float))) for v in dataset.signals.values())
    return share * sig


@dataclass(frozen=True)
class EmulatedRunPlan:
    """Trotter steps and predicted time of an emulated fit (module docstring).

    Attributes:
        steps: {(experiment name, t): r}; step_sources: {(experiment name, t): 'fixed'|'signal'|'bound'|'model'}.
        target: the allowed Trotter error of S and dS/dh per unit_hz (None with fixed steps).
        evaluation_seconds: predicted seconds of one evaluation; evaluations: how many are counted.
        families_per_evaluation, shots_per_evaluation: circuit families and shots of one evaluation.
        calibration: seconds per family measured at the calibrated r.
        max_minutes: the limit checked (None: not checked).
        search_seconds: predicted seconds of step search still to do (0 once searched).
    """

    steps: dict
    step_sources: dict
    target: float | None
    unit_hz: float
    evaluation_seconds: float
    evaluations: int
    families_per_evaluation: int
    shots_per_evaluation: int
    calibration: dict
    max_minutes: float | None
    search_seconds: float = 0.0

    @property
    def predicted_seconds(self) -> float:
        """Step search still to do + evaluations x seconds per evaluation."""
        return self.search_seconds + self.evaluation_seconds * self.evaluations

    def summary(self) -> str:
        """One line: steps, families and shots per evaluation, predicted time."""
        rs = list(self.steps.values())
        src = sorted(set(self.step_sources.values()))
        search = f", {format_seconds(self.search_seconds)} of step search" if self.search_seconds else ""
        r_text = f"r {min(rs)}-{max(rs)}" if rs and min(rs) != max(rs) else f"r {rs[0] if rs else 0}"
        return (f"predicted at most {format_seconds(self.predicted_seconds)} ({self.evaluations} evaluations x "
                f"{format_seconds(self.evaluation_seconds)}: {self.families_per_evaluation:,} circuit families and "
                f"{self.shots_per_evaluation:,} shots each, {r_text} Trotter steps from {'/'.join(src)}{search})")

    def to_json(self) -> dict:
        return {"steps": [{"experiment": n, "time_s": t, "steps": r, "source": self.step_sources.get((n, t))}
                          for (n, t), r in self.steps.items()],
                "trotter_target": self.target, "unit_hz": self.unit_hz, "trotter_share": TROTTER_SHARE,
                "evaluation_seconds": self.evaluation_seconds, "evaluations": self.evaluations,
                "predicted_seconds": self.predicted_seconds,
                "families_per_evaluation": self.families_per_evaluation,
                "shots_per_evaluation": self.shots_per_evaluation, "calibration": self.calibration,
                "max_minutes": self.max_minutes,
                "model": "evaluations x calibrated seconds per evaluation (qhl.learning.emulated_run)"}


def _evaluation_seconds(steps, cal, weights):
    """sum over times of the signal family and the gradient families, each a + b r through the
    calibrated points {r: (signal s, {kind representative: gradient s})}; weights: {representative:
    how many free parameters it stands for}."""
    rs = sorted(cal)
    lo, hi = rs[0], rs[-1]

    def line(r, lo_value, hi_value):
        return lo_value if hi == lo else max(lo_value + (hi_value - lo_value) * (r - lo) / (hi - lo), 0.0)

    total = 0.0
    for r in steps.values():
        total += line(r, cal[lo][0], cal[hi][0])
        total += sum(w * line(r, cal[lo][1][name], cal[hi][1][name]) for name, w in weights.items())
    return float(total)


def plan_emulated_run(provider, dataset, max_iter: int, max_minutes: float | None = DEFAULT_MAX_MINUTES,
                      target: float | None = None, progress=None) -> EmulatedRunPlan:
    """Trotter steps and predicted time of an emulated fit; refuse it when too long (module docstring).

    Args:
        provider: qhl.emulation.provider.EmulatedGradientProvider (its steps rule is used).
        dataset: the Dataset to be fitted (its times).
        max_iter: the fit's iteration limit (evaluations counted: max_iter + 1).
        max_minutes: refuse above this many minutes (None: never).
        target: the provider's signal target, recorded in the plan.
        progress: optional callable(done, total, label) during the step search.

    Returns:
        EmulatedRunPlan.

    Raises:
        QhlInputError: max_minutes not positive, or the predicted time above it.
    """
    if max_minutes is not None and (not np.isfinite(max_minutes) or max_minutes <= 0):
        raise QhlInputError(f"expected --max-minutes > 0, got {max_minutes!r}", key="--max-minutes")
    def estimated_times(name, t):
        # t = 0 needs no shots after a bare 90-degree pulse (S = 1, dS/dh = 0), but after a pulse sequence
        # the provider estimates it too
        t = np.asarray(t, float)
        return np.sort(t if getattr(provider.experiments.get(name), "steps", ()) else t[t != 0])

    times = {name: estimated_times(name, v[0]) for name, v in dataset.signals.items()}
    times = {name: t for name, t in times.items() if t.size}
    n_params = len(provider.parameter_names)
    evaluations = int(max_iter) + 1
    values = provider.model.values_hz.copy()
    last, search_s = {}, 0.0
    for name, t in times.items():                       # stage 1: the last time of each experiment
        if name not in provider.experiments:
            raise QhlInputError(f"no experiment named '{name}': expected one of {', '.join(provider.experiments)}",
                                key="experiment")
        last[name] = provider.steps_for(provider.experiments[name], t[-1], values)
        search_s += provider.step_search_seconds.get((name, float(t[-1])), 0.0) * (t.size - 1)
    name_hi = max(last, key=last.get) if last else None
    kinds = {p.name: p.kind for p in provider.model.parameters}
    weights = {}                                         # one representative free parameter per kind
    for name in provider.parameter_names:
        rep = next((r for r in weights if kinds[r] == kinds[name]), name)
        weights[rep] = weights.get(rep, 0) + 1
    reps = tuple(weights)
    cal = {}
    if name_hi is not None:
        ex, t_hi, r_hi = provider.experiments[name_hi], times[name_hi][-1], last[name_hi]
        provider.family_seconds(ex, t_hi, 1, reps)     # warm-up (first-call costs), not counted
        cal = {1: provider.family_seconds(ex, t_hi, 1, reps)}
        if r_hi != 1:
            cal[r_hi] = provider.family_seconds(ex, t_hi, r_hi, reps)
    cal = cal or {1: (0.0, {name: 0.0 for name in reps})}
    modelled = {(n, float(x)): int(provider.steps) if provider.steps is not None else
                max(1, math.ceil(last[n] * x / t[-1])) for n, t in times.items() for x in t}

    def make(steps, sources, search):
        return EmulatedRunPlan(steps, sources, target if provider.steps is None else None, provider.unit_hz,
                               _evaluation_seconds(steps, cal, weights), evaluations,
                               len(steps) * (1 + n_params), 2 * provider.shots * len(steps) * (1 + n_params),
                               {"seconds_per_family": {int(r): {"signal": float(v[0]), "gradient": v[1]}
                                                       for r, v in cal.items()},
                                "step_search_seconds": search}, max_minutes, search)

    def check(plan, stage):
        if max_minutes is not None and plan.predicted_seconds > 60.0 * max_minutes:
            raise QhlInputError(f"emulated run {plan.summary()} exceeds --max-minutes {max_minutes:g} ({stage}): "
                                f"lower --max-iter, --shots, --free or the number of points, or raise --max-minutes",
                                key="--max-minutes")

    pending = search_s if provider.steps is None and provider.signal_target is not None else 0.0
    check(make(modelled, {k: "model" for k in modelled}, pending), "step counts modelled from the last times")
    steps = provider.step_plan(times, progress)
    plan = make(steps, {k: provider.step_sources[k] for k in steps}, 0.0)
    check(plan, "searched step counts")
    return plan
