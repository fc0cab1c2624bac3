"""Independent dense reference for spinning experiments: H(t) built here, time-ordered propagation.

It imports nothing of qhl. From the cluster it reads data only (spin positions, the field
direction, each experiment's spinning_hz, spinning_angle_deg and dipolar_scale); from the model,
the parameter data that tests/reference_dense.py reads. The rotor convention is the one written
in qhl.spins.spinning's docstring, rebuilt here with scipy.spatial.transform.Rotation:
  * at t = 0 the field is along the cluster's field_direction f; the rotor axis R lies at
    spinning_angle_deg from f in the plane of f and x (y when f is nearly along x);
  * the sample turns about R at 2 pi spinning_hz t (right-handed): a pair's vector r becomes
    Rot(R, phi) r, and the dipolar coupling is h_ij P2(cos Theta(t)) / P2(cos Theta(0)) times
    dipolar_scale, where Theta(t) is the angle between Rot(R, phi) r and f.
The propagator is a product of exponentials of H at the midpoints of `slices_per_period` slices
per rotor period (error O(slice^2)), with sampling times inserted exactly; scipy.linalg.expm
(Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 31, 970 (2009)).
"""

import numpy as np
import scipy.linalg as sla
from scipy.spatial.transform import Rotation

from reference_dense import all_values, generator_matrix, initial_and_detection


def rotor_axis_here(f, angle_deg):
    f = np.asarray(f, float) / np.linalg.norm(f)
    x = np.array([1.0, 0.0, 0.0]) if abs(f[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    e = x - (x @ f) * f
    e /= np.linalg.norm(e)
    th = np.radians(angle_deg)
    return np.cos(th) * f + np.sin(th) * e


def _p2(c):
    return 0.5 * (3 * c * c - 1)


def dipolar_factor(cluster, experiment, spins, t):
    """dipolar_scale * P2(cos Theta(t)) / P2(cos Theta(0)) of the pair `spins` (labels) at times t."""
    pos = {s.label: np.asarray(s.position_angstrom, float) for s in cluster.spins}
    r = pos[spins[1]] - pos[spins[0]]
    r /= np.linalg.norm(r)
    f = np.asarray(cluster.field_direction, float)
    f /= np.linalg.norm(f)
    axis = rotor_axis_here(f, experiment.spinning_angle_deg)
    phi = 2 * np.pi * experiment.spinning_hz * np.atleast_1d(t)
    turned = Rotation.from_rotvec(np.outer(phi, axis)).apply(r)
    return experiment.dipolar_scale * _p2(turned @ f) / _p2(r @ f)


def hamiltonian_at(cluster, model, experiment, values, t):
    """H(t) = 2 pi sum_n s_n(t) h_n G_n (rad/s), full space."""
    labels, isotopes = list(model.labels), list(model.isotopes)
    dim = 2 ** len(labels)
    h = np.zeros((dim, dim), complex)
    for p, v in zip(model.parameters, values):
        s = dipolar_factor(cluster, experiment, p.spins, t)[0] if p.kind == "dipolar" else 1.0
        h += 2 * np.pi * s * v * generator_matrix(p, labels, isotopes)
    return h


def dense_spinning_signal(cluster, model, experiment, times, free_values=None, slices_per_period=400):
    """S(t) = Tr[O U(t) rho0 U(t)^dag] / Tr[O rho0] with U time-ordered (midpoint slices)."""
    values = all_values(model, free_values)
    rho, det = initial_and_detection(model)
    norm = np.trace(det @ rho)
    times = np.asarray(times, float)
    dt_max = 1.0 / (experiment.spinning_hz * slices_per_period)
    u = np.eye(rho.shape[0], dtype=complex)
    t_now = 0.0
    out = np.empty(times.size, complex)
    for k in np.argsort(times):
        t_end = times[k]
        n_sl = int(np.ceil((t_end - t_now) / dt_max - 1e-12)) if t_end > t_now else 0
        edges = np.linspace(t_now, t_end, n_sl + 1)
        for a, b in zip(edges[:-1], edges[1:]):
            u = sla.expm(-1j * (b - a) * hamiltonian_at(cluster, model, experiment, values, 0.5 * (a + b))) @ u
        t_now = t_end
        out[k] = np.trace(det @ u @ rho @ u.conj().T) / norm
    return out


def dense_spinning_gradient(cluster, model, experiment, times, free_values=None, step_hz=1e-3,
                            slices_per_period=400):
    """Central differences of dense_spinning_signal in every free parameter, shape (P, T)."""
    base = all_values(model, free_values)
    names = [p.name for p in model.parameters]
    free = [names.index(f) for f in model.free]
    out = []
    for k in free:
        rows = []
        for sign in (1, -1):
            v = base.copy()
            v[k] += sign * step_hz
            fv = np.array([v[names.index(f)] for f in model.free])
            rows.append(dense_spinning_signal(cluster, model, experiment, times, fv, slices_per_period))
        out.append((rows[0] - rows[1]) / (2 * step_hz))
    return np.array(out)


# ---------------------------------------------------------------- dense Trotterised reference (separate)
# The product formula with exact step averages, built here from dense matrices (scipy.linalg.expm)
# and scipy.integrate.quad for the step averages of dipolar_factor: no circuit, no qhl.
# Groups: one per spin (its offset), in qubit order, then one per spin pair with every dipolar and
# J term of the pair, pairs in the order they first appear in model.parameters (the 'pairs'
# grouping, 'offsets-first' ordering of qhl.circuits.trotter, read as a convention);
# first order S1_k = e^{-i tau H_G,k} ... e^{-i tau H_1,k}, second order the symmetric product
# (Childs, Su, Tran, Wiebe, Zhu, Phys. Rev. X 11, 011020 (2021)), with H_g,k built from the
# averages of s_n over step k.

def _step_average(cluster, experiment, spins, a, b):
    from scipy.integrate import quad
    val, _ = quad(lambda u: float(dipolar_factor(cluster, experiment, spins, u)[0]), a, b, epsabs=1e-13,
                  epsrel=1e-12, limit=200)
    return val / (b - a)


def dense_trotter_spinning_signal(cluster, model, experiment, time, steps, order, free_values=None):
    """S_trot(t) of the step-averaged product formula (see above), full space."""
    values = all_values(model, free_values)
    labels, isotopes = list(model.labels), list(model.isotopes)
    n = len(labels)
    keys = [(labels.index(p.spins[0]),) for p in model.parameters if p.kind == "offset"]
    keys = sorted(set(keys))
    for p in model.parameters:
        if p.kind in ("dipolar", "j"):
            k = tuple(labels.index(s) for s in p.spins)
            if k not in keys:
                keys.append(k)
    tau = time / steps
    dim = 2 ** n
    u = np.eye(dim, dtype=complex)
    for k in range(steps):
        a, b = k * tau, (k + 1) * tau
        groups = []
        for key in keys:
            h = np.zeros((dim, dim), complex)
            for p, v in zip(model.parameters, values):
                if tuple(labels.index(s) for s in p.spins) != key:
                    continue
                s = _step_average(cluster, experiment, p.spins, a, b) if p.kind == "dipolar" else 1.0
                h += 2 * np.pi * s * v * generator_matrix(p, labels, isotopes)
            groups.append(h)
        if order == 1:
            for h in groups:
                u = sla.expm(-1j * tau * h) @ u
        else:
            for h in groups + groups[::-1]:
                u = sla.expm(-0.5j * tau * h) @ u
    rho, det = initial_and_detection(model)
    return np.trace(det @ u @ rho @ u.conj().T) / np.trace(det @ rho)


def dense_period_propagator(cluster, model, experiment, free_values=None, slices_per_period=400):
    """U(T_R): the time-ordered propagator over one rotor period (midpoint slices), full space."""
    values = all_values(model, free_values)
    period = 1.0 / experiment.spinning_hz
    edges = np.linspace(0.0, period, slices_per_period + 1)
    u = np.eye(2 ** len(model.labels), dtype=complex)
    for a, b in zip(edges[:-1], edges[1:]):
        u = sla.expm(-1j * (b - a) * hamiltonian_at(cluster, model, experiment, values, 0.5 * (a + b))) @ u
    return u
