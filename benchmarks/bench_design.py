"""Experiment-design benchmark: `qhl design` over 50 candidate experiments on the demo cluster.

Usage:
    python benchmarks/bench_design.py

Workload: the demo's 4 experiments plus a 6 x 8 grid of dipolar scales (0 ... 1) and acquisition
windows (2e-4 ... 4e-3 s) at 64 points: 52 candidates, 21 free parameters; the three
criteria per shot, and D per T gate (which adds the Trotter models of 6 dipolar scales and the
T-count of every candidate). Each job is timed once, end to end (engine, Fisher information,
costs, optimiser), as the command runs it. Goal: each job under 120 s (issue 14). Also printed:
the gain over the current set and the equivalence ratio (1 at a D or A optimum).
"""

import time

import numpy as np

from qhl import demo_cluster
from qhl.learning.design import design_experiments

GOAL_S = 120.0


def main():
    cluster = demo_cluster()
    grid = dict(dipolar_scales=np.linspace(0, 1, 6), windows_s=np.linspace(2e-4, 4e-3, 8), points=64)
    print(f"{'job':<22}{'candidates':>11}{'seconds':>9}{'gain':>9}{'equivalence':>13}  goal < {GOAL_S:g} s")
    worst = 0.0
    for criterion, per in (("D", "shot"), ("A", "shot"), ("worst", "shot"), ("D", "t_count")):
        t0 = time.perf_counter()
        rep = design_experiments(cluster, criterion=criterion, per=per, **grid)
        sec = time.perf_counter() - t0
        worst = max(worst, sec)
        print(f"{criterion + ' per ' + per:<22}{len(rep.candidates):>11}{sec:>9.2f}{rep.gain:>9.3g}"
              f"{rep.equivalence:>13.6f}  {'ok' if sec < GOAL_S else 'SLOW'}")
    print(f"slowest job: {worst:.2f} s = {worst / GOAL_S:.3f} of the goal")


if __name__ == "__main__":
    main()
