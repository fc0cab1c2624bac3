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
