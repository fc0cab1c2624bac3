"""How well a cluster's experiments determine its free parameters: the `qhl fisher` job.

Fisher information of the Gaussian likelihood (qhl.exact.likelihood):
    F_mn = sum_{x,t} Re[conj(dS_m) dS_n] / sigma^2          (1/Hz^2)
Cramer-Rao bound: any unbiased estimator has std(h_n) >= sqrt((F^-1)_nn) (H. Cramer,
"Mathematical Methods of Statistics", 1946; C. R. Rao, Bull. Calcutta Math. Soc. 37, 81 (1945)).
The eigenvectors of F are the parameter combinations the data determine independently;
eigenvalue lambda gives that combination a bound 1/sqrt(lambda).

Cut-off (UNLEARNABLE_RULE): a combination is unlearnable when
  - the model says the signal cannot see it (qhl.spins.identifiability: exact symmetry), or
  - it has no effect within floating point: lambda <= ZERO_RTOL_PER_PARAMETER * P * ||F||_2
    (eigh's rounding is about eps ||F||_2; common practice), or
  - its bound 1/sqrt(lambda) exceeds BOUND_LIMIT_FACTOR times the largest |parameter value|
    (at least BOUND_LIMIT_MIN_HZ): the data could not even fix its order of magnitude.
The bound scales with the noise sigma, so the cut-off is set in the parameters' own unit (Hz).
A parameter's bound is inf when its weight in an unlearnable combination exceeds WEIGHT_TOL;
otherwise it is sqrt((F^+)_nn) with the pseudo-inverse restricted to the learnable combinations.
"""

from dataclasses import dataclass

import numpy as np

from ..exact.engine import ExactEngine
from ..exact.engine_choice import make_engine
from ..base.errors import QhlInputError
from ..exact.likelihood import fisher_information
from ..spins.model import DEFAULT_FREE, build_model

__all__ = ["FisherReport", "fisher_report", "report_from_fisher", "WEIGHT_TOL", "describe_combination",
           "learnable_split", "crb_relative_error", "BOUND_LIMIT_FACTOR", "BOUND_LIMIT_MIN_HZ",
           "ZERO_RTOL_PER_PARAMETER", "UNLEARNABLE_RULE"]

def describe_combination(combination: dict) -> str:
    """'+0.707*offset:A -0.707*offset:B' for a {name: weight} combination."""
    return " ".join(f"{w:+.3f}*{n}" for n, w in combination.items())


# Components smaller than this are left out when an unlearnable combination is printed, and a
# parameter with less weight than this in every unlearnable combination keeps a finite bound.
WEIGHT_TOL = 1e-3
# A combination whose Cramer-Rao bound exceeds this factor times the largest |value| is unlearnable.
BOUND_LIMIT_FACTOR = 1e3
BOUND_LIMIT_MIN_HZ = 1.0
# An eigenvalue below this times P * ||F||_2 is zero within floating point (about 64 eps).
ZERO_RTOL_PER_PARAMETER = 64 * np.finfo(float).eps
UNLEARNABLE_RULE = ("a combination is unlearnable when the model says the signal cannot see it, when it has "
                    "no effect (eigenvalue <= {zero:.1e} 1/Hz^2, floating-point zero) or when its bound "
                    "1/sqrt(eigenvalue) exceeds {limit:.3g} Hz ({factor:g} x the largest |value|)")


def crb_relative_error(crb_hz, values_hz) -> float:
    """The Cramer-Rao-limited relative error sqrt(sum_n CRB_n^2) / ||h|| (Euclidean norms)."""
    return float(np.sqrt(np.sum(np.asarray(crb_hz, float) ** 2)) / np.linalg.norm(values_hz))


def learnable_split(fisher, values_hz, invisible=None):
    """Eigen-decomposition of F with the unlearnable combinations marked (module docstring).

    Args:
        fisher: (P, P) Fisher matrix, 1/Hz^2.
        values_hz: (P,) parameter values (they set the bound limit).
        invisible: optional (P, k) orthonormal combinations the model says are invisible
            (qhl.spins.identifiability.invisible_directions); F is projected off them first.

    Returns:
        (bounds (P,), eigenvalues ascending, eigenvectors as columns, unlearnable mask, limit_hz, zero_tol)
    """
    fisher = 0.5 * (np.asarray(fisher, float) + np.asarray(fisher, float).T)
    P = fisher.shape[0]
    if invisible is not None and np.size(invisible):
        # Eigen-decompose F on the visible complement; the invisible combinations get eigenvalue 0.
        from scipy.linalg import null_space
        comp = null_space(np.asarray(invisible).T)
        ev_c, w = np.linalg.eigh(comp.T @ fisher @ comp)
        evals = np.concatenate([np.zeros(invisible.shape[1]), ev_c])
        evecs = np.hstack([invisible, comp @ w])
        order = np.argsort(evals, kind="stable")
        evals, evecs = evals[order], evecs[:, order]
    else:
        evals, evecs = np.linalg.eigh(fisher)
    norm = max(float(np.max(np.abs(evals))), 0.0) if P else 0.0
    zero_tol = ZERO_RTOL_PER_PARAMETER * P * norm
    limit_hz = max(BOUND_LIMIT_FACTOR * float(np.max(np.abs(values_hz), initial=0.0)), BOUND_LIMIT_MIN_HZ)
    with np.errstate(divide="ignore", invalid="ignore"):
        dir_bound = np.where(evals > zero_tol, 1.0 / np.sqrt(np.maximum(evals, 1e-300)), np.inf)
    bad = (evals <= zero_tol) | (dir_bound > limit_hz) if norm > 0 else np.ones(P, bool)
    good = ~bad
    bounds = np.sqrt(np.sum(evecs[:, good] ** 2 / evals[good][None, :], axis=1))
    weight_bad = np.sqrt(np.sum(evecs[:, bad] ** 2, axis=1))
    bounds[weight_bad > WEIGHT_TOL] = np.inf
    return bounds, evals, evecs, bad, limit_hz, zero_tol


@dataclass(frozen=True)
class FisherReport:
    """Fisher matrix (1/Hz^2), CRB per parameter (Hz), eigen-decomposition and unlearnable combinations.

    Attributes:
        names: free parameter names (rows/columns of `fisher`).
        values_hz: the parameter values the matrix was evaluated at.
        fisher: (P, P).
        crb_hz: (P,) sqrt(diag F^-1); inf for parameters in an unlearnable combination.
        eigenvalues: ascending (P,), 1/Hz^2.
        eigenvectors: columns (P, P), matching `eigenvalues`.
        unlearnable: list of {'eigenvalue', 'combination': {name: weight}}.
        unlearnable_mask: (P,) bools, True for eigenvalues of unlearnable combinations.
        bound_limit_hz, zero_tol: the cut-off used (module docstring).
        hidden: parameters the default free set left out (qhl.spins.model.HamiltonianModel.hidden).
    """

    names: tuple
    values_hz: np.ndarray
    fisher: np.ndarray
    crb_hz: np.ndarray
    eigenvalues: np.ndarray
    eigenvectors: np.ndarray
    unlearnable: list
    unlearnable_mask: np.ndarray
    bound_limit_hz: float = float("inf")
    zero_tol: float = 0.0
    hidden: tuple = ()

    @property
    def rule(self) -> str:
        """The cut-off in words, with its numbers."""
        return UNLEARNABLE_RULE.format(zero=self.zero_tol, limit=self.bound_limit_hz, factor=BOUND_LIMIT_FACTOR)

    @property
    def crb_relative_error(self) -> float:
        """sqrt(sum CRB^2) / ||h|| over the free parameters (inf if any is unlearnable)."""
        return crb_relative_error(self.crb_hz, self.values_hz)

    @property
    def singular(self) -> bool:
        return bool(self.unlearnable)

    def to_json(self) -> dict:
        return {"parameters": list(self.names), "values_hz": self.values_hz, "fisher": self.fisher,
                "crb_hz": self.crb_hz, "eigenvalues": self.eigenvalues,
                "eigenvectors": self.eigenvectors.T,  # one row per eigenvalue
                "unlearnable": self.unlearnable, "crb_relative_error": self.crb_relative_error,
                "unlearnable_rule": self.rule, "bound_limit_hz": self.bound_limit_hz,
                "zero_eigenvalue_tol": self.zero_tol, "hidden": list(self.hidden)}


def report_from_fisher(names, values_hz, fisher, invisible=None, hidden=()) -> FisherReport:
    """A FisherReport from a Fisher matrix already computed (e.g. at a fit); cut-off in the module docstring."""
    bounds, evals, evecs, mask, limit_hz, zero_tol = learnable_split(fisher, values_hz, invisible)
    # eigh fixes eigenvectors only up to sign: make the largest component positive.
    signs = np.sign(evecs[np.argmax(np.abs(evecs), axis=0), np.arange(evecs.shape[1])])
    evecs = evecs * np.where(signs == 0, 1.0, signs)[None, :]
    unlearnable = [{"eigenvalue": float(evals[k]),
                    "combination": {n: float(w) for n, w in zip(names, evecs[:, k]) if abs(w) > WEIGHT_TOL}}
                   for k in np.flatnonzero(mask)]
    return FisherReport(tuple(names), np.asarray(values_hz, float), np.asarray(fisher, float), bounds,
                        evals, evecs, unlearnable, np.asarray(mask, bool), limit_hz, zero_tol, tuple(hidden))


def fisher_report(cluster, free=DEFAULT_FREE, sigma=None, experiments=None, free_values_hz=None,
                  engine=None, method: str = "exact") -> FisherReport:
    """Fisher matrix and Cramer-Rao bounds of `cluster`'s experiments at its parameter values.

    Args:
        cluster: the Cluster (its experiments and their `noise` define the data).
        free: glob patterns of free parameters.
        sigma: noise per point overriding each experiment's `noise`.
        experiments: subset of the cluster's experiments (default all).
        free_values_hz: where to evaluate (default the cluster's values).
        method: 'exact', 'typical' or 'auto' engine (qhl.exact.engine_choice) when no engine is given.

    Returns:
        FisherReport.

    Raises:
        QhlInputError: no experiments, an experiment without noise and no sigma, sigma <= 0.

    Example:
        >>> from qhl import demo_cluster
        >>> rep = fisher_report(demo_cluster(), free="offset:*")
        >>> rep.crb_hz.shape, rep.singular
        ((6,), False)
    """
    if engine is None:
        model = build_model(cluster, free=free)
        engine = ExactEngine(model) if method == "exact" else make_engine(model, method)[0]
    model = engine.model
    experiments = list(cluster.experiments if experiments is None else experiments)
    if not experiments:
        raise QhlInputError("the cluster defines no experiments: add an [[experiment]]", source=cluster.source,
                            key="experiment")
    if not model.free:
        raise QhlInputError("no free parameters", key="free")
    values = model.free_values_hz if free_values_hz is None else np.asarray(free_values_hz, float)
    fisher = fisher_information(engine, experiments, values, sigma)
    from ..spins.identifiability import invisible_directions
    return report_from_fisher(model.free, values, fisher, invisible_directions(model), model.hidden)
