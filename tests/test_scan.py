"""Scans: task ids, resumable results, Dask execution, bad input, plots."""

import csv
import json
import math
import os
from pathlib import Path
import signal
import subprocess
import sys
import time

import pytest

from qhl import QhlInputError
from qhl.cli import main
from qhl.survey.scan import (COLUMNS, ScanSettings, define_scan, parse_scale_range, read_results, run_scan)
from qhl.survey.scan_plots import aggregate
from qhl.survey.structure import cut_clusters, demo_structure_path, invented_offsets_hz, read_structure, write_cluster_files

SCALES = (0.0, 0.5, 1.0)


def _clusters(size=4, centres=4, seed=0):
    nuclei = read_structure(demo_structure_path(), "1H")
    offsets = invented_offsets_hz(nuclei, 8.0, 9.4, seed=seed)
    return cut_clusters(nuclei, size=size, centres=centres, offsets_hz=offsets)


def _numbers(path):
    """Rows as text without the timing column, keyed by task id (nan compares equal as text)."""
    _, rows = read_results(path)
    out = {}
    for r in rows:
        out[r["task_id"]] = tuple(repr(r[k]) for k in COLUMNS if k != "seconds")
    return out


def _data_lines(path):
    return [ln for ln in Path(path).read_text().splitlines()[3:] if ln]


def test_cluster_too_large_for_memory_is_refused_up_front():
    from qhl import MemoryBudgetError

    big = _clusters(size=18, centres=1)
    with pytest.raises(MemoryBudgetError, match="18 spins"):
        define_scan(big, (0.5,))


def test_parse_scale_range():
    assert parse_scale_range("0:1:3") == (0.0, 0.5, 1.0)
    assert parse_scale_range("0.25") == (0.25,)
    for bad in ("0:1", "a:b:3", "0:1:0", "0:1:x"):
        with pytest.raises(QhlInputError, match="A:B:N"):
            parse_scale_range(bad)


def test_task_ids_depend_on_everything_that_defines_a_task():
    cl = _clusters()
    a = define_scan(cl, SCALES)
    assert len(a.tasks) == len(cl) * 3 and len({t.task_id for t in a.tasks}) == len(a.tasks)
    assert [t.task_id for t in define_scan(cl, SCALES).tasks] == [t.task_id for t in a.tasks]
    b = define_scan(cl, SCALES, ScanSettings(points=65))
    assert not {t.task_id for t in a.tasks} & {t.task_id for t in b.tasks}
    assert a.scan_id != b.scan_id
    # A cluster given twice adds no task; a changed offset is a new task.
    assert define_scan(cl + cl[:1], SCALES).scan_id == a.scan_id
    moved = _clusters(seed=1)
    assert define_scan(moved, SCALES).scan_id != a.scan_id


def test_interrupted_scan_resumes_to_the_same_results(tmp_path):
    definition = define_scan(_clusters(), SCALES)
    whole = tmp_path / "whole.csv"
    run_scan(definition, whole, workers=0, progress=False)
    part = tmp_path / "part.csv"
    first = run_scan(definition, part, workers=0, progress=False, stop_after=5)
    assert first.computed == 5 and len(_data_lines(part)) == 5
    # A machine dying mid-write leaves a torn last row: it is cut off and that task recomputed.
    with open(part, "a") as f:
        f.write("deadbeef,demo,4,0.5,21,0.1")
    second = run_scan(definition, part, workers=0, progress=False)
    assert second.skipped == 5 and second.computed == len(definition.tasks) - 5
    ids = [ln.split(",")[0] for ln in _data_lines(part)]
    assert sorted(ids) == sorted(t.task_id for t in definition.tasks)     # each exactly once
    assert _numbers(part) == _numbers(whole)
    third = run_scan(definition, part, workers=0, progress=False)
    assert third.computed == 0 and third.skipped == len(definition.tasks)


def test_killed_scan_process_resumes(tmp_path):
    # A real kill (SIGKILL) of `qhl scan` in another process, then a rerun here.
    cdir = tmp_path / "clusters"
    files = [str(p) for p in write_cluster_files(_clusters(size=6, centres=4), cdir)]
    out = tmp_path / "r.csv"
    args = files + ["--dipolar-scale", "0.1:1:8", "--workers", "0", "--points", "48", "--out", str(out)]
    proc = subprocess.Popen([sys.executable, "-m", "qhl", "scan"] + args, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, start_new_session=True)
    try:
        deadline = time.time() + 120
        while time.time() < deadline and proc.poll() is None:
            if out.exists() and len(_data_lines(out)) >= 3:
                break
            time.sleep(0.01)
        killed_at = len(_data_lines(out)) if out.exists() else 0
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(timeout=30)
    assert 3 <= killed_at < 32, "the scan finished before it could be killed"
    assert main(["scan"] + args) == 0
    definition = define_scan(files, parse_scale_range("0.1:1:8"), ScanSettings(points=48))
    ids = [ln.split(",")[0] for ln in _data_lines(out)]
    assert sorted(ids) == sorted(t.task_id for t in definition.tasks)
    reference = tmp_path / "ref.csv"
    run_scan(definition, reference, workers=0, progress=False)
    assert _numbers(out) == _numbers(reference)


def test_local_cluster_two_workers_matches_in_process(tmp_path):
    definition = define_scan(_clusters(size=4, centres=3), SCALES)
    serial, dask = tmp_path / "serial.csv", tmp_path / "dask.csv"
    run_scan(definition, serial, workers=0, progress=False)
    summary = run_scan(definition, dask, workers=2, processes=True, progress=False)
    assert summary.workers == 2 and summary.computed == len(definition.tasks)
    assert _numbers(dask) == _numbers(serial)


def test_threaded_local_cluster_matches_in_process(tmp_path):
    definition = define_scan(_clusters(size=4, centres=2), SCALES)
    serial, dask = tmp_path / "serial.csv", tmp_path / "dask.csv"
    run_scan(definition, serial, workers=0, progress=False)
    run_scan(definition, dask, workers=2, processes=False, progress=False)
    assert _numbers(dask) == _numbers(serial)


def test_results_file_of_another_scan_is_refused(tmp_path, capsys):
    out = tmp_path / "r.csv"
    run_scan(define_scan(_clusters(centres=2), SCALES), out, workers=0, progress=False)
    before = out.read_text()
    with pytest.raises(QhlInputError, match="another scan"):
        run_scan(define_scan(_clusters(centres=2), (0.0, 0.5)), out, workers=0, progress=False)
    assert out.read_text() == before
    cdir = tmp_path / "c"
    files = [str(p) for p in write_cluster_files(_clusters(centres=2), cdir)]
    assert main(["scan"] + files + ["--dipolar-scale", "0:1:2", "--workers", "0", "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "another scan" in err and len(err.strip().splitlines()) == 1
    other = tmp_path / "other.csv"
    other.write_text("a,b\n1,2\n")
    with pytest.raises(QhlInputError, match="not a qhl scan results file"):
        run_scan(define_scan(_clusters(centres=2), SCALES), other, workers=0, progress=False)


def test_unreachable_scheduler_fails_after_timeout(tmp_path, capsys):
    definition = define_scan(_clusters(centres=1), (0.5,))
    start = time.perf_counter()
    with pytest.raises(QhlInputError, match="cannot reach the Dask scheduler within 1 s"):
        run_scan(definition, tmp_path / "r.csv", scheduler="tcp://127.0.0.1:9", connect_timeout=1.0,
                 progress=False)
    assert time.perf_counter() - start < 15
    assert not (tmp_path / "r.csv").exists()
    files = [str(p) for p in write_cluster_files(_clusters(centres=1), tmp_path / "c")]
    rc = main(["scan"] + files + ["--dipolar-scale", "0.5", "--scheduler", "tcp://127.0.0.1:9",
                                  "--timeout", "1", "--out", str(tmp_path / "r.csv")])
    err = capsys.readouterr().err
    assert rc == 2 and "cannot reach the Dask scheduler" in err and "Traceback" not in err


def test_existing_scheduler_address(tmp_path):
    from dask.distributed import LocalCluster

    definition = define_scan(_clusters(size=4, centres=2), (0.5, 1.0))
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=":0") as cluster:
        s = run_scan(definition, tmp_path / "r.csv", scheduler=cluster.scheduler_address, progress=False)
    assert s.computed == 4 and s.workers == 1
    run_scan(definition, tmp_path / "serial.csv", workers=0, progress=False)
    assert _numbers(tmp_path / "r.csv") == _numbers(tmp_path / "serial.csv")


def test_second_scan_on_a_file_in_use_is_refused(tmp_path):
    import fcntl

    definition = define_scan(_clusters(centres=1), SCALES)
    out = tmp_path / "r.csv"
    run_scan(definition, out, workers=0, progress=False, stop_after=1)
    with open(out, "a") as held:
        fcntl.flock(held, fcntl.LOCK_EX | fcntl.LOCK_NB)   # another scan appending
        with pytest.raises(QhlInputError, match="another running scan"):
            run_scan(definition, out, workers=0, progress=False)
    assert run_scan(definition, out, workers=0, progress=False).computed == 2


def test_results_columns_hold_the_diagnostics(tmp_path):
    from qhl.survey.diagnostics import diagnose

    clusters = _clusters(size=4, centres=1)
    out = tmp_path / "r.csv"
    run_scan(define_scan(clusters, (0.5,)), out, workers=0, progress=False)
    scan_id, rows = read_results(out)
    d = diagnose(clusters[0], 0.5)
    (row,) = rows
    assert row["n_spins"] == 4 and row["n_free"] == 10 and row["dipolar_scale"] == 0.5
    assert row["fisher_eigenvalues"] == tuple(d.fisher_eigenvalues.tolist())   # exact through CSV
    assert row["mean_r"] == d.mean_r and row["median_crb_hz"] == d.median_crb_hz
    with open(out) as f:
        lines = f.read().splitlines()
    assert lines[0] == "# qhl scan results v1" and lines[1].startswith(f"# scan_id={scan_id} ")
    assert tuple(next(csv.reader([lines[2]]))) == COLUMNS


def test_aggregate_medians():
    rows = [{"n_spins": 4, "dipolar_scale": 0.5, "x": v} for v in (1.0, 3.0, math.inf, 2.0)]
    rows += [{"n_spins": 5, "dipolar_scale": 0.5, "x": 7.0}]
    agg = aggregate(rows, "x")
    assert agg[4][1].tolist() == [2.0] and agg[5][1].tolist() == [7.0]


def test_cli_scan_with_plots(tmp_path, capsys):
    files = [str(p) for p in write_cluster_files(_clusters(size=4, centres=2), tmp_path / "c")]
    rc = main(["scan"] + files + ["--dipolar-scale", "0:1:3", "--workers", "0", "--out", str(tmp_path / "r.csv"),
                                  "--plot", str(tmp_path / "plots"), "--json"])
    assert rc == 0
    captured = capsys.readouterr()
    report = json.loads(captured.out)
    assert "scan [" in captured.err and "6/6 tasks" in captured.err      # progress on stderr
    assert report["tasks"] == 6 and report["computed"] == 6 and report["skipped"] == 0
    assert len(report["plots"]) == 3
    for p in report["plots"]:
        assert Path(p).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
