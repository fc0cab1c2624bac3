"""Pulse-sequence experiments against the plain FID: exact signal + gradient time on the demo.

Run: python benchmarks/bench_sequences.py   (prints medians and ratios measured in this run)
"""

import dataclasses

from timing import median_time

from qhl import ExactEngine, build_model, demo_cluster
from qhl.spins.cluster import Delay, Pulse
from qhl.spins.sequences import named_block

cluster = demo_cluster()
engine = ExactEngine(build_model(cluster))
fid = cluster.experiments[0]
cases = {"hahn echo (3 steps)": (Delay(1e-4), Pulse(180, 90), Delay(1e-4)),
         "wahuha x 10 (90 steps)": (named_block("wahuha", 2e-6, 10),)}
print(f"demo cluster: {cluster.n_spins} spins, {len(engine.model.free)} free parameters, {fid.points} points")
base = median_time(lambda: engine.gradient(fid), 5)
print(f"{'experiment':<26}{'gradient (s)':>14}{'x FID':>8}")
print(f"{'FID':<26}{base:>14.3f}{1.0:>8.1f}")
for label, steps in cases.items():
    ex = dataclasses.replace(fid, steps=steps)
    t = median_time(lambda: engine.gradient(ex), 3)
    print(f"{label:<26}{t:>14.3f}{t / base:>8.1f}")
