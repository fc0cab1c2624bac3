"""Dense references for the circuit tests: Trotterised signals and their exact gradients.

Built from full matrices (SparsePauliOp.to_matrix, scipy.linalg.expm) and the product formula
as written in qhl.trotter's docstring, with no use of circuits, slots or insertion points.
The gradient differentiates each factor with the Frechet derivative of the matrix exponential
(scipy.linalg.expm_frechet; Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 30, 1639 (2009)).
"""

import numpy as np
import scipy.linalg as sla

from qhl.spins.cluster import Cluster, Experiment, Pair, Spin
from qhl.spins.model import build_model
from qhl.circuits.trotter import trotter_terms, trotter_unitary


def small_cluster(hetero=False, n=3):
    """Hz-scale invented couplings so that 2 pi t h is of order one at t = 0.3 s."""
    iso = ["1H", "1H", "13C" if hetero else "1H", "1H"][:n]
    offsets = [1.3, -0.8, 0.55, 0.2][:n]
    spins = tuple(Spin(f"S{i}", iso[i], None, offsets[i]) for i in range(n))
    pairs = [Pair(("S0", "S1"), j_hz=0.45, dipolar_hz=0.9), Pair(("S1", "S2"), dipolar_hz=-0.6),
             Pair(("S0", "S2"), j_hz=0.3, dipolar_hz=0.35)]
    if n == 4:
        pairs += [Pair(("S2", "S3"), dipolar_hz=0.5), Pair(("S0", "S3"), j_hz=0.25)]
    pairs = [p for p in pairs if all(int(s[1:]) < n for s in p.spins)]
    return Cluster(9.4, "1H", spins, tuple(pairs), (Experiment("x", 0.3, 4, 0.8),))


def small_model(hetero=False, n=3):
    c = small_cluster(hetero, n)
    return build_model(c, free=["offset:*", "dipolar:*", "j:*"]), c.experiments[0]


def trotter_signal(model, experiment, time, steps, order, values=None, **kw):
    """S_trot(t) = Tr[O U_trot rho0 U_trot^dag] / Tr[O rho0] from the dense product unitary."""
    terms = trotter_terms(model, experiment, values, **kw)
    u = trotter_unitary(terms, time, steps, order)
    rho = model.initial_operator().to_matrix()
    obs = model.detection_operator().to_matrix()
    return np.trace(obs @ u @ rho @ u.conj().T) / np.trace(obs @ rho).real


def five_point(fun, x0, step):
    """d fun / dx at x0 by the five-point central stencil (error O(step^4))."""
    return (-fun(x0 + 2 * step) + 8 * fun(x0 + step) - 8 * fun(x0 - step) + fun(x0 - 2 * step)) / (12 * step)


def _factors(model, experiment, values, time, steps, order, name, kw):
    terms = trotter_terms(model, experiment, values, **kw)
    unit = np.zeros(len(model.parameters))
    unit[model.names.index(name)] = 1.0
    dterms = trotter_terms(model, experiment, unit, **kw)   # H is linear in h: dH_g/dh_n = H_g(e_n)
    mats = [op.to_matrix() for op in terms.operators()]
    dmats = [op.to_matrix() for op in dterms.operators()]
    tau = time / steps
    seq = list(range(len(mats)))
    if order == 1:
        one = [(g, tau) for g in seq]
    else:
        one = [(g, tau / 2) for g in seq] + [(g, tau / 2) for g in reversed(seq)]
    out = []
    for _ in range(steps):
        for g, d in one:
            a, da = -1j * d * mats[g], -1j * d * dmats[g]
            f, df = sla.expm_frechet(a, da)
            out.append((f, df))
    return out


def trotter_gradient(model, experiment, time, steps, order, name, values=None, **kw):
    """Exact dS_trot/dh_name by the product rule over the factors of U_trot."""
    facs = _factors(model, experiment, values, time, steps, order, name, kw)
    dim = facs[0][0].shape[0]
    prefix = [np.eye(dim, dtype=complex)]
    for f, _ in facs:
        prefix.append(f @ prefix[-1])
    u = prefix[-1]
    du = np.zeros_like(u)
    suffix = np.eye(dim, dtype=complex)
    for k in range(len(facs) - 1, -1, -1):
        du += suffix @ facs[k][1] @ prefix[k]
        suffix = suffix @ facs[k][0]
    rho = model.initial_operator().to_matrix()
    obs = model.detection_operator().to_matrix()
    num = np.trace(obs @ du @ rho @ u.conj().T) + np.trace(obs @ u @ rho @ du.conj().T)
    return num / np.trace(obs @ rho).real
