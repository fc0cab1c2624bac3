"""Choosing the engine for a job: exact (eigendecomposition) or typical (random pure states).

Rule for method='auto': the exact engine when the cluster has at most its spin limit and its
memory estimate (qhl.exact.engine.estimate_memory_bytes, 256 time points) fits in 80 % of the
available memory; otherwise the typical engine, with a one-line note saying why.
"""

from ..base.errors import QhlInputError
from ..base.memory import available_memory_bytes
from .sector_operators import SectorSpace
from .sectors import conserves_magnetisation

__all__ = ["METHODS", "exact_engine_fits", "make_engine"]

METHODS = ("exact", "typical", "auto")


def exact_engine_fits(model, fraction: float = 0.8):
    """(fits, estimate in bytes, reason) for the exact engine on `model`."""
    from .engine import _MAX_SPINS, estimate_memory_bytes
    n = model.n_spins
    symmetric = conserves_magnetisation([p.generator for p in model.parameters], model.isotopes)
    dims = SectorSpace(model.isotopes, symmetric).dims
    need = estimate_memory_bytes(n, dims, 256)
    if n > _MAX_SPINS:
        return False, need, f"{n} spins exceed the exact engine's limit of {_MAX_SPINS}"
    avail = fraction * available_memory_bytes()
    if need > avail:
        return False, need, f"the exact engine would need {need / 2**30:.2f} GiB of {avail / 2**30:.2f} GiB available"
    return True, need, ""


def make_engine(model, method: str = "auto", replicas: int = 4, seed: int = 0, progress=None,
                precision: str | None = None):
    """(engine, method used, note) for `method` in METHODS.

    The typical engine's answers carry standard errors (qhl.exact.typicality); `note` says why
    'auto' chose it (empty when it chose the exact engine). `precision`: the exact engine's
    ("double", "single" or "fast": qhl.exact.engine); the typical engine runs "single" for both
    reduced precisions. None (default): "double" for the exact engine (the reference) and "single"
    for the typical one, whose float32 rounding (at most 7e-8 of S(0), measured at 10-18 spins;
    tests/test_typicality_fast.py) stays below 1e-4 of its own standard error, while it needs about
    a third less memory (18 spins, 2 replicas, one core: 0.30 against 0.46 GiB peak, 1.13x less
    CPU time, measured beside another job); "double" asks for double precision in both.
    """
    if method not in METHODS:
        raise QhlInputError(f"expected one of {', '.join(METHODS)}, got {method!r}", key="method")
    note = ""
    if method == "auto":
        fits, _, reason = exact_engine_fits(model)
        method = "exact" if fits else "typical"
        if not fits:
            note = f"{reason}: using the typical (pure-state) engine, with error bars"
    if method == "exact":
        from .engine import ExactEngine
        return ExactEngine(model, precision=precision or "double"), "exact", note
    from .typicality import TypicalEngine
    return TypicalEngine(model, replicas=replicas, seed=seed, progress=progress,
                         precision="double" if precision == "double" else "single"), "typical", note
