"""PNG plots of a fit: data vs fit, residuals and convergence (matplotlib, Agg backend)."""

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from ..base.files import save_figure

__all__ = ["plot_fit"]


def plot_fit(report, path):
    """Data vs fit (Re, Im) and residuals in units of sigma per experiment, and the cost history.

    Args:
        report: a qhl.learning.LearnReport.
    """
    names = list(report.fitted_signals)
    fig, axes = plt.subplots(len(names) + 1, 2, figsize=(10, 2.8 * (len(names) + 1)), squeeze=False)
    for row, name in zip(axes, names):
        t, d, s = report.dataset.signals[name]
        fit = report.fitted_signals[name]
        row[0].plot(t * 1e3, d.real, ".", ms=3, label="data Re")
        row[0].plot(t * 1e3, d.imag, ".", ms=3, label="data Im")
        row[0].plot(t * 1e3, fit.real, "-", lw=1, label="fit Re")
        row[0].plot(t * 1e3, fit.imag, "-", lw=1, label="fit Im")
        row[0].set_xlabel("t (ms)")
        row[0].set_title(f"{name}: data and fit")
        row[0].legend(fontsize=7)
        r = (d - fit) / np.broadcast_to(s, np.shape(d))
        row[1].plot(t * 1e3, r.real, ".", ms=3, label="Re")
        row[1].plot(t * 1e3, r.imag, ".", ms=3, label="Im")
        row[1].axhline(0.0, color="k", lw=0.5)
        row[1].set_xlabel("t (ms)")
        row[1].set_ylabel("residual / sigma")
        row[1].set_title(f"{name}: residuals")
        row[1].legend(fontsize=7)
    hist = report.fit.history
    it = [h["iteration"] for h in hist]
    axes[-1][0].semilogy(it, [max(h["cost"], 1e-300) for h in hist], "o-")
    axes[-1][0].set_xlabel("iteration")
    axes[-1][0].set_ylabel("cost (nats)")
    axes[-1][0].set_title(f"convergence ({report.fit.method})")
    axes[-1][1].semilogy(it, [max(h["gradient_norm"], 1e-300) for h in hist], "o-")
    axes[-1][1].set_xlabel("iteration")
    axes[-1][1].set_ylabel("scaled gradient norm")
    fig.tight_layout()
    save_figure(fig, path, dpi=110)
    plt.close(fig)
    return path
