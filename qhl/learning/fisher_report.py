"""How well a cluster's experiments determine its free parameters: the `qhl fisher` job.

Fisher information of the Gaussian likelihood (qhl.exact.likelihood):
    F_mn = sum_{x,t} Re[conj(dS_m) dS_n] / sigma^2          (1/Hz^2)
Cramer-Rao bound: any unbiased estimator has std(h_n) >= sqrt((F^-1)_nn) (H. Cramer,
"Mathematical Methods of Statistics", 1946; C. R. Rao, Bull. Calcutta Math. Soc. 37, 81 (1945)).
The eigenvectors of F are the parameter combinations the data determine independently;
eigenvalue lambda gives that combination a bound 1/sqrt(lambda). Eigenvalues below
rcond * max eigenvalue mark unlearnable combinations; parameters with weight in them get an
infinite bound.
"""

from dataclasses import dataclass

import numpy as np

from ..exact.engine import ExactEngine
from ..exact.engine_choice import make_engine
from ..base.errors import QhlInputError
from ..exact.likelihood import cramer_rao_bounds, fisher_information
from ..spins.model import DEFAULT_FREE, build_model

__all__ = ["FisherReport", "fisher_report", "report_from_fisher", "WEIGHT_TOL", "describe_combination"]

def describe_combination(combination: dict) -> str:
    """'+0.707*offset:A -0.707*offset:B' for a {name: weight} combination."""
    return " ".join(f"{w:+.3f}*{n}" for n, w in combination.items())


# Components smaller than this are left out when an unlearnable combination is printed.
WEIGHT_TOL = 1e-3


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
    """

    names: tuple
    values_hz: np.ndarray
    fisher: np.ndarray
    crb_hz: np.ndarray
    eigenvalues: np.ndarray
    eigenvectors: np.ndarray
    unlearnable: list
    unlearnable_mask: np.ndarray

    @property
    def singular(self) -> bool:
        return bool(self.unlearnable)

    def to_json(self) -> dict:
        return {"parameters": list(self.names), "values_hz": self.values_hz, "fisher": self.fisher,
                "crb_hz": self.crb_hz, "eigenvalues": self.eigenvalues,
                "eigenvectors": self.eigenvectors.T,  # one row per eigenvalue
                "unlearnable": self.unlearnable}


def report_from_fisher(names, values_hz, fisher, rcond: float = 1e-10) -> FisherReport:
    """A FisherReport from a Fisher matrix already computed (e.g. at a fit)."""
    bounds, evals, evecs, mask = cramer_rao_bounds(fisher, rcond=rcond)
    # eigh fixes eigenvectors only up to sign: make the largest component positive.
    signs = np.sign(evecs[np.argmax(np.abs(evecs), axis=0), np.arange(evecs.shape[1])])
    evecs = evecs * np.where(signs == 0, 1.0, signs)[None, :]
    unlearnable = [{"eigenvalue": float(evals[k]),
                    "combination": {n: float(w) for n, w in zip(names, evecs[:, k]) if abs(w) > WEIGHT_TOL}}
                   for k in np.flatnonzero(mask)]
    return FisherReport(tuple(names), np.asarray(values_hz, float), np.asarray(fisher, float), bounds,
                        evals, evecs, unlearnable, np.asarray(mask, bool))


def fisher_report(cluster, free=DEFAULT_FREE, sigma=None, experiments=None, free_values_hz=None,
                  rcond: float = 1e-10, engine=None, method: str = "exact") -> FisherReport:
    """Fisher matrix and Cramer-Rao bounds of `cluster`'s experiments at its parameter values.

    Args:
        cluster: the Cluster (its experiments and their `noise` define the data).
        free: glob patterns of free parameters.
        sigma: noise per point overriding each experiment's `noise`.
        experiments: subset of the cluster's experiments (default all).
        free_values_hz: where to evaluate (default the cluster's values).
        rcond: relative eigenvalue threshold for unlearnable combinations.
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
    return report_from_fisher(model.free, values, fisher, rcond)
