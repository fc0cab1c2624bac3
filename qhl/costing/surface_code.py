"""Physical footprint on a surface code: distance, physical qubits, factories and wall time.

Model (Gidney and Ekera, "How to factor 2048 bit RSA integers in 8 hours using 20 million noisy
qubits", Quantum 5, 433 (2021); Litinski, "A game of surface codes", Quantum 3, 128 (2019)):
    logical error per patch per code cycle  p_L(d) = 0.1 (100 p)^((d+1)/2)
    (threshold p = 1%: at or above it no distance lowers p_L, so such rates are refused);
    about 2 d^2 physical qubits per logical patch;
    15-to-1 distillation: output T-state error 35 p_in^3 (levels stacked until good enough).
Assumptions stated with the result (common practice unless named): each Clifford layer takes
d code cycles; each T layer takes max(d cycles, reaction time): a lattice-surgery measurement of
d cycles whose outcome must be read and decoded before the next dependent T layer (its
classically controlled correction) can start (REACTION_TIME_S = 10 us, Gidney and Ekera 2021,
from memory); a 15-to-1 factory occupies FACTORY_PATCHES patches and yields one T state per
FACTORY_CYCLES_PER_D * d cycles per distillation level; enough factories that T supply keeps pace
with the T layers (or at most `max_factories`); routing space doubles the data patches
(ROUTING_FACTOR); the failure budget is split equally between data qubits and T states.
Wall time = max(depth-limited time, factory-limited time):
    depth-limited   t_depth max(d tau, t_react) + clifford_layers d tau,
    factory-limited t_count (FACTORY_CYCLES_PER_D d levels tau) / factories;
`limited_by` says which ('reaction', 'code cycles' or 'factories').
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
REACTION_TIME_S = 10e-6

ASSUMPTIONS = {
    "logical_error": "p_L = 0.1 (100 p)^((d+1)/2) per patch per cycle (Gidney and Ekera, Quantum 5, 433 (2021))",
    "patch_qubits": "2 d^2 physical qubits per logical patch (Gidney and Ekera 2021; Litinski, Quantum 3, 128 (2019))",
    "distillation": "15-to-1 output error 35 p^3 per level (Gidney and Ekera 2021)",
    "layer_cycles": "one Clifford layer takes d code cycles (common practice); one T layer takes max(d cycles, "
                    "reaction time)",
    "reaction_time": "10 us from a measurement to the dependent classically controlled correction (Gidney and "
                     "Ekera, Quantum 5, 433 (2021), from memory)",
    "wall_time": "max(T-depth x max(d cycle, reaction) + Clifford layers x d cycles, T-count / factory throughput)",
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
    t_depth: float = 0.0
    reaction_time_s: float = REACTION_TIME_S
    time_depth_limited_s: float = 0.0
    time_factory_limited_s: float = 0.0
    limited_by: str = "code cycles"

    def to_json(self):
        return dict(self.__dict__)


def surface_code_estimate(logical_qubits, gate_layers, t_count, physical_error=1e-3, cycle_time_s=1e-6,
                          failure_budget=0.01, t_depth=0.0, reaction_time_s=REACTION_TIME_S,
                          max_factories=None) -> SurfaceCodeEstimate:
    """Distance, physical qubits and wall time so the whole circuit fails with probability <= budget.

    Args:
        logical_qubits: data qubits of the algorithm.
        gate_layers: logical depth (T layers + Clifford layers).
        t_count: T gates (T states to distil).
        physical_error: p per physical operation, below THRESHOLD.
        cycle_time_s: surface-code cycle time (1 us, Gidney and Ekera 2021).
        failure_budget: allowed total failure probability.
        t_depth: T layers among gate_layers (0: every layer a Clifford layer).
        reaction_time_s: measurement-to-correction latency bounding each T layer.
        max_factories: cap on the number of factories (None: enough to keep pace).

    Raises:
        QhlInputError: p at or above threshold, or non-positive inputs.
    """
    p = check_physical_error(physical_error)
    if not (cycle_time_s > 0 and 0 < failure_budget < 1 and reaction_time_s >= 0):
        raise QhlInputError("cycle time must be positive, the failure budget in (0, 1) and the reaction time >= 0",
                            key="surface-code")
    layers = max(float(gate_layers), 1.0)
    t_layers = min(max(float(t_depth), 0.0), layers)
    c_layers = layers - t_layers
    patches = max(1.0, ROUTING_FACTOR * logical_qubits)
    half = failure_budget / 2
    levels, t_err = 0, p
    while t_count > 0 and t_count * t_err > half:
        levels += 1
        t_err = distilled_error(p, levels)
        if levels > 4:
            break

    def timing(d):
        depth_time = t_layers * max(d * cycle_time_s, reaction_time_s) + c_layers * d * cycle_time_s
        per_state = FACTORY_CYCLES_PER_D * d * max(levels, 1) * cycle_time_s
        factories = 0
        fact_time = 0.0
        if t_count > 0:
            factories = max(1, math.ceil(t_count * per_state / max(depth_time, 1e-300)))
            if max_factories is not None:
                factories = min(factories, int(max_factories))
            fact_time = t_count * per_state / factories
        return depth_time, fact_time, factories

    d = 3
    for _ in range(200):   # cycles depend on d: iterate to a fixed point (monotone in d)
        depth_time, fact_time, factories = timing(d)
        cycles = max(depth_time, fact_time) / cycle_time_s
        d_new = code_distance_for(p, half / (patches * cycles))
        if d_new <= d:
            break
        d = d_new
    depth_time, fact_time, factories = timing(d)
    wall = max(depth_time, fact_time)
    if fact_time > depth_time:
        limited = "factories"
    elif t_layers > 0 and reaction_time_s > d * cycle_time_s:
        limited = "reaction"
    else:
        limited = "code cycles"
    factory_patches = factories * FACTORY_PATCHES * (15 ** max(levels - 1, 0))
    qubits = int(QUBITS_PER_PATCH_PER_D2 * d**2 * (patches + factory_patches))
    return SurfaceCodeEstimate(p, d, logical_error_rate(p, d), wall / cycle_time_s, levels, factories, qubits,
                               wall, cycle_time_s, failure_budget, t_layers, reaction_time_s, depth_time, fact_time,
                               limited)
