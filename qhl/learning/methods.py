"""Names of the optimisers of qhl.learning.fitting (no heavy imports: the CLI reads them at start-up)."""

__all__ = ["METHODS"]

METHODS = ("gn", "cg", "lbfgs")
