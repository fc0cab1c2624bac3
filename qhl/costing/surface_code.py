"""Physical footprint on a surface code: distance, physical qubits, factories and wall time.

Model (Gidney and Ekera, "How to factor 2048 bit RSA integers in 8 hours using 20 million noisy
qubits", Quantum 5, 433 (2021); Litinski, "A game of surface codes", Quantum 3, 128 (2019)):
    logical error per patch per code cycle  p_L(d) = 0.1 (100 p)^((d+1)/2)
    (threshold p = 1%: at or above it no distance lowers p_L, so such rates are refused);
    about 2 d^2 physical qubits per logical patch;
    15-to-1 distillation: output T-state error 35 p_in^3 (levels stacked until good enough).
Assumptions stated with the result (common practice unless named): each logical gate layer takes
d code cycles; a 15-to-1 factory occupies FACTORY_PATCHES patches and yields one T state per
FACTORY_CYCLES_PER_D * d cycles; enough factories that T supply keeps pace with the gate layers;
routing space doubles the data patches (ROUTING_FACTOR); the failure budget is split equally
between data qubits and T states.
"""

from dataclasses import dataclass
import math

from ..base.errors import QhlInputError

__all__ = ["THRESHOLD", "logical_error_rate", "code_distance_for", "distilled_error", "SurfaceCodeEstimate",
           "surface_code_estimate", "check_physical_error", "ASSUMPTIONS"]

THRESHOLD = 0.01
QUBITS_PER_PATCH_PER_D2 = 2
FACTORY_PATCHES = 16
FACTORY_CYCLES_PER_D = 10
ROUTING_FACTOR = 2.0

ASSUMPTIONS = {
    "logical_error": "p_L = 0.1 (100 p)^((d+1)/2) per patch per cycle (Gidney and Ekera, Quantum 5, 433 (2021))",
    "patch_qubits": "2 d^2 physical qubits per logical patch (Gidney and Ekera 2021; Litinski, Quantum 3, 128 (2019))",
    "distillation": "15-to-1 output error 35 p^3 per level (Gidney and Ekera 2021)",
    "layer_cycles": "one logical gate layer takes d code cycles (common practice)",
    "factory": f"one 15-to-1 factory = {FACTORY_PATCHES} patches, one T state per {FACTORY_CYCLES_PER_D} d cycles "
               "(from memory)",
    "routing": f"routing space: data patches times {ROUTING_FACTOR:g} (common practice)",
    "failure_split": "failure budget split equally between data errors and T-state errors (a choice)",
}


def check_physical_error(p):
    """Refuse a physical error rate that is not in (0, THRESHOLD), saying why."""
    try:
        p = float(p)
    except (TypeError, ValueError):
        raise QhlInputError(f"expected a number, got {p!r}", key="physical-error") from None
    if not math.isfinite(p) or p <= 0:
        raise QhlInputError(f"expected a positive physical error rate, got {p!r}", key="physical-error")
    if p >= THRESHOLD:
        raise QhlInputError(f"p = {p:g} is at or above the surface-code threshold {THRESHOLD:g}: with "
                            f"p_L = 0.1 (100 p)^((d+1)/2) and 100 p >= 1 no code distance lowers the logical "
                            f"error rate", key="physical-error")
    return p


def logical_error_rate(p, d):
    """p_L = 0.1 (100 p)^((d+1)/2) per logical patch per code cycle.

    Example:
        >>> f"{logical_error_rate(1e-3, 27):.1e}"
        '1.0e-15'
    """
    return 0.1 * (100.0 * p) ** ((d + 1) / 2)


def code_distance_for(p, target):
    """Smallest odd d >= 3 with logical_error_rate(p, d) <= target."""
    check_physical_error(p)
    if not target > 0:
        raise QhlInputError(f"target logical error must be positive, got {target!r}", key="failure")
    # 0.1 x^((d+1)/2) <= target  <=>  (d+1)/2 >= log(target/0.1)/log(x), x = 100 p < 1
    need = math.log(target / 0.1) / math.log(100.0 * p)
    d = max(3, 2 * math.ceil(need) - 1)
    if d % 2 == 0:
        d += 1
    while logical_error_rate(p, d) > target:   # rounding guard
        d += 2
    while d > 3 and logical_error_rate(p, d - 2) <= target:
        d -= 2
    return d


def distilled_error(p, levels):
    """T-state error after `levels` rounds of 15-to-1 distillation (35 p^3 per level)."""
    e = p
    for _ in range(levels):
        e = 35.0 * e**3
    return e


@dataclass(frozen=True)
class SurfaceCodeEstimate:
    """Physical estimate for one fault-tolerant circuit (see the module docstring's assumptions)."""

    physical_error: float
    code_distance: int
    logical_error_per_cycle: float
    code_cycles: float
    distillation_levels: int
    factories: int
    physical_qubits: int
    wall_time_s: float
    cycle_time_s: float
    failure_budget: float

    def to_json(self):
        return dict(self.__dict__)


def surface_code_estimate(logical_qubits, gate_layers, t_count, physical_error=1e-3, cycle_time_s=1e-6,
                          failure_budget=0.01) -> SurfaceCodeEstimate:
    """Distance, physical qubits and wall time so the whole circuit fails with probability <= budget.

    Args:
        logical_qubits: data qubits of the algorithm.
        gate_layers: logical depth (each layer d code cycles).
        t_count: T gates (T states to distil).
        physical_error: p per physical operation, below THRESHOLD.
        cycle_time_s: surface-code cycle time (1 us, Gidney and Ekera 2021).
        failure_budget: allowed total failure probability.

    Raises:
        QhlInputError: p at or above threshold, or non-positive inputs.
    """
    p = check_physical_error(physical_error)
    if not (cycle_time_s > 0 and 0 < failure_budget < 1):
        raise QhlInputError("cycle time must be positive and the failure budget in (0, 1)", key="surface-code")
    layers = max(float(gate_layers), 1.0)
    patches = max(1.0, ROUTING_FACTOR * logical_qubits)
    half = failure_budget / 2
    d = 3
    for _ in range(200):   # cycles depend on d: iterate to a fixed point (monotone in d)
        cycles = layers * d
        d_new = code_distance_for(p, half / (patches * cycles))
        if d_new <= d:
            break
        d = d_new
    cycles = layers * d
    levels, t_err = 0, p
    while t_count > 0 and t_count * t_err > half:
        levels += 1
        t_err = distilled_error(p, levels)
        if levels > 4:
            break
    factories = 0
    if t_count > 0:
        per_factory = cycles / (FACTORY_CYCLES_PER_D * d * max(levels, 1))
        factories = max(1, math.ceil(t_count / max(per_factory, 1e-300)))
    factory_patches = factories * FACTORY_PATCHES * (15 ** max(levels - 1, 0))
    qubits = int(QUBITS_PER_PATCH_PER_D2 * d**2 * (patches + factory_patches))
    return SurfaceCodeEstimate(p, d, logical_error_rate(p, d), cycles, levels, factories, qubits,
                               cycles * cycle_time_s, cycle_time_s, failure_budget)
