"""Helpers shared by the CLI commands: cluster argument, JSON output, output paths."""

import json
import math
from pathlib import Path
import sys

import numpy as np

from ..spins.cluster import (MAX_DIPOLAR_SCALE, MAX_FIELD_TESLA, MAX_POINTS, MAX_SPINNING_HZ, MAX_SPINS,
                             MAX_T_MAX_S, NOISE_RANGE)
from ..circuits import MAX_BUILT_STEPS
from ..spins.cluster_file import demo_cluster, load_cluster
from ..base.errors import QhlInputError

__all__ = ["add_cluster_argument", "cluster_from_args", "print_json", "check_output_path",
           "positive_float", "positive_int", "integer_at_least", "number_in", "range_text", "SEED", "SHOTS",
           "STEPS", "ITERATIONS", "TIME_S", "PRECISION", "NOISE", "PROBABILITY", "FIELD_T", "POINTS", "SWEEP",
           "CYCLE_TIME", "FAILURE", "TROTTER_EPS", "CLUSTER_SIZE", "CENTRES", "RADIUS", "SHIFT_SPREAD",
           "START_OFFSET", "SCALES", "WORKERS", "TIMEOUT", "MAX_STEPS", "check_steps", "add_report_argument",
           "report_if_asked"]


def add_cluster_argument(parser):
    parser.add_argument("cluster", nargs="?", default=None, metavar="CLUSTER",
                        help="cluster file (.toml or .xyz); the built-in demo cluster when omitted")


def cluster_from_args(args):
    return demo_cluster() if args.cluster is None else load_cluster(args.cluster)


def _plain(obj):
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _plain(obj.tolist())
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        return v if math.isfinite(v) else (None if math.isnan(v) else ("inf" if v > 0 else "-inf"))
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj


def print_json(obj, stream=None):
    """Print one JSON object (numpy values converted; inf as the string "inf")."""
    json.dump(_plain(obj), stream or sys.stdout, indent=1)
    (stream or sys.stdout).write("\n")


def check_output_path(path, option):
    """Refuse an output path whose folder does not exist or cannot be written."""
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise QhlInputError(f"cannot write '{path}': folder '{parent}' does not exist", key=option)
    if option == "--plot":
        _check_figure_format(p)
    try:
        with open(p, "ab"):
            pass
    except OSError as e:
        raise QhlInputError(f"cannot write '{path}': {e.strerror}", key=option) from None
    return p


def _check_figure_format(p: Path) -> None:
    """A --plot file must end in a format matplotlib writes (.png, .pdf, .svg, ...), checked before any work."""
    from matplotlib.backend_bases import FigureCanvasBase
    formats = FigureCanvasBase.get_supported_filetypes()
    suffix = p.suffix.lower().lstrip(".")
    if suffix and suffix not in formats:                  # no suffix: PNG (qhl.base.files.save_figure)
        raise QhlInputError(f"cannot write a figure to '{p}': expected a file ending in "
                            f"{', '.join('.' + f for f in ('png', 'pdf', 'svg') if f in formats)} (or another "
                            f"format matplotlib writes: {', '.join(sorted(formats))})", key="--plot")


def _report_path(text):
    """An argparse type: an HTML file whose folder exists and can be written (checked before the run)."""
    import argparse
    try:
        check_output_path(text, "--report")
    except QhlInputError as e:
        raise argparse.ArgumentTypeError(" ".join(str(e).split()).removeprefix("--report: ")) from None
    return text


def add_report_argument(parser):
    """`--report FILE.html`: one self-contained HTML report of the run (qhl.report)."""
    parser.add_argument("--report", type=_report_path, metavar="FILE.html",
                        help="also write one self-contained HTML report: tables, plots, assumptions with "
                             "sources, command line, versions and the --json data")


def write_output(args, option, path, write) -> bool:
    """Run `write()`, one file output of the command (a plot, a report, a QASM file).

    A failing write (a full disk, a device that refuses data) is reported in one line naming the
    option and the file, and makes the exit code 2 at the end of the run; the run goes on, so what
    is already computed still reaches the screen or --json. Returns whether the file was written."""
    try:
        write()
    except OSError as e:
        print(f"qhl: error: {option}: could not write '{path}': {e.strerror or e}", file=sys.stderr)
        args.failed_writes = [*getattr(args, "failed_writes", []), str(path)]
        return False
    return True


def report_if_asked(args, command, data, subject=None, **plots):
    """With --report: write the report of `data` (the dictionary --json prints) and name the file on stderr.

    `plots`: result objects the command already holds, passed to qhl.report.write_report.
    """
    if not getattr(args, "report", None):
        return None
    from ..report import write_report
    argv = getattr(args, "argv", None)
    if not write_output(args, "--report", args.report, lambda: write_report(
            args.report, command, _plain(data), argv=sys.argv[1:] if argv is None else argv, subject=subject,
            **plots)):
        return None
    path = Path(args.report)                 # what write_report wrote to
    print(f"qhl: wrote the report {path}", file=sys.stderr)
    return path


def number_in(low=None, high=None, *, low_open=False, high_open=False, integer=False, name=None):
    """An argparse type: a finite number (or an integer, also written 1e6) within [low, high].

    Open ends with `low_open` / `high_open`. The message names the range and the text given, e.g.
    "argument --seed: expected an integer in [0, 9,223,372,036,854,775,807], got '-1'".
    """
    import argparse

    g = (lambda x: f"{x:,}") if integer else (lambda x: f"{x:g}")
    what = "an integer" if integer else "a number"
    if low is not None and high is not None:
        rng = f" in {'(' if low_open else '['}{g(low)}, {g(high)}{')' if high_open else ']'}"
    elif low is not None:
        rng = f" {'>' if low_open else '>='} {g(low)}"
    else:
        rng = f" {'<' if high_open else '<='} {g(high)}" if high is not None else ""

    def parse(text):
        shown = text if len(text) <= 40 else text[:24] + f"... ({len(text)} characters)"
        try:
            if integer:
                try:
                    v = int(text)
                except ValueError:
                    f = float(text)
                    if not (math.isfinite(f) and f.is_integer()):
                        raise ValueError from None
                    v = int(f)
            else:
                v = float(text)
        except (ValueError, OverflowError):
            raise argparse.ArgumentTypeError(f"expected {what}{rng}, got {shown!r}") from None
        bad = not integer and not math.isfinite(v)
        if not bad and low is not None:
            bad = v <= low if low_open else v < low
        if not bad and high is not None:
            bad = v >= high if high_open else v > high
        if bad:
            raise argparse.ArgumentTypeError(f"expected {what}{rng}, got {shown!r}")
        return v

    parse.__name__ = name or ("integer" if integer else "number")
    return parse


def positive_float(text):
    """An argparse type: a finite number > 0 (no upper bound; prefer a `number_in` range)."""
    return number_in(0, None, low_open=True)(text)


def integer_at_least(minimum: int):
    """An argparse type: an integer >= `minimum` (no upper bound; prefer a `number_in` range)."""
    return number_in(minimum, None, integer=True)


def range_text(max_count: int, low=None, high=None):
    """An argparse type for 'A:B:N' (or one number): checked here, returned as the text given.

    A and B finite (within [low, high] when given), N an integer in [1, max_count].
    """
    import argparse

    def parse(text):
        parts = text.split(":")
        shown = text if len(text) <= 40 else text[:24] + "..."
        lim = "" if low is None else f", A and B in [{low:g}, {high:g}]"
        msg = f"expected A:B:N with N an integer in [1, {max_count:,}]{lim}, got {shown!r}"
        try:
            values = [float(x) for x in parts[:2]]
            n = int(parts[2]) if len(parts) == 3 else 1
        except (ValueError, OverflowError):
            raise argparse.ArgumentTypeError(msg) from None
        if len(parts) not in (1, 3) or not 1 <= n <= max_count or not all(math.isfinite(v) for v in values):
            raise argparse.ArgumentTypeError(msg)
        if low is not None and not all(low <= v <= high for v in values):
            raise argparse.ArgumentTypeError(msg)
        return text

    parse.__name__ = "range"
    return parse


# Ranges of the command-line numbers (the reasons are stated once, here).
SEED = number_in(0, 2**63 - 1, integer=True, name="seed")              # numpy seeds are non-negative
SHOTS = number_in(1, 10**8, integer=True, name="shots")                # 1e8 shots: minutes of emulation
MAX_STEPS = MAX_BUILT_STEPS           # Trotter steps of one built circuit (the reason: qhl.circuits)
STEPS = number_in(1, MAX_STEPS, integer=True, name="steps")


def check_steps(steps, option):
    """Refuse a derived Trotter step count above MAX_STEPS (the circuit would not be built in reasonable time)."""
    if steps > MAX_STEPS:
        raise QhlInputError(f"needs {steps:,} Trotter steps; at most {MAX_STEPS:,} are built into one circuit: "
                            f"choose a larger EPS or a shorter --time", key=option)
    return steps
ITERATIONS = number_in(1, 10**6, integer=True, name="iterations")
TIME_S = number_in(0, MAX_T_MAX_S, low_open=True, name="time")         # as t_max_s of a cluster file
PRECISION = number_in(1e-9, 1, high_open=True, name="precision")       # per kHz; below 1e-9 shots overflow
NOISE = number_in(*NOISE_RANGE, name="noise")                          # as noise of a cluster file
PROBABILITY = number_in(0, 1, high_open=True, name="probability")
FIELD_T = number_in(0, MAX_FIELD_TESLA, low_open=True, name="field")   # as field_tesla of a cluster file
POINTS = number_in(2, MAX_POINTS, integer=True, name="points")         # as points of a cluster file
SWEEP = range_text(1000)                                               # a sweep grid of at most 1000 values
CYCLE_TIME = number_in(0, 1, low_open=True, name="cycle time")         # seconds per surface-code cycle
FAILURE = number_in(0, 1, low_open=True, high_open=True, name="failure probability")
TROTTER_EPS = number_in(1e-6, 1, high_open=True, name="eps")           # Trotter error target (a bound > 1 says nothing)
CLUSTER_SIZE = number_in(2, MAX_SPINS, integer=True, name="size")      # as the spin count of a cluster file
CENTRES = number_in(1, 10**6, integer=True, name="centres")
RADIUS = number_in(0, 1e3, low_open=True, name="radius")               # angstrom
SHIFT_SPREAD = number_in(0, 1e3, name="shift spread")                  # ppm (chemical shifts span < 1000 ppm)
START_OFFSET = number_in(0, 10, name="relative start offset")
SCALES = range_text(10_000, -MAX_DIPOLAR_SCALE, MAX_DIPOLAR_SCALE)    # dipolar scales as in a cluster file
SPINNING = number_in(0, MAX_SPINNING_HZ, name="spinning_hz")          # rotor rate in Hz, as in a cluster file
AXIS_VALUES = range_text(10_000, -MAX_SPINNING_HZ, MAX_SPINNING_HZ)  # any control axis; checked per axis later
WORKERS = number_in(0, 1024, integer=True, name="workers")
TIMEOUT = number_in(0, 86400, low_open=True, name="timeout")           # seconds


positive_int = integer_at_least(1)
