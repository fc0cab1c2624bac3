"""What every task of a scan shares (light: the CLI reads the defaults at start-up)."""

from dataclasses import dataclass
import math
import numbers

from ..base.errors import QhlInputError
from ..spins.parameter_names import DEFAULT_FREE

__all__ = ["ScanSettings"]


@dataclass(frozen=True)
class ScanSettings:
    """What every task of a scan shares: one FID (t_max_s, points, noise), the free parameters and the rotor
    (spinning_hz > 0: the FID of a sample spinning at the magic angle; its levels are Floquet quasi-energies,
    qhl.survey.diagnostics)."""

    t_max_s: float = 5e-4
    points: int = 64
    noise: float = 1e-3
    free: tuple = DEFAULT_FREE
    spinning_hz: float = 0.0

    def __post_init__(self):
        object.__setattr__(self, "free", tuple(self.free))
        for key in ("t_max_s", "noise"):
            v = getattr(self, key)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise QhlInputError(f"expected a positive number, got {v!r}", key=key)
        from ..spins.cluster import MAX_SPINNING_HZ
        v = self.spinning_hz
        if isinstance(v, bool) or not (isinstance(v, (int, float)) and math.isfinite(v) and 0 <= v <= MAX_SPINNING_HZ):
            raise QhlInputError(f"expected a rate in [0, {MAX_SPINNING_HZ:g}] Hz, got {v!r}", key="spinning_hz")
        if not self.free:
            raise QhlInputError("expected at least one free-parameter pattern", key="free")
        if not isinstance(self.points, numbers.Integral) and not isinstance(self.points, bool) or self.points < 2:
            raise QhlInputError(f"expected an integer >= 2, got {self.points!r}", key="points")
