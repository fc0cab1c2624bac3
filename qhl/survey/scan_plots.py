"""PNG plots of scan results: learnability and ergodicity against dipolar scale and cluster size.

Each point is the median over the clusters of one size at one dipolar scale (rows from
qhl.survey.scan.read_results). Learnability: the smallest Fisher eigenvalue (1/Hz^2) and the median
Cramer-Rao bound (Hz; unlearnable parameters have an infinite bound and are left out of the
plotted median when every cluster is unlearnable). Ergodicity: <r> with the Poisson (0.3863)
and GOE (0.5307) reference values (Atas et al., PRL 110, 084101 (2013)) and the mean D2.
"""

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .diagnostics import GOE_MEAN_R, GUE_MEAN_R, POISSON_MEAN_R  # noqa: E402
from ..base.files import save_figure

__all__ = ["aggregate", "plot_scan"]


_NOTE = "not shown: eigenvalues <= 0 and infinite bounds (unlearnable directions)"


def _save(fig, path, title, note):
    """Title, optional footnote, layout, write the PNG and close the figure; returns the path."""
    fig.suptitle(title)
    if note:
        fig.text(0.01, 0.01, _NOTE, fontsize=7)
    fig.tight_layout(rect=(0, 0.03, 1, 1))
    save_figure(fig, path, dpi=110)
    plt.close(fig)
    return path


def aggregate(rows, key) -> dict:
    """{n_spins: (scales, medians)} of column `key` over clusters (finite values only)."""
    out = {}
    for n in sorted({r["n_spins"] for r in rows}):
        scales = sorted({r["dipolar_scale"] for r in rows if r["n_spins"] == n})
        med = []
        for s in scales:
            v = np.array([r[key] for r in rows if r["n_spins"] == n and r["dipolar_scale"] == s], float)
            v = v[np.isfinite(v)]
            med.append(float(np.median(v)) if v.size else np.nan)
        out[n] = (np.array(scales), np.array(med))
    return out


def _positive(y):
    y = np.asarray(y, float)
    return np.where(y > 0, y, np.nan)


def plot_scan(rows, out_dir, spinning_hz: float = 0.0) -> list:
    """Write learnability_vs_scale.png, learnability_vs_size.png and ergodicity_vs_scale.png.

    spinning_hz > 0 (a scan of spinning samples): <r> is that of Floquet quasi-energies, drawn beside the
    circular unitary ensemble's 0.5996 instead of the GOE value.

    Returns:
        list of the written paths.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths = []
    fisher = aggregate(rows, "fisher_min_eigenvalue")
    crb = aggregate(rows, "median_crb_hz")

    fig, axes = plt.subplots(1, 2, figsize=(10, 4))
    for n, (x, y) in fisher.items():
        axes[0].semilogy(x, _positive(y), "o-", label=f"{n} spins")
    for n, (x, y) in crb.items():
        axes[1].semilogy(x, _positive(y), "o-", label=f"{n} spins")
    axes[0].set_ylabel("smallest Fisher eigenvalue (1/Hz$^2$)")
    axes[1].set_ylabel("median Cramer-Rao bound (Hz)")
    for ax in axes:
        ax.set_xlabel("dipolar scale")
        ax.legend(fontsize=8)
    paths.append(_save(fig, out / "learnability_vs_scale.png", "learnability vs dipolar scale (median over clusters)", note=True))

    fig, axes = plt.subplots(1, 2, figsize=(10, 4))
    sizes = sorted(fisher)
    scales = sorted({r["dipolar_scale"] for r in rows})
    for s in scales:
        yf = [fisher[n][1][np.flatnonzero(fisher[n][0] == s)][0] if np.any(fisher[n][0] == s) else np.nan
              for n in sizes]
        yc = [crb[n][1][np.flatnonzero(crb[n][0] == s)][0] if np.any(crb[n][0] == s) else np.nan for n in sizes]
        axes[0].semilogy(sizes, _positive(yf), "o-", label=f"scale {s:g}")
        axes[1].semilogy(sizes, _positive(yc), "o-", label=f"scale {s:g}")
    axes[0].set_ylabel("smallest Fisher eigenvalue (1/Hz$^2$)")
    axes[1].set_ylabel("median Cramer-Rao bound (Hz)")
    for ax in axes:
        ax.set_xlabel("cluster size (spins)")
        ax.set_xticks(sizes)
        ax.legend(fontsize=7)
    paths.append(_save(fig, out / "learnability_vs_size.png", "learnability vs cluster size (median over clusters)", note=True))

    fig, axes = plt.subplots(1, 2, figsize=(10, 4))
    for n, (x, y) in aggregate(rows, "mean_r").items():
        axes[0].plot(x, y, "o-", label=f"{n} spins")
    axes[0].axhline(POISSON_MEAN_R, color="k", ls="--", lw=1, label=f"Poisson {POISSON_MEAN_R:.4f}")
    if spinning_hz:
        axes[0].axhline(GUE_MEAN_R, color="k", ls=":", lw=1, label=f"CUE (GUE) {GUE_MEAN_R:.4f}, Floquet levels")
    else:
        axes[0].axhline(GOE_MEAN_R, color="k", ls=":", lw=1, label=f"GOE {GOE_MEAN_R:.4f}")
    axes[0].set_ylabel("<r>")
    for n, (x, y) in aggregate(rows, "mean_d2").items():
        axes[1].plot(x, y, "o-", label=f"{n} spins")
    axes[1].set_ylabel("mean D2 (computational basis)")
    axes[1].set_ylim(-0.02, 1.02)
    for ax in axes:
        ax.set_xlabel("dipolar scale")
        ax.legend(fontsize=8)
    paths.append(_save(fig, out / "ergodicity_vs_scale.png", "ergodicity vs dipolar scale (median over clusters)", note=False))
    return paths
