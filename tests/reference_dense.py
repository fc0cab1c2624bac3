"""Independent dense reference computations for the exact-engine tests.

Full-space matrices from qiskit's SparsePauliOp.to_matrix and scipy.linalg.expm, with no use of
sectors, eigenbases or divided differences.
"""

import numpy as np
import scipy.linalg as sla

from qhl.spins.cluster import Cluster, Experiment, Pair, Spin


def random_cluster(rng, n, hetero=False, experiments=None, with_j=True):
    spins = []
    for i in range(n):
        iso = "13C" if (hetero and i % 3 == 2) else "1H"
        spins.append(Spin(f"S{i}", iso, tuple(rng.uniform(-1, 1, 3) * 1.3 * n ** (1 / 3)),
                          float(rng.normal(0, 2000))))
    pairs = (Pair(("S0", "S1"), j_hz=7.0), Pair(("S1", "S2"), j_hz=-12.0)) if with_j and n > 2 else ()
    if experiments is None:
        experiments = (Experiment("a", 2e-4, 6, 0.7), Experiment("b", 1e-3, 5, 0.1))
    try:
        return Cluster(9.4, "1H", tuple(spins), pairs, tuple(experiments))
    except Exception:  # two spins drawn too close: draw again
        return random_cluster(rng, n, hetero, experiments, with_j)


def dense_signal(model, experiment, times, free_values=None):
    """S(t) = Tr[O U rho0 U^dag] / Tr[O rho0] with U = expm(-i H t), full space."""
    m = model if free_values is None else model.with_values(free_values)
    h = m.hamiltonian(experiment).to_matrix()
    rho = m.initial_operator().to_matrix()
    obs = m.detection_operator().to_matrix()
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
