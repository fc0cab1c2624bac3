"""Spinning (magic-angle) experiment against the static FID: exact signal + full gradient time.

The issue's goal: a 6-spin experiment with 64 points over 10 rotor periods, signal and full
gradient, under 10x the static experiment's gradient time. Both on the built-in demo (six protons,
21 free parameters), 64 points over the same window (10 periods at RATE_HZ), medians of 3 runs
measured in this one run (wall time, and the ratio of CPU times of this process, steadier on a
shared machine); the error column is the largest |S| difference from a run with four
times the default slices per period (fourth order: about 256 times smaller error).

Two samplings per rate: "10 T_R", 64 points from 0 to exactly 10 periods (spacing 10/63 T_R, every
time inside a slice), and "synced", 64 points spaced 5/32 T_R (9.84 periods, rotor-synchronised: the
default K becomes a multiple of 32 and no time needs a partial slice).

Run: python benchmarks/bench_spinning.py [RATE_HZ ...]   (default 20000)
"""

import dataclasses
import sys

import numpy as np
from timing import median_cpu, median_time

from qhl import ExactEngine, build_model, demo_cluster
from qhl.exact.spinning_engine import default_slices_per_period, spinning_signal



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
    t_static = median_time(lambda: engine.gradient(static), 3)
    t_spin = median_time(lambda: engine.gradient(spinning), 3)
    cpu = median_cpu(lambda: engine.gradient(spinning), 3) / median_cpu(lambda: engine.gradient(static), 3)
    t = spinning.times_s
    err = np.abs(spinning_signal(engine, spinning, t) - spinning_signal(engine, spinning, t, slices_per_period=4 * k))
    print(f"{rate:>10.0f}{label:>10}{k:>5d}{t_static:>17.4f}{t_spin:>19.4f}{t_spin / t_static:>7.1f}{cpu:>11.1f}"
          f"{err.max():>12.1e}")
