"""`qhl classical`: what exact classical simulation of a cluster would cost (memory, time), and the
cluster size from which it exceeds a day or 1 TiB."""

from .common import add_cluster_argument, cluster_from_args, integer_at_least, print_json


def register(sub):
    p = sub.add_parser("classical", help="memory and time of exact classical simulation of a cluster")
    add_cluster_argument(p)
    p.add_argument("--replicas", type=integer_at_least(2), default=4, metavar="R",
                   help="random states for the pure-state route (default 4)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=run)


def _human_seconds(s):
    for unit, size in (("years", 3.156e7), ("days", 86400.0), ("h", 3600.0), ("min", 60.0)):
        if s >= size:
            return f"{s / size:.3g} {unit}"
    return f"{s:.3g} s"


def run(args):
    from ..costing.classical_cost import classical_cost
    cluster = cluster_from_args(args)
    cost = classical_cost(cluster, replicas=args.replicas)
    if args.json:
        print_json({"cluster": cluster.name, "spins": cluster.n_spins, "classical": cost.to_json()})
        return 0
    print(f"cluster {cluster.name}: {cluster.n_spins} spins, {cost.couplings_per_spin:.2f} flip-flop couplings per spin")
    print(f"{'route':<20}{'memory (GiB)':>14} {'time':>16}  feasible here")
    for r in cost.routes:
        mark = " (best)" if r["method"] == cost.method else ""
        print(f"{r['method']:<20}{r['memory_bytes'] / 2**30:>14.3g} {_human_seconds(r['seconds']):>16}  "
              f"{'yes' if r['feasible_here'] else 'no'}{mark}")
    cross = cost.crossover_spins
    print("classical simulation exceeds a day and 1 TiB from "
          + (f"{cross} spins" if cross else "more than 80 spins") + " at this coupling density")
    print("estimates; assumptions:")
    for a in cost.assumptions:
        print(f"  - {a}")
    return 0
