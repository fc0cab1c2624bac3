"""The gradient-provider protocol: any source of S(t) and dS/dh at a parameter point.

It sits below both the learning loop (qhl.learning) and the emulator (qhl.emulation), which
implements it with shots; `ExactGradientProvider` implements it with the exact engine.
"""

from abc import ABC, abstractmethod

from ..base.errors import QhlInputError

__all__ = ["GradientProvider", "ExactGradientProvider"]


class GradientProvider(ABC):
    """Source of signals and their derivatives with respect to the free parameters.

    Subclasses set `parameter_names` (free parameters, in order) and `noisy` (True when the
    values are estimates with sampling noise, e.g. from a shot budget on a quantum emulator:
    the 'gn' loop then also stops when the cost stalls at the noise floor, NOISY_STALL_TOL),
    and implement `signals_and_gradients`. A noisy provider draws fresh estimates on every call.
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
