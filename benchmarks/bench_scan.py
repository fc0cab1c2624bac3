"""Scan benchmark: time per task and the speed-up of a Dask LocalCluster from 1 to 2 workers.

Usage:
    python benchmarks/bench_scan.py [--quick] [--repeats R]

Workload: clusters of 6, 7 and 8 protons cut from the invented demo structure (with invented
shifts over 8 ppm) x dipolar scales 0.05 ... 1; default 20 clusters x 8 scales = 160 tasks,
--quick 6 clusters x 4 scales. Three runs side by side in one process, each into a fresh results
file: in this process (no Dask), a LocalCluster of 1 worker and one of 2 workers (processes, one
thread each); the Dask runs are repeated R times (default 1) and the median wall time is used. The clusters are started before timing, so the ratios measure the scan itself
(task shipping, compute, row appends), not worker start-up or the first import of qhl. Goal: 2-worker speed-up above 1.7x
on an otherwise idle machine with at least 2 cores; the load average is printed beside it.
"""

import os

# One BLAS thread in this process too, as Dask gives its worker processes: otherwise the
# in-process run competes with its own BLAS threads on a busy machine (common practice).
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
from pathlib import Path  # noqa: E402
import statistics  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from qhl.survey.scan import ScanSettings, define_scan, read_results, run_scan  # noqa: E402
from qhl.survey.structure import cut_clusters, demo_structure_path, invented_offsets_hz, read_structure  # noqa: E402


def workload(quick: bool):
    nuclei = read_structure(demo_structure_path(), "1H")
    offsets = invented_offsets_hz(nuclei, 8.0, 9.4, seed=0)
    plan = [(6, 2), (7, 2), (8, 2)] if quick else [(6, 7), (7, 7), (8, 6)]
    clusters = []
    for size, centres in plan:
        clusters += cut_clusters(nuclei, size=size, centres=centres, offsets_hz=offsets)
    scales = tuple(np.round(np.linspace(0.05, 1.0, 4 if quick else 8), 6))
    return clusters, scales


def _import_qhl():
    import qhl.survey.diagnostics  # noqa: F401


def timed_scan(definition, workdir, name, **kwargs):
    out = Path(workdir) / f"{name}.csv"
    start = time.perf_counter()
    summary = run_scan(definition, out, progress=False, **kwargs)
    wall = time.perf_counter() - start
    assert summary.computed == len(definition.tasks)
    _, rows = read_results(out)
    return wall, rows


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="6 clusters x 4 scales")
    parser.add_argument("--repeats", type=int, default=1, help="repeats of each Dask run (median)")
    args = parser.parse_args()
    from dask.distributed import Client, LocalCluster

    clusters, scales = workload(args.quick)
    definition = define_scan(clusters, scales, ScanSettings())
    sizes = sorted({c.n_spins for c in clusters})
    n = len(definition.tasks)
    print(f"workload: {len(clusters)} clusters of {sizes[0]}-{sizes[-1]} spins x {len(scales)} dipolar scales "
          f"= {n} tasks (FID {ScanSettings.points} points, offsets + dipolar free)")
    with tempfile.TemporaryDirectory() as work:
        serial_wall, rows = timed_scan(definition, work, "serial", workers=0)
        per_task = [r["seconds"] for r in rows]
        print(f"in process : {serial_wall:7.2f} s wall, {serial_wall / n * 1e3:7.1f} ms per task "
              f"(median task {statistics.median(per_task) * 1e3:.1f} ms)")
        for k in sizes:
            t = [r["seconds"] for r in rows if r["n_spins"] == k]
            print(f"   {k} spins: median {statistics.median(t) * 1e3:6.1f} ms per task over {len(t)} tasks")
        walls = {1: [], 2: []}
        for rep in range(max(args.repeats, 1)):
            for workers in (1, 2):
                with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                  dashboard_address=":0", silence_logs=40) as cluster:
                    with Client(cluster) as warm:                  # import qhl (and qiskit) first
                        warm.run(_import_qhl)
                    wall, _ = timed_scan(definition, work, f"dask{workers}-{rep}",
                                         scheduler=cluster.scheduler_address)
                walls[workers].append(wall)
        walls = {k: statistics.median(v) for k, v in walls.items()}
        for workers in (1, 2):
            print(f"dask {workers} worker{'s' if workers > 1 else ' '}: {walls[workers]:7.2f} s wall, "
                  f"{walls[workers] / n * 1e3:7.1f} ms per task")
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"speed-up 1 -> 2 workers: {walls[1] / walls[2]:.2f}x (goal > 1.7x; {os.cpu_count()} cores, "
          f"load average {load:.2f} at the end)")
    print(f"Dask overhead, 1 worker vs in process: {walls[1] / serial_wall:.2f}x")


if __name__ == "__main__":
    main()
