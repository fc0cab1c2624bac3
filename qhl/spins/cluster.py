"""The spin cluster and its experiments, as plain validated values.

Units: positions in angstrom, frequencies in Hz, times in seconds, field in tesla.
Chemical shifts become rotating-frame offsets through
    offset_hz = (shift_ppm - reference_ppm) * 1e-6 * nu0,  nu0 = |gamma| B / 2 pi,
so a positive offset means a line above the carrier (common practice).
"""

from dataclasses import dataclass
import math

import numpy as np

from ..base.errors import QhlInputError
from .nuclei import larmor_frequency_hz, nucleus

__all__ = ["Spin", "Pair", "Experiment", "Cluster", "MIN_DISTANCE_ANGSTROM"]

MIN_DISTANCE_ANGSTROM = 0.5


def _finite(value, what, source):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise QhlInputError(f"expected a number, got {value!r}", source=source, key=what) from None
    if not math.isfinite(v):
        raise QhlInputError(f"expected a finite number, got {value!r}", source=source, key=what)
    return v


@dataclass(frozen=True)
class Spin:
    """One spin-1/2 nucleus: label, isotope symbol, optional position (angstrom), offset (Hz)."""

    label: str
    isotope: str
    position_angstrom: tuple | None = None
    offset_hz: float = 0.0


@dataclass(frozen=True)
class Pair:
    """Couplings of two spins named by label: J (Hz) and an optional dipolar override (Hz)."""

    spins: tuple
    j_hz: float | None = None
    dipolar_hz: float | None = None


@dataclass(frozen=True)
class Experiment:
    """A free-induction-decay experiment sampled at `points` times from 0 to `t_max_s`.

    `dipolar_scale` multiplies every dipolar term (decoupling, spinning); `noise` is the
    standard deviation per point of each of Re and Im, relative to S(0) = 1.
    """

    name: str
    t_max_s: float
    points: int
    dipolar_scale: float = 1.0
    noise: float | None = None

    @property
    def times_s(self) -> np.ndarray:
        """Sampling times linspace(0, t_max_s, points) in seconds."""
        return np.linspace(0.0, self.t_max_s, self.points)


@dataclass(frozen=True)
class Cluster:
    """A validated nuclear-spin cluster in a static field, with its experiments.

    Raises:
        QhlInputError: on any inconsistent value (message names `source` and the key).
    """

    field_tesla: float
    observe: str
    spins: tuple
    pairs: tuple = ()
    experiments: tuple = ()
    field_direction: tuple = (0.0, 0.0, 1.0)
    source: str = "<cluster>"
    name: str = "cluster"

    def __post_init__(self):
        src = self.source
        b = _finite(self.field_tesla, "field_tesla", src)
        if b <= 0:
            raise QhlInputError(f"expected a positive field in tesla, got {b}", source=src, key="field_tesla")
        d = np.asarray(self.field_direction, dtype=float)
        if d.shape != (3,) or not np.all(np.isfinite(d)) or np.linalg.norm(d) == 0:
            raise QhlInputError("expected a non-zero vector [x, y, z]", source=src, key="field_direction")
        object.__setattr__(self, "field_direction", tuple(d / np.linalg.norm(d)))
        nucleus(self.observe)  # raises on unknown / spin > 1/2
        object.__setattr__(self, "observe", nucleus(self.observe).symbol)
        if not self.spins:
            raise QhlInputError("expected at least one [[spin]] entry", source=src, key="spin")
        labels = [s.label for s in self.spins]
        seen = set()
        for i, s in enumerate(self.spins):
            key = f"spin[{i}]"
            if not isinstance(s.label, str) or not s.label or "-" in s.label or ":" in s.label:
                raise QhlInputError(f"expected a non-empty label without '-' or ':', got {s.label!r}",
                                    source=src, key=key + ".label")
            if s.label in seen:
                raise QhlInputError(f"duplicate label '{s.label}'", source=src, key=key + ".label")
            seen.add(s.label)
            try:
                nucleus(s.isotope)
            except QhlInputError as e:
                raise QhlInputError(str(e), source=src, key=key + ".isotope") from None
            _finite(s.offset_hz, key + ".offset_hz", src)
            if s.position_angstrom is not None:
                p = s.position_angstrom
                if len(p) != 3:
                    raise QhlInputError("expected [x, y, z] in angstrom", source=src, key=key + ".position_angstrom")
                for c in p:
                    _finite(c, key + ".position_angstrom", src)
        if self.observe not in {nucleus(s.isotope).symbol for s in self.spins}:
            raise QhlInputError(f"no spin of the observed isotope {self.observe}", source=src, key="observe")
        placed = [(s.label, np.asarray(s.position_angstrom, float)) for s in self.spins
                  if s.position_angstrom is not None]
        if len(placed) > 1:
            pos = np.array([p for _, p in placed])
            dist = np.linalg.norm(pos[:, None, :] - pos[None, :, :], axis=-1)
            dist[np.diag_indices(len(placed))] = np.inf
            i, j = np.unravel_index(np.argmin(dist), dist.shape)
            if dist[i, j] < MIN_DISTANCE_ANGSTROM:
                raise QhlInputError(
                    f"spins {placed[i][0]} and {placed[j][0]} are {dist[i, j]:.3f} A apart; "
                    f"expected at least {MIN_DISTANCE_ANGSTROM} A", source=src, key="position_angstrom")
        pair_seen = set()
        for k, pr in enumerate(self.pairs):
            key = f"pair[{k}]"
            if len(pr.spins) != 2 or pr.spins[0] == pr.spins[1]:
                raise QhlInputError("expected spins = [a, b] with two different labels", source=src, key=key + ".spins")
            for lab in pr.spins:
                if lab not in labels:
                    raise QhlInputError(f"unknown spin '{lab}'", source=src, key=key + ".spins")
            fs = frozenset(pr.spins)
            if fs in pair_seen:
                raise QhlInputError(f"pair {pr.spins[0]}-{pr.spins[1]} given twice", source=src, key=key + ".spins")
            pair_seen.add(fs)
            if pr.j_hz is not None:
                _finite(pr.j_hz, key + ".j_hz", src)
            if pr.dipolar_hz is not None:
                _finite(pr.dipolar_hz, key + ".dipolar_hz", src)
        names = set()
        for k, ex in enumerate(self.experiments):
            key = f"experiment[{k}]"
            if ex.name in names:
                raise QhlInputError(f"duplicate experiment name '{ex.name}'", source=src, key=key + ".name")
            names.add(ex.name)
            if _finite(ex.t_max_s, key + ".t_max_s", src) <= 0:
                raise QhlInputError(f"expected t_max_s > 0, got {ex.t_max_s}", source=src, key=key + ".t_max_s")
            if not isinstance(ex.points, (int, np.integer)) or isinstance(ex.points, bool) or ex.points < 2:
                raise QhlInputError(f"expected an integer points >= 2, got {ex.points!r}", source=src, key=key + ".points")
            _finite(ex.dipolar_scale, key + ".dipolar_scale", src)
            if ex.noise is not None and _finite(ex.noise, key + ".noise", src) <= 0:
                raise QhlInputError(f"expected noise > 0, got {ex.noise}", source=src, key=key + ".noise")

    @property
    def labels(self) -> list:
        return [s.label for s in self.spins]

    @property
    def n_spins(self) -> int:
        return len(self.spins)

    def spin(self, label: str) -> Spin:
        return self.spins[self.labels.index(label)]

    def experiment(self, name: str) -> Experiment:
        for ex in self.experiments:
            if ex.name == name:
                return ex
        raise QhlInputError(f"no experiment named '{name}': expected one of "
                            f"{', '.join(e.name for e in self.experiments)}", source=self.source, key="experiment")

    def larmor_hz(self, isotope: str) -> float:
        return larmor_frequency_hz(isotope, self.field_tesla)
