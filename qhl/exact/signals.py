"""Signals of every experiment of a cluster, with optional exact gradients: the `qhl signal` job.

Spectrum convention: numpy's FFT of S(t) (S(t) = exp(+2 pi i nu t) peaks at +nu).
"""

from dataclasses import dataclass, field

import numpy as np

from .engine import ExactEngine
from ..spins.model import DEFAULT_FREE, build_model

__all__ = ["SignalReport", "compute_signals", "spectrum_of"]


@dataclass
class SignalReport:
    """Signals per experiment; gradients (P, T) when asked for (1/Hz)."""

    cluster: object
    model: object
    experiments: list
    signals: dict
    gradients: dict = field(default_factory=dict)

    def to_json(self) -> dict:
        params = [{"name": p.name, "kind": p.kind, "spins": list(p.spins), "value_hz": p.value_hz,
                   "free": p.name in self.model.free} for p in self.model.parameters]
        exps = []
        for ex in self.experiments:
            s = self.signals[ex.name]
            row = {"name": ex.name, "dipolar_scale": ex.dipolar_scale, "times_s": ex.times_s,
                   "signal_real": s.real, "signal_imag": s.imag}
            if ex.name in self.gradients:
                g = self.gradients[ex.name]
                row["gradient_parameters"] = list(self.model.free)
                row["gradient_real"] = g.real
                row["gradient_imag"] = g.imag
            exps.append(row)
        return {"cluster": self.cluster.name, "field_tesla": self.cluster.field_tesla,
                "observe": self.cluster.observe, "parameters": params, "experiments": exps}


def compute_signals(cluster, free=DEFAULT_FREE, gradient: bool = False, engine=None) -> SignalReport:
    """Exact S_x(t) for every experiment of `cluster` (and dS/dh for the free parameters)."""
    model = build_model(cluster, free=free) if engine is None else engine.model
    engine = engine or ExactEngine(model)
    signals, grads = {}, {}
    for ex in cluster.experiments:
        if gradient:
            signals[ex.name], grads[ex.name] = engine.gradient(ex)
        else:
            signals[ex.name] = engine.signal(ex)
    return SignalReport(cluster, model, list(cluster.experiments), signals, grads)


def spectrum_of(times_s, signal, zero_fill: int = 4):
    """(frequencies in Hz, spectrum) of an FID by FFT, first point halved, zero-filled."""
    s = np.array(signal, complex)
    s[0] *= 0.5
    n = zero_fill * len(s)
    dt = times_s[1] - times_s[0]
    spec = np.fft.fftshift(np.fft.fft(s, n))
    freq = np.fft.fftshift(np.fft.fftfreq(n, dt))
    return freq, spec
