"""Orientation (powder) averages over a published spherical grid.

Grid: Lebedev-Laikov rules (V. I. Lebedev and D. N. Laikov, Doklady Mathematics 59, 477 (1999)),
via scipy.integrate.lebedev_rule; a rule of degree L integrates spherical harmonics up to degree
L exactly, so degree >= 4 already averages P2(cos theta)^2 exactly.

Only dipolar couplings computed from geometry depend on orientation (qhl.spins.dipolar); offsets,
J couplings and explicit `dipolar_hz` overrides are taken as orientation independent.
"""

import numpy as np

from ..spins.cluster import refuse_spinning
from ..spins.dipolar import dipolar_coupling_hz
from .engine import ExactEngine
from ..spins.model import build_model
from ..spins.nuclei import nucleus

__all__ = ["lebedev_orientations", "oriented_values_hz", "powder_signal", "powder_lines"]


def lebedev_orientations(order: int = 17):
    """(directions (K, 3), weights (K,) summing to 1) of the Lebedev-Laikov rule of degree `order`."""
    from scipy.integrate import lebedev_rule

    x, w = lebedev_rule(order)
    return x.T.copy(), w / w.sum()


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


def powder_signal(cluster, experiment, order: int = 17, times=None) -> np.ndarray:
    """Orientation average of S(t): sum_k w_k S(t; direction_k) (static samples: spinning is refused)."""
    refuse_spinning(experiment, "powder averages")
    eng = _engine_all_free(cluster)
    dirs, weights = lebedev_orientations(order)
    t = experiment.times_s if times is None else np.asarray(times, float)
    total = np.zeros(t.shape, complex)
    for d, w in zip(dirs, weights):
        total += w * eng.signal(experiment, t, free_values_hz=oriented_values_hz(cluster, eng.model, d))
    return total


def powder_lines(cluster, experiment=None, order: int = 17):
    """Line list of the powder average: (frequencies Hz, amplitudes weighted by the grid)."""
    refuse_spinning(experiment, "powder averages")
    eng = _engine_all_free(cluster)
    dirs, weights = lebedev_orientations(order)
    freqs, amps = [], []
    for d, w in zip(dirs, weights):
        f, a = eng.transitions(experiment, free_values_hz=oriented_values_hz(cluster, eng.model, d))
        freqs.append(f)
        amps.append(w * a)
    return np.concatenate(freqs), np.concatenate(amps)
