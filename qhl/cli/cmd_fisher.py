"""`qhl fisher`: Fisher information, Cramer-Rao bounds and learnable combinations of a cluster."""

import sys

import numpy as np

from .common import add_cluster_argument, cluster_from_args, print_json


from .common import NOISE  # range-checked option types
def register(sub):
    p = sub.add_parser("fisher", help="Fisher matrix and Cramer-Rao bounds of a cluster's experiments")
    add_cluster_argument(p)
    p.add_argument("--noise", type=NOISE, metavar="SIGMA",
                   help="noise per point of Re and Im (default: each experiment's noise)")
    p.add_argument("--free", nargs="+", default=["offset:*", "dipolar:*"], metavar="PATTERN",
                   help="free parameters as glob patterns (default: offsets and dipolar couplings)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    from .cmd_signal import add_method_arguments
    add_method_arguments(p)
    p.set_defaults(func=run)


def run(args):
    from ..exact.engine_choice import make_engine
    from ..learning.fisher_report import describe_combination, fisher_report
    from ..spins.model import build_model
    from ..base.progress import FractionProgress
    from .cmd_signal import announce_typical
    cluster = cluster_from_args(args)
    progress = FractionProgress("typical engine")
    engine, method, note = make_engine(build_model(cluster, free=args.free), args.method,
                                       replicas=args.replicas, seed=args.seed, progress=progress,
                                       precision=args.engine_precision)
    if method == "typical":
        announce_typical(cluster, note, args.replicas, len(engine.model.free))
    try:
        rep = fisher_report(cluster, free=args.free, sigma=args.noise, engine=engine)
    finally:
        progress.close()
    if rep.hidden:
        print(f"qhl: note: left out of the default free set (the signal cannot see them): "
              f"{', '.join(rep.hidden)}", file=sys.stderr)
    for u in rep.unlearnable:
        combo = describe_combination(u["combination"])
        print(f"qhl: warning: singular Fisher matrix: {combo} is unlearnable "
              f"(eigenvalue {u['eigenvalue']:.2e})", file=sys.stderr)
    if args.json:
        print_json({**rep.to_json(), "method": method})
        return 0
    print(f"cluster {cluster.name}: {len(rep.names)} free parameters, experiments "
          f"{', '.join(ex.name for ex in cluster.experiments)}")
    print(f"method: {method}" + (" (gradients estimated from random states: the Fisher matrix is an "
                                 "estimate, biased up by the gradients' variance)" if method == "typical" else ""))
    print(f"{'parameter':<20}{'value (Hz)':>14}{'CRB (Hz)':>12}{'CRB/|value|':>13}")
    for n, v, b in zip(rep.names, rep.values_hz, rep.crb_hz):
        rel = b / abs(v) if v != 0 else float("inf")
        print(f"{n:<20}{v:>14.3f}{b:>12.4g}{rel:>13.3g}")
    print()
    print("Fisher eigenvalues (1/Hz^2), the bound 1/sqrt(eigenvalue) of each combination, and its")
    print("largest components:")
    for k in range(len(rep.eigenvalues)):
        lam = rep.eigenvalues[k]
        v = rep.eigenvectors[:, k]
        top = np.argsort(-np.abs(v))[:3]
        bound = 1 / np.sqrt(lam) if lam > 0 and not rep.unlearnable_mask[k] else float("inf")
        flag = "  UNLEARNABLE" if rep.unlearnable_mask[k] else ""
        comps = " ".join(f"{v[j]:+.2f}*{rep.names[j]}" for j in top)
        print(f"  {lam:>11.4g}  {bound:>10.4g} Hz  {comps}{flag}")
    print()
    print(f"Cramer-Rao-limited relative error sqrt(sum CRB^2)/||h|| = {rep.crb_relative_error:.3e} "
          f"({100 * rep.crb_relative_error:.3g}%)")
    print(f"cut-off: {rep.rule}")
    return 0
