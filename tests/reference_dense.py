"""Independent dense reference for the exact-engine tests: full-space matrices built here.

It imports nothing of qhl (test clusters are built in made_up_clusters.py). What it shares
with qhl, and nothing more:
  * from the model under test, data only: each parameter's name, kind, spins (labels) and
    value_hz, the names in model.free, and model.labels / model.isotopes / model.observed (spin
    labels in qubit order, each spin's isotope symbol, and which spins are of the observed
    isotope); from the experiment, its dipolar_scale;
  * for an 'rf' parameter only, the letter of its axis (x or y), read from the Pauli labels of
    its generator, because the parameter list records the axis nowhere else. The rf matrix
    itself is built here.
Nothing that computes is used: no model.hamiltonian, no generator matrices, no
initial_operator / detection_operator, no engine and no Trotter code.

Conventions (README.md, "Conventions"): spin operators I = sigma/2; qubit i = spin i in qiskit's
little-endian order, so qubit 0 is the LAST Kronecker factor; H = 2 pi sum_n s_n h_n G_n (rad/s)
with s_n = experiment.dipolar_scale for dipolar terms and 1 otherwise (experiment None: 1);
    offset:A              G = Iz_A
    dipolar:A-B homo      G = 3 Iz_A Iz_B - I_A.I_B        hetero  G = 2 Iz_A Iz_B
    j:A-B       homo      G = I_A.I_B                      hetero  G = Iz_A Iz_B
    rf:ISO (axis a)       G = sum of Ia over the parameter's spins
rho0 = sum Ix and O = sum I+ = sum (Ix + i Iy) over the observed spins, and
S(t) = Tr[O U rho0 U^dag] / Tr[O rho0] with U = expm(-i H t), in the full 2^n space (no sectors,
eigenbases or divided differences). Generators: M. H. Levitt, "Spin Dynamics", 2nd ed. (2008).
scipy.linalg.expm: Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 31, 970 (2009).
"""

from functools import lru_cache

import numpy as np
import scipy.linalg as sla


PAULI = {"x": np.array([[0, 1], [1, 0]], dtype=complex),
         "y": np.array([[0, -1j], [1j, 0]], dtype=complex),
         "z": np.array([[1, 0], [0, -1]], dtype=complex)}


@lru_cache(maxsize=None)
def spin_matrix(axis, qubit, n):
    """I_axis = sigma_axis / 2 on `qubit` of n qubits (qubit 0 is the last Kronecker factor).

    Cached, so returned read-only.
    """
    out = np.ones((1, 1), dtype=complex)
    for q in range(n - 1, -1, -1):
        out = np.kron(out, PAULI[axis] / 2 if q == qubit else np.eye(2, dtype=complex))
    out.flags.writeable = False
    return out


def _rf_axis(param):
    """The rf axis letter, read from the generator's Pauli labels (the only such read)."""
    letters = {ch for lab in param.generator.paulis.to_labels() for ch in lab if ch != "I"}
    if len(letters) != 1 or not letters <= {"X", "Y"}:
        raise ValueError(f"cannot read an rf axis from {param.name}")
    return letters.pop().lower()


def generator_matrix(param, labels, isotopes):
    """G of one parameter, from its kind, its spin labels and the spins' isotopes."""
    n = len(labels)
    qubits = [labels.index(s) for s in param.spins]
    if param.kind == "offset":
        (a,) = qubits
        return spin_matrix("z", a, n)
    if param.kind in ("dipolar", "j"):
        a, b = qubits
        zz = spin_matrix("z", a, n) @ spin_matrix("z", b, n)
        dot = sum(spin_matrix(x, a, n) @ spin_matrix(x, b, n) for x in "xyz")
        homo = isotopes[a] == isotopes[b]
        if param.kind == "dipolar":
            return 3 * zz - dot if homo else 2 * zz
        return dot if homo else zz
    if param.kind == "rf":
        axis = _rf_axis(param)
        return sum(spin_matrix(axis, q, n) for q in qubits)
    raise ValueError(f"unknown parameter kind {param.kind!r}")


def scale_factor(param, experiment):
    """s_n: the experiment's dipolar_scale for dipolar terms, 1 otherwise (and for no experiment)."""
    if experiment is not None and param.kind == "dipolar":
        return float(experiment.dipolar_scale)
    return 1.0


def all_values(model, free_values=None):
    """Every parameter value (parameter order); free_values replace those named in model.free."""
    vals = np.array([p.value_hz for p in model.parameters], dtype=float)
    if free_values is not None:
        names = [p.name for p in model.parameters]
        free_values = np.asarray(free_values, dtype=float)
        if free_values.shape != (len(model.free),):
            raise ValueError("expected one value per free parameter")
        for name, v in zip(model.free, free_values):
            vals[names.index(name)] = v
    return vals


def hamiltonian_matrix(model, experiment, values):
    """H = 2 pi sum_n s_n h_n G_n (rad/s) in the full space, for all parameter values `values`."""
    labels, isotopes = list(model.labels), list(model.isotopes)
    dim = 2 ** len(labels)
    h = np.zeros((dim, dim), dtype=complex)
    for p, v in zip(model.parameters, values):
        h += 2 * np.pi * scale_factor(p, experiment) * v * generator_matrix(p, labels, isotopes)
    return h


def initial_and_detection(model):
    """(rho0, O): sum Ix and sum (Ix + i Iy) over the spins of the observed isotope."""
    n = len(model.labels)
    obs = [q for q in range(n) if model.observed[q]]
    rho = sum(spin_matrix("x", q, n) for q in obs)
    det = sum(spin_matrix("x", q, n) + 1j * spin_matrix("y", q, n) for q in obs)
    return rho, det


def dense_signal(model, experiment, times, free_values=None):
    """S(t) = Tr[O U rho0 U^dag] / Tr[O rho0] with U = expm(-i H t), full space."""
    h = hamiltonian_matrix(model, experiment, all_values(model, free_values))
    rho, obs = initial_and_detection(model)
    out = []
    for t in times:
        u = sla.expm(-1j * h * t)
        out.append(np.trace(obs @ u @ rho @ u.conj().T))
    return np.array(out) / np.trace(obs @ rho)


def central_difference(fun, x, step):
    """d fun / d x_k by central differences, stacked over k (first axis)."""
    x = np.asarray(x, float)
    cols = []
    for k in range(x.size):
        e = np.zeros_like(x)
        e[k] = step
        cols.append((fun(x + e) - fun(x - e)) / (2 * step))
    return np.array(cols)
