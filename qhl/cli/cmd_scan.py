"""`qhl scan`: learnability and ergodicity diagnostics over clusters x dipolar scales, on Dask."""

from ..survey.scan_settings import ScanSettings
from .common import (NOISE, POINTS, SCALES, SPINNING, TIMEOUT, TIME_S, WORKERS, add_report_argument, print_json,
                     report_if_asked, write_output)


def register(sub):
    p = sub.add_parser("scan", help="Fisher spectra, level statistics and D2 over clusters and dipolar scales")
    p.add_argument("clusters", nargs="+", metavar="CLUSTERS", help="cluster files (.toml or .xyz)")
    p.add_argument("--dipolar-scale", type=SCALES, required=True, metavar="A:B:N",
                   help="N dipolar scales from A to B (or one number)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="address of a running Dask scheduler (tcp://host:8786)")
    p.add_argument("--workers", type=WORKERS, metavar="N",
                   help="local Dask workers (default: this machine's cores; 0: run in this process)")
    p.add_argument("--out", required=True, metavar="RESULTS", help="results CSV (resumed if it exists)")
    p.add_argument("--plot", metavar="DIR", help="write PNG plots of the results to DIR")
    p.add_argument("--t-max", type=TIME_S, default=ScanSettings.t_max_s, metavar="SECONDS",
                   help=f"FID length (default {ScanSettings.t_max_s:g} s)")
    p.add_argument("--points", type=POINTS, default=ScanSettings.points, help="FID points (default 64)")
    p.add_argument("--noise", type=NOISE, default=ScanSettings.noise,
                   help="noise per Re/Im part relative to S(0) (default 1e-3)")
    p.add_argument("--free", nargs="+", default=list(ScanSettings.free), metavar="PATTERN",
                   help="free parameters as glob patterns (default: offsets and dipolar couplings)")
    p.add_argument("--spinning-hz", type=SPINNING, default=0.0, metavar="HZ",
                   help="spin every sample at the magic angle at this rate (default 0: static; the levels are then "
                        "Floquet quasi-energies of one rotor period)")
    p.add_argument("--timeout", type=TIMEOUT, default=10.0, metavar="SECONDS",
                   help="how long to wait for --scheduler (default 10 s)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    add_report_argument(p)
    p.set_defaults(func=run)


def _check_plot_folder(folder):
    """Refuse --plot DIR before the scan runs: DIR must be a writable folder or creatable in one."""
    import os
    from pathlib import Path

    from ..base.errors import QhlInputError

    d = Path(folder)
    if d.exists() and not d.is_dir():
        raise QhlInputError(f"'{folder}' exists and is not a folder", key="--plot")
    parent = d if d.is_dir() else (d.parent if str(d.parent) else Path("."))
    if not parent.is_dir():
        raise QhlInputError(f"cannot create '{folder}': folder '{parent}' does not exist", key="--plot")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise QhlInputError(f"cannot write in '{parent}'", key="--plot")


def run(args):
    from ..survey.scan import define_scan, parse_scale_range, read_results, run_scan
    if args.plot:
        _check_plot_folder(args.plot)
    settings = ScanSettings(t_max_s=args.t_max, points=args.points, noise=args.noise, free=tuple(args.free),
                            spinning_hz=args.spinning_hz)
    definition = define_scan(args.clusters, parse_scale_range(args.dipolar_scale), settings)
    summary = run_scan(definition, args.out, scheduler=args.scheduler, workers=args.workers,
                       connect_timeout=args.timeout)
    plots = []
    if args.plot:
        from ..survey.scan_plots import plot_scan
        write_output(args, "--plot", args.plot, lambda: plots.extend(
            str(p) for p in plot_scan(read_results(args.out)[1], args.plot, spinning_hz=args.spinning_hz)))
    report = {"results": summary.path, "scan_id": summary.scan_id, "tasks": summary.total,
              "skipped": summary.skipped, "computed": summary.computed, "seconds": summary.seconds,
              "workers": summary.workers, "plots": plots}
    report_if_asked(args, "scan", report, ", ".join(args.clusters), scan_results=args.out)
    if args.json:
        print_json(report)
        return 0
    print(f"scan {summary.scan_id}: {summary.total} tasks, {summary.skipped} already done, "
          f"{summary.computed} computed in {summary.seconds:.1f} s")
    print(f"results: {summary.path}")
    for p in plots:
        print(f"wrote {p}")
    return 0
