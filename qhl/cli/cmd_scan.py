"""`qhl scan`: learnability and ergodicity diagnostics over clusters x dipolar scales, on Dask."""

from ..survey.scan_settings import ScanSettings
from .common import integer_at_least, positive_float, positive_int, print_json


_workers = integer_at_least(0)


def register(sub):
    p = sub.add_parser("scan", help="Fisher spectra, level statistics and D2 over clusters and dipolar scales")
    p.add_argument("clusters", nargs="+", metavar="CLUSTERS", help="cluster files (.toml or .xyz)")
    p.add_argument("--dipolar-scale", required=True, metavar="A:B:N",
                   help="N dipolar scales from A to B (or one number)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="address of a running Dask scheduler (tcp://host:8786)")
    p.add_argument("--workers", type=_workers, metavar="N",
                   help="local Dask workers (default: this machine's cores; 0: run in this process)")
    p.add_argument("--out", required=True, metavar="RESULTS", help="results CSV (resumed if it exists)")
    p.add_argument("--plot", metavar="DIR", help="write PNG plots of the results to DIR")
    p.add_argument("--t-max", type=positive_float, default=ScanSettings.t_max_s, metavar="SECONDS",
                   help=f"FID length (default {ScanSettings.t_max_s:g} s)")
    p.add_argument("--points", type=positive_int, default=ScanSettings.points, help="FID points (default 64)")
    p.add_argument("--noise", type=positive_float, default=ScanSettings.noise,
                   help="noise per Re/Im part relative to S(0) (default 1e-3)")
    p.add_argument("--free", nargs="+", default=list(ScanSettings.free), metavar="PATTERN",
                   help="free parameters as glob patterns (default: offsets and dipolar couplings)")
    p.add_argument("--timeout", type=positive_float, default=10.0, metavar="SECONDS",
                   help="how long to wait for --scheduler (default 10 s)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=run)


def run(args):
    from ..survey.scan import define_scan, parse_scale_range, read_results, run_scan
    settings = ScanSettings(t_max_s=args.t_max, points=args.points, noise=args.noise, free=tuple(args.free))
    definition = define_scan(args.clusters, parse_scale_range(args.dipolar_scale), settings)
    summary = run_scan(definition, args.out, scheduler=args.scheduler, workers=args.workers,
                       connect_timeout=args.timeout)
    plots = []
    if args.plot:
        from ..survey.scan_plots import plot_scan
        plots = [str(p) for p in plot_scan(read_results(args.out)[1], args.plot)]
    report = {"results": summary.path, "scan_id": summary.scan_id, "tasks": summary.total,
              "skipped": summary.skipped, "computed": summary.computed, "seconds": summary.seconds,
              "workers": summary.workers, "plots": plots}
    if args.json:
        print_json(report)
        return 0
    print(f"scan {summary.scan_id}: {summary.total} tasks, {summary.skipped} already done, "
          f"{summary.computed} computed in {summary.seconds:.1f} s")
    print(f"results: {summary.path}")
    for p in plots:
        print(f"wrote {p}")
    return 0
