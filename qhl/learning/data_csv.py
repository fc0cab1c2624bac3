"""Measured signals from CSV: one row per time point, columns experiment,time_s,real,imag[,sigma].

Rows of one experiment must have increasing, distinct times, each on that experiment's sampling
grid (linspace(0, t_max_s, points) of the cluster file; a subset of the grid is fine). The
signal is relative to S(0) = 1 (qhl.exact.engine's normalisation); `sigma` (optional) is the noise
standard deviation of each of Re and Im per point, otherwise the experiment's `noise` or the
caller's value is used.

Checked on reading (one-line QhlInputError naming file, line and column): UTF-8 text of at most
256 MiB, fields of at most 10,000 characters, 0 <= time_s <= t_max_s, |real|, |imag| <= 1e6,
1e-15 <= sigma <= 1e3 (the noise range of cluster files).
"""

import csv
import io
import math

import numpy as np

from ..base.errors import QhlInputError
from ..base.files import read_text_file
from ..exact.likelihood import Dataset
from ..spins.cluster import NOISE_RANGE, checked_number

__all__ = ["REQUIRED_COLUMNS", "load_signals_csv", "write_signals_csv", "TIME_RTOL"]

REQUIRED_COLUMNS = ("experiment", "time_s", "real", "imag")
# A time matches a grid point within this fraction of the grid spacing (files round times).
TIME_RTOL = 1e-3


# Accepted ranges: a signal relative to S(0) = 1 stays far below 1e6; sigma as a cluster file's noise.
MAX_SIGNAL = 1e6
MAX_FILE_BYTES = 256 * 2**20    # 256 MiB: about 3 million rows
MAX_FIELD_CHARS = 10_000        # one CSV field (experiment name or number)


def _short(text) -> str:
    text = repr(text)
    return text if len(text) <= 40 else text[:24] + f"... ({len(text)} characters)"


def _number(text, column, line, source, low=None, high=None):
    try:
        v = float(text)
    except (TypeError, ValueError):
        raise QhlInputError(f"line {line}: {column}: expected a number, got {_short(text)}", source=source) from None
    if not math.isfinite(v):
        raise QhlInputError(f"line {line}: {column}: NaN or infinite value {_short(text)}", source=source)
    if (low is not None and v < low) or (high is not None and v > high):
        raise QhlInputError(f"line {line}: {column}: expected a value in [{low:g}, {high:g}], got {_short(text)}",
                            source=source)
    return v


def _read_rows(path, source):
    """All CSV rows; missing, oversized, non-UTF-8 or malformed files -> one-line QhlInputError."""
    text = read_text_file(path, MAX_FILE_BYTES, source=source, encoding="utf-8-sig")
    reader = csv.reader(io.StringIO(text, newline=""))
    rows = []
    try:
        for r in reader:
            if any(len(c) > MAX_FIELD_CHARS for c in r):
                raise QhlInputError(f"line {reader.line_num}: a field of more than {MAX_FIELD_CHARS:,} characters",
                                    source=source)
            rows.append(r)
    except csv.Error as e:
        raise QhlInputError(f"line {reader.line_num}: malformed CSV ({str(e).splitlines()[0][:120]})",
                            source=source) from None
    return rows


def load_signals_csv(path, cluster, sigma=None) -> Dataset:
    """Read measured signals for the experiments of `cluster`.

    Args:
        path: CSV file with a header row naming at least experiment,time_s,real,imag.
        cluster: the Cluster whose experiments the rows name.
        sigma: noise per point where the file has no sigma column (default: experiment noise).

    Returns:
        qhl.exact.likelihood.Dataset with the experiments present in the file, in cluster order.

    Raises:
        QhlInputError: unreadable file, missing column, bad number, NaN, unknown experiment,
            unsorted or duplicate times, a time off the experiment's grid, sigma <= 0, no sigma.

    Example:
        >>> import tempfile, os
        >>> from qhl import demo_cluster
        >>> path = os.path.join(tempfile.mkdtemp(), "fid.csv")
        >>> _ = open(path, "w").write("experiment,time_s,real,imag\\nstatic,0.0,1.0,0.0\\n")
        >>> load_signals_csv(path, demo_cluster()).signals["static"][1]
        array([1.+0.j])
    """
    source = str(path)
    rows = _read_rows(path, source)
    rows = [(k + 1, r) for k, r in enumerate(rows) if r and any(c.strip() for c in r)]
    if not rows:
        raise QhlInputError(f"empty file: expected a header {','.join(REQUIRED_COLUMNS)}", source=source)
    header = [c.strip().lower() for c in rows[0][1]]
    missing = [c for c in REQUIRED_COLUMNS if c not in header]
    if missing:
        raise QhlInputError(f"missing column(s) {', '.join(missing)}: expected a header with "
                            f"{','.join(REQUIRED_COLUMNS)}[,sigma], got {','.join(header)}", source=source)
    col = {c: header.index(c) for c in header}
    has_sigma = "sigma" in col
    if sigma is not None:
        sigma = checked_number(sigma, "sigma", source, low=NOISE_RANGE[0], high=NOISE_RANGE[1])
    known = {ex.name: ex for ex in cluster.experiments}
    per = {}
    for line, r in rows[1:]:
        if len(r) < len(header):
            raise QhlInputError(f"line {line}: expected {len(header)} fields, got {len(r)}", source=source)
        name = r[col["experiment"]].strip()
        if name not in known:
            raise QhlInputError(f"line {line}: experiment '{name}' matches no experiment of the cluster: "
                                f"expected one of {', '.join(known) or '(none)'}", source=source)
        t = _number(r[col["time_s"]], "time_s", line, source)
        re_, im = (_number(r[col[c]], c, line, source, -MAX_SIGNAL, MAX_SIGNAL) for c in ("real", "imag"))
        s = _number(r[col["sigma"]], "sigma", line, source, *NOISE_RANGE) if has_sigma else None
        per.setdefault(name, []).append((line, t, complex(re_, im), s))
    if not per:
        raise QhlInputError("no data rows after the header", source=source)
    signals = {}
    for name, ex in known.items():
        if name not in per:
            continue
        lines, t, d, s = (np.array(v) for v in zip(*per[name]))
        steps = np.diff(t)
        if np.any(steps == 0):
            k = int(np.flatnonzero(steps == 0)[0]) + 1
            raise QhlInputError(f"line {lines[k]}: experiment '{name}': duplicate time {t[k]:g} s", source=source)
        if np.any(steps < 0):
            k = int(np.flatnonzero(steps < 0)[0]) + 1
            raise QhlInputError(f"line {lines[k]}: experiment '{name}': times not increasing "
                                f"({t[k]:g} s after {t[k - 1]:g} s)", source=source)
        grid = ex.times_s
        spacing = grid[1] - grid[0]
        nearest = np.rint(np.clip(t, 0.0, grid[-1]) / spacing).astype(np.int64)   # clip: no overflow
        nearest = np.clip(nearest, 0, len(grid) - 1)
        off = np.abs(t - grid[nearest]) > TIME_RTOL * spacing
        if np.any(off):
            k = int(np.flatnonzero(off)[0])
            raise QhlInputError(f"line {lines[k]}: time {t[k]:g} s matches no sampling time of experiment "
                                f"'{name}' ({ex.points} points from 0 to {ex.t_max_s:g} s)", source=source)
        if has_sigma:
            sig = s.astype(float)
        else:
            value = sigma if sigma is not None else ex.noise
            if value is None:
                raise QhlInputError(f"no noise level for experiment '{name}': add a sigma column, set its "
                                    f"noise in the cluster file or give sigma (--noise)", source=source)
            sig = np.full(len(t), float(value))
        signals[name] = (t.astype(float), d.astype(complex), sig)
    return Dataset(signals)


def write_signals_csv(path, dataset: Dataset, sigma_column: bool = True):
    """Write a Dataset in the format `load_signals_csv` reads (full float precision)."""
    with open(path, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(list(REQUIRED_COLUMNS) + (["sigma"] if sigma_column else []))
        for name, (times, data, sig) in dataset.signals.items():
            sig = np.broadcast_to(np.asarray(sig, float), np.shape(times))
            for t, d, s in zip(times, data, sig):
                w.writerow([name, repr(float(t)), repr(float(d.real)), repr(float(d.imag))]
                           + ([repr(float(s))] if sigma_column else []))
    return path
