"""Timing helper shared by the benchmark scripts (run as `python benchmarks/NAME.py`)."""

import statistics
import time


def median_time(fun, repeats):
    """Median wall time in seconds of `repeats` calls of fun()."""
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fun()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def median_cpu(fun, repeats):
    """Median CPU seconds of this process over `repeats` calls of fun() (less sensitive than wall time to a
    shared machine)."""
    out = []
    for _ in range(repeats):
        t0 = time.process_time()
        fun()
        out.append(time.process_time() - t0)
    return statistics.median(out)


def paired_times(fun_a, fun_b, repeats):
    """(median wall a, median wall b, median of the per-pair ratios b / a) over `repeats` alternating
    calls a, b, a, b, ...: both see the same moments of a shared machine, so the ratio is steadier than
    a ratio of medians taken one after the other."""
    ta, tb = [], []
    for _ in range(repeats):
        for fun, out in ((fun_a, ta), (fun_b, tb)):
            t0 = time.perf_counter()
            fun()
            out.append(time.perf_counter() - t0)
    return statistics.median(ta), statistics.median(tb), statistics.median(b / a for a, b in zip(ta, tb))
