"""Scans of diagnostics over many clusters and dipolar scales, on Dask, resumable.

A scan is a set of tasks, one per (cluster, dipolar_scale), all sharing ScanSettings (the FID
and the free parameters). Each task's id is a hash of everything that defines it: the
cluster's canonical cluster-file text (qhl.survey.structure.cluster_to_toml), the dipolar scale,
the settings and RESULTS_VERSION. The scan id is the hash of the sorted task ids.

Results file (CSV). Two comment lines (`# qhl scan results v1`, `# scan_id=...` and a summary),
a header row, then one row per finished task. The file is opened (created if missing) and
locked (flock) before its header is written, never replaced by a rename, so two scans on one
file cannot both run (the second is refused); a header torn by a crash is rewritten under the
lock. Each row is appended with a single write() and fsync as its task finishes, by the
one process that drives the scan. A rerun reads the file, skips every task already there and
computes the rest; a torn last row (a machine that died mid-write) is cut off and recomputed.
A results file with another scan id is refused rather than mixed. Floats are written with
repr() so that numbers read back exactly.

Execution: in this process (workers=0), a dask.distributed LocalCluster on this machine's cores
(default), or an existing scheduler at an address (`tcp://host:8786`). Workers receive the
cluster text, not a path, so they need no shared file system.
"""

from dataclasses import asdict, dataclass, field
import csv
import fcntl
import hashlib
import io
import json
import math
import os
from pathlib import Path
import sys
import time

import numpy as np

from ..spins.cluster import MAX_DIPOLAR_SCALE, Cluster, Experiment
from ..spins.cluster_file import load_cluster, parse_cluster_toml
from .diagnostics import diagnose
from ..exact.engine import estimate_memory_bytes
from ..base.errors import QhlInputError
from ..base.memory import require_memory
from ..spins.model import build_model
from .scan_settings import ScanSettings
from .structure import cluster_to_toml

__all__ = ["ScanSettings", "ScanTask", "ScanDefinition", "ScanSummary", "RESULTS_VERSION", "COLUMNS",
           "define_scan", "parse_scale_range", "run_task", "read_results", "run_scan"]

RESULTS_VERSION = 1
MAX_SCALES = 10_000     # dipolar scales per scan
_MAGIC = f"# qhl scan results v{RESULTS_VERSION}"

COLUMNS = ("task_id", "cluster", "n_spins", "dipolar_scale", "n_free", "fisher_min_eigenvalue",
           "fisher_max_eigenvalue", "n_unlearnable", "median_crb_hz", "softest_participation",
           "mean_participation", "mean_r", "n_ratios", "mean_ipr", "mean_d2", "fisher_eigenvalues",
           "fisher_participation", "sector_mean_r", "seconds")
_LISTS = {"fisher_eigenvalues", "fisher_participation", "sector_mean_r"}
_INTS = {"n_spins", "n_free", "n_unlearnable", "n_ratios"}
_STRINGS = {"task_id", "cluster"}


@dataclass(frozen=True)
class ScanTask:
    """One (cluster, dipolar_scale) task; `cluster_toml` is the canonical cluster text."""

    task_id: str
    cluster: str
    cluster_toml: str
    dipolar_scale: float
    settings: ScanSettings


def _sha(text: str) -> str:
    return hashlib.sha256(text.encode()).hexdigest()


def _task_id(cluster_toml: str, scale: float, settings: ScanSettings) -> str:
    shared = {k: (list(v) if isinstance(v, tuple) else v) for k, v in asdict(settings).items()}
    if not settings.spinning_hz:
        del shared["spinning_hz"]           # static scans keep the task ids they had before the rotor setting
    key = {"cluster": _sha(cluster_toml), "dipolar_scale": repr(float(scale)), "settings": shared,
           "version": RESULTS_VERSION}
    return _sha(json.dumps(key, sort_keys=True))[:20]


@dataclass(frozen=True)
class ScanDefinition:
    """The tasks of a scan (duplicates removed, order: cluster, then dipolar scale)."""

    tasks: tuple
    settings: ScanSettings
    clusters: tuple
    dipolar_scales: tuple

    @property
    def scan_id(self) -> str:
        return _sha("\n".join(sorted(t.task_id for t in self.tasks)))[:20]

    def describe(self) -> str:
        s = self.settings
        return (f"tasks={len(self.tasks)} clusters={len(self.clusters)} "
                f"dipolar_scales={','.join(repr(x) for x in self.dipolar_scales)} "
                f"t_max_s={s.t_max_s!r} points={s.points} noise={s.noise!r} free={','.join(s.free)}"
                + (f" spinning_hz={s.spinning_hz!r}" if s.spinning_hz else ""))


def parse_scale_range(text: str) -> tuple:
    """'A:B:N' -> N values from A to B inclusive (N = 1 gives A); a single number -> (A,).

    Example:
        >>> parse_scale_range("0:1:5")
        (0.0, 0.25, 0.5, 0.75, 1.0)
    """
    parts = str(text).split(":")
    try:
        if len(parts) == 1:
            values = (float(parts[0]),)
        elif len(parts) == 3:
            a, b, n = float(parts[0]), float(parts[1]), int(parts[2])
            if not 1 <= n <= MAX_SCALES:
                raise ValueError
            values = tuple(float(x) for x in np.linspace(a, b, n))
        else:
            raise ValueError
    except ValueError:
        raise QhlInputError(f"expected A:B:N (start, stop, count in [1, {MAX_SCALES:,}]) or one number, "
                            f"got {str(text)[:40]!r}",
                            key="dipolar-scale") from None
    if not all(math.isfinite(v) and abs(v) <= MAX_DIPOLAR_SCALE for v in values):
        raise QhlInputError(f"expected dipolar scales in [-{MAX_DIPOLAR_SCALE:g}, {MAX_DIPOLAR_SCALE:g}], "
                            f"got {text!r}", key="dipolar-scale")
    return values


def _sector_dimensions(cluster: Cluster) -> list:
    """Magnetisation-sector dimensions: products of binomials over isotopes (qhl.exact.sectors)."""
    counts = {}
    for spin in cluster.spins:
        counts[spin.isotope] = counts.get(spin.isotope, 0) + 1
    dims = [1]
    for n in counts.values():
        dims = [d * math.comb(n, m) for d in dims for m in range(n + 1)]
    return dims


def define_scan(clusters, dipolar_scales, settings: ScanSettings = ScanSettings()) -> ScanDefinition:
    """Build the task list for every cluster (paths or Cluster objects) at every dipolar scale.

    Raises:
        QhlInputError: an unreadable cluster, a free pattern that matches nothing in a cluster,
            or no cluster / no scale.
        MemoryBudgetError: a cluster whose exact diagnostics would not fit in this machine's memory
            (qhl.exact.engine.estimate_memory_bytes; workers are assumed no larger).
    """
    clusters = list(clusters)
    scales = tuple(float(s) for s in dipolar_scales)
    if not clusters:
        raise QhlInputError("expected at least one cluster file", key="clusters")
    if not scales or not all(math.isfinite(s) for s in scales):
        raise QhlInputError("expected at least one finite dipolar scale", key="dipolar-scale")
    loaded = []
    for c in clusters:
        c = c if isinstance(c, Cluster) else load_cluster(c)
        require_memory(f"a scan task on {c.source} ({c.n_spins} spins)",      # before building anything
                       estimate_memory_bytes(c.n_spins, _sector_dimensions(c), settings.points))
        try:
            model = build_model(c).with_free(settings.free)
        except QhlInputError as e:
            raise QhlInputError(str(e), source=c.source, key="free") from None
        if settings.spinning_hz:
            # what every task of this cluster will ask of the rotor (a pair at the magic angle, a pair without a
            # direction), checked before any task runs instead of on a worker mid-scan
            from ..spins.spinning import spinning_factors
            probe = Experiment(name="scan", t_max_s=settings.t_max_s, points=settings.points, dipolar_scale=1.0,
                               noise=settings.noise, spinning_hz=float(settings.spinning_hz))
            try:
                spinning_factors(model, probe)
            except QhlInputError as e:
                raise QhlInputError(f"{e} (--spinning-hz {settings.spinning_hz:g})", source=c.source) from None
        loaded.append(c)
    tasks, seen, names = [], set(), []
    for c in loaded:
        text = cluster_to_toml(c)
        names.append(c.name)
        for s in scales:
            tid = _task_id(text, s, settings)
            if tid not in seen:
                seen.add(tid)
                tasks.append(ScanTask(tid, c.name, text, s, settings))
    return ScanDefinition(tuple(tasks), settings, tuple(names), scales)


def run_task(task: ScanTask) -> dict:
    """Compute one task's results row (a dict over COLUMNS). Runs on a worker."""
    cluster = parse_cluster_toml(task.cluster_toml, source=f"<{task.cluster}>")
    s = task.settings
    d = diagnose(cluster, task.dipolar_scale, t_max_s=s.t_max_s, points=s.points, noise=s.noise, free=s.free,
                 spinning_hz=s.spinning_hz)
    row = {"task_id": task.task_id, "cluster": task.cluster, "n_spins": d.n_spins,
           "dipolar_scale": task.dipolar_scale, "seconds": d.seconds}
    row.update(d.summary())
    return row


# ---------------------------------------------------------------------------- results file
def _format(key, value) -> str:
    if key in _LISTS:
        return ";".join(repr(float(x)) for x in value)
    if key in _STRINGS:
        return " ".join(str(value).split())          # one line per row
    if key in _INTS:
        return str(value)
    return repr(float(value))


def _parse(key, text):
    if key in _LISTS:
        return tuple(float(x) for x in text.split(";")) if text else ()
    if key in _INTS:
        return int(text)
    if key in _STRINGS:
        return text
    return float(text)


def _row_line(row: dict) -> str:
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerow([_format(k, row[k]) for k in COLUMNS])
    return buf.getvalue()


def read_results(path, repair: bool = False):
    """Read a results file.

    Args:
        path: the CSV written by run_scan.
        repair: cut off a torn last row (no final newline) in place.

    Returns:
        (scan_id, rows): rows are dicts over COLUMNS in file order, first occurrence of each task.

    Raises:
        QhlInputError: not a qhl results file, or a malformed row other than a torn last one.
    """
    path = Path(path)
    src = str(path)
    try:
        data = path.read_bytes()
    except OSError as e:
        raise QhlInputError(f"cannot read results: {e.strerror}", source=src) from None
    text = data.decode("utf-8", errors="replace")
    if not text.endswith("\n"):
        cut = text.rfind("\n") + 1
        text = text[:cut]
        if repair:
            with open(path, "r+b") as f:
                f.truncate(len(text.encode()))
                f.flush()
                os.fsync(f.fileno())
    lines = text.splitlines()
    if len(lines) < 3 or lines[0] != _MAGIC or not lines[1].startswith("# scan_id="):
        raise QhlInputError(f"not a qhl scan results file (expected first line '{_MAGIC}')", source=src,
                            key="out")
    try:
        scan_id = lines[1].split()[1].split("=", 1)[1]
        header = next(csv.reader([lines[2]]))
    except (IndexError, csv.Error):
        raise QhlInputError("malformed results header", source=src, key="out") from None
    if tuple(header) != COLUMNS:
        raise QhlInputError("results header does not match this version of qhl", source=src, key="out")
    try:
        parsed = list(enumerate(csv.reader(lines[3:]), start=4))
    except csv.Error as e:
        raise QhlInputError(f"malformed results row ({str(e)[:80]})", source=src, key="out") from None
    rows, seen = [], set()
    for n, values in parsed:
        if len(values) != len(COLUMNS):
            raise QhlInputError(f"line {n}: expected {len(COLUMNS)} fields, got {len(values)}", source=src)
        try:
            row = {k: _parse(k, v) for k, v in zip(COLUMNS, values)}
        except ValueError:
            raise QhlInputError(f"line {n}: malformed value", source=src) from None
        if row["task_id"] not in seen:
            seen.add(row["task_id"])
            rows.append(row)
    return scan_id, rows


def _check_results(path: Path, definition: ScanDefinition, repair: bool = False) -> set:
    """Check an existing results file; return the ids of tasks done.

    Only with `repair` (under the lock) is a torn last row cut off; a check before the lock only reads.
    """
    if path.exists() and path.stat().st_size > 0:
        if _is_torn_header(path, definition):
            return set()
        scan_id, rows = read_results(path, repair=repair)
        if scan_id != definition.scan_id:
            raise QhlInputError(f"holds results of another scan (scan_id {scan_id}, this scan {definition.scan_id}); "
                                "choose another --out or the same clusters, scales and settings",
                                source=str(path), key="out")
        return {r["task_id"] for r in rows}
    if not path.parent.is_dir():
        raise QhlInputError(f"folder '{path.parent}' does not exist", source=str(path), key="out")
    return set()


def _header(definition: ScanDefinition) -> str:
    return f"{_MAGIC}\n# scan_id={definition.scan_id} {definition.describe()}\n" + ",".join(COLUMNS) + "\n"


def _is_torn_header(path: Path, definition: ScanDefinition) -> bool:
    """A file holding only a strict beginning of this scan's header (a crash while writing it)."""
    head = _header(definition).encode()
    size = path.stat().st_size
    if size >= len(head):
        return False
    with open(path, "rb") as f:
        return head.startswith(f.read())


class _Appender:
    """The results file, locked: created (or opened) and locked before anything is written.

    The file is opened with O_CREAT (never replaced by a rename), then an exclusive advisory lock
    (flock) is taken on it; only then is a new or torn header written, so two scans on one file
    cannot both proceed. Rows are appended with one write() each, then fsync: a crash leaves at
    most one torn last row.
    """

    def __init__(self, path: Path, definition: ScanDefinition):
        self.path = path
        try:
            self.fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        except OSError as e:
            raise QhlInputError(f"cannot write results: {e.strerror}", source=str(path), key="out") from None
        try:
            fcntl.flock(self.fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(self.fd)
            raise QhlInputError("is being written by another running scan", source=str(path), key="out") from None
        try:
            if os.fstat(self.fd).st_size == 0 or _is_torn_header(path, definition):
                os.ftruncate(self.fd, 0)
                os.write(self.fd, _header(definition).encode())
                os.fsync(self.fd)
        except OSError as e:
            os.close(self.fd)
            raise QhlInputError(f"cannot write results: {e.strerror}", source=str(path), key="out") from None
        except BaseException:
            os.close(self.fd)
            raise

    def write(self, row: dict):
        os.write(self.fd, _row_line(row).encode())
        os.fsync(self.fd)

    def close(self):
        os.close(self.fd)


class _Progress:
    """A one-line progress bar on stderr (a line every 10 % when stderr is not a terminal)."""

    def __init__(self, total: int, done_before: int, enabled: bool, stream=None):
        self.total, self.before, self.enabled = total, done_before, enabled
        self.stream = stream or sys.stderr
        self.start = time.perf_counter()
        self.count = 0
        self.tty = getattr(self.stream, "isatty", lambda: False)()
        self.last_decile = -1

    def step(self):
        self.count += 1
        if not self.enabled:
            return
        done = self.before + self.count
        frac = done / self.total if self.total else 1.0
        rate = self.count / max(time.perf_counter() - self.start, 1e-9)
        left = (self.total - done) / rate if rate > 0 else float("inf")
        bar = "#" * int(30 * frac) + "." * (30 - int(30 * frac))
        msg = f"scan [{bar}] {done}/{self.total} tasks ({self.before} from before), {rate:.2f}/s, {left:.0f} s left"
        if self.tty:
            self.stream.write("\r" + msg + ("\n" if done == self.total else ""))
            self.stream.flush()
        elif int(10 * frac) > self.last_decile or done == self.total:
            self.last_decile = int(10 * frac)
            self.stream.write(msg + "\n")
            self.stream.flush()


@dataclass(frozen=True)
class ScanSummary:
    """What a run did: tasks in the scan, skipped (already in the file), computed now."""

    path: str
    scan_id: str
    total: int
    skipped: int
    computed: int
    seconds: float
    workers: int = field(default=0)


def _connect(scheduler, workers, processes, timeout):
    from dask.distributed import Client, LocalCluster

    if scheduler:
        try:
            client = Client(scheduler, timeout=timeout)
        except (OSError, TimeoutError, ValueError) as e:
            reason = str(e).splitlines()[0] if str(e) else type(e).__name__
            raise QhlInputError(f"cannot reach the Dask scheduler within {timeout:g} s ({reason[:120]})",
                                key="scheduler") from None
        try:
            client.wait_for_workers(1, timeout=timeout)
        except (OSError, TimeoutError):
            client.close()
            raise QhlInputError(f"the Dask scheduler at {scheduler} has no workers after {timeout:g} s",
                                key="scheduler") from None
        return client, None
    local = LocalCluster(n_workers=workers, threads_per_worker=1, processes=processes,
                         dashboard_address=":0", silence_logs=40)
    return Client(local), local


def run_scan(definition: ScanDefinition, out, *, scheduler: str | None = None, workers: int | None = None,
             processes: bool = True, connect_timeout: float = 10.0, progress: bool = True,
             stop_after: int | None = None) -> ScanSummary:
    """Run (or resume) a scan, appending each finished task's row to the results file `out`.

    Args:
        definition: from define_scan.
        out: results CSV; created, or resumed when it holds this scan's results.
        scheduler: address of a running Dask scheduler; None starts a LocalCluster.
        workers: LocalCluster workers (default: this machine's cores); 0 runs in this process.
        processes: LocalCluster workers as processes (True) or threads of this process.
        connect_timeout: seconds to wait for `scheduler`.
        progress: show progress on stderr.
        stop_after: stop after this many new tasks (for tests and partial runs).

    Returns:
        ScanSummary.

    Raises:
        QhlInputError: a results file of another scan, an unwritable path, an unreachable scheduler.
    """
    start = time.perf_counter()
    path = Path(out)
    if workers is None:
        workers = os.cpu_count() or 1
    done = _check_results(path, definition)          # refuse a foreign file before connecting
    if all(t.task_id in done for t in definition.tasks) or stop_after == 0:
        skipped = sum(t.task_id in done for t in definition.tasks)
        return ScanSummary(str(path), definition.scan_id, len(definition.tasks), skipped, 0,
                           time.perf_counter() - start, 0)
    client = local = None
    used = 0
    try:
        if workers or scheduler:
            client, local = _connect(scheduler, workers, processes, connect_timeout)
            used = len(client.scheduler_info().get("workers", {}))
        appender = _Appender(path, definition)        # lock first, then (under it) the header
        try:
            done = _check_results(path, definition, repair=True)   # again, under the lock
            pending = [t for t in definition.tasks if t.task_id not in done]
            skipped = len(definition.tasks) - len(pending)
            if stop_after is not None:
                pending = pending[:stop_after]
            bar = _Progress(len(definition.tasks), skipped, progress)
            if client is None:
                for task in pending:
                    appender.write(run_task(task))
                    bar.step()
            else:
                from dask.distributed import as_completed

                futures = [client.submit(run_task, t, key=f"qhl-scan-{t.task_id}", pure=False) for t in pending]
                try:
                    for fut in as_completed(futures):
                        appender.write(fut.result())
                        bar.step()
                except BaseException:
                    client.cancel(futures)
                    raise
        finally:
            appender.close()
    finally:
        if client is not None:
            client.close()
        if local is not None:
            local.close()
    return ScanSummary(str(path), definition.scan_id, len(definition.tasks), skipped, bar.count,
                       time.perf_counter() - start, used)
