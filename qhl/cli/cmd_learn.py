"""`qhl learn`: fit a cluster's free parameters to measured or synthetic NMR signals."""

import sys

import numpy as np

from ..learning.methods import METHODS
from .common import (ITERATIONS, NOISE, SEED, SHOTS, START_OFFSET, STEPS, add_cluster_argument, add_report_argument,
                     check_output_path, cluster_from_args, number_in, print_json, report_if_asked,
                     write_output)

MAX_MINUTES = number_in(0, 10**6, low_open=True, name="minutes")
# A spectrometer field more than this fraction off the cluster file's gets a note (shifts in ppm
# and dipolar couplings do not depend on it, but a different magnet usually means a wrong file).
FIELD_NOTE_RTOL = 0.01


def register(sub):
    p = sub.add_parser("learn", help="fit Hamiltonian parameters to signals, with Cramer-Rao error bars")
    add_cluster_argument(p)
    src = p.add_mutually_exclusive_group()
    src.add_argument("--data", metavar="PATH",
                     help="measured signals: a CSV (columns experiment,time_s,real,imag[,sigma]), a spectrometer "
                          "FID directory (acqus + fid, or procpar + fid), a JCAMP-DX file, or a directory of "
                          "them (matched to the experiments by name or order)")
    src.add_argument("--synthetic", action="store_true",
                     help="fit synthetic data from the cluster's own values (the default)")
    p.add_argument("--noise", type=NOISE, metavar="SIGMA",
                   help="noise per point of Re and Im (default: each experiment's noise)")
    p.add_argument("--seed", type=SEED, default=0, metavar="S", help="seed of the noise and start signs")
    p.add_argument("--start-offset", type=START_OFFSET, default=None, metavar="REL",
                   help="start this far off in relative terms (default 0.05 synthetic, 0 with --data)")
    p.add_argument("--method", choices=METHODS, default="gn",
                   help="gn: Levenberg-Marquardt on the Fisher matrix; cg; lbfgs (default gn)")
    p.add_argument("--gradients", choices=("exact", "emulated"), default="exact",
                   help="exact engine or circuit emulator with --shots per estimate")
    p.add_argument("--shots", type=SHOTS, metavar="N", help="shots per estimate (emulated gradients)")
    p.add_argument("--steps", type=STEPS, metavar="N",
                   help="emulated: N Trotter steps at every time (default: the fewest keeping the Trotter error of "
                        "S and dS/dh within a quarter of the data noise)")
    p.add_argument("--max-minutes", type=MAX_MINUTES, default=60.0, metavar="M",
                   help="emulated: refuse a run predicted to take longer than M minutes (default 60)")
    p.add_argument("--max-iter", type=ITERATIONS, default=200, metavar="N", help="iteration limit")
    p.add_argument("--free", nargs="+", default=["offset:*", "dipolar:*"], metavar="PATTERN",
                   help="free parameters as glob patterns (default: offsets and dipolar couplings)")
    p.add_argument("--nuisance", metavar="LIST", default=None,
                   help="also fit, comma-separated: scale, phase (per experiment), decay (T2), gauss (Gaussian "
                        "envelope), deadtime, or all (default none)")
    p.add_argument("--plot", metavar="FILE.png", help="write data vs fit, residuals and convergence")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    add_report_argument(p)
    p.set_defaults(func=run)


class _Progress:
    """Per iteration: cost, time per iteration and the time left if the fit ran to --max-iter;
    within an emulated evaluation: circuit families done with an estimate of the time left."""

    def __init__(self, max_iter):
        import time
        self.clock = time.monotonic
        self.start = self.clock()
        self.max_iter = max_iter
        self.inner = None

    def iteration(self, entry):
        from ..base.progress import format_seconds
        k = entry["iteration"]
        elapsed = self.clock() - self.start
        per = elapsed / (k + 1)          # iteration 0 is the starting point's evaluation
        print(f"iteration {k:>3}: cost {entry['cost']:.6g}  scaled gradient {entry['gradient_norm']:.3g}  "
              f"{format_seconds(per)} per iteration, {format_seconds(elapsed)} elapsed, at most "
              f"{format_seconds(per * (self.max_iter - k))} left (--max-iter {self.max_iter})", file=sys.stderr)
        self.inner = None

    def planning(self, done, total, label):
        from ..base.progress import Progress
        if done == 1:
            self.inner = Progress("  Trotter steps per time (signal and gradient error)", total)
        self.inner.update(done, label[:40])
        if done == total:
            self.inner = None

    def planned(self, plan):
        print(f"qhl: emulated run {plan.summary()}", file=sys.stderr)

    def evaluation(self, done, total, label):
        from ..base.progress import Progress
        if self.inner is None or done == 1:
            self.inner = Progress("  circuit families this evaluation", total)
        self.inner.update(done, label[:40])


def run(args):
    from ..learning.fisher_report import describe_combination
    from ..learning.fitting import learn
    cluster = cluster_from_args(args)
    if args.plot:
        check_output_path(args.plot, "--plot")
    bars = _Progress(args.max_iter)
    report = learn(cluster, free=args.free, data_path=args.data, sigma=args.noise, seed=args.seed,
                   start_offset=args.start_offset, method=args.method, gradients=args.gradients,
                   shots=args.shots, max_iter=args.max_iter, progress=None if args.json else bars.iteration,
                   evaluation_progress=None if args.json else bars.evaluation, nuisance=args.nuisance,
                   steps=args.steps, max_minutes=args.max_minutes,
                   planning_progress=None if args.json else bars.planning,
                   plan_ready=None if args.json else bars.planned)
    plotted = False
    if args.plot and not report.fit.diverged:
        from ..learning.fit_plots import plot_fit
        plotted = write_output(args, "--plot", args.plot, lambda: plot_fit(report, args.plot))
    fit = report.fit
    report_if_asked(args, "learn", report.to_json(), cluster.name, fit=report)
    for a in report.acquisitions:      # spectrometer files: the field they were taken at
        if a.field_tesla is not None and abs(a.field_tesla / cluster.field_tesla - 1) > FIELD_NOTE_RTOL:
            print(f"qhl: note: {a.source} was taken at {a.field_tesla:.4g} T ({a.observe_mhz:.6g} MHz {a.nucleus}), "
                  f"the cluster file says field_tesla = {cluster.field_tesla:g}", file=sys.stderr)
    if report.model.hidden:
        print(f"qhl: note: left out of the default free set (the signal cannot see them): "
              f"{', '.join(report.model.hidden)}", file=sys.stderr)
    if report.fixed_unlearnable:
        print(f"qhl: note: kept fixed at the cluster's values (the signal cannot see them): "
              f"{', '.join(report.fixed_unlearnable)}", file=sys.stderr)
    if fit.diverged:
        hint = "" if args.method == "gn" else " or --method gn"
        print(f"qhl: error: {fit.message}; no result (try a closer --start-offset, fewer --free "
              f"parameters{hint})", file=sys.stderr)
        if args.json:
            print_json(report.to_json())
        return 1
    if not fit.converged:
        print(f"qhl: warning: {fit.message}", file=sys.stderr)
    gof = report.goodness_of_fit
    if gof["p_value"] < 1e-6:
        print(f"qhl: warning: the cost is far above the noise: 2 x cost = {gof['chi2']:.4g} against a chi-square "
              f"with {gof['dof']} degrees of freedom (p = {gof['p_value']:.1e}); a local minimum or a wrong "
              f"noise level: try another --seed or a smaller --start-offset", file=sys.stderr)
    for u in fit.unlearnable:
        combo = describe_combination(u["combination"])
        print(f"qhl: warning: the data do not determine {combo} (Fisher eigenvalue {u['eigenvalue']:.2e})",
              file=sys.stderr)
    if args.json:
        print_json(report.to_json())
        return 0
    extra = f" + {len(report.nuisance)} nuisance" if report.nuisance else ""
    print(f"cluster {cluster.name}: {report.n_hamiltonian} free parameters{extra}, method {fit.method}, "
          f"{report.gradients} gradients, data {'from ' + args.data if args.data else 'synthetic'}")
    print(f"{fit.message} after {fit.iterations} iterations; cost {fit.cost:.6g} nats")
    truth = report.true_hz
    head = f"{'parameter':<20}{'fitted (Hz)':>14}{'stderr (Hz)':>13}"
    print(head + (f"{'true (Hz)':>14}{'error/stderr':>13}" if truth is not None else ""))
    P = report.n_hamiltonian
    for k, (n, v, e) in enumerate(zip(fit.names[:P], fit.values_hz[:P], fit.stderr_hz[:P])):
        line = f"{n:<20}{v:>14.3f}{e:>13.4g}"
        if truth is not None:
            z = (v - truth[k]) / e if np.isfinite(e) and e > 0 else float("nan")
            line += f"{truth[k]:>14.3f}{z:>13.2f}"
        print(line)
    _print_nuisance(report.nuisance)
    if truth is not None:
        print(f"relative error ||h_fit - h_true||/||h_true|| = {report.relative_error:.3e} "
              f"(Cramer-Rao-limited: {report.crb_relative_error:.3e})")
    else:
        print(f"Cramer-Rao-limited relative error: {report.crb_relative_error:.3e}")
    if plotted:
        print(f"wrote {args.plot}")
    return 0


def _print_nuisance(rows):
    """Nuisance parameters with their Cramer-Rao bounds (qhl.learning.nuisance.nuisance_table)."""
    if not rows:
        return
    print(f"{'nuisance':<20}{'fitted':>14}{'stderr':>13}  unit    physical")
    for r in rows:
        ph = r.get("physical")
        extra = f"  {ph['name']} = {ph['value']:.4g} +- {ph['stderr']:.2g} {ph['unit']}" if ph else ""
        print(f"{r['name']:<20}{r['value']:>14.5g}{r['stderr']:>13.4g}  {r['unit']:<6}{extra}")
