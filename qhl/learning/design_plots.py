"""PNG of an experiment design (matplotlib Agg): shares per candidate, and Cramer-Rao bounds of the
optimum beside the current set's (equal shares over the file's experiments) at the same budget."""

import numpy as np
from ..base.files import save_figure

__all__ = ["plot_design"]

MAX_BARS = 40


def plot_design(report, path):
    """Write the PNG; returns the path. At most MAX_BARS candidates are drawn (the largest shares)."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    w = report.shares
    order = np.argsort(-w)[:MAX_BARS]
    fig, (a1, a2) = plt.subplots(2, 1, figsize=(8, 7))
    x = np.arange(len(order))
    a1.bar(x - 0.2, w[order], width=0.4, label="optimal")
    a1.bar(x + 0.2, report.baseline_shares[order], width=0.4, label="current set (equal shares)")
    a1.set_xticks(x)
    a1.set_xticklabels([report.candidates[k].name for k in order], rotation=70, fontsize=6)
    a1.set_ylabel("share of shots")
    a1.legend(fontsize=7)
    a1.set_title(f"{report.cluster}: {report.criterion}-optimal per {report.per}, gain {report.gain:.3g}x "
                 f"over the current set", fontsize=9)
    p = np.arange(len(report.parameters))
    crb, base = np.asarray(report.crb_hz, float), np.asarray(report.baseline_crb_hz, float)
    a2.semilogy(p, np.where(np.isfinite(crb), crb, np.nan), "o", label="optimal")
    a2.semilogy(p, np.where(np.isfinite(base), base, np.nan), "x", label="current set")
    a2.set_xticks(p)
    a2.set_xticklabels(report.parameters, rotation=70, fontsize=6)
    a2.set_ylabel(f"Cramer-Rao bound (Hz) at budget {report.budget:.3g}")
    a2.legend(fontsize=7)
    fig.tight_layout()
    save_figure(fig, path, dpi=110)
    plt.close(fig)
    return path
