"""The gradient-provider protocol: any source of S(t) and dS/dh at a parameter point.

It sits below both the learning loop (qhl.learning) and the emulator (qhl.emulation), which
implements it with shots; `ExactGradientProvider` implements it with the exact engine.
"""

from abc import ABC, abstractmethod

import numpy as np

from ..base.errors import QhlInputError
from ..spins.spinning import is_spinning

__all__ = ["GradientProvider", "ExactGradientProvider"]


class GradientProvider(ABC):
    """Source of signals and their derivatives with respect to the free parameters.

    Subclasses set `parameter_names` (free parameters, in order) and `noisy` (True when the
    values are estimates with sampling noise, e.g. from a shot budget on a quantum emulator:
    the 'gn' loop then also stops when the cost stalls at the noise floor, NOISY_STALL_TOL),
    and implement `signals_and_gradients`. A noisy provider draws fresh estimates on every call.
    Optionally they implement `weighted_gradients` (the gradient of a sum over time points at the
    cost of a few signals); the default returns None and callers use `signals_and_gradients`.
    """

    parameter_names: tuple = ()
    noisy: bool = False

    @abstractmethod
    def signals_and_gradients(self, values_hz, times_by_experiment: dict) -> dict:
        """S(t) and dS/dh at the free parameter values `values_hz`.

        Args:
            values_hz: free parameter values (P,) in Hz, order of `parameter_names`.
            times_by_experiment: {experiment name: times in seconds}.

        Returns:
            {experiment name: (signal complex (T,), gradient complex (P, T) in 1/Hz)}.
        """

    def weighted_gradients(self, values_hz, times_by_experiment: dict, weights_by_experiment: dict):
        """Optional: S(t) and Re sum_t c_t dS(t)/dh, where that is cheaper than the full dS/dh.

        Args:
            values_hz, times_by_experiment: as in `signals_and_gradients`.
            weights_by_experiment: {experiment name: c (T,) complex, or a callable taking the
                signal S (T,) and returning c}.

        Returns:
            {experiment name: (signal complex (T,), Re sum_t c_t dS(t)/dh (P,) in 1/Hz)}, or None
            (the default) where the provider has no such path: use `signals_and_gradients`.
        """
        return None


class ExactGradientProvider(GradientProvider):
    """Exact signals and gradients from qhl.exact.engine.ExactEngine (Daleckii-Krein derivatives).

    Args:
        engine: an ExactEngine; its model's free parameters are fitted.
        experiments: the Experiment objects the data refer to.

    Example:
        >>> from qhl import demo_cluster, build_model, ExactEngine
        >>> c = demo_cluster(); eng = ExactEngine(build_model(c, free="offset:*"))
        >>> p = ExactGradientProvider(eng, c.experiments)
        >>> s, g = p.signals_and_gradients(eng.model.free_values_hz, {"static": [0.0, 1e-4]})["static"]
        >>> g.shape
        (6, 2)
    """

    noisy = False

    def __init__(self, engine, experiments):
        self.engine = engine
        self.experiments = {ex.name: ex for ex in experiments}
        self.parameter_names = tuple(engine.model.free)

    def signals_and_gradients(self, values_hz, times_by_experiment):
        out = {}
        for name, times in times_by_experiment.items():
            if name not in self.experiments:
                raise QhlInputError(f"no experiment named '{name}': expected one of "
                                    f"{', '.join(self.experiments)}", key="experiment")
            out[name] = self.engine.gradient(self.experiments[name], times, values_hz)
        return out

    def weighted_gradients(self, values_hz, times_by_experiment, weights_by_experiment):
        """The engine's weighted path (ExactEngine.gradient_weighted, real part): about two signals'
        cost per experiment instead of the full gradient's P-fold work (pulse-sequence and spinning
        experiments: the full gradient contracted with the weights)."""
        out = {}
        for name, times in times_by_experiment.items():
            if name not in self.experiments:
                raise QhlInputError(f"no experiment named '{name}': expected one of "
                                    f"{', '.join(self.experiments)}", key="experiment")
            ex, weights = self.experiments[name], weights_by_experiment[name]
            if getattr(ex, "steps", ()) or is_spinning(ex):
                sig, jac = self.engine.gradient(ex, times, values_hz)
                c = np.asarray(weights(sig) if callable(weights) else weights)
                out[name] = (sig, np.real(jac @ c))
            else:
                out[name] = self.engine.gradient_weighted(ex, weights, times, values_hz, real=True)
        return out
