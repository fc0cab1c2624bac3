"""Plots: signal spectra zoomed, labelled and apodised; qhl check's title and legend placement;
distinct markers in the budget sweep plot.

References: scipy.signal.windows.exponential and .gaussian for the apodisation windows (the
exponential window exp(-pi LB t) is exp(-n/tau) with tau = 1/(pi LB dt) samples; the Gaussian
window exp(-(pi GB t)^2/(4 ln 2)) has standard deviation sqrt(2 ln 2)/(pi GB) in time); the
fraction of a Lorentzian pair's power inside a band (numpy sums); hand-placed line lists.
"""

import matplotlib

matplotlib.use("Agg")
import numpy as np
import pytest
from scipy.signal import windows

from qhl import demo_cluster
from qhl.exact.signals import compute_signals
from qhl.exact.signal_plots import apodisation_window, line_band, signal_figure, spectral_band


def test_exponential_and_gaussian_windows_match_scipy():
    t = np.linspace(0, 1e-3, 101)
    dt = t[1]
    w, lb = apodisation_window(t, "exponential", 500.0)
    ref = windows.exponential(len(t), center=0, tau=1 / (np.pi * 500.0 * dt), sym=False)
    np.testing.assert_allclose(w, ref, rtol=1e-12)
    # Gaussian exp(-(pi GB t)^2 / (4 ln 2)) = exp(-t^2 / (2 s^2)) with s = sqrt(2 ln 2) / (pi GB)
    g, gb = apodisation_window(t, "gaussian", 800.0)
    s_samples = np.sqrt(2 * np.log(2)) / (np.pi * 800.0) / dt
    ref = windows.gaussian(2 * len(t) - 1, std=s_samples)[len(t) - 1:]
    np.testing.assert_allclose(g, ref, rtol=1e-10)
    # defaults: the window falls to 5% at t_max
    assert apodisation_window(t, "exponential")[0][-1] == pytest.approx(0.05)
    assert apodisation_window(t, "gaussian")[0][-1] == pytest.approx(0.05)


def test_band_holds_99_percent_of_power_of_two_lines():
    """Two Lorentzian lines at -5 and +8 kHz sampled over +-500 kHz: the band is near the lines."""
    f = np.linspace(-5e5, 5e5, 20001)
    spec = 1 / (1 + ((f + 5e3) / 200) ** 2) + 1 / (1 + ((f - 8e3) / 200) ** 2)
    lo, hi = spectral_band(f, spec)
    inside = (f >= lo) & (f <= hi)
    assert np.sum(spec[inside] ** 2) / np.sum(spec ** 2) > 0.99
    assert -2e4 < lo < -5e3 and 8e3 < hi < 2e4


def test_signal_plot_is_zoomed_labelled_and_apodised():
    rep = compute_signals(demo_cluster())
    fig = signal_figure(rep)
    fid_axes, spec_axes = fig.axes[0::2], fig.axes[1::2]
    for ax in fid_axes + spec_axes:
        assert ax.get_ylabel()
    nyquist_khz = 0.5 / rep.experiments[0].times_s[1] / 1e3      # 480 kHz for the static experiment
    lo, hi = spec_axes[0].get_xlim()
    assert hi - lo < 0.5 * nyquist_khz
    assert "exponential window" in spec_axes[0].get_title()


def test_check_plot_has_title_and_legend_outside_axes():
    from qhl.cli.cmd_check import check_figure
    from qhl.emulation.check import CheckReport
    rows = [{"parameter": f"p{k}", "part": "re", "emulated": 1e-4 * k, "stderr": 2e-5, "trotter_exact": 1e-4 * k,
             "exact": 1.1e-4 * k} for k in range(4)]
    fig = check_figure(CheckReport(rows=rows), "a title")
    ax = fig.axes[0]
    assert ax.get_title() == "a title"
    fig.canvas.draw()
    legend_box = ax.get_legend().get_window_extent()
    axes_box = ax.get_window_extent()
    assert legend_box.x0 >= axes_box.x1          # entirely to the right of the data area


def test_budget_plot_entries_are_distinguishable():
    from qhl.costing.budget_plots import PLOTTED
    styles = [(c, ls, m) for _, _, c, ls, m in PLOTTED]
    markers = [m for *_, m in PLOTTED]
    assert len(set(markers)) == len(PLOTTED) and len(set(styles)) == len(PLOTTED)


def test_line_band_covers_the_lines_with_padding():
    """Lines at -5 and +8 kHz (weights 0.5 each) and a 1e-4 stray line at 400 kHz (below the 1% cut)."""
    lo, hi = line_band([-5e3, 8e3, 4e5], [0.5, 0.5, 1e-4], broadening_hz=100.0, pad=0.25)
    # [-5000 - 200, 8000 + 200] is 13.4 kHz wide, padded by 3.35 kHz on each side
    assert lo == pytest.approx(-5200 - 3350) and hi == pytest.approx(8200 + 3350)
