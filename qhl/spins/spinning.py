"""Sample spinning: the time-dependent factor on each dipolar term, in closed form.

Convention (one crystallite; secular dipolar coupling, high field):
  * The cluster frame is the sample frame. At rotor phase 0 (t = 0, the start of the
    acquisition) the static field points along the cluster's `field_direction` f, so the
    spinning sample starts in the static experiment's orientation.
  * The rotor axis R lies at `spinning_angle_deg` theta_R from f, in the plane of f and the
    cluster x axis (the y axis when f is along x): R = cos(theta_R) f + sin(theta_R) e,
    e = the unit part of x perpendicular to f. A crystallite of a powder may turn that plane about
    f by its rotor azimuth psi (the model's optional `rotor_azimuth_deg`, right-handed about f):
    e -> cos(psi) e + sin(psi) (f x e). psi = 0 (every model build_model makes) is the rule above.
  * The sample turns about R at `spinning_hz` nu_r (right-handed, phi = 2 pi nu_r t), so a
    pair's unit vector r turns to Rot(R, phi) r (Rodrigues' formula) and the angle Theta(t)
    between it and the field obeys
        cos Theta(t) = a0 + a1 cos(phi) + b1 sin(phi),
        a0 = (R.r)(R.f),  a1 = r.f - a0,  b1 = (R x r).f.
  * The coupling of pair ij at time t is b_ij P2(cos Theta_ij(t)), P2(c) = (3 c^2 - 1)/2, with
    b_ij the dipolar constant (qhl.spins.dipolar). The model's parameter dipolar:i-j is the
    static coupling h_ij = b_ij P2(r.f) (its value at t = 0), so in a spinning experiment
        s_n(t) = dipolar_scale * P2(cos Theta(t)) / P2(r.f)
    multiplies h_n G_n in H(t) = 2 pi sum_n s_n(t) h_n G_n. A pair whose static factor P2(r.f) is
    below STATIC_FACTOR_FLOOR in magnitude (it lies at the magic angle to the static field) cannot
    carry its spinning dependence through h_ij and is refused; so is a pair without positions
    (its direction is unknown). Offsets (isotropic shifts; no shielding anisotropy in the model),
    J couplings and RF terms do not depend on orientation: s_n = 1.
  * Crystallites of a powder (qhl.exact.powder.CrystalliteModel, optional model attribute
    `dipolar_constants` true) take the other parametrisation: dipolar:i-j is the pair's dipolar
    constant b_ij (Hz, qhl.spins.dipolar), orientation free, and
        s_n(t) = dipolar_scale * P2(cos Theta(t)),
    so h_n s_n(t) is the same coupling with no division: a pair at the magic angle at t = 0 is
    an ordinary crystallite (P2 = 0 there), not a refusal. A dipolar parameter without a
    direction (an explicit dipolar_hz) is orientation independent there: s_n = dipolar_scale.
Expanding P2 of the cosine above gives five Fourier coefficients per term,
    s_n(t) = c0 + c1 cos(phi) + d1 sin(phi) + c2 cos(2 phi) + d2 sin(2 phi),
    c0 = [3 (a0^2 + (a1^2 + b1^2)/2) - 1]/2,  c1 = 3 a0 a1,  d1 = 3 a0 b1,
    c2 = 3 (a1^2 - b1^2)/4,  d2 = 3 a1 b1 / 2       (all divided by P2(r.f), times dipolar_scale),
so averages over any time interval are exact (SpinningFactors.mean). The rotor-period average c0
equals P2(R.r) P2(cos theta_R) (the spherical-harmonic addition theorem; M. M. Maricq and
J. S. Waugh, J. Chem. Phys. 70, 3300 (1979)): zero at the magic angle, arccos(1/sqrt 3).
Checked against a direct rotation of the vectors in tests/test_spinning_factors.py.
"""

from dataclasses import dataclass

import numpy as np

from ..base.errors import QhlInputError

__all__ = ["MAGIC_ANGLE_DEG", "STATIC_FACTOR_FLOOR", "SpinningFactors", "rotor_axis", "spinning_factors",
           "is_spinning"]

MAGIC_ANGLE_DEG = float(np.degrees(np.arccos(1 / np.sqrt(3))))    # 54.7356 degrees
STATIC_FACTOR_FLOOR = 1e-3


def is_spinning(experiment) -> bool:
    """True for an experiment with a spinning rate above zero."""
    return experiment is not None and float(getattr(experiment, "spinning_hz", 0.0) or 0.0) > 0.0


def rotor_axis(field_direction, angle_deg: float, azimuth_deg: float = 0.0) -> np.ndarray:
    """Unit rotor axis R at `angle_deg` from the unit field direction f, turned by `azimuth_deg` psi
    about f (module convention; psi = 0: in the plane of f and the cluster x axis)."""
    f = np.asarray(field_direction, float)
    f = f / np.linalg.norm(f)
    x = np.array([1.0, 0.0, 0.0]) if abs(f[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    e = x - (x @ f) * f
    e /= np.linalg.norm(e)
    if azimuth_deg:
        psi = np.radians(azimuth_deg)
        e = np.cos(psi) * e + np.sin(psi) * np.cross(f, e)
    th = np.radians(angle_deg)
    return np.cos(th) * f + np.sin(th) * e


def _fourier_of_p2(a0, a1, b1):
    c0 = 0.5 * (3 * (a0 * a0 + 0.5 * (a1 * a1 + b1 * b1)) - 1)
    return np.array([c0, 3 * a0 * a1, 3 * a0 * b1, 0.75 * (a1 * a1 - b1 * b1), 1.5 * a1 * b1])


@dataclass(frozen=True)
class SpinningFactors:
    """s_n(t) of every parameter of a model in one spinning experiment (module docstring).

    Attributes:
        fourier: (P, 5) coefficients (c0, c1, d1, c2, d2) per parameter, model parameter order.
        spinning_hz: rotor frequency nu_r (Hz); phi = 2 pi nu_r t.
    """

    fourier: np.ndarray
    spinning_hz: float

    @property
    def period_s(self) -> float:
        return 1.0 / self.spinning_hz

    @property
    def time_dependent(self) -> np.ndarray:
        """(P,) bools: parameters whose factor changes with the rotor phase."""
        return np.any(self.fourier[:, 1:] != 0, axis=1)

    def at(self, times) -> np.ndarray:
        """(T, P) instantaneous factors s_n(t)."""
        phi = 2 * np.pi * self.spinning_hz * np.atleast_1d(np.asarray(times, float))
        basis = np.stack([np.ones_like(phi), np.cos(phi), np.sin(phi), np.cos(2 * phi), np.sin(2 * phi)], axis=1)
        return basis @ self.fourier.T

    def mean(self, t0, t1) -> np.ndarray:
        """(K, P) averages of s_n over the intervals [t0_k, t1_k] (exact integrals); t1 = t0 gives s_n(t0).

        The average of cos(k phi) over [p0, p1] is cos(k m) sinc(k (p1 - p0) / 2), of sin(k phi)
        sin(k m) sinc(k (p1 - p0) / 2), m the midpoint (product-to-sum identities; no cancellation
        for short intervals, where (sin(k p1) - sin(k p0)) / (k (p1 - p0)) loses digits)."""
        t0 = np.atleast_1d(np.asarray(t0, float))
        t1 = np.atleast_1d(np.asarray(t1, float))
        w = 2 * np.pi * self.spinning_hz
        mid, half = 0.5 * w * (t0 + t1), 0.5 * w * (t1 - t0)
        cols = [np.ones_like(mid)]
        for k in (1, 2):
            damp = np.sinc(k * half / np.pi)                 # numpy's sinc(x) = sin(pi x) / (pi x)
            cols += [np.cos(k * mid) * damp, np.sin(k * mid) * damp]
        return np.stack(cols, axis=1) @ self.fourier.T


def spinning_factors(model, experiment) -> SpinningFactors:
    """The SpinningFactors of `model` in the spinning `experiment` (module convention).

    The model's optional attributes `rotor_azimuth_deg` (default 0) and `dipolar_constants` (default
    false) pose a crystallite of a powder (module convention; qhl.exact.powder).

    Raises:
        QhlInputError: the experiment does not spin; a dipolar pair without a direction (no
            positions) or at the magic angle to the static field (|P2(r.f)| < STATIC_FACTOR_FLOOR),
            both only for static-coupling parameters (not dipolar_constants).
    """
    if not is_spinning(experiment):
        raise QhlInputError(f"experiment '{getattr(experiment, 'name', None)}' does not spin (spinning_hz = 0)",
                            key="experiment.spinning_hz")
    f = np.asarray(model.field_direction, float)
    f = f / np.linalg.norm(f)
    axis = rotor_axis(f, experiment.spinning_angle_deg, float(getattr(model, "rotor_azimuth_deg", 0.0)))
    constants = bool(getattr(model, "dipolar_constants", False))
    fourier = np.zeros((len(model.parameters), 5))
    fourier[:, 0] = 1.0
    for k, prm in enumerate(model.parameters):
        if prm.kind != "dipolar":
            continue
        if constants and prm.direction is None:      # explicit dipolar_hz in a crystallite: no orientation
            fourier[k, 0] = experiment.dipolar_scale
            continue
        if prm.direction is None:
            raise QhlInputError(f"experiment '{experiment.name}' spins, but the pair {'-'.join(prm.spins)} has no "
                                f"positions: expected position_angstrom for both spins (its direction sets the "
                                f"spinning modulation)", key="experiment.spinning_hz")
        r = np.asarray(prm.direction, float)
        r = r / np.linalg.norm(r)
        c = float(r @ f)
        static = 1.0 if constants else 0.5 * (3 * c * c - 1)     # h_n = b_n P2(r.f), or b_n (crystallite)
        if abs(static) < STATIC_FACTOR_FLOOR:
            raise QhlInputError(f"experiment '{experiment.name}' spins, but the pair {'-'.join(prm.spins)} lies at "
                                f"the magic angle to field_direction (P2 = {static:.2g}): its static coupling cannot "
                                f"carry the spinning modulation; expected |P2| >= {STATIC_FACTOR_FLOOR:g} (turn "
                                f"field_direction slightly)", key="experiment.spinning_hz")
        a0 = float(axis @ r) * float(axis @ f)
        fourier[k] = _fourier_of_p2(a0, c - a0, float(np.cross(axis, r) @ f)) * (experiment.dipolar_scale / static)
    return SpinningFactors(fourier=fourier, spinning_hz=float(experiment.spinning_hz))
