"""`qhl signal`: signals of a cluster's experiments (and gradients), exact or estimated."""

import sys

import numpy as np

from ..base.errors import QhlInputError
from ..base.progress import FractionProgress
from .common import SEED, add_cluster_argument, check_output_path, cluster_from_args, integer_at_least, \
    print_json, write_output


def add_method_arguments(p):
    """--method, --replicas, --seed (shared with `qhl fisher`)."""
    p.add_argument("--method", choices=("exact", "typical", "auto"), default="auto",
                   help="exact engine, typical (random pure states, with error bars), or auto "
                        "(exact when it fits in memory; default)")
    p.add_argument("--replicas", type=integer_at_least(2), default=4, metavar="R",
                   help="random states per sector pair for --method typical (default 4)")
    p.add_argument("--seed", type=SEED, default=0, help="seed of the random states (default 0)")
    p.add_argument("--engine-precision", choices=("double", "single", "fast"), default=None,
                   help="double (the exact engine's default, the reference); single: gradient products in float32; "
                        "fast: also float32 eigendecompositions (stated tolerance 1e-3 of the largest entry); the "
                        "typical engine runs float32 for both and by default (its rounding stays below 1e-4 of its "
                        "standard error), double only when asked")


def register(sub):
    p = sub.add_parser("signal", help="NMR signals of a cluster's experiments (exact or estimated)")
    add_cluster_argument(p)
    p.add_argument("--plot", metavar="FILE.png", help="write the FIDs and spectra as a PNG")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.add_argument("--gradient", action="store_true", help="add dS/dh for the free parameters")
    add_method_arguments(p)
    p.add_argument("--free", nargs="+", default=["offset:*", "dipolar:*"], metavar="PATTERN",
                   help="free parameters as glob patterns (default: offsets and dipolar couplings)")
    p.set_defaults(func=run)


def announce_typical(cluster, note, replicas, n_gradient=0):
    """Say on stderr why the typical engine runs and, from 16 spins on, about how long one signal takes."""
    if note:
        print(f"qhl: note: {note}", file=sys.stderr)
    if cluster.n_spins >= 16:
        from ..costing.classical_cost import classical_cost
        secs = next(r["seconds"] for r in classical_cost(cluster, replicas=replicas).routes
                    if r["method"] == "pure-state") * (1 + n_gradient)
        print(f"qhl: note: the typical engine needs about {secs / 60:.3g} min for the costliest experiment "
              "(estimate from `qhl classical`; optimistic on a busy machine)", file=sys.stderr)


def run(args):
    from ..exact.engine_choice import make_engine
    from ..exact.signals import compute_signals
    from ..spins.model import build_model
    cluster = cluster_from_args(args)
    if args.plot:
        check_output_path(args.plot, "--plot")
    if not cluster.experiments:
        raise QhlInputError("the cluster defines no experiments: add an [[experiment]]", source=cluster.source,
                            key="experiment")
    progress = FractionProgress("typical engine")
    model = build_model(cluster, free=args.free)
    if args.gradient and not model.free:
        raise QhlInputError(f"no parameter of {cluster.name} matches {' '.join(args.free)}: nothing to "
                            f"differentiate (parameters: {', '.join(model.names)})", key="--free")
    engine, method, note = make_engine(model, args.method,
                                       replicas=args.replicas, seed=args.seed, progress=progress,
                                       precision=args.engine_precision)
    if method == "typical":
        announce_typical(cluster, note, args.replicas, len(engine.model.free) if args.gradient else 0)
    try:
        report = compute_signals(cluster, gradient=args.gradient, engine=engine)
    finally:
        progress.close()
    if report.note:
        print(f"qhl: note: {report.note}", file=sys.stderr)
    plotted = False
    if args.plot:
        from ..exact.signal_plots import plot_signals
        plotted = write_output(args, "--plot", args.plot, lambda: plot_signals(report, args.plot))
    if args.json:
        print_json({**report.to_json(), "engine_precision": engine.precision})
        return 0
    m = report.model
    print(f"cluster {cluster.name}: {cluster.n_spins} spins, {cluster.field_tesla:g} T, observe {cluster.observe}")
    print(f"{len(m.parameters)} parameters ({len(m.free)} free)")
    if report.method == "typical":
        print(f"method: typical ({report.replicas} random states per sector pair; "
              "values are estimates, +- one standard error)")
    else:
        print("method: exact")
    print(f"{'parameter':<22}{'value (Hz)':>14}  free")
    for prm in m.parameters:
        print(f"{prm.name:<22}{prm.value_hz:>14.2f}  {'yes' if prm.name in m.free else ''}")
    print()
    typical = report.method == "typical"
    print(f"{'experiment':<14}{'points':>7}{'t_max (s)':>12}{'dip. scale':>11}{'|S(t_max)|':>12}{'min Re S':>10}"
          + (f"{'max stderr':>12}" if typical else ""))
    for ex in report.experiments:
        s = report.signals[ex.name]
        extra = ""
        if typical:
            er, ei = report.stderr[ex.name]
            extra = f"{max(er.max(), ei.max()):>12.2e}"
        print(f"{ex.name:<14}{ex.points:>7}{ex.t_max_s:>12.3g}{ex.dipolar_scale:>11.3g}"
              f"{abs(s[-1]):>12.4f}{s.real.min():>10.4f}{extra}")
    if args.gradient:
        print()
        print("largest |dS/dh| per experiment (1/Hz):")
        for ex in report.experiments:
            g = np.abs(report.gradients[ex.name]).max(axis=1)
            k = int(np.argmax(g))
            print(f"  {ex.name:<12} {m.free[k]:<20} {g[k]:.3e}")
    if plotted:
        print(f"wrote {args.plot}")
    return 0
