"""A qhl.learning.GradientProvider whose S(t) and dS/dh come from the emulator with shots.

Each call compiles, at the requested parameter values, one signal family and one gradient
family per free parameter and time point, with r(t) Trotter steps, and estimates each with `shots`
shots per part from one Generator seeded once (fresh estimates every call, reproducible per seed).
At t = 0 the values are exact: S(0) = 1 and dS/dh = 0 by the normalisation S = Tr[O rho]/Tr[O rho0].

Trotter steps r(t), in this order of precedence:
    'fixed'   a given count (`steps`);
    'signal'  with `signal_target`: the fewest steps whose Trotterised S(t) and dS/dh (per unit_hz)
              are within signal_target of the exact engine's (qhl.circuits.signal_trotter, clusters
              up to its SIGNAL_MAX_SPINS spins, orders 1 and 2), found once per (experiment, t) at the
              model's own values and kept for the whole fit (every evaluation sees the same formula);
    'bound'   the fewest whose commutator bound (qhl.circuits.trotter_bounds) on the propagator is
              <= eps (also where the signal search declines or hits its time limit: the bound is
              valid for every observable, so it is never too few).

Pulse-sequence experiments (steps): the families are qhl.circuits.sequence_circuits' signal and
Hadamard-gradient families (delays Trotterised, ideal pulses as rotations, then the acquisition).
The acquisition's r(t) is chosen as above, except that the signal-based search (free evolution
only) is replaced by the bound. The delays' steps: with `steps` fixed, every delay gets that count;
otherwise the commutator bound holds the delays to eps together, each delay tau_d to
eps tau_d / sum_d tau_d (so by the triangle inequality the whole propagator is within 2 eps, the
acquisition's eps plus the delays'; common practice). t = 0 is estimated too (after a
preparation S(0) and dS/dh are not fixed by the normalisation).

Spinning experiments: qhl.circuits.spinning_circuits' families (step averages of the rotor factors);
r(t) = the rotor rule, at least 8 steps per rotor period (steps_rule), and at least `steps` when fixed
(no commutator bound or signal search: both are written for a static Hamiltonian).

Calibration (`family_seconds`): the measured time of one signal and one gradient family at a
given (t, r) with the same estimator (fast path when noiseless), on its own random stream; the
run-time prediction built from it is qhl.learning.emulated_run's.
"""

import time as _time

import numpy as np

from ..base.errors import QhlInputError
from ..circuits.gradient_circuits import gradient_circuit, signal_circuit
from ..circuits.sequence_circuits import acquisition_terms, sequence_gradient_circuit, sequence_signal_circuit
from ..circuits.spinning_circuits import spinning_gradient_circuit, spinning_signal_circuit, steps_rule
from ..spins.spinning import is_spinning
from ..exact.provider import GradientProvider
from ..circuits.trotter_bounds import trotter_steps_for
from ..spins.cluster import Delay, flat_steps
from ..circuits.signal_trotter import signal_trotter_steps
from .derivatives import as_generator, check_shots, estimate_family

__all__ = ["EmulatedGradientProvider"]


class EmulatedGradientProvider(GradientProvider):
    """Shot-noise S and dS/dh for the learning loop (`noisy = True`).

    Args:
        model: HamiltonianModel whose free parameters are fitted.
        experiments: Experiment objects the data refer to.
        shots: shots per part of every estimate.
        seed: int seed of the single random stream.
        steps: fixed Trotter steps, or None for r(t) from `signal_target` or the bound (module docstring).
        eps: target Trotter error (spectral norm) of the bound-based r(t); order: 1 or 2.
        noise: qhl.emulation.noise.NoiseSpec or None.
        signal_target: allowed error of the Trotterised S(t) and dS/dh (per unit_hz) for the
            signal-based r(t), or None for the bound; needs `engine`.
        engine: qhl.exact.engine.ExactEngine of `model` (signal-based r(t)).
        unit_hz: frequency unit of the derivative error in the signal-based r(t).
        step_time_limit_s: limit of one signal-based search in seconds of its cost model
            (qhl.circuits.signal_trotter.step_seconds; then the bound is used).

    Attributes:
        shots_used, circuits_run, seconds: totals over all calls.
        progress: optional callable(done, total, label) after each circuit family of a call.
        step_sources: {(experiment name, t): 'fixed' | 'signal' | 'bound'} of the counts used so far.
    """

    noisy = True

    def __init__(self, model, experiments, shots: int, seed=0, steps=None, eps: float = 1e-3, order: int = 2,
                 noise=None, signal_target=None, engine=None, unit_hz: float = 1.0, step_time_limit_s: float = 10.0):
        self.model = model
        self.experiments = {ex.name: ex for ex in experiments}
        self.parameter_names = tuple(model.free)
        self.shots = check_shots(shots)
        self.rng = as_generator(seed)
        if steps is not None and (int(steps) != steps or steps < 1):
            raise QhlInputError(f"expected steps >= 1, got {steps!r}", key="--steps")
        self.steps, self.eps, self.order, self.noise = steps, float(eps), int(order), noise
        self.shots_used = self.circuits_run = 0
        self.seconds = 0.0
        self.progress = None
        if signal_target is not None and (not np.isfinite(signal_target) or signal_target <= 0 or engine is None):
            raise QhlInputError(f"expected a positive signal_target and an engine, got {signal_target!r}",
                                key="signal_target")
        self.signal_target, self.engine = signal_target, engine
        self.unit_hz, self.step_time_limit_s = float(unit_hz), float(step_time_limit_s)
        self._steps_cache = {}
        self._delay_cache = {}
        self.step_sources = {}
        self.step_search_seconds = {}

    def steps_for(self, experiment, time, values_all) -> int:
        """r at time t (module docstring: fixed, signal or bound); signal counts are cached per (experiment, t)."""
        key = (experiment.name, float(time))
        if is_spinning(experiment):      # the rotor rule, at least the fixed count (module docstring)
            self.step_sources[key] = "fixed" if self.steps is not None else "rotor rule"
            return steps_rule(experiment.spinning_hz, float(time), self.steps or 1)
        if self.steps is not None:
            self.step_sources[key] = "fixed"
            return int(self.steps)
        if self.signal_target is not None and not _has_steps(experiment):
            if key not in self._steps_cache:
                t0 = _time.perf_counter()
                bound = max(1, trotter_steps_for(acquisition_terms(self.model, experiment, self.model.values_hz),
                                                 time, self.eps, self.order))
                r, _ = signal_trotter_steps(self.model, experiment, self.engine, float(time), self.order,
                                            self.signal_target, self.unit_hz, r_max=bound,
                                            cost_limit_s=self.step_time_limit_s)
                self._steps_cache[key] = (int(r), "signal") if r else (bound, "bound")
                self.step_search_seconds[key] = _time.perf_counter() - t0
            r, source = self._steps_cache[key]
            self.step_sources[key] = source
            return r
        terms = acquisition_terms(self.model, experiment, values_all)
        self.step_sources[key] = "bound"
        return max(1, trotter_steps_for(terms, time, self.eps, self.order))

    def delay_steps_for(self, experiment) -> list:
        """Steps of each delay of a sequence experiment, in the order they act (module docstring):
        the fixed count, or the bound at the model's values (cached per experiment)."""
        delays = [st.seconds for st in flat_steps(experiment.steps) if isinstance(st, Delay)]
        if self.steps is not None:
            return [int(self.steps)] * len(delays)
        if experiment.name not in self._delay_cache:
            terms = acquisition_terms(self.model, experiment, self.model.values_hz)
            total = float(sum(delays))
            self._delay_cache[experiment.name] = [
                max(1, trotter_steps_for(terms, d, self.eps * d / total, self.order)) if d > 0 else 1 for d in delays]
        return self._delay_cache[experiment.name]

    def signal_family(self, experiment, time, steps, values_all=None):
        """The signal family of (experiment, t, r): the sequence family when the experiment has steps, the
        spinning family when it spins."""
        if is_spinning(experiment):
            return spinning_signal_circuit(self.model, experiment, float(time), int(steps), self.order,
                                           values_hz=values_all)
        if _has_steps(experiment):
            return sequence_signal_circuit(self.model, experiment, float(time), int(steps), self.order,
                                           delay_steps=self.delay_steps_for(experiment), values_hz=values_all)
        return signal_circuit(self.model, experiment, float(time), int(steps), self.order, values_hz=values_all)

    def gradient_family(self, experiment, name, time, steps, values_all=None):
        """The Hadamard gradient family of h_name at (experiment, t, r) (sequence family with steps, spinning
        family when it spins)."""
        if is_spinning(experiment):
            return spinning_gradient_circuit(self.model, experiment, name, float(time), int(steps), self.order,
                                             values_hz=values_all)
        if _has_steps(experiment):
            return sequence_gradient_circuit(self.model, experiment, name, float(time), int(steps), self.order,
                                             delay_steps=self.delay_steps_for(experiment), values_hz=values_all)
        return gradient_circuit(self.model, experiment, name, float(time), int(steps), self.order,
                                values_hz=values_all)

    def step_plan(self, times_by_experiment, progress=None) -> dict:
        """{(experiment name, t): r} for every non-zero time, at the model's values (no shots spent).

        progress: optional callable(done, total, label) after each time point.
        """
        values_all = self.model.values_hz.copy()
        points = [(name, float(t)) for name, times in times_by_experiment.items()
                  for t in np.atleast_1d(np.asarray(times, float))
                  if t != 0 or _has_steps(self.experiments.get(name))]
        plan = {}
        for k, (name, t) in enumerate(points):
            if name not in self.experiments:
                raise QhlInputError(f"no experiment named '{name}': expected one of {', '.join(self.experiments)}",
                                    key="experiment")
            plan[(name, t)] = self.steps_for(self.experiments[name], t, values_all)
            if progress is not None:
                progress(k + 1, len(points), f"{name} t={t:.3g} s r={plan[(name, t)]}")
        return plan

    def family_seconds(self, experiment, time: float, steps: int, parameters=None,
                       calibration_seed: int = 12345) -> tuple:
        """Measured seconds of one signal family and of one gradient family per named parameter at
        (t, r), each built and estimated with `shots` shots per part on an independent random stream
        (the provider's own stream is untouched). A calibration run for qhl.learning.emulated_run.

        Returns:
            (signal seconds, {parameter: gradient seconds}); parameters default to the first free one.
        """
        rng = np.random.default_rng(calibration_seed)
        names = self.parameter_names[:1] if parameters is None else tuple(parameters)
        t0 = _time.perf_counter()
        estimate_family(self.signal_family(experiment, time, steps), self.shots, rng, self.noise)
        signal_s = _time.perf_counter() - t0
        gradient_s = {}
        for name in names:
            t0 = _time.perf_counter()
            estimate_family(self.gradient_family(experiment, name, time, steps), self.shots, rng, self.noise)
            gradient_s[name] = _time.perf_counter() - t0
        return signal_s, gradient_s

    def _estimate(self, family):
        e = estimate_family(family, self.shots, self.rng, self.noise)
        self.shots_used += e.shots
        self.circuits_run += e.circuits_run
        self.seconds += e.seconds
        return e.value

    def signals_and_gradients(self, values_hz, times_by_experiment):
        values_all = self.model.values_hz.copy()
        values_all[self.model.free_indices] = np.asarray(values_hz, float)
        out = {}
        total = sum(np.atleast_1d(np.asarray(t, float)).size if _has_steps(self.experiments.get(name))
                    else int(np.count_nonzero(np.atleast_1d(np.asarray(t, float))))
                    for name, t in times_by_experiment.items()) * (1 + len(self.parameter_names))
        done = 0

        def tick(label):
            nonlocal done
            done += 1
            if self.progress is not None:
                self.progress(done, total, label)

        for name, times in times_by_experiment.items():
            if name not in self.experiments:
                raise QhlInputError(f"no experiment named '{name}': expected one of {', '.join(self.experiments)}",
                                    key="experiment")
            ex = self.experiments[name]
            times = np.atleast_1d(np.asarray(times, float))
            sig = np.ones(len(times), complex)
            grad = np.zeros((len(self.parameter_names), len(times)), complex)
            for k, t in enumerate(times):
                if t == 0 and not _has_steps(ex):
                    continue
                r = self.steps_for(ex, t, values_all)
                sig[k] = self._estimate(self.signal_family(ex, t, r, values_all))
                tick(f"{name} t={t:.3g} s signal")
                for p, nm in enumerate(self.parameter_names):
                    grad[p, k] = self._estimate(self.gradient_family(ex, nm, t, r, values_all))
                    tick(f"{name} t={t:.3g} s {nm}")
            out[name] = (sig, grad)
        return out


def _has_steps(experiment) -> bool:
    return bool(getattr(experiment, "steps", ()))
