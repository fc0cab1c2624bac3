"""Log-log plots of a BudgetSweep (PNG, matplotlib Agg backend)."""

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from ..base.files import save_figure

__all__ = ["plot_budget_sweep", "PLOTTED"]

# key, legend, colour, line style, marker: every entry has its own marker, so curves that lie
# exactly on top of one another (equal budgets) stay visible.
PLOTTED = (
    ("near_term_component_bound", "NT shots/component (bound)", "C0", "-", "o"),
    ("near_term_component_exact", "NT shots/component (exact var.)", "C0", "--", "s"),
    ("near_term_gradient_exact", "NT shots/gradient (optimal alloc.)", "C1", "-", "^"),
    ("near_term_gradient_uniform_exact", "NT shots/gradient (uniform)", "C1", ":", "v"),
    ("near_term_hessian_entry_bound", "NT shots/Hessian entry (bound)", "C2", "-", "D"),
    ("fault_tolerant_depth", "FT depth (gate layers)", "C3", "-", "x"),
    ("fault_tolerant_t_count", "FT T-count", "C4", "-", "+"),
    ("near_term_total_layers", "NT total layers executed", "C5", "--", "<"),
    ("fault_tolerant_total_layers", "FT total layers executed", "C3", ":", ">"),
)


def plot_budget_sweep(sweep, path, time_index=None, precision_index=None):
    """Every budget against t (at one eps) and against eps (at one t), log-log, into `path`.

    Args:
        sweep: qhl.costing.BudgetSweep.
        path: PNG path.
        time_index, precision_index: the fixed grid point of each panel (default: the middle).
    """
    nt, ne = len(sweep.times), len(sweep.precisions)
    i = nt // 2 if time_index is None else time_index
    j = ne // 2 if precision_index is None else precision_index
    panels = [(sweep.times, lambda a: a[:, j], f"evolution time t (s), eps = {sweep.precisions[j]:.3g}", nt),
              (sweep.precisions, lambda a: a[i, :], f"precision eps, t = {sweep.times[i]:.3g} s", ne)]
    panels = [p for p in panels if p[3] > 1] or panels[:1]
    fig, axes = plt.subplots(1, len(panels), figsize=(6.5 * len(panels), 4.8), squeeze=False)
    for ax, (x, cut, label, _) in zip(axes[0], panels):
        for k, (key, name, color, style, marker) in enumerate(PLOTTED):
            y = np.asarray(cut(np.broadcast_to(sweep.tables[key], (nt, ne))), float)
            ok = y > 0
            if ok.any():
                # markers on staggered points and decreasing sizes keep coincident curves apart
                ax.loglog(x[ok], y[ok], linestyle=style, marker=marker, color=color, label=name,
                          markevery=(k % 3, 3) if ok.sum() > 6 else None, markersize=8 - 0.5 * k,
                          markerfacecolor="none")
        ax.set_xlabel(label)
        ax.set_ylabel("count")
        ax.grid(True, which="both", alpha=0.3)
    axes[0][0].legend(fontsize=7)
    fig.suptitle("model-based budgets (assumptions: qhl budget --json)")
    fig.tight_layout()
    save_figure(fig, path, dpi=110)
    plt.close(fig)
    return path
