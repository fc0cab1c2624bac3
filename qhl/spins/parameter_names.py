"""Parameter names and the default free set (no heavy imports: the CLI reads these at start-up).

A parameter is named `kind:LABELS`: `offset:H1`, `dipolar:H1-H2`, `j:H1-H2`. Free parameters are
chosen by glob patterns over these names.
"""

__all__ = ["DEFAULT_FREE"]

DEFAULT_FREE = ("offset:*", "dipolar:*")
