"""Signals of every experiment of a cluster, with optional gradients: the `qhl signal` job.

Engines (qhl.exact.engine_choice): 'exact' (eigendecomposition, exact to rounding), 'typical'
(random pure states, qhl.exact.typicality: estimates with standard errors), or 'auto' (exact
when its memory estimate fits, else typical).

Spectrum convention: numpy's FFT of S(t) (S(t) = exp(+2 pi i nu t) peaks at +nu).
"""

from dataclasses import dataclass, field

import numpy as np

from .engine_choice import make_engine
from ..spins.model import DEFAULT_FREE, build_model

__all__ = ["SignalReport", "compute_signals", "spectrum_of"]


@dataclass
class SignalReport:
    """Signals per experiment; gradients (P, T) when asked for (1/Hz).

    With method 'typical', `stderr` holds {experiment: (stderr of Re S, stderr of Im S)} and
    `gradient_stderr` the same for the gradients; `replicas` is the number of random states and
    `schemes` {experiment: "positive" | "pairs"} the typical engine's scheme (--json key
    `typical_scheme` per experiment; qhl.exact.typicality).
    """

    cluster: object
    model: object
    experiments: list
    signals: dict
    gradients: dict = field(default_factory=dict)
    method: str = "exact"
    stderr: dict = field(default_factory=dict)
    gradient_stderr: dict = field(default_factory=dict)
    replicas: int = 0
    note: str = ""
    schemes: dict = field(default_factory=dict)

    def to_json(self) -> dict:
        params = [{"name": p.name, "kind": p.kind, "spins": list(p.spins), "value_hz": p.value_hz,
                   "free": p.name in self.model.free} for p in self.model.parameters]
        exps = []
        for ex in self.experiments:
            s = self.signals[ex.name]
            row = {"name": ex.name, "dipolar_scale": ex.dipolar_scale, "times_s": ex.times_s,
                   "signal_real": s.real, "signal_imag": s.imag}
            if ex.steps:
                from ..spins.cluster_file import step_tables
                row["steps"] = step_tables(ex.steps)     # the preparation; times count from its end
            if ex.name in self.stderr:
                row["signal_stderr_real"], row["signal_stderr_imag"] = self.stderr[ex.name]
            if ex.name in self.schemes:
                row["typical_scheme"] = self.schemes[ex.name]
            if ex.name in self.gradients:
                g = self.gradients[ex.name]
                row["gradient_parameters"] = list(self.model.free)
                row["gradient_real"] = g.real
                row["gradient_imag"] = g.imag
                if ex.name in self.gradient_stderr:
                    row["gradient_stderr_real"], row["gradient_stderr_imag"] = self.gradient_stderr[ex.name]
            exps.append(row)
        out = {"cluster": self.cluster.name, "field_tesla": self.cluster.field_tesla,
               "observe": self.cluster.observe, "method": self.method, "parameters": params,
               "experiments": exps}
        if self.method == "typical":
            out["replicas"] = self.replicas
        return out


def compute_signals(cluster, free=DEFAULT_FREE, gradient: bool = False, engine=None, method: str = "exact",
                    replicas: int = 4, seed: int = 0, progress=None) -> SignalReport:
    """S(t) for every experiment of `cluster` (and dS/dh for the free parameters).

    Args:
        method: 'exact', 'typical' or 'auto' (ignored when `engine` is given).
        replicas, seed: random states of the typical engine (errors fall as 1/sqrt(replicas)).
        progress: optional callback(fraction) for the typical engine.

    Ctrl-C after the first experiment returns the experiments finished so far (`note` says so).
    """
    note = ""
    if engine is None:
        model = build_model(cluster, free=free)
        engine, method, note = make_engine(model, method, replicas=replicas, seed=seed, progress=progress)
    else:
        model = engine.model
        method = "typical" if hasattr(engine, "estimate") else "exact"
    signals, grads, errs, gerrs, schemes = {}, {}, {}, {}, {}
    done = []
    try:
        for ex in cluster.experiments:
            if method == "typical":
                est = engine.estimate(ex, gradient=gradient)
                signals[ex.name] = est.signal
                errs[ex.name] = (est.signal_stderr_real, est.signal_stderr_imag)
                schemes[ex.name] = est.scheme
                if gradient:
                    grads[ex.name] = est.gradient
                    gerrs[ex.name] = (est.gradient_stderr_real, est.gradient_stderr_imag)
            elif gradient:
                signals[ex.name], grads[ex.name] = engine.gradient(ex)
            else:
                signals[ex.name] = engine.signal(ex)
            done.append(ex)
    except KeyboardInterrupt:
        if not done:
            raise
        note = (note + "; " if note else "") + (f"interrupted: {len(done)} of {len(cluster.experiments)} "
                                                "experiments computed, the rest left out")
    return SignalReport(cluster, model, done, signals, grads, method, errs, gerrs,
                        getattr(engine, "replicas", 0), note, schemes)


def spectrum_of(times_s, signal, zero_fill: int = 4):
    """(frequencies in Hz, spectrum) of an FID by FFT, first point halved, zero-filled."""
    s = np.array(signal, complex)
    s[0] *= 0.5
    n = zero_fill * len(s)
    dt = times_s[1] - times_s[0]
    spec = np.fft.fftshift(np.fft.fft(s, n))
    freq = np.fft.fftshift(np.fft.fftfreq(n, dt))
    return freq, spec
