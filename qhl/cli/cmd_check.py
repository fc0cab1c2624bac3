"""`qhl check`: emulated gradients (and Hessian entries) against exact and Trotterised ones."""

import sys

from .common import add_cluster_argument, add_report_argument, check_output_path, cluster_from_args, print_json, \
    report_if_asked, write_output
from .common import PROBABILITY, SEED, SHOTS, STEPS, TIME_S, number_in  # range-checked option types
from ..base.files import save_figure

CIRCUITS = number_in(1, 10**6, integer=True, name="circuits per job")
PUB_SHOTS = number_in(1, 10**9, integer=True, name="shots per PUB")

def register(sub):
    p = sub.add_parser("check", help="check shot-based emulated gradients against exact ones")
    add_cluster_argument(p)
    p.add_argument("--time", type=TIME_S, required=True, metavar="T", help="evolution time in seconds (> 0)")
    p.add_argument("--steps", type=STEPS, required=True, metavar="R", help="Trotter steps")
    p.add_argument("--shots", type=SHOTS, required=True, metavar="N", help="shots per part (Re, Im) of each estimate")
    p.add_argument("--seed", type=SEED, default=0, metavar="S", help="random seed (default 0)")
    p.add_argument("--noise", type=PROBABILITY, default=0.0, metavar="P",
                   help="depolarising rate on sx, x, cx and readout flip probability, in [0, 1)")
    p.add_argument("--device", metavar="NAME",
                   help="emulate on an offline fake backend's noise model through SamplerV2 and compare with the "
                        "exact value times the attenuation predicted from its calibrated error rates")
    p.add_argument("--max-circuits", type=CIRCUITS, metavar="N",
                   help="with --device: at most N bound circuits per sampler job (default: one job per group of 8 families)")
    p.add_argument("--shots-per-pub", type=PUB_SHOTS, metavar="N",
                   help="with --device: a fixed shot count N per PUB (default: one PUB per distinct shot count)")
    p.add_argument("--target", default="all-to-all", metavar="NAME",
                   help="also report routed counts of the checked circuits for a target: line, ring, grid, "
                        "heavy-hex or an offline fake backend (default all-to-all: none)")
    p.add_argument("--hessian", action="store_true", help="also check every Hessian entry m <= n")
    p.add_argument("--param", nargs="+", metavar="NAME", help="parameters (default: free offsets and dipolar)")
    p.add_argument("--experiment", metavar="NAME", help="experiment setting the dipolar scale (default: first)")
    p.add_argument("--order", type=int, choices=(1, 2), default=1, help="product-formula order (default 1)")
    p.add_argument("--plot", metavar="FILE.png", help="draw emulated vs exact with error bars")
    p.add_argument("--json", action="store_true", help="print one JSON object (rows, status, verdict, totals)")
    add_report_argument(p)
    p.set_defaults(func=run)


class _Bars:
    """Progress lines (qhl.base.progress) for the reference sweep and the emulated rows."""

    def __init__(self):
        self.bars = {}

    def _bar(self, key, label, total):
        from ..base.progress import Progress
        if key not in self.bars:
            self.bars[key] = Progress(label, total)
        return self.bars[key]

    def reference(self, done, total):
        self._bar("reference", "Trotterised reference (slots)", total).update(done)

    def rows(self, done, total, label):
        self._bar("rows", "emulated derivatives", total).update(done, label[:40])


def check_figure(report, title):
    """Emulated vs exact derivatives with error bars; the legend sits right of the axes, off the data."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    rows = report.rows
    fig, ax = plt.subplots(figsize=(max(6, 0.35 * len(rows)) + 2.5, 4.2))
    x = range(len(rows))
    ax.errorbar(x, [r["emulated"] for r in rows], yerr=[r["stderr"] for r in rows], fmt="o", ms=3,
                label="emulated +- stderr")
    ax.plot(x, [r["trotter_exact"] for r in rows], "x", label="exact Trotterised")
    ax.plot(x, [r["exact"] for r in rows], "+", label="exact (continuous)")
    ax.axhline(0.0, color="0.7", lw=0.8)
    ax.set_xticks(list(x), [f"{r['parameter']} {r['part']}" for r in rows], rotation=90, fontsize=6)
    ax.set_ylabel("derivative of S (1/Hz or 1/Hz^2)")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0)
    fig.tight_layout()
    return fig


def _number(value, width, spec):
    """value formatted to `spec` in `width` columns, or 'n/a' where it is undefined (NaN, None)."""
    ok = value is not None and value == value
    return f"{value:>{width}{spec}}" if ok else f"{'n/a':>{width}}"


def _plot(report, path, title):
    import matplotlib.pyplot as plt
    fig = check_figure(report, title)
    save_figure(fig, path, dpi=120, bbox_inches="tight")
    plt.close(fig)


def run(args):
    from ..emulation.check import ATTENUATION_MODEL, BIAS_RULE, DEVICE_RULE, POWER_RULE, check_derivatives
    from ..emulation.noise import NoiseSpec
    from ..base.errors import QhlInputError
    if args.shots < 1:
        raise QhlInputError(f"expected shots >= 1, got {args.shots}", key="--shots")
    if args.steps < 1:
        raise QhlInputError(f"expected steps >= 1, got {args.steps}", key="--steps")
    noise = NoiseSpec(args.noise, args.noise)
    noise = None if noise.is_noiseless else noise
    device = getattr(args, "device", None)
    sampler_options = None
    if device is not None:
        if noise is not None:
            raise QhlInputError("--device brings the device's noise model: leave out --noise", key="--device")
        sampler_options = {"max_circuits": args.max_circuits, "shots_per_pub": getattr(args, "shots_per_pub", None)}
    elif getattr(args, "max_circuits", None) is not None:
        raise QhlInputError("--max-circuits applies to --device runs only", key="--max-circuits")
    elif getattr(args, "shots_per_pub", None) is not None:
        raise QhlInputError("--shots-per-pub applies to --device runs only", key="--shots-per-pub")
    target = getattr(args, "target", "all-to-all")
    if target != "all-to-all":
        from ..circuits.targets import resolve_target
        resolve_target(target, 1, key="--target")           # an unknown name fails before any work
    if args.plot:
        check_output_path(args.plot, "--plot")
    cluster = cluster_from_args(args)
    bars = _Bars()
    report = check_derivatives(cluster, args.time, args.steps, args.shots, args.seed, noise, args.hessian,
                               args.param, args.experiment, args.order, progress=bars.rows,
                               reference_progress=bars.reference, device=device, sampler_options=sampler_options,
                               target=target)
    if report.steps > args.steps:
        print(f"qhl: note: --steps {args.steps} raised to {report.steps} by the rotor rule (8 steps per rotor "
              f"period of the spinning experiment)", file=sys.stderr)
    if report.interrupted:
        print(f"\nqhl check: interrupted; {len(report.rows)} of {report.planned} rows finished", file=sys.stderr)
    plotted = bool(args.plot and report.rows) and write_output(args, "--plot", args.plot, lambda: _plot(
        report, args.plot, f"qhl check {cluster.name}: t = {report.time_s:g} s, r = {report.steps}, "
                           f"{args.shots} shots per part; {report.status.upper()}"))
    report_if_asked(args, "check", report.to_json(), cluster.name, figures=[(
        "emulated derivatives (error bars: one standard error) against the exact and Trotterised values",
        lambda: check_figure(report, f"qhl check {cluster.name}: {report.status.upper()}"))] if report.rows else [])
    for w in report.warnings():
        print(f"qhl: warning: {w}", file=sys.stderr)
    if args.json:
        print_json(report.to_json())
        return 130 if report.interrupted else 0
    print(f"cluster {cluster.name}: t = {report.time_s:g} s, r = {report.steps} steps, {args.shots} shots per part, "
          f"seed {args.seed}, " + (f"device {report.device} (reference: trotter x predicted attenuation)"
                                   if device else f"noise {args.noise:g}"))
    head = (f"{'parameter':<28}{'part':>5}{'exact':>13}{'trotter':>13}{'emulated':>13}{'stderr':>11}"
            f"{'z':>7}{'bias':>11}  flags")
    print(head)
    for r in report.rows:
        flags = ("" if r["power"] else " no-power") + (" BIAS>VALUE" if r["bias_exceeds_value"] else "") \
            + (" SIGN-FLIP" if r["sign_flip"] else "")
        print(f"{r['parameter']:<28}{r['part']:>5}{r['exact']:>13.4e}{r['trotter_exact']:>13.4e}"
              f"{r['emulated']:>13.4e}{_number(r['stderr'], 11, '.2e')}{_number(r['z'], 7, '.2f')}"
              f"{r['trotter_bias']:>11.2e} {flags}")
    if device and report.rows:
        print(f"{'parameter':<28}{'part':>5}{'predicted':>13}{'attenuation':>13}{'measured att.':>15}{'2q gates':>10}")
        for r in report.rows:
            print(f"{r['parameter']:<28}{r['part']:>5}{r['predicted']:>13.4e}{r['attenuation']:>13.4f}"
                  f"{r['measured_attenuation']:>9.3f} +- {r['measured_attenuation_stderr']:<5.3f}"
                  f"{r['two_qubit_gates']:>8d}")
        print(f"attenuation model: {ATTENUATION_MODEL}")
        print(f"test: {DEVICE_RULE}")
    if report.routing:
        print(f"routed for {report.target} (preset pass manager; layout circuit qubit -> physical, spins first)")
        print(f"{'parameter':<28}{'2q all-to-all':>14}{'2q routed':>11}{'depth':>8}{'swaps':>7}{'2q/step':>9}  layout")
        for r in report.routing:
            w, st = r["whole"], r["per_step"]
            lay = " ".join(f"{i}->{q}" for i, q in enumerate(w["layout"]))
            print(f"{r['parameter']:<28}{r['all_to_all_two_qubit']:>14}{w['two_qubit']:>11}{w['depth']:>8}"
                  f"{w['swaps']:>7}{st['two_qubit']:>9}  {lay} ({w['two_qubit_gate']}, {w['layout_method']})")
    print(f"shots {report.shots}, circuits run {report.circuits_run}, {report.seconds:.1f} s")
    print(report.verdict())
    if report.biased or report.without_power:
        print(f"flags: no-power = a row that fails the power test ({POWER_RULE}); {BIAS_RULE}")
    if plotted:
        print(f"wrote {args.plot}")
    return 130 if report.interrupted else 0
