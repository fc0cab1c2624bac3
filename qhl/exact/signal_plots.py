"""PNG plots of exact signals: FID and spectrum per experiment (matplotlib, Agg backend)."""

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .signals import spectrum_of  # noqa: E402

__all__ = ["plot_signals"]


def plot_signals(report, path):
    """FID (Re, Im) and spectrum of each experiment, one row per experiment."""
    n = len(report.experiments)
    fig, axes = plt.subplots(n, 2, figsize=(10, 2.8 * n), squeeze=False)
    for row, ex in zip(axes, report.experiments):
        t = ex.times_s
        s = report.signals[ex.name]
        row[0].plot(t * 1e3, s.real, label="Re S")
        row[0].plot(t * 1e3, s.imag, label="Im S", alpha=0.7)
        row[0].set_xlabel("t (ms)")
        row[0].set_title(f"{ex.name}: FID (dipolar scale {ex.dipolar_scale:g})")
        row[0].legend(fontsize=8)
        f, spec = spectrum_of(t, s)
        row[1].plot(f / 1e3, spec.real)
        row[1].set_xlabel("frequency offset (kHz)")
        row[1].set_title(f"{ex.name}: spectrum (real part)")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
