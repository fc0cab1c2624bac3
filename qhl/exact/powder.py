"""Orientation (powder) averages over a published spherical grid.

Grid: Lebedev-Laikov rules (V. I. Lebedev and D. N. Laikov, Doklady Mathematics 59, 477 (1999)),
via scipy.integrate.lebedev_rule; a rule of degree L integrates spherical harmonics up to degree
L exactly, so degree >= 4 already averages P2(cos theta)^2 exactly.

Only dipolar couplings computed from geometry depend on orientation (qhl.spins.dipolar); offsets,
J couplings and explicit `dipolar_hz` overrides are taken as orientation independent.

Static samples: a turn about the field leaves the secular couplings unchanged, so the average runs
over the field direction f only, sum_k w_k S(t; f_k).

Crystallites (CrystalliteModel; rotor convention in qhl.spins.spinning).
Orientation. A crystallite of a spinning sample is posed by three angles: the
static field direction f at t = 0 in the cluster frame (2 angles) and the rotor azimuth psi, the
turn of the rotor axis about f away from the plane of f and the cluster x axis (right-handed).
(f, psi) covers every orientation once: a rotation Q of the sample against the laboratory (field
and rotor axis fixed there) is fixed by where it sends the field (f) and, about it, the rotor axis
(psi); the invariant measure is uniform in f on the sphere and in psi on [0, 360).

Parametrisation. CrystalliteModel's dipolar parameter dipolar:i-j is the pair's dipolar constant
b_ij (Hz; qhl.spins.dipolar.dipolar_constant_hz), the same in every crystallite; the orientation
is in the factor only:
    static experiment:    s_n = dipolar_scale * P2(r.f)
    spinning experiment:  s_n(t) = dipolar_scale * P2(cos Theta(t))     (qhl.spins.spinning)
so h_n s_n is the crystallite's coupling b_ij P2(cos Theta) with no division by the static
factor: a pair that sits at the magic angle to f at t = 0 in some crystallite needs no special
case (the static-coupling parametrisation of a single-crystal model, h = b P2(r.f), would have to
divide by P2(r.f) = 0 there and refuses it). A pair with an explicit `dipolar_hz` has no geometric
constant: it stays orientation independent (s_n = dipolar_scale), as in the static powder
average. Offsets, J couplings and RF terms: s_n = 1 as everywhere.

Spinning samples: the average is the product grid
    S(t) = sum_k sum_j (w_k / N) S(t; f_k, psi_j),   psi_j = 360 j / N degrees, N = gamma_points,
each crystallite from the exact spinning engine on its CrystalliteModel (no crystallite is
refused or treated apart because a pair sits at the magic angle at t = 0). Exactness (derived
here): a function of the orientation Q = Rot(f, psi) Q0(f) expands in Wigner functions D^l_mk(Q);
D^l(Rot(f, psi) Q0) = D^l(Q0 Rot(z, psi)) brings exp(-i k psi), |k| <= l, which the N equally
spaced psi sum to zero for 0 < |k| < N; what is left, D^l_m0(Q0(f)), is a degree-l spherical
harmonic of f, summed exactly by a Lebedev rule of degree >= l. So the grid is exact for every
D^l with l <= min(order, N - 1); the default N = order + 1 balances the two.
"""

import copy
from dataclasses import dataclass, replace

import numpy as np

from ..base.errors import QhlInputError
from ..base.progress import FractionProgress
from ..spins.cluster import refuse_spinning
from ..spins.dipolar import dipolar_constant_hz, dipolar_coupling_hz, orientation_factor
from ..spins.spinning import is_spinning
from .engine import ExactEngine
from ..spins.model import HamiltonianModel, build_model
from ..spins.nuclei import nucleus

__all__ = ["lebedev_orientations", "spinning_orientations", "oriented_values_hz", "powder_signal",
           "powder_lines", "CrystalliteModel", "crystallite_model"]


@dataclass(frozen=True)
class CrystalliteModel(HamiltonianModel):
    """A HamiltonianModel of one crystallite (module docstring): dipolar parameters are dipolar
    constants; `field_direction` and `rotor_azimuth_deg` pose the crystallite."""

    rotor_azimuth_deg: float = 0.0
    dipolar_constants = True              # class constant, read by qhl.spins.spinning.spinning_factors

    def posed(self, field_direction, rotor_azimuth_deg: float = 0.0) -> "CrystalliteModel":
        """The same crystallite model at field direction f (normalised) and rotor azimuth psi (degrees)."""
        f = np.asarray(field_direction, float)
        f = f / np.linalg.norm(f)
        return replace(self, field_direction=tuple(float(x) for x in f), rotor_azimuth_deg=float(rotor_azimuth_deg))

    def scale_factors(self, experiment) -> np.ndarray:
        """s_n of a static experiment: dipolar_scale P2(r.f) for geometric pairs (module docstring)."""
        s = super().scale_factors(experiment)
        for k, p in enumerate(self.parameters):
            if p.kind == "dipolar" and p.direction is not None:
                s[k] *= orientation_factor(p.direction, self.field_direction)
        return s


def crystallite_model(cluster, free="*") -> CrystalliteModel:
    """The CrystalliteModel of `cluster` posed at its field_direction with rotor azimuth 0.

    Same parameters, generators and free set as build_model(cluster, free); each geometric dipolar
    value becomes the pair's constant b_ij (Hz), each explicit dipolar_hz keeps its value and loses
    its direction (orientation independent).
    """
    model = build_model(cluster, free=free)
    overrides = {frozenset(p.spins) for p in cluster.pairs if p.dipolar_hz is not None}
    params = []
    for p in model.parameters:
        if p.kind == "dipolar" and frozenset(p.spins) in overrides:
            p = replace(p, direction=None)
        elif p.kind == "dipolar":
            a, b = (cluster.spin(lab) for lab in p.spins)
            d = float(np.linalg.norm(np.subtract(b.position_angstrom, a.position_angstrom, dtype=float)))
            p = replace(p, value_hz=float(dipolar_constant_hz(nucleus(a.isotope).gamma_rad_per_s_per_tesla,
                                                                nucleus(b.isotope).gamma_rad_per_s_per_tesla, d)))
        params.append(p)
    fields = {name: getattr(model, name) for name in model.__dataclass_fields__}
    fields["parameters"] = tuple(params)
    return CrystalliteModel(**fields)


def lebedev_orientations(order: int = 17):
    """(directions (K, 3), weights (K,) summing to 1) of the Lebedev-Laikov rule of degree `order`."""
    from scipy.integrate import lebedev_rule

    x, w = lebedev_rule(order)
    return x.T.copy(), w / w.sum()


def spinning_orientations(order: int = 17, gamma_points: int | None = None):
    """Crystallites of a spinning powder: (field directions (M, 3), rotor azimuths psi in degrees (M,),
    weights (M,) summing to 1), M = K N: each Lebedev direction of degree `order` with N =
    `gamma_points` (default order + 1) equally spaced psi_j = 360 j / N, weight w_k / N (module docstring).

    Raises:
        QhlInputError: gamma_points not a positive integer.
    """
    n = int(order) + 1 if gamma_points is None else gamma_points
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise QhlInputError(f"gamma_points = {gamma_points!r}: expected a positive integer (rotor azimuths per "
                            f"field direction)", key="gamma_points")
    dirs, weights = lebedev_orientations(order)
    psi = 360.0 * np.arange(n) / n
    return (np.repeat(dirs, n, axis=0), np.tile(psi, len(dirs)), np.repeat(weights / n, n))


def oriented_values_hz(cluster, model, direction) -> np.ndarray:
    """All parameter values of `model` with geometric dipolar couplings for field `direction`."""
    values = model.values_hz
    overrides = {frozenset(p.spins) for p in cluster.pairs if p.dipolar_hz is not None}
    for k, prm in enumerate(model.parameters):
        if prm.kind == "dipolar" and frozenset(prm.spins) not in overrides:
            a, b = (cluster.spin(lab) for lab in prm.spins)
            values[k] = dipolar_coupling_hz(nucleus(a.isotope).gamma_rad_per_s_per_tesla,
                                            nucleus(b.isotope).gamma_rad_per_s_per_tesla,
                                            a.position_angstrom, b.position_angstrom, direction)
    return values


def _engine_all_free(cluster):
    model = build_model(cluster, free="*")
    return ExactEngine(model)


def powder_signal(cluster, experiment, order: int = 17, times=None, gamma_points: int | None = None,
                  slices_per_period: int | None = None) -> np.ndarray:
    """Orientation average of S(t) (module docstring), complex (T,).

    Static experiments: sum_k w_k S(t; f_k) over the Lebedev rule of degree `order` (gamma_points
    and slices_per_period are not used: a turn about the field changes nothing). Spinning
    experiments: the product grid of spinning_orientations(order, gamma_points), each crystallite
    from the exact spinning engine (`slices_per_period`: its slices per rotor period, default its
    own rule per crystallite); progress on stderr after 2 s.
    """
    if is_spinning(experiment):
        return _spinning_powder_signal(cluster, experiment, order, times, gamma_points, slices_per_period)
    eng = _engine_all_free(cluster)
    dirs, weights = lebedev_orientations(order)
    t = experiment.times_s if times is None else np.asarray(times, float)
    total = np.zeros(t.shape, complex)
    for d, w in zip(dirs, weights):
        total += w * eng.signal(experiment, t, free_values_hz=oriented_values_hz(cluster, eng.model, d))
    return total


def _posed_engine(template: ExactEngine, model) -> ExactEngine:
    """`template` with its model replaced by the posed crystallite `model`. Posing changes only
    field_direction and rotor_azimuth_deg (read by spinning_factors at each signal); the engine's
    operators (sector blocks of the generators, rho0, O) and its caches (keyed by coefficients or
    by sector) are the same in every crystallite, so they are shared instead of rebuilt (the build
    is two thirds of the time of a three-spin crystallite)."""
    eng = copy.copy(template)
    eng.model = model
    return eng


def _spinning_powder_signal(cluster, experiment, order, times, gamma_points, slices_per_period):
    dirs, psis, weights = spinning_orientations(order, gamma_points)
    base = crystallite_model(cluster)
    template = ExactEngine(base)
    template.spinning_slices_per_period = slices_per_period
    t = experiment.times_s if times is None else np.asarray(times, float)
    total = np.zeros(t.shape, complex)
    bar = FractionProgress(f"powder average of '{experiment.name}' ({len(weights)} crystallites)")
    for i, (d, psi, w) in enumerate(zip(dirs, psis, weights)):
        total += w * _posed_engine(template, base.posed(d, psi)).signal(experiment, t)
        bar((i + 1) / len(weights))
    bar.close()
    return total


def powder_lines(cluster, experiment=None, order: int = 17):
    """Line list of the powder average: (frequencies Hz, amplitudes weighted by the grid)."""
    refuse_spinning(experiment, "powder line lists")
    eng = _engine_all_free(cluster)
    dirs, weights = lebedev_orientations(order)
    freqs, amps = [], []
    for d, w in zip(dirs, weights):
        f, a = eng.transitions(experiment, free_values_hz=oriented_values_hz(cluster, eng.model, d))
        freqs.append(f)
        amps.append(w * a)
    return np.concatenate(freqs), np.concatenate(amps)
