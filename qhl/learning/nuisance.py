"""Nuisance parameters of measured FIDs, fitted together with the Hamiltonian parameters.

Model of experiment x's data at the sampling times t_k (qhl's convention, S(0) = 1):
    M_x(t) = A_x exp(i phi_x) E_x(t + tau) S_x(t + tau; h)
    E_x(u) = exp(-a_x u / T_x) exp(-g_x (u / T_x)^2),   T_x = the experiment's t_max_s
with
    scale:X     A_x      overall scale (receiver gain, normalisation), dimensionless, start 1
    phase:X     phi_x    receiver (zero-order) phase in radians, start 0
    decay:X     a_x      exponential decay over the window: T2 = T_x / a_x (a = 0: none), start 0
    gauss:X     g_x      Gaussian decay over the window: exp(-(u/T_G)^2) with T_G = T_x / sqrt(g_x), start 0
    deadtime_us tau      dead time in microseconds, one for all experiments: the data point k was taken
                         at t_k + tau after the excitation (first points missing), start 0
The decay parameters are measured over each experiment's own window and the dead time in
microseconds so that every nuisance direction of the Fisher matrix is of the same order as
the Hamiltonian ones (a rate in 1/s or a time in s would put eigenvalues 1e15 apart and make
the rank test of qhl.learning.fisher_report meaningless). Negative a or g (growth) are allowed:
the fit reports what the data say. Which envelope to use (common practice): exponential T2 for
relaxation and unresolved couplings in liquids, Gaussian for many weak couplings to spins outside
the cluster in solids; both may be fitted together.

Derivatives (analytic, chained with the provider's dS/dh; u = t + tau):
    dM/dh_n = A e^{i phi} E(u) dS/dh_n(u)
    dM/dA   = M / A,    dM/dphi = i M,
    dM/da   = -(u / T) M,    dM/dg = -(u / T)^2 M,
    dM/dtau = 1e-6 [ (-a / T - 2 g u / T^2) M + A e^{i phi} E(u) S'(u) ]   (tau in microseconds)
S'(u) comes from the exact engine's line list S(u) = sum_k c_k exp(2 pi i f_k u)
(qhl.exact.engine.ExactEngine.transitions): S'(u) = sum_k 2 pi i f_k c_k exp(2 pi i f_k u), exact.
The Fisher matrix of the fit (qhl.learning.fitting: F = sum Re[conj(dM_m) dM_n] / sigma^2) thus
holds every nuisance parameter, and their Cramer-Rao bounds come from its inverse like the others.
Reported in physical units by `nuisance_table` (T2 = T/a, T_G = T/sqrt(g) with first-order error
propagation: sd(T2) = T sd(a) / a^2, sd(T_G) = T sd(g) / (2 g^(3/2)); A. Papoulis, "Probability,
Random Variables and Stochastic Processes", 1991, sec. 7-2, linearisation).
"""

import numpy as np

from ..base.errors import QhlInputError
from ..exact.provider import GradientProvider

__all__ = ["NUISANCE_KINDS", "parse_nuisance", "NuisanceProvider", "nuisance_table", "apply_nuisance"]

NUISANCE_KINDS = ("scale", "phase", "decay", "gauss", "deadtime")
_ALIASES = {"t2": "decay", "exp": "decay", "gaussian": "gauss", "dead": "deadtime", "dead-time": "deadtime"}
_PER_EXPERIMENT = ("scale", "phase", "decay", "gauss")
_START = {"scale": 1.0, "phase": 0.0, "decay": 0.0, "gauss": 0.0, "deadtime": 0.0}
DEADTIME_NAME = "deadtime_us"


def parse_nuisance(spec) -> tuple:
    """'scale,phase,t2' (or a list) -> ('scale', 'phase', 'decay'); '' or None -> (); 'all' -> every kind."""
    if spec is None:
        return ()
    items = spec.split(",") if isinstance(spec, str) else list(spec)
    out = []
    for item in items:
        k = str(item).strip().lower()
        if not k:
            continue
        if k == "all":
            return NUISANCE_KINDS
        k = _ALIASES.get(k, k)
        if k not in NUISANCE_KINDS:
            raise QhlInputError(f"unknown nuisance parameter {str(item)[:40]!r}: expected a comma-separated list of "
                                f"{', '.join(NUISANCE_KINDS)} (t2 = decay) or all", key="--nuisance")
        if k not in out:
            out.append(k)
    return tuple(k for k in NUISANCE_KINDS if k in out)


def envelope(times, a, g, window):
    """E(u) = exp(-a u/T - g (u/T)^2) (module docstring)."""
    x = np.asarray(times, float) / window
    return np.exp(-a * x - g * x * x)


def apply_nuisance(signal, times, window, scale=1.0, phase=0.0, decay=0.0, gauss=0.0):
    """A e^{i phi} E(t) S(t): what a spectrometer adds to an ideal signal (for synthetic tests and demos)."""
    return scale * np.exp(1j * phase) * envelope(times, decay, gauss, window) * np.asarray(signal, complex)


class NuisanceProvider(GradientProvider):
    """Wraps a GradientProvider: its parameters followed by the nuisance parameters (module docstring).

    Args:
        inner: the provider of S and dS/dh (e.g. ExactGradientProvider).
        experiments: the Experiment objects fitted (their t_max_s are the decay windows).
        kinds: nuisance kinds (parse_nuisance); 'deadtime' needs an inner provider with an exact
            engine (`engine` and `experiments` attributes, as ExactGradientProvider has).

    Example:
        >>> from qhl import demo_cluster, build_model, ExactEngine
        >>> from qhl.exact.provider import ExactGradientProvider
        >>> c = demo_cluster(); eng = ExactEngine(build_model(c, free="offset:*"))
        >>> p = NuisanceProvider(ExactGradientProvider(eng, c.experiments[:1]), c.experiments[:1], ("scale", "decay"))
        >>> p.parameter_names[-2:]
        ('scale:static', 'decay:static')
    """

    def __init__(self, inner: GradientProvider, experiments, kinds):
        self.inner = inner
        self.kinds = parse_nuisance(kinds)
        self.noisy = bool(getattr(inner, "noisy", False))
        self.experiments = {ex.name: ex for ex in experiments}
        self.n_inner = len(inner.parameter_names)
        if "deadtime" in self.kinds and not (hasattr(inner, "engine") and hasattr(inner, "experiments")):
            raise QhlInputError("the dead time needs the exact engine's time derivative: use --gradients exact",
                                key="--nuisance")
        names = []
        for ex in experiments:
            names += [f"{k}:{ex.name}" for k in _PER_EXPERIMENT if k in self.kinds]
        if "deadtime" in self.kinds:
            names.append(DEADTIME_NAME)
        self.nuisance_names = tuple(names)
        self.parameter_names = tuple(inner.parameter_names) + self.nuisance_names
        self._index = {n: self.n_inner + k for k, n in enumerate(names)}

    @property
    def progress(self):
        return getattr(self.inner, "progress", None)

    @progress.setter
    def progress(self, value):
        self.inner.progress = value

    def start_values(self) -> np.ndarray:
        """Starting values of the nuisance parameters (scale 1, everything else 0)."""
        return np.array([_START[n.split(":")[0] if ":" in n else "deadtime"] for n in self.nuisance_names])

    def _value(self, values, kind, name, default):
        k = self._index.get(f"{kind}:{name}" if kind != "deadtime" else DEADTIME_NAME)
        return default if k is None else float(values[k])

    def _time_derivative(self, name, h, u):
        f, c = self.inner.engine.transitions(self.inner.experiments[name], h)
        return (np.exp(2j * np.pi * np.outer(u, f)) * (2j * np.pi * f * c)[None, :]).sum(axis=1)

    def signals_and_gradients(self, values_hz, times_by_experiment):
        values = np.asarray(values_hz, float)
        if values.shape != (len(self.parameter_names),):
            raise QhlInputError(f"expected {len(self.parameter_names)} values, got shape {values.shape}", key="values")
        h = values[: self.n_inner]
        tau_us = self._value(values, "deadtime", "", 0.0)
        tau = tau_us * 1e-6
        shifted = {n: np.asarray(t, float) + tau for n, t in times_by_experiment.items()}
        inner = self.inner.signals_and_gradients(h, shifted)
        out = {}
        for name, u in shifted.items():
            if name not in self.experiments:
                raise QhlInputError(f"no experiment named '{name}'", key="experiment")
            window = self.experiments[name].t_max_s
            s, ds = inner[name]
            A = self._value(values, "scale", name, 1.0)
            phi = self._value(values, "phase", name, 0.0)
            a = self._value(values, "decay", name, 0.0)
            g = self._value(values, "gauss", name, 0.0)
            x = u / window
            factor = A * np.exp(1j * phi) * np.exp(-a * x - g * x * x)
            m = factor * s
            grad = np.zeros((len(self.parameter_names), u.size), complex)
            grad[: self.n_inner] = factor[None, :] * ds
            for kind, d in (("scale", m / A if A != 0 else np.exp(1j * phi) * np.exp(-a * x - g * x * x) * s),
                            ("phase", 1j * m), ("decay", -x * m), ("gauss", -x * x * m)):
                k = self._index.get(f"{kind}:{name}")
                if k is not None:
                    grad[k] = d
            k = self._index.get(DEADTIME_NAME)
            if k is not None:
                ds_dt = self._time_derivative(name, h, u)
                grad[k] = 1e-6 * ((-a / window - 2 * g * u / window ** 2) * m + factor * ds_dt)
            out[name] = (m, grad)
        return out


def nuisance_table(provider: NuisanceProvider, values, stderr) -> list:
    """Fitted nuisance parameters in fit units and physical units, with their Cramer-Rao bounds.

    Returns:
        [{'name', 'kind', 'experiment', 'value', 'stderr', 'unit', and where it applies
          'physical': {'name', 'value', 'stderr', 'unit'}}] (T2 and T_G in seconds, given where the fitted
        decay is positive; module docstring).
    """
    rows = []
    for name in provider.nuisance_names:
        k = provider._index[name]
        v, e = float(values[k]), float(stderr[k])
        if name == DEADTIME_NAME:
            rows.append({"name": name, "kind": "deadtime", "experiment": None, "value": v, "stderr": e,
                         "unit": "us"})
            continue
        kind, ex = name.split(":", 1)
        row = {"name": name, "kind": kind, "experiment": ex, "value": v, "stderr": e,
               "unit": {"scale": "1", "phase": "rad", "decay": "1", "gauss": "1"}[kind]}
        window = provider.experiments[ex].t_max_s
        if kind == "decay":
            if v > 0:
                row["physical"] = {"name": f"T2:{ex}", "value": window / v, "unit": "s", "stderr": window * e / v ** 2}
        elif kind == "gauss":
            if v > 0:
                row["physical"] = {"name": f"TG:{ex}", "value": float(window / np.sqrt(v)), "unit": "s",
                                   "stderr": float(window * e / (2 * v ** 1.5))}
        rows.append(row)
    return rows
