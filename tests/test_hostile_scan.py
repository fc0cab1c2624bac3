"""Scans under hostile timing and options: the results-file race, bounded scale grids, --plot first.

The race: two scans on one results file, started together, with a delay forced where the old
code created the header (temporary file renamed into place) before taking the lock. Then both
scans reported success and the first scan's rows were lost; now exactly one runs and the other
is refused, and every row of the one that ran is in the file (common practice: take the lock
before creating what it protects).
"""

import threading
import time

import pytest

import qhl.survey.scan as scan_module
from qhl import QhlInputError
from qhl.cli import main
from qhl.survey.scan import define_scan, parse_scale_range, read_results, run_scan
from qhl.survey.structure import cut_clusters, demo_structure_path, read_structure, write_cluster_files


def _clusters(centres=2):
    return cut_clusters(read_structure(demo_structure_path(), "1H"), size=3, centres=centres)


def test_two_scans_started_together_cannot_both_succeed(tmp_path, monkeypatch):
    definition = define_scan(_clusters(), (0.0, 0.5, 1.0))
    out = tmp_path / "r.csv"
    real_task = scan_module.run_task
    real_write = getattr(scan_module, "write_text_atomic", None)

    def slow_task(task):                      # keep the first scan busy while the second starts
        time.sleep(0.05)
        return real_task(task)

    def slow_header(path, text):              # the old code's window between "exists?" and rename
        time.sleep(0.5)
        return real_write(path, text)

    monkeypatch.setattr(scan_module, "run_task", slow_task)
    if real_write is not None:
        monkeypatch.setattr(scan_module, "write_text_atomic", slow_header)
    real_check = scan_module._check_results

    def slow_check(*a, **k):                   # both scans pass the unlocked pre-check first
        done = real_check(*a, **k)
        time.sleep(0.3)
        return done

    monkeypatch.setattr(scan_module, "_check_results", slow_check)
    outcomes = [None, None]

    def go(k):
        try:
            outcomes[k] = run_scan(definition, out, workers=0, progress=False)
        except QhlInputError as e:
            outcomes[k] = e

    threads = [threading.Thread(target=go, args=(k,)) for k in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    refused = [o for o in outcomes if isinstance(o, QhlInputError)]
    done = [o for o in outcomes if not isinstance(o, QhlInputError)]
    assert len(refused) == 1 and "another running scan" in str(refused[0])
    assert len(done) == 1 and done[0].computed == len(definition.tasks)
    scan_id, rows = read_results(out)
    assert scan_id == definition.scan_id and len(rows) == len(definition.tasks) == 6
    monkeypatch.undo()
    assert run_scan(definition, out, workers=0, progress=False).computed == 0


def test_torn_header_is_rewritten_under_the_lock(tmp_path):
    definition = define_scan(_clusters(1), (0.5,))
    out = tmp_path / "r.csv"
    out.write_text(scan_module._header(definition)[:30])        # a crash while writing the header
    assert run_scan(definition, out, workers=0, progress=False).computed == 1
    assert len(read_results(out)[1]) == 1


def test_scale_grid_is_bounded():
    assert len(parse_scale_range("0:1:10000")) == 10000
    with pytest.raises(QhlInputError, match=r"count in \[1, 10,000\]"):
        parse_scale_range("1e-5:1e-4:100000000")
    with pytest.raises(QhlInputError, match=r"\[-10, 10\]"):
        parse_scale_range("1e300")


def test_plot_folder_is_checked_before_the_scan_runs(tmp_path, capsys):
    paths = write_cluster_files(_clusters(1), tmp_path / "c")
    blocker = tmp_path / "file.txt"
    blocker.write_text("x")
    for bad, msg in ((blocker, "exists and is not a folder"), (tmp_path / "no" / "such" / "dir", "does not exist")):
        rc = main(["scan", str(paths[0]), "--dipolar-scale", "0.5", "--workers", "0",
                   "--out", str(tmp_path / "r.csv"), "--plot", str(bad)])
        err = capsys.readouterr().err
        assert rc == 2 and msg in err and err.count("\n") == 1
        assert not (tmp_path / "r.csv").exists()            # nothing computed


def test_results_file_with_a_huge_field_is_one_line(tmp_path):
    definition = define_scan(_clusters(1), (0.5,))
    out = tmp_path / "r.csv"
    run_scan(definition, out, workers=0, progress=False)
    with open(out, "a") as f:
        f.write('"' + "x" * 200000 + '"\n')          # beyond the csv module's field limit
    with pytest.raises(QhlInputError, match="malformed results row"):
        read_results(out)
