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
from .spinning import MAGIC_ANGLE_DEG

__all__ = ["Spin", "Pair", "Delay", "Pulse", "Block", "Experiment", "Cluster", "flat_steps", "refuse_steps",
           "MAX_STEPS", "MIN_DISTANCE_ANGSTROM", "MAX_SPINS", "MAX_POINTS",
           "MAX_FREQUENCY_HZ", "MAX_FIELD_TESLA", "MAX_T_MAX_S", "NOISE_RANGE", "checked_number",
           "check_spin_count", "check_experiment"]

MIN_DISTANCE_ANGSTROM = 0.5

# Accepted ranges of every number in a cluster (the reasons are stated once, here).
MAX_FREQUENCY_HZ = 1e9          # |offset|, |J|, |dipolar| < 1 GHz: above any Larmor frequency in use (common practice)
MAX_FIELD_TESLA = 100.0         # 0 < B <= 100 T: above the strongest NMR magnets, 28 T (common practice)
MAX_COORDINATE_ANGSTROM = 1e6   # |x|, |y|, |z| <= 1e6 angstrom (0.1 mm): far beyond any cluster
MAX_T_MAX_S = 1e3               # 0 < t_max_s <= 1000 s: far beyond any FID (T2 <= seconds, common practice)
MAX_POINTS = 2**20              # 2 <= points <= 1,048,576: 16 MiB per complex signal and per gradient row;
#                                 spectrometers record at most a few 1e5 complex points (common practice)
MAX_SPINNING_HZ = 1e6            # 0 <= spinning_hz <= 1 MHz: above the fastest rotors, about 0.15 MHz (common practice)
MAX_DIPOLAR_SCALE = 10.0        # |dipolar_scale| <= 10 (scaling sequences give |s| <= 1)
NOISE_RANGE = (1e-15, 1e3)      # noise per point relative to S(0) = 1: above round-off, below nonsense
MAX_PPM = 1e6                   # |shift_ppm|, |reference_ppm| <= 1e6 ppm
MAX_SPINS = 1000                # clusters above this are refused before any O(n^2) work
MAX_STEPS = 100_000             # pulses and delays of one experiment once repeats are unrolled: the
#                                 exact engine costs a few sector-matrix products per step
MAX_REPEAT = 100_000            # repeat = N on a block: 1 <= N <= 100,000
MAX_ANGLE_DEG = 36_000.0        # |pulse_deg|, |phase_deg| <= 36,000 degrees (100 turns)
MAX_NESTING_STEPS = 8           # blocks inside blocks: at most 8 levels


def checked_number(value, key, source, *, low=None, high=None, low_open=False, high_open=False,
                   max_abs=None, integer=False):
    """`value` as a float (or int with `integer`), refused unless a finite number in range.

    Rejects bool, strings and other types, integers too large for a float, NaN and inf.
    The message is one line: source, key, the value and the allowed range.
    """
    import numbers

    if isinstance(value, (bool, np.bool_)) or not isinstance(value, numbers.Real):
        raise QhlInputError(f"expected {'an integer' if integer else 'a number'}"
                            f"{_range_text(low, high, low_open, high_open, max_abs, integer)}, "
                            f"got {_short(value)}", source=source, key=key)
    if integer and not isinstance(value, numbers.Integral):
        raise QhlInputError(f"expected an integer{_range_text(low, high, low_open, high_open, max_abs, True)}, "
                            f"got {_short(value)}", source=source, key=key)
    try:
        v = float(value)
    except (OverflowError, ValueError, TypeError):
        v = math.inf if value > 0 else -math.inf
    bad = not math.isfinite(v)
    if not bad and max_abs is not None:
        bad = abs(v) > max_abs
    if not bad and low is not None:
        bad = v <= low if low_open else v < low
    if not bad and high is not None:
        bad = v >= high if high_open else v > high
    if bad:
        sign = "positive " if low == 0 and low_open else ""
        raise QhlInputError(f"expected a finite {sign}{'integer' if integer else 'number'}"
                            f"{_range_text(low, high, low_open, high_open, max_abs, integer)}, got {_short(value)}",
                            source=source, key=key)
    return int(value) if integer else v


def _bytes_text(n: float) -> str:
    for unit, size in (("EiB", 2**60), ("PiB", 2**50), ("TiB", 2**40), ("GiB", 2**30), ("MiB", 2**20)):
        if n >= size:
            return f"{n / size:.3g} {unit}" if n < 2**70 else f"{n / 2**60:.3g} EiB"
    return f"{n:.0f} bytes"


def _short(value) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:24] + f"... ({len(text)} characters)"


def _range_text(low, high, low_open, high_open, max_abs, integer) -> str:
    g = (lambda x: f"{x:,}") if integer else (lambda x: f"{x:g}")
    if max_abs is not None:
        return f" with |value| <= {g(max_abs)}"
    if low is not None and high is not None:
        return f" in {'(' if low_open else '['}{g(low)}, {g(high)}{')' if high_open else ']'}"
    if low is not None:
        return f" {'>' if low_open else '>='} {g(low)}"
    if high is not None:
        return f" {'<' if high_open else '<='} {g(high)}"
    return ""


def _finite(value, what, source):
    return checked_number(value, what, source)


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
class Delay:
    """Free evolution under the experiment's Hamiltonian for `seconds`."""

    seconds: float


@dataclass(frozen=True)
class Pulse:
    """A pulse: ideal R = exp(-i theta sum_k (cos phi Ix_k + sin phi Iy_k)), or finite.

    theta = `angle_deg`, phi = `phase_deg` (0: about +x, 90: about +y), the sum over every spin
    of `isotope` (None: the observed isotope); rho -> R rho R^dag. With `duration_s` the pulse
    lasts that long at constant amplitude, on resonance with the pulsed isotope's reference
    frequency, and the spins evolve under H plus the RF term during it:
        R = exp(-i (H + 2 pi nu1 sum_k (cos phi Ix_k + sin phi Iy_k)) duration_s),
        nu1 = (angle_deg / 360) / duration_s   (Hz; the nominal flip angle sets the amplitude),
    which tends to the ideal pulse as duration_s -> 0.
    """

    angle_deg: float
    phase_deg: float = 0.0
    isotope: str | None = None
    duration_s: float | None = None


@dataclass(frozen=True)
class Block:
    """`steps` run `repeat` times in a row; `name` is the named sequence it came from, if any."""

    steps: tuple
    repeat: int = 1
    name: str | None = None


def flat_steps(steps) -> list:
    """Delays and pulses in the order they act, blocks unrolled `repeat` times."""
    out = []
    for st in steps:
        if isinstance(st, Block):
            inner = flat_steps(st.steps)
            out.extend(inner * st.repeat)
        else:
            out.append(st)
    return out


def has_finite_pulses(experiment) -> bool:
    """True when a pulse of `experiment` has a duration (a finite pulse; Pulse docstring)."""
    return any(isinstance(st, Pulse) and st.duration_s is not None
               for st in flat_steps(getattr(experiment, "steps", ()) or ()))


def refuse_spinning(experiment, what: str) -> None:
    """Refuse a spinning experiment where `what` covers static samples only (not ignore the spinning)."""
    if experiment is not None and float(getattr(experiment, "spinning_hz", 0.0) or 0.0) > 0:
        raise QhlInputError(f"experiment '{experiment.name}' spins ({experiment.spinning_hz:g} Hz), not covered yet "
                            f"by {what} (static samples only)", key="experiment.spinning_hz")


def refuse_steps(experiment, what: str) -> None:
    """Refuse a pulse-sequence experiment where `what` covers free evolution only (not ignore its steps)."""
    if experiment is not None and getattr(experiment, "steps", ()):
        raise QhlInputError(f"experiment '{experiment.name}' has pulse-sequence steps, not covered yet by {what} "
                            f"(free evolution only; the exact engine's signals and gradients cover sequences)",
                            key="experiment.step")


@dataclass(frozen=True)
class Experiment:
    """A free-induction-decay experiment sampled at `points` times from 0 to `t_max_s`.

    `dipolar_scale` multiplies every dipolar term (decoupling, spinning); `noise` is the
    standard deviation per point of each of Re and Im, relative to S(0) = 1.

    `steps` (Delay, Pulse, Block) is an optional preparation between the implicit 90-degree
    excitation (rho0 = sum Ix of the observed spins) and the acquisition: the sampling times
    count from the end of the last step. Without steps the experiment is the plain FID.
    """

    name: str
    t_max_s: float
    points: int
    dipolar_scale: float = 1.0
    noise: float | None = None
    steps: tuple = ()
    spinning_hz: float = 0.0
    spinning_angle_deg: float = MAGIC_ANGLE_DEG

    @property
    def times_s(self) -> np.ndarray:
        """Sampling times linspace(0, t_max_s, points) in seconds."""
        return np.linspace(0.0, self.t_max_s, self.points)


def check_spin_count(n: int, source=None) -> None:
    """Refuse more than MAX_SPINS spins, before anything quadratic in the spin count is built."""
    if n > MAX_SPINS:
        raise QhlInputError(
            f"{n:,} spins: expected at most {MAX_SPINS:,} per cluster (its pairwise distances alone would take "
            f"about {n * n * 24 / 2**30:.2f} GiB and its exact state space 2^{n}); cut smaller clusters with qhl cut",
            source=source, key="spin")


def check_experiment(ex, key="experiment", source=None) -> None:
    """Check one Experiment's numbers against the stated ranges (points, t_max_s, dipolar_scale, noise)."""
    checked_number(ex.t_max_s, key + ".t_max_s", source, low=0, high=MAX_T_MAX_S, low_open=True)
    try:
        checked_number(ex.points, key + ".points", source, low=2, high=MAX_POINTS, integer=True)
    except QhlInputError as e:
        if isinstance(ex.points, int) and ex.points > MAX_POINTS:   # say what it would have cost
            need = 16.0 * min(ex.points, 2**100)
            raise QhlInputError(f"{e} (one complex signal alone would need {_bytes_text(need)})") from None
        raise
    checked_number(ex.dipolar_scale, key + ".dipolar_scale", source, max_abs=MAX_DIPOLAR_SCALE)
    checked_number(getattr(ex, "spinning_hz", 0.0), key + ".spinning_hz", source, low=0, high=MAX_SPINNING_HZ)
    checked_number(getattr(ex, "spinning_angle_deg", MAGIC_ANGLE_DEG), key + ".spinning_angle_deg", source,
                   low=0, high=90)
    if ex.noise is not None:
        checked_number(ex.noise, key + ".noise", source, low=NOISE_RANGE[0], high=NOISE_RANGE[1])
    steps = getattr(ex, "steps", ())
    if not isinstance(steps, tuple):
        raise QhlInputError(f"expected a tuple of steps, got {_short(steps)}", source=source, key=key + ".step")
    count, seconds = _check_steps(steps, key + ".step", source, 0)
    if count > MAX_STEPS:
        raise QhlInputError(f"{count:,} pulses and delays once repeats are unrolled; expected at most "
                            f"{MAX_STEPS:,}", source=source, key=key + ".step")
    if seconds > MAX_T_MAX_S:
        raise QhlInputError(f"the steps last {seconds:g} s; expected at most {MAX_T_MAX_S:g} s", source=source,
                            key=key + ".step")


def _check_steps(steps, key, source, depth):
    """(pulses and delays once unrolled, total delay in s) of a step tuple; refuses bad values."""
    if depth > MAX_NESTING_STEPS:
        raise QhlInputError(f"blocks nested deeper than {MAX_NESTING_STEPS} levels", source=source, key=key)
    count, seconds = 0, 0.0
    for j, st in enumerate(steps):
        where = f"{key}[{j}]"
        if isinstance(st, Delay):
            seconds += checked_number(st.seconds, where + ".delay_s", source, low=0, high=MAX_T_MAX_S,
                                      low_open=True)
            count += 1
        elif isinstance(st, Pulse):
            checked_number(st.angle_deg, where + ".pulse_deg", source, max_abs=MAX_ANGLE_DEG)
            checked_number(st.phase_deg, where + ".phase_deg", source, max_abs=MAX_ANGLE_DEG)
            if getattr(st, "duration_s", None) is not None:
                seconds += checked_number(st.duration_s, where + ".duration_s", source, low=0, high=MAX_T_MAX_S,
                                          low_open=True)
            if st.isotope is not None:
                if not isinstance(st.isotope, str):
                    raise QhlInputError(f"expected an isotope symbol such as \"1H\", got {_short(st.isotope)}",
                                        source=source, key=where + ".isotope")
                try:
                    nucleus(st.isotope)
                except QhlInputError as e:
                    raise QhlInputError(str(e), source=source, key=where + ".isotope") from None
            count += 1
        elif isinstance(st, Block):
            rep = checked_number(st.repeat, where + ".repeat", source, low=1, high=MAX_REPEAT, integer=True)
            if not isinstance(st.steps, tuple) or not st.steps:
                raise QhlInputError("expected a block with at least one step", source=source, key=where + ".steps")
            c, sec = _check_steps(st.steps, where + ".steps", source, depth + 1)
            count += rep * c
            seconds += rep * sec
            if count > MAX_STEPS:     # stop before unrolling anything huge
                return count, seconds
        else:
            raise QhlInputError(f"expected a delay, a pulse or a block, got {_short(st)}", source=source, key=where)
    return count, seconds


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
        b = checked_number(self.field_tesla, "field_tesla", src, low=0, high=MAX_FIELD_TESLA, low_open=True)
        object.__setattr__(self, "field_tesla", b)
        d = self.field_direction
        if not isinstance(d, (list, tuple, np.ndarray)) or len(d) != 3:
            raise QhlInputError(f"expected a non-zero vector [x, y, z], got {_short(d)}", source=src,
                                key="field_direction")
        d = np.array([checked_number(c, "field_direction", src) for c in d])
        biggest = np.max(np.abs(d))
        if biggest == 0:
            raise QhlInputError(f"expected a non-zero vector [x, y, z], got {_short(self.field_direction)}",
                                source=src, key="field_direction")
        d = d / biggest                     # scale first: no overflow or underflow in the norm
        object.__setattr__(self, "field_direction", tuple(float(x) for x in d / np.linalg.norm(d)))
        if not isinstance(self.observe, str):
            raise QhlInputError(f"expected an isotope symbol such as \"1H\", got {_short(self.observe)}",
                                source=src, key="observe")
        try:
            object.__setattr__(self, "observe", nucleus(self.observe).symbol)  # raises on unknown / spin > 1/2
        except QhlInputError as e:
            raise QhlInputError(str(e), source=src, key="observe") from None
        if not self.spins:
            raise QhlInputError("expected at least one [[spin]] entry", source=src, key="spin")
        check_spin_count(len(self.spins), src)
        labels = [s.label for s in self.spins]
        seen = set()
        for i, s in enumerate(self.spins):
            key = f"spin[{i}]"
            if not isinstance(s.label, str) or not s.label or "-" in s.label or ":" in s.label:
                raise QhlInputError(f"expected a non-empty label without '-' or ':', got {_short(s.label)}",
                                    source=src, key=key + ".label")
            if s.label in seen:
                raise QhlInputError(f"duplicate label '{s.label}'", source=src, key=key + ".label")
            seen.add(s.label)
            try:
                if not isinstance(s.isotope, str):
                    raise QhlInputError(f"expected an isotope symbol, got {_short(s.isotope)}")
                nucleus(s.isotope)
            except QhlInputError as e:
                raise QhlInputError(str(e), source=src, key=key + ".isotope") from None
            checked_number(s.offset_hz, key + ".offset_hz", src, max_abs=MAX_FREQUENCY_HZ)
            if s.position_angstrom is not None:
                p = s.position_angstrom
                if not isinstance(p, (list, tuple, np.ndarray)) or len(p) != 3:
                    raise QhlInputError("expected [x, y, z] in angstrom", source=src, key=key + ".position_angstrom")
                for c in p:
                    checked_number(c, key + ".position_angstrom", src, max_abs=MAX_COORDINATE_ANGSTROM)
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
        label_set = set(labels)
        for k, pr in enumerate(self.pairs):
            key = f"pair[{k}]"
            if (not isinstance(pr.spins, (list, tuple)) or len(pr.spins) != 2
                    or not all(isinstance(x, str) for x in pr.spins) or pr.spins[0] == pr.spins[1]):
                raise QhlInputError(f"expected spins = [a, b] with two different labels, got {_short(pr.spins)}",
                                    source=src, key=key + ".spins")
            for lab in pr.spins:
                if lab not in label_set:
                    raise QhlInputError(f"unknown spin {_short(lab)}", source=src, key=key + ".spins")
            fs = frozenset(pr.spins)
            if fs in pair_seen:
                raise QhlInputError(f"pair {pr.spins[0]}-{pr.spins[1]} given twice", source=src, key=key + ".spins")
            pair_seen.add(fs)
            if pr.j_hz is not None:
                checked_number(pr.j_hz, key + ".j_hz", src, max_abs=MAX_FREQUENCY_HZ)
            if pr.dipolar_hz is not None:
                checked_number(pr.dipolar_hz, key + ".dipolar_hz", src, max_abs=MAX_FREQUENCY_HZ)
        names = set()
        for k, ex in enumerate(self.experiments):
            key = f"experiment[{k}]"
            if not isinstance(ex.name, str):
                raise QhlInputError(f"expected a name, got {_short(ex.name)}", source=src, key=key + ".name")
            if ex.name in names:
                raise QhlInputError(f"duplicate experiment name '{ex.name}'", source=src, key=key + ".name")
            names.add(ex.name)
            check_experiment(ex, key, src)
            present = {nucleus(sp.isotope).symbol for sp in self.spins}
            for j, st in enumerate(flat_steps(ex.steps) if ex.steps else ()):
                if isinstance(st, Pulse) and st.isotope is not None and nucleus(st.isotope).symbol not in present:
                    raise QhlInputError(f"step {j + 1} (counted with repeats unrolled) is a pulse on {st.isotope}, but "
                                        f"no spin has that isotope (spins: {', '.join(sorted(present))})",
                                        source=src, key=key + ".step.isotope")

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
