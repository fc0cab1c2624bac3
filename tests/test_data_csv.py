"""Measured signals from CSV (qhl.learning.data_csv): round trip, fits from a file, one-line errors.

Format: RFC 4180 comma-separated values (Shafranovich, 2005) read with Python's csv module;
the fit from a file must equal the fit from the same data in memory (common practice)."""

import numpy as np
import pytest

from qhl import ExactEngine, build_model, demo_cluster
from qhl.cli import main
from qhl.learning.data_csv import load_signals_csv, write_signals_csv
from qhl.base.errors import QhlInputError
from qhl.exact.likelihood import synthetic_dataset

HEADER = "experiment,time_s,real,imag\n"


@pytest.fixture(scope="module")
def cluster():
    return demo_cluster()


@pytest.fixture(scope="module")
def dataset(cluster):
    engine = ExactEngine(build_model(cluster))
    return synthetic_dataset(engine, cluster.experiments, seed=1, sigma=1e-3)


def write(tmp_path, text, name="data.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


def grid_rows(cluster, name, idx, values=None):
    ex = cluster.experiment(name)
    t = ex.times_s
    return "".join(f"{name},{float(t[i])!r},{(values or {}).get(i, 0.5)},0.1\n" for i in idx)


def test_round_trip_is_exact(tmp_path, cluster, dataset):
    p = write_signals_csv(tmp_path / "d.csv", dataset)
    back = load_signals_csv(p, cluster)
    assert list(back.signals) == list(dataset.signals)
    for name, (t, d, s) in dataset.signals.items():
        t2, d2, s2 = back.signals[name]
        np.testing.assert_array_equal(t2, t)
        np.testing.assert_array_equal(d2, d)
        np.testing.assert_array_equal(s2, s)


def test_sigma_from_argument_or_experiment_and_subset(tmp_path, cluster):
    p = write(tmp_path, HEADER + grid_rows(cluster, "static", [0, 3, 10]))
    d = load_signals_csv(p, cluster)
    assert list(d.signals) == ["static"]
    t, data, s = d.signals["static"]
    np.testing.assert_allclose(t, cluster.experiment("static").times_s[[0, 3, 10]])
    np.testing.assert_allclose(data, 0.5 + 0.1j)
    np.testing.assert_allclose(s, cluster.experiment("static").noise)
    np.testing.assert_allclose(load_signals_csv(p, cluster, sigma=0.02).signals["static"][2], 0.02)


@pytest.mark.parametrize("text,match", [
    ("experiment,time_s,real\nstatic,0,1\n", "missing column.*imag"),
    ("time_s,real,imag\n0,1,0\n", "missing column.*experiment"),
    ("", "empty file"),
    (HEADER, "no data rows"),
    (HEADER + "static,0.0,nan,0\n", "line 2: real: NaN"),
    (HEADER + "static,0.0,1.0,inf\n", "line 2: imag: NaN or infinite"),
    (HEADER + "static,abc,1.0,0\n", "line 2: time_s: expected a number"),
    (HEADER + "spinning,0.0,1.0,0\n", "line 2: experiment 'spinning' matches no experiment"),
    (HEADER + "static,0.0,1.0,0\nstatic,0.0,1.0,0\n", "line 3: experiment 'static': duplicate time"),
    (HEADER + "static,1e-6,1.0\n", "line 2: expected 4 fields"),
    ("experiment,time_s,real,imag,sigma\nstatic,0.0,1.0,0,0\n", r"line 2: sigma: expected a value in \[1e-15, 1000\]"),
])
def test_bad_files_give_one_line_errors(tmp_path, cluster, text, match):
    p = write(tmp_path, text)
    with pytest.raises(QhlInputError, match=match) as info:
        load_signals_csv(p, cluster)
    msg = str(info.value)
    assert "\n" not in msg and str(p) in msg


def test_unsorted_and_off_grid_times(tmp_path, cluster):
    t = cluster.experiment("static").times_s
    p = write(tmp_path, HEADER + f"static,{float(t[5])!r},1,0\nstatic,{float(t[2])!r},1,0\n")
    with pytest.raises(QhlInputError, match="line 3: experiment 'static': times not increasing"):
        load_signals_csv(p, cluster)
    mid = float(0.5 * (t[1] + t[2]))
    p = write(tmp_path, HEADER + f"static,{mid!r},1,0\n")
    with pytest.raises(QhlInputError, match="matches no sampling time of experiment 'static'"):
        load_signals_csv(p, cluster)
    p = write(tmp_path, HEADER + f"static,{float(t[-1]) * 2!r},1,0\n")
    with pytest.raises(QhlInputError, match="matches no sampling time"):
        load_signals_csv(p, cluster)


def test_times_rounded_to_six_digits_still_match(tmp_path, cluster):
    t = cluster.experiment("static").times_s
    p = write(tmp_path, HEADER + "".join(f"static,{x:.6g},1,0\n" for x in t[:5]))
    np.testing.assert_allclose(load_signals_csv(p, cluster).signals["static"][0], t[:5], rtol=1e-5)


def test_missing_file_and_missing_noise(tmp_path, cluster):
    with pytest.raises(QhlInputError, match="no such file"):
        load_signals_csv(tmp_path / "absent.csv", cluster)
    from dataclasses import replace
    quiet = replace(cluster, experiments=tuple(replace(ex, noise=None) for ex in cluster.experiments))
    p = write(tmp_path, HEADER + grid_rows(cluster, "static", [0, 1]))
    with pytest.raises(QhlInputError, match="no noise level for experiment 'static'"):
        load_signals_csv(p, quiet)
    with pytest.raises(QhlInputError, match=r"sigma: expected a finite number in \[1e-15, 1000\]"):
        load_signals_csv(p, cluster, sigma=0.0)


def test_cli_learn_from_csv(tmp_path, cluster, dataset, capsys):
    """Fit the demo cluster's offsets to a CSV of synthetic data from its own values."""
    p = write_signals_csv(tmp_path / "d.csv", dataset, sigma_column=False)
    rc = main(["learn", "--data", str(p), "--free", "offset:*", "--start-offset", "0.02", "--json"])
    assert rc == 0
    import json
    out = json.loads(capsys.readouterr().out)
    assert out["converged"] is True
    truth = build_model(cluster, free="offset:*").free_values_hz
    for prm, t in zip(out["parameters"], truth):
        assert prm["true_hz"] is None
        assert abs(prm["fitted_hz"] - t) < 5 * prm["stderr_hz"]


def test_cli_bad_csv_exit_2(tmp_path, capsys):
    p = write(tmp_path, "experiment,time_s,real\nstatic,0,1\n")
    assert main(["learn", "--data", str(p)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "missing column" in err
