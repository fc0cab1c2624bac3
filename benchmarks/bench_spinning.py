"""Spinning (magic-angle) experiment against the static FID: exact signal + full gradient time.

The issue's goal: a 6-spin experiment with 64 points over 10 rotor periods, signal and full
gradient, under 10x the static experiment's gradient time. Both on the built-in demo (six protons,
21 free parameters), 64 points over the same window (10 periods at RATE_HZ), REPEATS alternating
static/spinning calls in this one run: median wall times, the median of the per-pair ratios, and
the ratio of median CPU times of this process (steadier on a shared machine); the error column is the largest |S| difference from a run with four
times the default slices per period (fourth order: about 256 times smaller error).

Two samplings per rate: "10 T_R", 64 points from 0 to exactly 10 periods (spacing 10/63 T_R: the slice
plan puts every other sampling phase on a slice boundary, 32 slices, 31 partial slices), and "synced",
64 points spaced 5/32 T_R (9.84 periods, rotor-synchronised: 32 equal slices and no partial slice).
K is the number of slices per period.

Run: python benchmarks/bench_spinning.py [RATE_HZ ...]   (default 20000)
"""

import dataclasses
import sys

import numpy as np
from timing import median_cpu, paired_times

from qhl import ExactEngine, build_model, demo_cluster
from qhl.exact.spinning_engine import default_slices_per_period, spinning_signal



REPEATS = 15
cluster = demo_cluster()
engine = ExactEngine(build_model(cluster))
rates = [float(x) for x in sys.argv[1:]] or [20000.0]
print(f"demo cluster: {cluster.n_spins} spins, {len(engine.model.free)} free parameters, 64 points, 10 periods")
print(f"{'rate (Hz)':>10}{'sampling':>10}{'K':>5}{'static grad (s)':>17}{'spinning grad (s)':>19}{'ratio':>7}"
      f"{'CPU ratio':>11}{'|dS| vs 4K':>12}")
cases = [(rate, label, span) for rate in rates for label, span in (("10 T_R", 10.0), ("synced", 63 * 5 / 32))]
for rate, label, span in cases:
    static = dataclasses.replace(cluster.experiments[0], t_max_s=span / rate, points=64, spinning_hz=0.0)
    spinning = dataclasses.replace(static, spinning_hz=rate)
    k = default_slices_per_period(engine, spinning)
    engine.gradient(static)
    engine.gradient(spinning)                 # warm both (imports, caches)
    t_static, t_spin, ratio = paired_times(lambda: engine.gradient(static), lambda: engine.gradient(spinning),
                                           REPEATS)
    cpu = median_cpu(lambda: engine.gradient(spinning), REPEATS) / median_cpu(lambda: engine.gradient(static), REPEATS)
    t = spinning.times_s
    err = np.abs(spinning_signal(engine, spinning, t) - spinning_signal(engine, spinning, t, slices_per_period=4 * k))
    print(f"{rate:>10.0f}{label:>10}{k:>5d}{t_static:>17.4f}{t_spin:>19.4f}{ratio:>7.1f}{cpu:>11.1f}"
          f"{err.max():>12.1e}")
