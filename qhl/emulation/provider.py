"""A qhl.learning.GradientProvider whose S(t) and dS/dh come from the emulator with shots.

Each call compiles, at the requested parameter values, one signal family and one gradient
family per free parameter and time point, with r(t) Trotter steps (the fewest whose commutator
bound, qhl.circuits.trotter_bounds, is <= eps; or a fixed count), and estimates each with `shots` shots
per part from one Generator seeded once (fresh estimates every call, reproducible per seed).
At t = 0 the values are exact: S(0) = 1 and dS/dh = 0 by the normalisation S = Tr[O rho]/Tr[O rho0].
"""

import numpy as np

from ..base.errors import QhlInputError
from ..circuits.gradient_circuits import gradient_circuit, signal_circuit
from ..exact.provider import GradientProvider
from ..circuits.trotter import trotter_terms
from ..circuits.trotter_bounds import trotter_steps_for
from ..spins.cluster import refuse_steps
from .derivatives import as_generator, check_shots, estimate_family

__all__ = ["EmulatedGradientProvider"]


class EmulatedGradientProvider(GradientProvider):
    """Shot-noise S and dS/dh for the learning loop (`noisy = True`).

    Args:
        model: HamiltonianModel whose free parameters are fitted.
        experiments: Experiment objects the data refer to.
        shots: shots per part of every estimate.
        seed: int seed of the single random stream.
        steps: fixed Trotter steps, or None for the bound-based r(t) with `eps`.
        eps: target Trotter error (spectral norm) per time point; order: 1 or 2.
        noise: qhl.emulation.noise.NoiseSpec or None.

    Attributes:
        shots_used, circuits_run, seconds: totals over all calls.
        progress: optional callable(done, total, label) after each circuit family of a call.
    """

    noisy = True

    def __init__(self, model, experiments, shots: int, seed=0, steps=None, eps: float = 1e-3, order: int = 2,
                 noise=None):
        for ex in experiments:
            refuse_steps(ex, "the circuit emulator")
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

    def steps_for(self, experiment, time, values_all) -> int:
        if self.steps is not None:
            return int(self.steps)
        terms = trotter_terms(self.model, experiment, values_all)
        return max(1, trotter_steps_for(terms, time, self.eps, self.order))

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
        total = sum(int(np.count_nonzero(np.atleast_1d(np.asarray(t, float))))
                    for t in times_by_experiment.values()) * (1 + len(self.parameter_names))
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
                if t == 0:
                    continue
                r = self.steps_for(ex, t, values_all)
                sig[k] = self._estimate(signal_circuit(self.model, ex, t, r, self.order, values_hz=values_all))
                tick(f"{name} t={t:.3g} s signal")
                for p, nm in enumerate(self.parameter_names):
                    grad[p, k] = self._estimate(gradient_circuit(self.model, ex, nm, t, r, self.order,
                                                                 values_hz=values_all))
                    tick(f"{name} t={t:.3g} s {nm}")
            out[name] = (sig, grad)
        return out
