"""Independent dense reference for pulse-sequence experiments: explicit 2^n x 2^n pulse matrices.

It imports nothing of qhl (only reference_dense.py, which imports nothing of qhl either). What it
shares with qhl is data: the model's parameter list, labels, isotopes and observed flags (as in
reference_dense.py) and the experiment's steps read by attribute (a delay has `seconds`; a pulse
`angle_deg`, `phase_deg`, `isotope` (None: the observed isotope); a block `steps` and `repeat`),
unrolled here.

Each pulse is the full-space matrix expm(-i theta sum_k (cos phi Ix_k + sin phi Iy_k)) over the
pulsed spins, built from Kronecker products of Pauli matrices (reference_dense.spin_matrix);
each delay expm(-i H tau). Then
    S(t) = Tr[O U(t) W rho0 W^dag U(t)^dag] / Tr[O rho0],  U(t) = expm(-i H t).
scipy.linalg.expm: Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 31, 970 (2009).
"""

import numpy as np
import scipy.linalg as sla

from reference_dense import all_values, hamiltonian_matrix, initial_and_detection, spin_matrix


def unrolled(steps):
    out = []
    for st in steps:
        if hasattr(st, "repeat"):
            out.extend(unrolled(st.steps) * int(st.repeat))
        else:
            out.append(st)
    return out


def pulse_matrix(model, angle_deg, phase_deg, isotope):
    """expm(-i theta sum_k (cos phi Ix_k + sin phi Iy_k)) over the pulsed spins, full space."""
    n = len(model.labels)
    if isotope is None:
        qubits = [q for q in range(n) if model.observed[q]]
    else:
        qubits = [q for q in range(n) if model.isotopes[q] == isotope]
    th, ph = np.deg2rad(angle_deg), np.deg2rad(phase_deg)
    gen = sum(np.cos(ph) * spin_matrix("x", q, n) + np.sin(ph) * spin_matrix("y", q, n) for q in qubits)
    return sla.expm(-1j * th * gen)


def rf_matrix(model, angle_deg, phase_deg, isotope, duration_s):
    """2 pi nu1 sum_k (cos phi Ix_k + sin phi Iy_k), nu1 = (angle / 360) / duration: a finite pulse's RF term."""
    n = len(model.labels)
    qubits = ([q for q in range(n) if model.observed[q]] if isotope is None else
              [q for q in range(n) if model.isotopes[q] == isotope])
    ph = np.deg2rad(phase_deg)
    nu1 = angle_deg / 360.0 / duration_s
    return 2 * np.pi * nu1 * sum(np.cos(ph) * spin_matrix("x", q, n) + np.sin(ph) * spin_matrix("y", q, n)
                                 for q in qubits)


def preparation(model, experiment, h):
    """W, the product of the steps' matrices in order (a finite pulse: expm(-i (H + H_rf) duration))."""
    w = np.eye(h.shape[0], dtype=complex)
    for st in unrolled(experiment.steps):
        if hasattr(st, "seconds"):
            w = sla.expm(-1j * h * st.seconds) @ w
        elif getattr(st, "duration_s", None) is not None:
            rf = rf_matrix(model, st.angle_deg, st.phase_deg, st.isotope, st.duration_s)
            w = sla.expm(-1j * (h + rf) * st.duration_s) @ w
        else:
            w = pulse_matrix(model, st.angle_deg, st.phase_deg, st.isotope) @ w
    return w


def dense_sequence_signal(model, experiment, times, free_values=None):
    """S(t) of the sequence experiment (module docstring), full space."""
    h = hamiltonian_matrix(model, experiment, all_values(model, free_values))
    rho, obs = initial_and_detection(model)
    w = preparation(model, experiment, h)
    rho_p = w @ rho @ w.conj().T
    out = []
    for t in times:
        u = sla.expm(-1j * h * t)
        out.append(np.trace(obs @ u @ rho_p @ u.conj().T))
    return np.array(out) / np.trace(obs @ rho)


def dense_cycle_propagator(model, experiment, free_values=None):
    """W of the experiment's steps (for average-Hamiltonian checks)."""
    h = hamiltonian_matrix(model, experiment, all_values(model, free_values))
    return preparation(model, experiment, h)


def net_rotation(model, experiment):
    """The product of the steps' pulse matrices alone (the toggling-frame transformation at the end)."""
    n = len(model.labels)
    w = np.eye(2**n, dtype=complex)
    for st in unrolled(experiment.steps):
        if not hasattr(st, "seconds"):
            w = pulse_matrix(model, st.angle_deg, st.phase_deg, st.isotope) @ w
    return w


def dense_trotter_sequence_signal(model, experiment, values, time, steps, order, delay_steps):
    """S_trot(t) at parameter values `values` (None: the model's own): each delay S(tau/r_d)^{r_d}, each
    pulse its full-space matrix, then S(t/r)^r (reference_trotter's product formula; nothing of qhl)."""
    from reference_trotter import _group_terms, _sequence, _values

    vals = _values(model, values)
    mats = [sum(vals[k] * m for k, m in g.items()) for g in _group_terms(model, experiment)]
    dim = 2 ** len(model.labels)

    def u_trot(t, r):
        step = np.eye(dim, dtype=complex)
        for g, d in _sequence(len(mats), t, r, order):
            step = sla.expm(-1j * d * mats[g]) @ step
        return np.linalg.matrix_power(step, r)

    w = np.eye(dim, dtype=complex)
    k = 0
    for st in unrolled(experiment.steps):
        if hasattr(st, "seconds"):
            w = u_trot(st.seconds, delay_steps[k]) @ w
            k += 1
        else:
            w = pulse_matrix(model, st.angle_deg, st.phase_deg, st.isotope) @ w
    u = u_trot(time, steps) @ w
    rho, obs = initial_and_detection(model)
    return np.trace(obs @ u @ rho @ u.conj().T) / np.trace(obs @ rho).real
