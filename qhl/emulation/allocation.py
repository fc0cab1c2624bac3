"""The negative log-likelihood gradient from emulated dS/dh, with optimal shots across time points.

Convention (qhl.learning): C = sum_{x,t} |S - D|^2 / (2 sigma^2), so
    g_n = sum_{x,t} [Re r Re dS_n + Im r Im dS_n] / sigma^2 = sum_k a_k X_k ,
a sum over strata k = (experiment x, time t, part) of weights a_k = r_part / sigma^2 times the
estimated X_k = Re or Im dS_n(t). With N_k shots on stratum k and single-shot standard
deviation s_k, Var g_n = sum_k a_k^2 s_k^2 / N_k; for a total N it is smallest at
N_k proportional to |a_k| s_k (Neyman allocation, J. Neyman, J. R. Stat. Soc. 97, 558 (1934)),
giving Var_opt = (sum_k |a_k| s_k)^2 / N, against Var_uniform = K sum_k a_k^2 s_k^2 / N for K
strata. Uniform allocation matches Var_opt only with N K sum a^2 s^2 / (sum |a| s)^2 shots; the
difference is reported as shots saved. s_k is the Popoviciu bound on the single-shot value
(range / 2 = W ||w_in||_inf ||A||_inf for the family, common practice) unless given.
"""

from dataclasses import dataclass

import numpy as np

from ..base.errors import QhlInputError
from ..circuits.gradient_circuits import gradient_circuit, signal_circuit
from .derivatives import as_generator, check_shots, estimate_family
from .runner import FamilyRunner, outcome_values

__all__ = ["neyman_allocation", "single_shot_bound", "NllGradient", "nll_gradient"]


def neyman_allocation(weights, sigmas, total: int) -> np.ndarray:
    """Integer shots N_k ~ |a_k| s_k summing to `total` (largest remainders; >= 1 where a_k s_k != 0).

    Raises:
        QhlInputError: total smaller than the number of active strata.
    """
    score = np.abs(np.asarray(weights, float)) * np.asarray(sigmas, float)
    active = score > 0
    total = int(total)
    if active.sum() == 0:
        return np.zeros(len(score), int)
    if total < active.sum():
        raise QhlInputError(f"{total} shots cannot cover {int(active.sum())} time points", key="--shots")
    raw = (total - active.sum()) * score / score.sum()
    n = np.floor(raw).astype(int) + active
    rest = total - n.sum()
    order = np.argsort(-(raw - np.floor(raw)))
    n[order[:rest]] += 1
    return n


def single_shot_bound(family) -> float:
    """Popoviciu bound on the single-shot standard deviation: W max|w_in| max|a| (module docstring)."""
    return float(family.insertions.total_weight * family.inputs.max_weight
                 * np.max(np.abs(outcome_values(family))))


@dataclass(frozen=True)
class NllGradient:
    """g_n estimates with standard errors and the shot accounting of one allocation.

    Attributes:
        names: parameters; gradient, stderr: (P,) in nats/Hz.
        shots: shots spent on the gradient (all parameters); uniform_equivalent: shots uniform
            allocation would need for the same variance (predicted from the s_k); shots_saved.
        allocation: 'optimal' or 'uniform'; circuits_run; seconds.
    """

    names: tuple
    gradient: np.ndarray
    stderr: np.ndarray
    shots: int
    uniform_equivalent: int
    shots_saved: int
    allocation: str
    circuits_run: int
    seconds: float


def nll_gradient(model, experiments, dataset, shots: int, steps, seed=0, order: int = 2,
                 allocation: str = "optimal", residuals=None, signal_shots: int = 2000, noise=None,
                 parameters=None) -> NllGradient:
    """Estimate the NLL gradient g_n with `shots` shots per parameter spread over the strata.

    Args:
        model: HamiltonianModel (its values are where g is taken).
        experiments: the Experiment objects named in `dataset` (qhl.exact.likelihood.Dataset).
        shots: total shots per parameter; steps: Trotter steps (int) or callable(time) -> int.
        allocation: 'optimal' (Neyman) or 'uniform'.
        residuals: {experiment name: complex r (T,)}; default from emulated signals with
            `signal_shots` shots per part and point (independent shots: g stays unbiased).
        parameters: names (default the free ones).

    Returns:
        NllGradient.

    Raises:
        QhlInputError: unknown allocation, shots too few for the strata, bad shots.
    """
    if allocation not in ("optimal", "uniform"):
        raise QhlInputError(f"unknown allocation '{allocation}': expected optimal or uniform", key="allocation")
    shots = check_shots(shots)
    rng = as_generator(seed)
    names = tuple(model.free if parameters is None else parameters)
    steps_for = steps if callable(steps) else (lambda t: int(steps))
    by_name = {ex.name: ex for ex in experiments}
    strata = []   # (experiment, time, part, a_k) with weights independent of the parameter
    for name, (times, data, sigma) in dataset.signals.items():
        ex = by_name[name]
        sig = np.broadcast_to(np.asarray(sigma, float), np.shape(times))
        if residuals is not None:
            r = np.asarray(residuals[name], complex)
        else:
            r = np.array([estimate_family(signal_circuit(model, ex, t, steps_for(t), order), signal_shots, rng).value
                          if t > 0 else 1.0 + 0j for t in times]) - np.asarray(data, complex)
        for t, rt, s in zip(times, r, sig):
            if t > 0:
                strata.append((ex, float(t), "re", rt.real / s ** 2))
                strata.append((ex, float(t), "im", rt.imag / s ** 2))
    grad, err = np.zeros(len(names)), np.zeros(len(names))
    spent = equivalent = circuits = 0
    seconds = 0.0
    for p, nm in enumerate(names):
        fams = {}
        for ex, t, _, _ in strata:
            key = (ex.name, t)
            if key not in fams:
                fams[key] = gradient_circuit(model, ex, nm, t, steps_for(t), order)
        a = np.array([s[3] for s in strata])
        sd = np.array([single_shot_bound(fams[(s[0].name, s[1])]) for s in strata])
        if allocation == "optimal":
            n = neyman_allocation(a, sd, shots)
        else:
            n = np.full(len(a), shots // len(a)) + (np.arange(len(a)) < shots % len(a))
        runners = {}
        for k, ((ex, t, part, ak), nk) in enumerate(zip(strata, n)):
            if nk == 0:
                continue
            key = (ex.name, t)
            runners.setdefault(key, FamilyRunner(fams[key], noise))
            e = runners[key].run(int(nk), rng, part)
            grad[p] += ak * e.value
            err[p] += ak ** 2 * (e.variance if nk >= 2 else sd[k] ** 2) / nk
            circuits += e.circuits_run
            seconds += e.seconds
        spent += int(n.sum())
        opt = np.sum(np.abs(a) * sd) ** 2
        equivalent += int(np.ceil(n.sum() * len(a) * np.sum(a ** 2 * sd ** 2) / opt)) if opt > 0 else int(n.sum())
    saved = equivalent - spent if allocation == "optimal" else 0
    return NllGradient(names, grad, np.sqrt(err), spent, equivalent if allocation == "optimal" else spent,
                       saved, allocation, circuits, seconds)
