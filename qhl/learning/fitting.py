"""The learning loop: fit free Hamiltonian parameters to NMR signals.

Cost (same convention as qhl.exact.likelihood): each point's Re and Im parts carry independent
Gaussian noise of standard deviation sigma, residual r = S(h) - D, and
    C(h)    = sum_{x,t} |r|^2 / (2 sigma^2)                 (negative log-likelihood, nats)
    g_n     = sum Re[conj(r) dS/dh_n] / sigma^2              (its gradient)
    F_mn    = sum Re[conj(dS_m) dS_n] / sigma^2              (Gauss-Newton matrix = Fisher information)
Only first derivatives of S are needed, so any source of S and dS/dh can drive the loop: a
`GradientProvider`. `ExactGradientProvider` uses the exact engine; an emulator-based provider
(shot-noise estimates) plugs in through the same interface, with `noisy = True`.

Optimisers:
    'gn'     Levenberg-Marquardt on the Fisher matrix with Marquardt's diagonal scaling,
             (F + mu diag F) delta = -g (K. Levenberg, Q. Appl. Math. 2, 164 (1944);
             D. W. Marquardt, J. SIAM 11, 431 (1963)); damping updated from the gain ratio as in
             K. Madsen, H. B. Nielsen, O. Tingleff, "Methods for non-linear least squares
             problems", 2nd ed., 2004, sec. 3.2.
    'cg'     nonlinear conjugate gradient (scipy.optimize.minimize, method 'CG': Polak-Ribiere).
    'lbfgs'  L-BFGS-B (scipy.optimize.minimize; Byrd, Lu, Nocedal, Zhu, SIAM J. Sci. Comput. 16,
             1190 (1995)).
For 'cg' and 'lbfgs' each parameter is measured in units of 1/sqrt(F_nn) at the start (diagonal
preconditioning, common practice): offsets and couplings differ in scale by orders of magnitude.
They need only C and g after the start, so where the provider has a weighted path
(GradientProvider.weighted_gradients; the exact engine's ExactEngine.gradient_weighted, with weights
c_t = conj(r_t) / sigma_t^2 so that g_n = Re sum_t c_t dS(t)/dh_n) each evaluation costs about two
signals instead of the full dS/dh; F is computed at the start and once more at the best point
(its Cramer-Rao errors).

Every optimiser keeps the lowest-cost point it evaluated and says whether it converged. A fit
that diverges (a non-finite value or cost, a parameter farther than DIVERGENCE_FACTOR times the
largest |starting value| from its start, or a cost rising over DIVERGENCE_RISES iterations in a
row) stops at once with `diverged` set: its values are not a result. With a noisy provider 'gn' is the method to use: its steps are accepted only when the cost falls, and it
stops when the cost stalls at the noise floor of the gradient estimates.
"""

from dataclasses import dataclass, field, replace

import numpy as np
import scipy.optimize as sopt

from ..base.errors import QhlInputError
from .fisher_report import crb_relative_error, report_from_fisher
from ..exact.likelihood import Dataset
from ..exact.provider import ExactGradientProvider, GradientProvider
from .emulated_run import DEFAULT_MAX_MINUTES, plan_emulated_run, trotter_signal_target
from .methods import METHODS

__all__ = ["GradientProvider", "ExactGradientProvider", "CostPoint", "FitResult", "evaluate_cost",
           "evaluate_cost_gradient",
           "fit", "perturbed_start", "emulated_gradient_provider", "relative_error", "METHODS",
           "LearnReport", "learn",
           "DECREMENT_TOL", "STEP_RTOL", "NOISY_STALL_TOL", "NOISY_PATIENCE", "DIVERGENCE_FACTOR", "DIVERGENCE_RISES"]


# Converged when the full Gauss-Newton step would lower the cost by less than this many nats:
# far below the statistical scale of a log-likelihood (1/2 nat per standard error; common practice).
DECREMENT_TOL = 1e-6
# Noisy gradients (GradientProvider.noisy): stop when the cost falls by less than this over
# that many iterations (common practice).
NOISY_STALL_TOL = 1e-2
NOISY_PATIENCE = 3
# Levenberg-Marquardt stops when its (scaled) step is below this fraction of the (scaled) point
# (Madsen, Nielsen and Tingleff 2004, eq. 3.9b; common practice for the value).
STEP_RTOL = 1e-12
# Divergence: a parameter this many times the largest |starting value| away from its start
# (no NMR parameter moves by 1e4 times the cluster's own scale in a fit; common practice), or
# the recorded cost rising this many iterations in a row.
DIVERGENCE_FACTOR = 1e4
DIVERGENCE_RISES = 5


class _Diverged(Exception):
    """Raised inside the loop to stop a diverging fit (caught in `fit`)."""


def emulated_gradient_provider(model, experiments, shots, seed=0, **options):
    """A GradientProvider backed by qhl's circuit emulator at `shots` per estimate.

    Thin wrapper over qhl.emulation.gradient_provider (imported on first use: qiskit-aer is heavy).
    """
    from ..emulation import gradient_provider
    return gradient_provider(model, experiments, shots=shots, seed=seed, **options)


@dataclass(frozen=True)
class CostPoint:
    """Cost C (nats), gradient g (1/Hz) and Fisher / Gauss-Newton matrix F (1/Hz^2) at `values_hz`
    (F is None where only C and g were evaluated: `evaluate_cost_gradient`)."""

    values_hz: np.ndarray
    cost: float
    gradient: np.ndarray
    fisher: np.ndarray


def _check_dataset(dataset: Dataset):
    if not isinstance(dataset, Dataset) or not dataset.signals:
        raise QhlInputError("expected a Dataset with at least one experiment", key="data")
    for name, (times, data, sigma) in dataset.signals.items():
        s = np.asarray(sigma, float)
        if np.any(~np.isfinite(s)) or np.any(s <= 0):
            raise QhlInputError(f"sigma must be positive and finite (experiment '{name}')", key="sigma")
        if np.shape(data) != np.shape(times) or np.broadcast_shapes(s.shape, np.shape(times)) != np.shape(times):
            raise QhlInputError(f"experiment '{name}': {np.size(times)} times but {np.size(data)} data "
                                f"points", key="data")


def evaluate_cost(provider: GradientProvider, dataset: Dataset, values_hz) -> CostPoint:
    """C, g and F (module docstring) at `values_hz` from the provider's S and dS/dh."""
    values_hz = np.asarray(values_hz, float)
    times = {name: np.asarray(v[0], float) for name, v in dataset.signals.items()}
    results = provider.signals_and_gradients(values_hz, times)
    P = len(values_hz)
    cost, grad, fisher = 0.0, np.zeros(P), np.zeros((P, P))
    for name, (_, d, s) in dataset.signals.items():
        sig, ds = results[name]
        w = 1.0 / np.broadcast_to(np.asarray(s, float), np.shape(d)) ** 2
        r = sig - d
        cost += 0.5 * float(np.sum(w * np.abs(r) ** 2))
        grad += np.real(np.conj(r)[None, :] * ds) @ w
        fisher += np.real((np.conj(ds) * w) @ ds.T)
    return CostPoint(values_hz, cost, grad, 0.5 * (fisher + fisher.T))


def evaluate_cost_gradient(provider: GradientProvider, dataset: Dataset, values_hz):
    """C and g (module docstring) through the provider's weighted path, F left out (None), or None
    where the provider has no weighted path (GradientProvider.weighted_gradients)."""
    values_hz = np.asarray(values_hz, float)
    times = {name: np.asarray(v[0], float) for name, v in dataset.signals.items()}
    weights = {}
    for name, (_, d, s) in dataset.signals.items():
        w = 1.0 / np.broadcast_to(np.asarray(s, float), np.shape(d)) ** 2
        weights[name] = lambda sig, d=d, w=w: np.conj(sig - d) * w          # c_t = conj(r_t) / sigma_t^2
    results = provider.weighted_gradients(values_hz, times, weights)
    if results is None:
        return None
    cost, grad = 0.0, np.zeros(len(values_hz))
    for name, (_, d, s) in dataset.signals.items():
        sig, g = results[name]
        w = 1.0 / np.broadcast_to(np.asarray(s, float), np.shape(d)) ** 2
        cost += 0.5 * float(np.sum(w * np.abs(sig - d) ** 2))
        grad += np.real(g)
    return CostPoint(values_hz, cost, grad, None)


@dataclass
class FitResult:
    """Outcome of `fit`.

    Attributes:
        names: free parameter names.
        values_hz: the best (lowest-cost) point evaluated.
        stderr_hz: Cramer-Rao standard errors sqrt(diag F^-1) at that point (inf if unlearnable).
        fisher: the Fisher matrix there (1/Hz^2).
        cost: the cost there (nats).
        iterations: optimiser iterations.
        converged: whether the stopping test was met (else `message` says why not).
        diverged: the fit ran away (module docstring) and stopped; `values_hz` is no result.
        history: per iteration {'iteration', 'cost', 'gradient_norm'} (gradient norm in the
            preconditioned units sqrt(g^T diag(F)^-1 g), dimensionless; F of the point, or for
            'cg' / 'lbfgs' on the weighted path F at the start, the optimiser's own units).
        unlearnable: [{'eigenvalue', 'combination': {name: weight}}] combinations the data do not
            determine (qhl.learning.fisher_report).
    """

    names: tuple
    values_hz: np.ndarray
    stderr_hz: np.ndarray
    fisher: np.ndarray
    cost: float
    iterations: int
    converged: bool
    message: str
    method: str
    history: list = field(default_factory=list)
    unlearnable: list = field(default_factory=list)
    evaluations: int = 0
    diverged: bool = False


def relative_error(fitted_hz, true_hz) -> float:
    """||h_fit - h_true|| / ||h_true|| (Euclidean norms over the free parameters)."""
    fitted_hz, true_hz = np.asarray(fitted_hz, float), np.asarray(true_hz, float)
    return float(np.linalg.norm(fitted_hz - true_hz) / np.linalg.norm(true_hz))


def perturbed_start(values_hz, relative: float, seed: int = 0) -> np.ndarray:
    """h_n (1 + relative * e_n) with random signs e_n = +-1: exactly `relative` off in norm."""
    if not np.isfinite(relative) or relative < 0:
        raise QhlInputError(f"expected a relative offset >= 0, got {relative}", key="--start-offset")
    signs = np.random.default_rng(seed).choice([-1.0, 1.0], size=len(values_hz))
    return np.asarray(values_hz, float) * (1.0 + relative * signs)


def _scales(fisher):
    """1/sqrt(F_nn), with parameters the data do not touch given the median scale."""
    d = np.diag(fisher).copy()
    ok = d > max(1e-300, ZERO_DIAGONAL_RTOL * float(np.max(d, initial=0.0)))
    fill = np.median(d[ok]) if np.any(ok) else 1.0
    d[~ok] = fill
    return 1.0 / np.sqrt(d)


# A diagonal Fisher entry below this times the largest one is a parameter the data do not touch:
# scaling by 1/sqrt(F_nn) would turn rounding noise into an enormous step.
ZERO_DIAGONAL_RTOL = 1e-14


def _gradient_norm(point, scale=None):
    return float(np.linalg.norm(point.gradient * (_scales(point.fisher) if point.fisher is not None else scale)))


def _levenberg_marquardt(evaluate, start, max_iter, tol, record, noisy=False):
    """Marquardt-scaled Levenberg-Marquardt (Madsen, Nielsen, Tingleff 2004, alg. 3.16).

    With noisy gradients the predicted decrease never falls below its noise floor, so the loop
    also stops once the cost has fallen by less than NOISY_STALL_TOL nats over NOISY_PATIENCE
    iterations.
    """
    point = evaluate(start)
    record(0, point)
    costs = [point.cost]
    mu, nu = 1e-3, 2.0
    for k in range(1, max_iter + 1):
        if noisy and len(costs) > NOISY_PATIENCE and costs[-1 - NOISY_PATIENCE] - costs[-1] < NOISY_STALL_TOL:
            return point, k - 1, True, (f"converged to the noise floor of the gradients: the cost fell by less "
                                        f"than {NOISY_STALL_TOL:g} nats over {NOISY_PATIENCE} iterations")
        g, F = point.gradient, point.fisher
        scale = _scales(F)
        # The full Gauss-Newton step in scaled variables; its predicted decrease is the test.
        fs, gs = F * np.outer(scale, scale), g * scale
        newton = np.linalg.lstsq(fs, -gs, rcond=1e-12)[0]
        decrement = -0.5 * float(gs @ newton)
        if decrement < tol:
            return point, k - 1, True, f"converged: predicted decrease {decrement:.2e} nats"
        scaled = np.linalg.lstsq(fs + mu * np.eye(len(scale)), -gs, rcond=1e-12)[0]
        # the step test of Madsen, Nielsen and Tingleff (alg. 3.16): stop when the step no longer changes
        # the point (in scaled variables); after many rejected steps mu grows without bound
        if np.linalg.norm(scaled) <= STEP_RTOL * (np.linalg.norm(point.values_hz / scale) + STEP_RTOL):
            return point, k - 1, False, (f"stopped: no step lowers the cost any more (steps below {STEP_RTOL:g} of "
                                         f"the parameters, predicted decrease {decrement:.2e} nats): the cost is at "
                                         f"the rounding floor of the signals (is the noise far below their "
                                         f"precision?) or the gradient does not match it; best point kept")
        step = scaled * scale
        predicted = -float(g @ step) - 0.5 * float(step @ F @ step)
        trial = evaluate(point.values_hz + step)
        gain = (point.cost - trial.cost) / predicted if predicted > 0 else -1.0
        if gain > 0:
            point = trial
            mu *= max(1.0 / 3.0, 1.0 - (2.0 * gain - 1.0) ** 3)
            nu = 2.0
        else:
            mu *= nu
            nu *= 2.0
        costs.append(point.cost)
        record(k, point)
    return point, max_iter, False, (f"did not converge in {max_iter} iterations (predicted decrease "
                                    f"{decrement:.2e} nats > {tol:.0e}); best point kept")


def _scipy(evaluate, start, method, max_iter, record):
    """Nonlinear CG or L-BFGS-B in preconditioned variables x = (h - h0) / scale."""
    first = evaluate(start)
    scale = _scales(first.fisher)
    last = {}

    def fun(x):
        p = evaluate(start + x * scale, light=True)
        last["point"] = p
        return p.cost, p.gradient * scale

    k = [0]
    record(0, first)

    def callback(*args):
        k[0] += 1
        h = start + np.asarray(args[0], float) * scale
        p = last["point"] if np.array_equal(last["point"].values_hz, h) else evaluate(h, light=True)
        record(k[0], p)

    opts = {"maxiter": max_iter, "gtol": 1e-5}
    if method == "lbfgs":
        opts.update(ftol=1e-12)
    res = sopt.minimize(fun, np.zeros(len(start)), jac=True, callback=callback,
                        method={"cg": "CG", "lbfgs": "L-BFGS-B"}[method], options=opts)
    return bool(res.success), int(res.nit), str(res.message)


def fit(provider: GradientProvider, dataset: Dataset, start_hz, method: str = "gn",
        max_iter: int = 50, tol: float = DECREMENT_TOL, invisible=None, progress=None) -> FitResult:
    """Maximum-likelihood fit of the provider's free parameters to `dataset`.

    Args:
        provider: a GradientProvider (ExactGradientProvider, or an emulator-based one).
        dataset: qhl.exact.likelihood.Dataset of measured or synthetic signals.
        start_hz: starting values (P,) in Hz.
        method: 'gn' (Levenberg-Marquardt on the Fisher matrix), 'cg' or 'lbfgs'.
        max_iter: iteration limit; reaching it gives converged=False and keeps the best point.
        tol: 'gn' stops when the predicted decrease of a full step is below tol nats; 'cg' and
            'lbfgs' use scipy's own tests (gtol 1e-5 in the preconditioned variables).
        invisible: optional (P, k) combinations the model says the signal cannot see
            (qhl.spins.identifiability), marked unlearnable in the result.
        progress: optional callable given each history entry as it is recorded.

    Returns:
        FitResult with the best point, Cramer-Rao standard errors and the history.

    Raises:
        QhlInputError: unknown method, wrong start size, bad sigma, empty data.

    Example:
        >>> from qhl import demo_cluster, build_model, ExactEngine
        >>> from qhl.exact.likelihood import synthetic_dataset
        >>> c = demo_cluster(); eng = ExactEngine(build_model(c, free="offset:*"))
        >>> data = synthetic_dataset(eng, c.experiments, seed=0)
        >>> start = perturbed_start(eng.model.free_values_hz, 0.01)
        >>> res = fit(ExactGradientProvider(eng, c.experiments), data, start)
        >>> res.converged, bool(res.iterations <= 10)
        (True, True)
    """
    if method not in METHODS:
        raise QhlInputError(f"unknown method '{method}': expected one of {', '.join(METHODS)}", key="method")
    names = tuple(provider.parameter_names)
    start = np.asarray(start_hz, float)
    if start.shape != (len(names),) or not np.all(np.isfinite(start)):
        raise QhlInputError(f"expected {len(names)} finite starting values, got shape {start.shape}", key="start")
    if int(max_iter) < 1:
        raise QhlInputError(f"expected max_iter >= 1, got {max_iter}", key="max_iter")
    _check_dataset(dataset)
    best = {}
    count = [0]
    reach = DIVERGENCE_FACTOR * max(float(np.max(np.abs(start), initial=0.0)), 1.0)

    def evaluate(values, light=False):
        """CostPoint at `values`; light: C and g only, by the weighted path where the provider has one."""
        values = np.asarray(values, float)
        if not np.all(np.isfinite(values)):
            raise _Diverged("a parameter became non-finite")
        far = np.abs(values - start) > reach
        if np.any(far):
            k = int(np.argmax(np.abs(values - start)))
            raise _Diverged(f"{names[k]} reached {values[k]:.3g} Hz, more than {DIVERGENCE_FACTOR:.0e} times "
                            f"the largest starting value from its start")
        p = evaluate_cost_gradient(provider, dataset, values) if light else None
        if p is None:
            p = evaluate_cost(provider, dataset, values)
        count[0] += 1
        if not np.isfinite(p.cost) or not np.all(np.isfinite(p.gradient)):
            if not best:
                raise QhlInputError("the cost is not finite at the starting point", key="data")
            raise _Diverged("the cost became non-finite")
        if "point" not in best or p.cost < best["point"].cost:
            best["point"] = p
        return p

    history = []

    start_scale = []      # 1/sqrt(F_nn) of the first point recorded (the start): units of points without F

    def record(k, point):
        if point.fisher is not None and not start_scale:
            start_scale.append(_scales(point.fisher))
        history.append({"iteration": k, "cost": point.cost,
                        "gradient_norm": _gradient_norm(point, start_scale[0] if start_scale else None)})
        if progress is not None:
            progress(history[-1])
        costs = [h["cost"] for h in history[-DIVERGENCE_RISES - 1:]]
        if len(costs) > DIVERGENCE_RISES and all(b > a for a, b in zip(costs, costs[1:])):
            raise _Diverged(f"the cost rose {DIVERGENCE_RISES} iterations in a row")

    diverged = False
    try:
        if method == "gn":
            _, iterations, converged, message = _levenberg_marquardt(evaluate, start, int(max_iter), tol, record,
                                                                     bool(getattr(provider, "noisy", False)))
        else:
            converged, iterations, message = _scipy(evaluate, start, method, int(max_iter), record)
            if not converged:
                message = f"did not converge in {iterations} iterations ({message}); best point kept"
    except _Diverged as e:
        diverged, converged = True, False
        iterations = max(len(history) - 1, 0)
        message = f"the fit diverged after {iterations} iterations: {e}"
    point = best["point"]
    if point.fisher is None:              # found on the weighted path: F (Cramer-Rao errors) there
        point = evaluate_cost(provider, dataset, point.values_hz)
        count[0] += 1
    report = report_from_fisher(names, point.values_hz, point.fisher, invisible)
    return FitResult(names, point.values_hz, report.crb_hz, point.fisher, point.cost, iterations, converged,
                     message, method, history, report.unlearnable, count[0], diverged)


@dataclass
class LearnReport:
    """A fit of a cluster's free parameters with everything `qhl learn` prints.

    Attributes:
        fit: the FitResult.
        model: the HamiltonianModel (its values are the cluster's: the truth for synthetic data).
        dataset: the data fitted.
        start_hz: the starting point.
        true_hz: the true values (synthetic data) or None (measured data).
        fitted_signals: {experiment name: S(t) at the fit, at the data's times}.
        gradients: 'exact' or 'emulated'.
        fixed_unlearnable: explicitly freed parameters the signal cannot see
            (qhl.spins.identifiability), kept fixed at the cluster's values instead of fitted.
        nuisance: rows of qhl.learning.nuisance.nuisance_table (empty without nuisance parameters);
            `fit` then holds the Hamiltonian parameters first and the nuisance ones after them,
            with one Fisher matrix over all of them.
        acquisitions: the spectrometer datasets read (qhl.learning.spectrometer.Acquisition), if any.
        emulation: qhl.learning.emulated_run.EmulatedRunPlan of an emulated fit (None for exact).
    """

    fit: FitResult
    model: object
    dataset: Dataset
    start_hz: np.ndarray
    true_hz: np.ndarray | None
    fitted_signals: dict
    gradients: str = "exact"
    fixed_unlearnable: tuple = ()
    nuisance: list = field(default_factory=list)
    acquisitions: list = field(default_factory=list)
    emulation: object = None

    @property
    def n_hamiltonian(self) -> int:
        """How many of fit.names are Hamiltonian parameters (the rest are nuisance parameters)."""
        return len(self.fit.names) - len(self.nuisance)

    @property
    def relative_error(self):
        """||h_fit - h_true|| / ||h_true|| (Hamiltonian parameters) or None without true values."""
        P = self.n_hamiltonian
        return None if self.true_hz is None else relative_error(self.fit.values_hz[:P], self.true_hz)

    @property
    def crb_relative_error(self) -> float:
        """The Cramer-Rao-limited relative error sqrt(tr F^-1) / ||h||, at the fit (Hamiltonian parameters;
        their bounds include the uncertainty of any nuisance parameters: one Fisher matrix over all)."""
        P = self.n_hamiltonian
        ref = self.fit.values_hz[:P] if self.true_hz is None else self.true_hz
        return crb_relative_error(self.fit.stderr_hz[:P], ref)

    @property
    def goodness_of_fit(self) -> dict:
        """2C against chi-square with N - P degrees of freedom (N real data values: Re and Im of
        every point). For a fit at the global optimum with the right sigma, 2C ~ chi2(N - P)
        (Kay 1993, ch. 7); a p-value below 1e-6 points to a local minimum or a wrong sigma."""
        from scipy.stats import chi2
        n = 2 * sum(int(np.size(v[1])) for v in self.dataset.signals.values())
        dof = max(n - len(self.fit.names), 1)
        stat = 2.0 * self.fit.cost
        return {"chi2": stat, "dof": dof, "p_value": float(chi2.sf(stat, dof))}

    def to_json(self) -> dict:
        f = self.fit
        P = self.n_hamiltonian
        params = [{"name": n, "fitted_hz": v, "stderr_hz": e,
                   "true_hz": None if self.true_hz is None else float(self.true_hz[k]),
                   "start_hz": float(self.start_hz[k])}
                  for k, (n, v, e) in enumerate(zip(f.names[:P], f.values_hz[:P], f.stderr_hz[:P]))]
        return {"parameters": params, "iterations": f.iterations, "converged": f.converged,
                "message": f.message, "method": f.method, "gradients": self.gradients,
                "history": f.history, "cost": f.cost, "relative_error": self.relative_error,
                "crb_relative_error": self.crb_relative_error, "unlearnable": f.unlearnable,
                "diverged": f.diverged, "fixed_unlearnable": list(self.fixed_unlearnable),
                "hidden": list(self.model.hidden), "goodness_of_fit": self.goodness_of_fit,
                "nuisance": list(self.nuisance), "data_files": [a.describe() for a in self.acquisitions],
                "emulation": None if self.emulation is None else self.emulation.to_json()}


def learn(cluster, free=("offset:*", "dipolar:*"), data_path=None, sigma=None, seed: int = 0,
          start_offset=None, method: str = "gn", gradients: str = "exact", shots=None,
          max_iter: int = 200, progress=None, evaluation_progress=None, nuisance=(), steps=None,
          max_minutes=DEFAULT_MAX_MINUTES, planning_progress=None, plan_ready=None) -> LearnReport:
    """Fit `cluster`'s free parameters to measured (CSV or spectrometer files) or synthetic signals.

    Synthetic data: the cluster's own values plus Gaussian noise `sigma` (default each
    experiment's `noise`), drawn with `seed`; the start is the truth perturbed by
    `start_offset` (default 0.05) with random signs from `seed`. Measured data
    (qhl.learning.data_csv): the start is the cluster's values perturbed by `start_offset` (default 0).

    Args:
        cluster: the Cluster.
        free: glob patterns of the parameters to fit.
        data_path: CSV of measured signals (qhl.learning.data_csv), a spectrometer dataset or a
            directory of them (qhl.learning.spectrometer), or None for synthetic data.
        sigma: noise per point (synthetic noise, or CSV noise without a sigma column).
        seed, start_offset, method, max_iter, progress: see `fit` and `perturbed_start`.
        gradients: 'exact' (ExactEngine) or 'emulated' (circuit emulator, `shots` per estimate).
        evaluation_progress: callable(done, total, label) within each evaluation of the emulated
            provider (one circuit family at a time); ignored for exact gradients.
        nuisance: nuisance kinds fitted with the Hamiltonian (qhl.learning.nuisance: 'scale',
            'phase', 'decay', 'gauss', 'deadtime', or a comma-separated string); none by default,
            for synthetic and measured data alike.
        steps: emulated only: one Trotter-step count for every time, overriding the default (the
            fewest steps keeping the Trotter error of S and dS/dh within the share of the data's
            noise, qhl.learning.emulated_run).
        max_minutes: emulated only: refuse, before any shot, a run predicted to take longer
            (qhl.learning.emulated_run.plan_emulated_run; None: no limit).
        planning_progress: callable(done, total, label) during the emulated run's step search.
        plan_ready: callable(EmulatedRunPlan) once an emulated run is planned and accepted.

    Returns:
        LearnReport.

    Parameters the signal cannot see (qhl.spins.identifiability) are not fitted: the default
    free set leaves them out (model.hidden), explicitly freed ones stay fixed at the cluster's
    values (`fixed_unlearnable`).

    Raises:
        QhlInputError: bad data file, sigma <= 0, no experiments, emulator unavailable, --steps with
            exact gradients, an emulated run predicted above max_minutes (the message gives the prediction).
    """
    from ..exact.engine import ExactEngine
    from ..exact.likelihood import synthetic_dataset
    from ..spins.model import build_model

    if gradients not in ("exact", "emulated"):
        raise QhlInputError(f"unknown gradients '{gradients}': expected exact or emulated", key="--gradients")
    if gradients == "exact" and shots is not None:
        raise QhlInputError("--shots applies only to --gradients emulated", key="--shots")
    if gradients == "exact" and steps is not None:
        raise QhlInputError("--steps applies only to --gradients emulated", key="--steps")
    if sigma is not None and (not np.isfinite(sigma) or sigma <= 0):
        raise QhlInputError(f"sigma must be positive, got {sigma}", key="--noise")
    if not cluster.experiments:
        raise QhlInputError("the cluster defines no experiments: add an [[experiment]]", source=cluster.source,
                            key="experiment")
    from ..spins.identifiability import unidentifiable_parameters
    model = build_model(cluster, free=free)
    fixed = tuple(unidentifiable_parameters(model))
    if fixed:
        model = replace(model, free=tuple(f for f in model.free if f not in fixed))
    if not model.free:
        raise QhlInputError("no free parameters to fit" + (f" (the signal cannot see {', '.join(fixed)})"
                                                           if fixed else ""), key="free")
    from .nuisance import NuisanceProvider, nuisance_table, parse_nuisance
    kinds = parse_nuisance(nuisance)
    engine = ExactEngine(model)
    truth = model.free_values_hz
    acquisitions = []
    if data_path is None:
        dataset = synthetic_dataset(engine, cluster.experiments, seed=seed, sigma=sigma)
        start = perturbed_start(truth, 0.05 if start_offset is None else start_offset, seed)
        true_hz = truth
    else:
        from .spectrometer import is_spectrometer_path, load_spectrometer_data
        if is_spectrometer_path(data_path):
            dataset, acquisitions = load_spectrometer_data(data_path, cluster, sigma=sigma)
        else:
            from .data_csv import load_signals_csv
            dataset = load_signals_csv(data_path, cluster, sigma=sigma)
        start = perturbed_start(truth, 0.0 if start_offset is None else start_offset, seed)
        true_hz = None
    experiments = [ex for ex in cluster.experiments if ex.name in dataset.signals]
    if gradients == "emulated":
        if shots is None:
            raise QhlInputError("--gradients emulated needs --shots N", key="--shots")
        target = trotter_signal_target(dataset)
        provider = emulated_gradient_provider(model, experiments, shots, seed, steps=steps, signal_target=target,
                                              engine=engine)
        plan = plan_emulated_run(provider, dataset, max_iter, max_minutes, target, planning_progress)
        if plan_ready is not None:
            plan_ready(plan)
        provider.progress = evaluation_progress
    else:
        provider, plan = ExactGradientProvider(engine, experiments), None
    if kinds:
        provider = NuisanceProvider(provider, experiments, kinds)
        start = np.concatenate([start, provider.start_values()])
    result = fit(provider, dataset, start, method=method, max_iter=max_iter, progress=progress)
    P = len(model.free)
    if kinds:
        times = {ex.name: dataset.signals[ex.name][0] for ex in experiments}
        exact = NuisanceProvider(ExactGradientProvider(engine, experiments), experiments, kinds)
        fitted = {n: v[0] for n, v in exact.signals_and_gradients(result.values_hz, times).items()}
        rows = nuisance_table(provider, result.values_hz, result.stderr_hz)
    else:
        fitted = {ex.name: engine.signal(ex, dataset.signals[ex.name][0], result.values_hz) for ex in experiments}
        rows = []
    return LearnReport(result, model, dataset, start[:P], true_hz, fitted, gradients, fixed, rows, acquisitions, plan)
