"""Near-term shots of a whole learning run: what each optimiser evaluation needs, times the evaluations.

Per evaluation of the cost (qhl.learning's optimisers; duck-typed here, qhl.learning is a later stage):
    signals   every residual d - S(theta) needs S at each stratum (experiment x, time point j,
              Re | Im). A single shot of the normalised-signal estimator lies in [-kappa, kappa]
              (kappa = observed spins, qhl.circuits.state_prep), so a standard error f sigma_x
              needs at most kappa^2 / (f sigma_x)^2 shots (variance bound, common practice);
              sigma_x is the experiment's noise (DEFAULT_NOISE if it has none) and f = 1 by default
              (the estimate adds at most the data's own variance to each residual: a choice).
    'cg', 'lbfgs'  signals + one full NLL gradient (optimal allocation over strata);
    'gn' (Levenberg-Marquardt), 'lm'  signals + the Jacobian: every component dS_k/dh_n to eps
              (the Fisher matrix J^T J / sigma^2 needs each component, not only their weighted sum).
Evaluations: from a fit when one is given (its `evaluations`, else its `iterations`; its
`method`), else the `iterations` setting (one evaluation per iteration: a lower bound for line
searches, which evaluate more than once per iteration).
"""

from dataclasses import dataclass
import math

from ..base.errors import QhlInputError

__all__ = ["METHOD_NEEDS", "DEFAULT_NOISE", "LearningRunCost", "signal_shots", "evaluations_from",
           "learning_run_cost", "ASSUMPTIONS"]

METHOD_NEEDS = {"gn": "jacobian", "lm": "jacobian", "cg": "gradient", "lbfgs": "gradient"}
DEFAULT_NOISE = 1e-3

ASSUMPTIONS = {
    "learning_run": "per evaluation: signals at every stratum to the data noise (kappa^2/sigma^2 shots each) + "
                    "the NLL gradient (cg, lbfgs) or the full Jacobian, every component to eps (gn/lm); "
                    "evaluations from the fit when given, else the iterations setting (one per iteration)",
}


@dataclass(frozen=True)
class LearningRunCost:
    """Shots of one learning run (see the module docstring)."""

    method: str
    needs: str
    evaluations: int
    evaluations_source: str
    shots_signals_per_evaluation: int
    shots_derivatives_per_evaluation: int
    shots_per_evaluation: int
    shots_total: int

    def to_json(self):
        return dict(self.__dict__)


def signal_shots(experiments, kappa: float, precision_factor: float = 1.0) -> int:
    """sum over experiments of 2 points kappa^2 / (f sigma_x)^2 (Re and Im at each time point).

    Example:
        >>> from types import SimpleNamespace as E
        >>> signal_shots([E(points=10, noise=1e-2)], kappa=2.0)
        800000
    """
    if not precision_factor > 0:
        raise QhlInputError(f"expected a positive signal precision factor, got {precision_factor!r}", key="signals")
    total = 0
    for ex in experiments:
        sigma = float(ex.noise) if getattr(ex, "noise", None) else DEFAULT_NOISE
        total += 2 * int(ex.points) * math.ceil(kappa**2 / (precision_factor * sigma) ** 2)
    return int(total)


def evaluations_from(value, method="gn"):
    """(evaluations, method, source) from an int or a fit-like object (`.fit`, `.evaluations`,
    `.iterations`, `.method`)."""
    obj = getattr(value, "fit", value)
    if hasattr(obj, "iterations"):
        n = int(getattr(obj, "evaluations", 0) or 0) or int(obj.iterations)
        return max(n, 1), str(getattr(obj, "method", method)), "fit"
    n = int(value)
    if n < 1:
        raise QhlInputError(f"iterations must be >= 1, got {value}", key="iterations")
    return n, method, "setting"


def learning_run_cost(signals: int, gradient: int, jacobian: int, iterations=50, method: str = "gn") -> LearningRunCost:
    """Shots of a learning run.

    Args:
        signals: shots for all signal strata of one evaluation (`signal_shots`).
        gradient: shots of one full NLL gradient; jacobian: shots of every Jacobian component.
        iterations: an int, or a fit (qhl.learning FitResult or LearnReport; duck-typed).
        method: 'gn', 'lm', 'cg' or 'lbfgs' (a fit's own method wins).
    """
    n, method, source = evaluations_from(iterations, method)
    if method not in METHOD_NEEDS:
        raise QhlInputError(f"unknown learning method {method!r}: expected one of {', '.join(METHOD_NEEDS)}",
                            key="method")
    needs = METHOD_NEEDS[method]
    deriv = int(jacobian if needs == "jacobian" else gradient)
    per = int(signals) + deriv
    return LearningRunCost(method, needs, n, source, int(signals), deriv, per, n * per)
