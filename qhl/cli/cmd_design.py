"""`qhl design`: Fisher-optimal shares of shots (or T gates) over candidate experiments; `--map AXIS`:
the learnability map of one cluster over a control axis (qhl.learning.design, qhl.survey.learnability_map)."""

import sys

from ..spins.sequences import NAMED_SEQUENCES
from .common import (AXIS_VALUES, NOISE, POINTS, PRECISION, SCALES, TIME_S, TROTTER_EPS, add_cluster_argument,
                     add_report_argument, check_output_path, cluster_from_args, number_in, print_json,
                     report_if_asked, write_output)

_CRITERIA = ("D", "A", "worst")
_BUDGET = number_in(0, 1e30, low_open=True, name="budget")
_TIME_POINTS = number_in(1, 10_000, integer=True, name="time points")
_NONNEG = number_in(0, 1e300, name="threshold")
_WINDOWS = "A:B:N"
_AXES = ("dipolar_scale", "spinning_hz", "cycle_time_s")
_DEFAULT_VALUES = {"dipolar_scale": "0:1:6", "spinning_hz": "0:40000:6", "cycle_time_s": "1e-5:2e-4:5"}


def register(sub):
    p = sub.add_parser("design", help="optimal shares of shots over candidate experiments (D, A or worst "
                                      "Cramer-Rao), or a learnability map over a control axis (--map)")
    add_cluster_argument(p)
    p.add_argument("--criterion", choices=_CRITERIA, default="D",
                   help="D: log det of the Fisher matrix; A: sum of Cramer-Rao variances; worst: the largest "
                        "Cramer-Rao variance of --parameters (default D)")
    p.add_argument("--parameters", nargs="+", metavar="PATTERN",
                   help="parameters the A and worst criteria look at (glob; default all free)")
    p.add_argument("--per", choices=("shot", "point", "t-count"), default="shot",
                   help="share a budget of shots, of sampled points (fair when --time-points competes with "
                        "whole acquisitions), or of fault-tolerant T gates (default shot)")
    p.add_argument("--budget", type=_BUDGET, metavar="N",
                   help="total shots, points or T gates (default: what the file's experiments spend, one shot each)")
    p.add_argument("--scales", type=SCALES, metavar="A:B:N",
                   help="generated candidates at N dipolar scales from A to B (times every --windows)")
    p.add_argument("--windows", type=SCALES, metavar="A:B:N",
                   help="generated candidates with N acquisition windows t_max from A to B seconds")
    p.add_argument("--points", type=POINTS, metavar="N", help="points of generated candidates "
                                                             "(default the file's largest)")
    p.add_argument("--time-points", type=_TIME_POINTS, metavar="N",
                   help="split each candidate into N single-time candidates (t_max/N ... t_max)")
    p.add_argument("--no-file", action="store_true", help="leave the file's experiments out of the candidates "
                                                          "(they stay the current set)")
    p.add_argument("--noise", type=NOISE, metavar="SIGMA", help="noise per point of Re and Im (default: each "
                                                                 "experiment's noise)")
    p.add_argument("--free", nargs="+", default=["offset:*", "dipolar:*"], metavar="PATTERN",
                   help="free parameters as glob patterns (default: offsets and dipolar couplings)")
    p.add_argument("--trotter-eps", type=TROTTER_EPS, default=1e-3, metavar="EPS",
                   help="Trotter error of each circuit, for --per t-count (default 1e-3)")
    p.add_argument("--synthesis-eps", type=TROTTER_EPS, default=1e-4, metavar="EPS",
                   help="rotation-synthesis error of each circuit, for --per t-count (default 1e-4)")
    p.add_argument("--show", type=_TIME_POINTS, default=20, metavar="N", help="candidates shown in the table "
                                                                             "(default 20)")
    m = p.add_argument_group("learnability map (--map)")
    m.add_argument("--map", choices=_AXES, metavar="AXIS",
                   help="map learnability, ergodicity and costs over this control axis (dipolar_scale; spinning_hz: "
                        "a magic-angle rotor, 0 = static; cycle_time_s: the cycle time of --sequence, sampled once "
                        "per cycle)")
    m.add_argument("--values", type=AXIS_VALUES, default=None, metavar="A:B:N",
                   help="axis values (default 0:1:6 for dipolar_scale, 0:40000:6 Hz for spinning_hz, "
                        "1e-5:2e-4:5 s for cycle_time_s)")
    m.add_argument("--sequence", choices=sorted(NAMED_SEQUENCES), default=None, metavar="NAME",
                   help=f"the cycle of --map cycle_time_s: {', '.join(sorted(NAMED_SEQUENCES))} (default wahuha)")
    m.add_argument("--t-max", type=TIME_S, default=5e-4, metavar="SECONDS",
                   help="FID length, or the window the cycles fill (default 5e-4 s)")
    m.add_argument("--map-points", type=POINTS, default=64, metavar="N", help="FID points (default 64)")
    m.add_argument("--map-noise", type=NOISE, default=1e-3, metavar="SIGMA", help="FID noise (default 1e-3)")
    m.add_argument("--precision", type=PRECISION, default=0.01, metavar="EPS",
                   help="fault-tolerant gradient-component precision per kHz (default 0.01)")
    m.add_argument("--max-median-crb", type=_NONNEG, default=10.0, metavar="HZ",
                   help="learnable: median Cramer-Rao bound at most this (default 10 Hz)")
    m.add_argument("--max-softest-bound", type=_NONNEG, default=100.0, metavar="HZ",
                   help="learnable: 1/sqrt(smallest Fisher eigenvalue) at most this (default 100 Hz)")
    m.add_argument("--hard-seconds", type=_NONNEG, default=86400.0, metavar="S",
                   help="classically hard: best classical route above this time (default a day)")
    m.add_argument("--hard-memory", type=_NONNEG, default=float(2 ** 40), metavar="BYTES",
                   help="classically hard: or above this memory (default 1 TiB)")
    m.add_argument("--max-t-count", type=_NONNEG, default=1e12, metavar="T",
                   help="affordable: fault-tolerant T-count at most this (default 1e12)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    add_report_argument(p)
    p.add_argument("--plot", metavar="FILE.png", help="write a PNG of the design (or of the map)")
    p.set_defaults(func=run)


def _say(msg):
    print(f"qhl design: {msg}", file=sys.stderr, flush=True)


def _grid(text):
    from ..survey.scan import parse_scale_range
    return () if text is None else parse_scale_range(text)


def _axis_grid(text):
    """'A:B:N' (checked by AXIS_VALUES) -> N values from A to B; one number -> (A,). Ranges per axis are
    checked by the experiment (qhl.spins.cluster.check_experiment)."""
    import numpy as np
    parts = text.split(":")
    if len(parts) == 1:
        return (float(parts[0]),)
    return tuple(float(x) for x in np.linspace(float(parts[0]), float(parts[1]), int(parts[2])))


def run(args):
    cluster = cluster_from_args(args)
    if args.plot:
        check_output_path(args.plot, "--plot")
    if args.map:
        return _run_map(args, cluster)
    from ..learning.design import design_experiments
    rep = design_experiments(cluster, criterion=args.criterion, per=args.per.replace("-", "_"), budget=args.budget,
                             free=args.free, parameters=args.parameters, dipolar_scales=_grid(args.scales),
                             windows_s=_grid(args.windows), points=args.points, noise=args.noise,
                             time_points=args.time_points, include_file=not args.no_file,
                             trotter_eps=args.trotter_eps, synthesis_eps=args.synthesis_eps, progress=_say)
    from ..learning.design_plots import plot_design
    plotted = bool(args.plot) and write_output(args, "--plot", args.plot, lambda: plot_design(rep, args.plot))
    plot = args.plot = args.plot if plotted else None          # what was written (_print_design says so)
    report_if_asked(args, "design", {**rep.to_json(), "plot": plot}, cluster.name, drawings=[(
        "shares of the budget per candidate and Cramer-Rao bounds against the current set",
        lambda f: plot_design(rep, f))])
    if args.json:
        print_json({**rep.to_json(), "plot": plot})
        return 0
    _print_design(rep, args)
    return 0


def _count(n):
    return f"{int(n)}" if n < 1e9 else f"{float(n):.3g}"


def _print_design(rep, args):
    import numpy as np
    unit = {"shot": "shots", "point": "points", "t_count": "T gates"}[rep.per]
    print(f"cluster {rep.cluster}: {len(rep.candidates)} candidates, {len(rep.parameters)} free parameters; "
          f"{rep.criterion}-optimal per {unit[:-1]}, budget {rep.budget:.4g} {unit}")
    if rep.criterion != "D" and len(rep.selection) < len(rep.parameters):
        print(f"criterion over: {', '.join(rep.selection)}")
    head = f"{'candidate':<24}{'kind':>11}{'scale':>7}{'t_max (s)':>11}{'points':>7}{'share':>9}{'shots':>10}"
    if rep.per == "t_count":
        head += f"{'T/shot':>11}"
    print(head)
    order = np.argsort(-rep.shares)
    shown = order[:args.show]
    for k in shown:
        c = rep.candidates[k]
        d = c.describe()
        line = (f"{c.name[:23]:<24}{c.kind:>11}{d['dipolar_scale']:>7.3g}{d['t_max_s']:>11.4g}{d['points']:>7}"
                f"{rep.shares[k]:>9.4f}{_count(rep.shots[k]):>10}")
        if rep.per == "t_count":
            line += f"{rep.cost_per_shot[k]:>11.3g}"
        print(line)
    if len(order) > len(shown):
        print(f"... {len(order) - len(shown)} more (shares below {rep.shares[order[len(shown) - 1]]:.2g}; --show N)")
    print(f"chosen (share >= 0.001): {', '.join(rep.candidates[k].name for k in rep.chosen)}")
    print(f"criterion {rep.criterion}: {rep.value:.6g} (current set, equal shares over the file's experiments: "
          f"{rep.baseline_value:.6g})")
    print(f"gain: the current set needs {rep.gain:.3g}x the budget to match")
    eq = "" if not np.isfinite(rep.equivalence) else f", equivalence ratio {rep.equivalence:.5f} (1 at the optimum)"
    print(f"optimiser: {rep.method}, {'converged' if rep.converged else 'NOT converged'}{eq}, {rep.seconds:.1f} s")
    print()
    print(f"{'parameter':<20}{'value (Hz)':>14}{'CRB (Hz)':>12}{'current (Hz)':>14}")
    for n, v, b, b0 in zip(rep.parameters, rep.values_hz, rep.crb_hz, rep.baseline_crb_hz):
        print(f"{n:<20}{v:>14.3f}{b:>12.4g}{b0:>14.4g}")
    if rep.per == "t_count":
        print(f"T-count model: {rep.assumptions.get('trotter_steps')}; {rep.assumptions.get('synthesis')}")
    if args.plot:
        print(f"wrote {args.plot}")


def _run_map(args, cluster):
    from ..survey.learnability_map import learnability_map, plot_learnability_map
    thresholds = {"max_median_crb_hz": args.max_median_crb, "max_softest_bound_hz": args.max_softest_bound,
                  "hard_seconds": args.hard_seconds, "hard_memory_bytes": args.hard_memory,
                  "max_t_count": args.max_t_count}
    if args.sequence is not None and args.map != "cycle_time_s":
        from ..base.errors import QhlInputError
        raise QhlInputError(f"{args.sequence} is a cycle for --map cycle_time_s only (this map: {args.map})",
                            key="--sequence")
    values = args.values or _DEFAULT_VALUES[args.map]
    lmap = learnability_map(cluster, args.map, _axis_grid(values), t_max_s=args.t_max, points=args.map_points,
                            noise=args.map_noise, free=args.free, precision=args.precision, thresholds=thresholds,
                            progress=_say, sequence=args.sequence or "wahuha")
    cyc = lmap.axis == "cycle_time_s"
    rc = 130 if lmap.interrupted else 0
    plotted = bool(args.plot) and write_output(args, "--plot", args.plot,
                                               lambda: plot_learnability_map(lmap, args.plot))
    plot = args.plot if plotted else None
    report_if_asked(args, "design", {**lmap.to_json(), "plot": plot}, cluster.name, drawings=[(
        f"learnability, ergodicity, classical and quantum cost over {lmap.axis}",
        lambda f: plot_learnability_map(lmap, f))])
    if args.json:
        print_json({**lmap.to_json(), "plot": plot})
        return rc
    print(f"cluster {lmap.cluster}: learnability map over {lmap.axis}"
          f"{' of ' + lmap.experiment['sequence'] if cyc else ''} ({len(lmap.points)} values, {lmap.seconds:.1f} s)")
    print(f"{lmap.axis:>13}{'cycles' if cyc else '':>7}{'lam_min':>10}{'medCRB Hz':>10}{'<r>':>7}{'D2':>6}{'D2rand':>7}{'classical s':>12}"
          f"{'T-count':>10}{'  L H A'}")
    for p in lmap.points:
        flags = " ".join("y" if f else "." for f in (p.learnable, p.classically_hard, p.affordable))
        print(f"{p.value:>13.4g}{p.cycles if cyc else '':>7}{p.fisher_min_eigenvalue:>10.3g}{p.median_crb_hz:>10.3g}{p.mean_r:>7.3f}"
              f"{p.mean_d2:>6.3f}{p.mean_d2_random:>7.3f}{p.classical_seconds:>12.3g}{p.t_count:>10.3g}  {flags}"
              f"{'  <- window' if p.window else ''}")
    th = lmap.thresholds
    print(f"L learnable: median CRB <= {th['max_median_crb_hz']:g} Hz and 1/sqrt(lam_min) <= "
          f"{th['max_softest_bound_hz']:g} Hz; H classically hard: > {th['hard_seconds']:g} s or > "
          f"{th['hard_memory_bytes']:.3g} B; A affordable: T-count <= {th['max_t_count']:.3g}")
    print(f"window (learnable, classically hard, affordable): "
          f"{', '.join(f'{v:g}' for v in lmap.window) if lmap.window else 'none'}")
    if cyc:
        print(f"cycle_time_s: {lmap.experiment['sequence']} cycles fill {lmap.experiment['t_max_s']:g} s, one sample "
              "at the end of each cycle; <r>, D2 of the cycle propagator's quasi-energies and states (random "
              "reference: CUE, <r> = 0.600, D2rand = D2_CUE); classical s: the dense pulse-sequence route (estimate)")
    elif any(p.level_kind != "eigenvalues of H" for p in lmap.points):
        print("spinning: <r>, D2 of the Floquet quasi-energies and states of one rotor period (random reference: "
              "CUE, <r> = 0.600, D2rand = D2_CUE); classical s: the static FID's cost (a lower bound)")
    if lmap.interrupted:
        print(f"interrupted: {len(lmap.points)} values done")
    if plotted:
        print(f"wrote {args.plot}")
    return rc
