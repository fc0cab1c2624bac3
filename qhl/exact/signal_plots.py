"""PNG plots of exact signals: FID and spectrum per experiment (matplotlib, Agg backend).

Spectra are apodised before the FFT (a window multiplies the FID so that it decays to zero at
t_max instead of being cut off, which removes truncation wiggles; common practice):
    exponential  w(t) = exp(-pi LB t)                     (Lorentzian broadening, FWHM LB Hz)
    gaussian     w(t) = exp(-(pi GB t)^2 / (4 ln 2))      (Gaussian broadening, FWHM GB Hz)
The default width makes the window fall to DEFAULT_END_WEIGHT at t_max. The frequency axis is
zoomed to where the lines are: the band holding WEIGHT_FRACTION of the summed |amplitude| of the
exact line list (qhl.exact.engine.ExactEngine.transitions), widened by the broadening and padded
by PAD_FRACTION of its width on each side (`line_band`). Without a line list, the band holding
WEIGHT_FRACTION of sum |spectrum|^2 is used (`spectral_band`; wider for short FIDs, whose
truncation tails carry a few per cent of the power).
"""

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .signals import spectrum_of  # noqa: E402
from ..base.files import save_figure

__all__ = ["plot_signals", "signal_figure", "apodisation_window", "spectral_band", "line_band", "WINDOWS"]

WINDOWS = ("exponential", "gaussian", "none")
DEFAULT_END_WEIGHT = 0.05
WEIGHT_FRACTION = 0.99
PAD_FRACTION = 0.25


def apodisation_window(times_s, kind: str = "exponential", width_hz=None):
    """(w(t), width in Hz) for `kind` (module docstring); width default: w(t_max) = DEFAULT_END_WEIGHT."""
    t = np.asarray(times_s, float)
    t_max = float(t[-1]) if t.size and t[-1] > 0 else 1.0
    if kind == "none":
        return np.ones_like(t), 0.0
    if kind == "exponential":
        lb = np.log(1 / DEFAULT_END_WEIGHT) / (np.pi * t_max) if width_hz is None else float(width_hz)
        return np.exp(-np.pi * lb * t), lb
    if kind == "gaussian":
        gb = 2 * np.sqrt(np.log(2) * np.log(1 / DEFAULT_END_WEIGHT)) / (np.pi * t_max) if width_hz is None \
            else float(width_hz)
        return np.exp(-(np.pi * gb * t) ** 2 / (4 * np.log(2))), gb
    raise ValueError(f"unknown window {kind!r}: expected one of {', '.join(WINDOWS)}")


def spectral_band(freq_hz, spectrum, fraction: float = WEIGHT_FRACTION, pad: float = PAD_FRACTION):
    """(low, high) in Hz: the central band holding `fraction` of sum |spectrum|^2, padded by
    `pad` times its width on each side (at least 8 frequency bins wide), clipped to the axis."""
    f = np.asarray(freq_hz, float)
    w = np.abs(np.asarray(spectrum)) ** 2
    if w.sum() <= 0:
        return float(f[0]), float(f[-1])
    c = np.cumsum(w) / w.sum()
    lo = f[min(np.searchsorted(c, (1 - fraction) / 2), len(f) - 1)]
    hi = f[min(np.searchsorted(c, 1 - (1 - fraction) / 2), len(f) - 1)]
    width = max(hi - lo, 8 * abs(f[1] - f[0]))
    mid = 0.5 * (lo + hi)
    half = 0.5 * width * (1 + 2 * pad)
    return float(max(mid - half, f[0])), float(min(mid + half, f[-1]))


def _central(x, weight, fraction):
    order = np.argsort(x)
    x, weight = np.asarray(x, float)[order], np.asarray(weight, float)[order]
    c = np.cumsum(weight) / weight.sum()
    lo = x[min(np.searchsorted(c, (1 - fraction) / 2), len(x) - 1)]
    hi = x[min(np.searchsorted(c, 1 - (1 - fraction) / 2), len(x) - 1)]
    return float(lo), float(hi)


def line_band(freqs_hz, amplitudes, broadening_hz: float = 0.0, fraction: float = WEIGHT_FRACTION,
              pad: float = PAD_FRACTION, axis=None):
    """(low, high) in Hz around the lines holding `fraction` of sum |a_k|: widened by
    2 x broadening on each side, then padded by `pad` times the width; clipped to `axis` (min, max)."""
    f = np.asarray(freqs_hz, float)
    w = np.abs(np.asarray(amplitudes))
    if f.size == 0 or w.sum() <= 0:
        return (float(axis[0]), float(axis[1])) if axis is not None else (-1.0, 1.0)
    lo, hi = _central(f, w, fraction)
    lo, hi = lo - 2 * broadening_hz, hi + 2 * broadening_hz
    width = max(hi - lo, 1e-9)
    lo, hi = lo - pad * width, hi + pad * width
    if axis is not None:
        lo, hi = max(lo, axis[0]), min(hi, axis[1])
    return float(lo), float(hi)


def _lines(report, experiment):
    try:
        from .engine import ExactEngine
        return ExactEngine(report.model).transitions(experiment)
    except Exception:           # no model or a job the engine refuses: fall back to the spectrum
        return None


def signal_figure(report, window: str = "exponential", width_hz=None):
    """The matplotlib Figure: FID (Re, Im) and apodised, zoomed spectrum of each experiment."""
    n = len(report.experiments)
    fig, axes = plt.subplots(n, 2, figsize=(10, 2.8 * n), squeeze=False)
    for row, ex in zip(axes, report.experiments):
        t = ex.times_s
        s = report.signals[ex.name]
        row[0].plot(t * 1e3, s.real, label="Re S")
        row[0].plot(t * 1e3, s.imag, label="Im S", alpha=0.7)
        row[0].set_xlabel("t (ms)")
        row[0].set_ylabel("S(t) (S(0) = 1)")
        row[0].set_title(f"{ex.name}: FID (dipolar scale {ex.dipolar_scale:g})")
        row[0].legend(fontsize=8)
        w, width = apodisation_window(t, window, width_hz)
        f, spec = spectrum_of(t, s * w)
        lines = _lines(report, ex)
        if lines is not None:
            lo, hi = line_band(*lines, broadening_hz=width, axis=(f[0], f[-1]))
        else:
            lo, hi = spectral_band(f, spec)
        keep = (f >= lo) & (f <= hi)
        row[1].plot(f[keep] / 1e3, spec.real[keep])
        row[1].set_xlim(lo / 1e3, hi / 1e3)
        row[1].set_xlabel("frequency offset (kHz)")
        row[1].set_ylabel("Re spectrum (arb. units)")
        how = "no apodisation" if window == "none" else f"{window} window, {width:.3g} Hz broadening"
        row[1].set_title(f"{ex.name}: spectrum ({how})", fontsize=9)
    fig.tight_layout()
    return fig


def plot_signals(report, path, window: str = "exponential", width_hz=None):
    """FID and apodised, zoomed spectrum of each experiment into the PNG `path` (signal_figure)."""
    fig = signal_figure(report, window, width_hz)
    save_figure(fig, path, dpi=110)
    plt.close(fig)
    return path
