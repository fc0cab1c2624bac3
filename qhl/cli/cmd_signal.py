"""`qhl signal`: exact signals of a cluster's experiments (and gradients)."""

import numpy as np

from .common import add_cluster_argument, check_output_path, cluster_from_args, print_json


def register(sub):
    p = sub.add_parser("signal", help="exact NMR signals of a cluster's experiments")
    add_cluster_argument(p)
    p.add_argument("--plot", metavar="FILE.png", help="write the FIDs and spectra as a PNG")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.add_argument("--gradient", action="store_true", help="add exact dS/dh for the free parameters")
    p.add_argument("--free", nargs="+", default=["offset:*", "dipolar:*"], metavar="PATTERN",
                   help="free parameters as glob patterns (default: offsets and dipolar couplings)")
    p.set_defaults(func=run)


def run(args):
    from ..exact.signals import compute_signals
    cluster = cluster_from_args(args)
    if args.plot:
        check_output_path(args.plot, "--plot")
    report = compute_signals(cluster, free=args.free, gradient=args.gradient)
    if args.plot:
        from ..exact.signal_plots import plot_signals
        plot_signals(report, args.plot)
    if args.json:
        print_json(report.to_json())
        return 0
    m = report.model
    print(f"cluster {cluster.name}: {cluster.n_spins} spins, {cluster.field_tesla:g} T, observe {cluster.observe}")
    print(f"{len(m.parameters)} parameters ({len(m.free)} free)")
    print(f"{'parameter':<22}{'value (Hz)':>14}  free")
    for prm in m.parameters:
        print(f"{prm.name:<22}{prm.value_hz:>14.2f}  {'yes' if prm.name in m.free else ''}")
    print()
    print(f"{'experiment':<14}{'points':>7}{'t_max (s)':>12}{'dip. scale':>11}{'|S(t_max)|':>12}{'min Re S':>10}")
    for ex in report.experiments:
        s = report.signals[ex.name]
        print(f"{ex.name:<14}{ex.points:>7}{ex.t_max_s:>12.3g}{ex.dipolar_scale:>11.3g}"
              f"{abs(s[-1]):>12.4f}{s.real.min():>10.4f}")
    if args.gradient:
        print()
        print("largest |dS/dh| per experiment (1/Hz):")
        for ex in report.experiments:
            g = np.abs(report.gradients[ex.name]).max(axis=1)
            k = int(np.argmax(g))
            print(f"  {ex.name:<12} {m.free[k]:<20} {g[k]:.3e}")
    if args.plot:
        print(f"wrote {args.plot}")
    return 0
