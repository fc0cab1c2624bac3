"""A Hahn echo from a cluster file: the echo top, its J modulation, and what it teaches.

Run: python examples/hahn_echo_demo.py
"""

from pathlib import Path

import numpy as np

from qhl import ExactEngine, build_model, load_cluster
from qhl.exact.likelihood import cramer_rao_bounds, fisher_information

cluster = load_cluster(Path(__file__).resolve().parent / "hahn_echo.toml")
engine = ExactEngine(build_model(cluster, free=["offset:H*", "j:*"]))
fid, hahn = cluster.experiments

echo = engine.signal(hahn)
tau = hahn.steps[0].seconds
print(f"echo top after 2 tau = {2 * tau * 1e3:.0f} ms: S = {echo[0].real:+.4f}{echo[0].imag:+.4f}i")
# The 180 pulse on 1H refocuses the offsets and the 1H-13C coupling, not the 1H-1H J: each proton's echo
# is modulated by cos(pi J 2 tau) (weak coupling), the pulse about y turns Ix into -Ix.
print(f"-cos(pi J 2 tau) with J(Ha-Hb) = 6.5 Hz: {-np.cos(np.pi * 6.5 * 2 * tau):+.4f}")

for experiments, label in (([fid], "FID alone"), ([fid, hahn], "FID + Hahn echo")):
    bounds, *_ = cramer_rao_bounds(fisher_information(engine, experiments))
    text = ", ".join(f"{n} {b:.3g}" for n, b in zip(engine.model.free, bounds))
    print(f"Cramer-Rao bounds (Hz), {label}: {text}")
