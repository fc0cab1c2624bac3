"""Gaussian likelihood of complex NMR data and the Fisher information.

Convention: each point's Re and Im parts carry independent Gaussian noise of standard deviation
sigma (relative to S(0) = 1). With residual r = S(h) - D,
    NLL(h)   = sum_{x,t} |r|^2 / (2 sigma^2)           (constants dropped)
    grad_n   = sum Re[conj(r) dS/dh_n] / sigma^2
    Hess_mn  = sum Re[conj(dS_m) dS_n + conj(r) d2S/dh_m dh_n] / sigma^2
    F_mn     = sum Re[conj(dS_m) dS_n] / sigma^2       (Fisher information; Gauss-Newton term)
(S. M. Kay, "Fundamentals of Statistical Signal Processing: Estimation Theory", 1993, ch. 3 and 15.)
"""

from dataclasses import dataclass

import numpy as np

from ..base.errors import QhlInputError

__all__ = ["Dataset", "negative_log_likelihood", "fisher_information", "cramer_rao_bounds",
           "synthetic_dataset"]


@dataclass(frozen=True)
class Dataset:
    """Signals per experiment: {name: (times_s, data complex, sigma per point)}."""

    signals: dict

    def sigma(self, name):
        return self.signals[name][2]


def _sigma_for(experiment, sigma):
    s = sigma if sigma is not None else experiment.noise
    if s is None:
        raise QhlInputError(f"experiment '{experiment.name}' has no noise: set noise = ... in its [[experiment]] "
                            f"or give --noise SIGMA (sigma= in Python)", key="noise")
    s = np.broadcast_to(np.asarray(s, float), (experiment.points,))
    if np.any(~np.isfinite(s)) or np.any(s <= 0):
        raise QhlInputError("sigma must be positive and finite", key="sigma")
    return s


def synthetic_dataset(engine, experiments, seed=0, sigma=None, free_values_hz=None) -> Dataset:
    """Signals of the model plus Gaussian noise (sigma per Re/Im part; default each experiment's noise)."""
    rng = np.random.default_rng(seed)
    out = {}
    for ex in experiments:
        s = _sigma_for(ex, sigma)
        clean = engine.signal(ex, free_values_hz=free_values_hz)
        noise = rng.normal(size=ex.points) + 1j * rng.normal(size=ex.points)
        out[ex.name] = (ex.times_s, clean + s * noise, s)
    return Dataset(out)


def negative_log_likelihood(engine, experiments, data: Dataset, free_values_hz=None, order: int = 1):
    """NLL and (order >= 1) its gradient, (order >= 2) its Hessian over the free parameters.

    Returns:
        (nll, gradient or None, hessian or None)
    """
    P = len(engine.model.free)
    nll, grad, hess = 0.0, np.zeros(P), np.zeros((P, P))
    for ex in experiments:
        times, d, s = data.signals[ex.name]
        w = 1.0 / np.asarray(s, float) ** 2
        if order >= 2:
            sig, g, h = engine.hessian(ex, times, free_values_hz)
        elif order >= 1:
            sig, g = engine.gradient(ex, times, free_values_hz)
        else:
            sig = engine.signal(ex, times, free_values_hz)
        r = sig - d
        nll += 0.5 * float(np.sum(w * np.abs(r) ** 2))
        if order >= 1:
            grad += np.real(np.conj(r)[None, :] * g) @ w
        if order >= 2:
            hess += np.real((np.conj(g) * w) @ g.T)
            hess += np.real(np.einsum("t,pqt->pq", np.conj(r) * w, h))
    return nll, (grad if order >= 1 else None), (hess if order >= 2 else None)


def fisher_information(engine, experiments, free_values_hz=None, sigma=None) -> np.ndarray:
    """F_mn = sum_{x,t} Re[conj(dS_m) dS_n] / sigma^2 over experiments (1/Hz^2)."""
    P = len(engine.model.free)
    fisher = np.zeros((P, P))
    for ex in experiments:
        s = _sigma_for(ex, sigma)
        _, g = engine.gradient(ex, None, free_values_hz)
        fisher += np.real((np.conj(g) / s**2) @ g.T)
    return 0.5 * (fisher + fisher.T)


def cramer_rao_bounds(fisher, rcond: float = 1e-10):
    """Cramer-Rao standard deviations sqrt(diag(F^-1)) in Hz (Cramer 1946; Rao 1945).

    Directions with eigenvalue below rcond * max eigenvalue are unlearnable: parameters with
    weight in them get an infinite bound.

    Returns:
        (bounds (P,), eigenvalues ascending, eigenvectors as columns, mask of unlearnable eigenvectors)
    """
    fisher = np.asarray(fisher, float)
    evals, evecs = np.linalg.eigh(fisher)
    top = max(float(evals[-1]), 0.0) if evals.size else 0.0
    bad = evals <= rcond * top if top > 0 else np.ones_like(evals, bool)
    good = ~bad
    inv_diag = np.sum(evecs[:, good] ** 2 / evals[good][None, :], axis=1)
    touched = np.any(np.abs(evecs[:, bad]) > 1e-6, axis=1) if np.any(bad) else np.zeros(len(evals), bool)
    bounds = np.sqrt(inv_diag)
    bounds[touched] = np.inf
    return bounds, evals, evecs, bad
