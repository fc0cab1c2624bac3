"""Cross-check with an independent general-purpose quantum library (QuTiP; Johansson, Nation,
Nori, Comput. Phys. Commun. 184, 1234 (2013)): the Hamiltonian is rebuilt from the cluster with
QuTiP spin operators (not from qhl's generators) and propagated with QuTiP's expm."""

import numpy as np
import pytest

qutip = pytest.importorskip("qutip")

from qhl import ExactEngine, build_model, nucleus  # noqa: E402
from qhl.spins.dipolar import dipolar_coupling_hz  # noqa: E402

from made_up_clusters import random_cluster  # noqa: E402


def _op(single, i, n):
    ops = [qutip.qeye(2)] * n
    ops[i] = single
    return qutip.tensor(list(reversed(ops)))  # qubit 0 rightmost, as in qiskit


def qutip_signal(cluster, experiment):
    n = cluster.n_spins
    ix, iy, iz = (0.5 * qutip.sigmax(), 0.5 * qutip.sigmay(), 0.5 * qutip.sigmaz())
    # QuTiP's sigmaz has +1 on basis state 0, as qiskit's Z
    X = [_op(ix, i, n) for i in range(n)]
    Y = [_op(iy, i, n) for i in range(n)]
    Z = [_op(iz, i, n) for i in range(n)]
    iso = [s.isotope for s in cluster.spins]
    h = 0
    for i, s in enumerate(cluster.spins):
        h += 2 * np.pi * s.offset_hz * Z[i]
    jmap = {frozenset(p.spins): p.j_hz for p in cluster.pairs}
    for i in range(n):
        for j in range(i + 1, n):
            si, sj = cluster.spins[i], cluster.spins[j]
            d = dipolar_coupling_hz(nucleus(si.isotope).gamma_rad_per_s_per_tesla,
                                    nucleus(sj.isotope).gamma_rad_per_s_per_tesla,
                                    si.position_angstrom, sj.position_angstrom, cluster.field_direction)
            dot = X[i] * X[j] + Y[i] * Y[j] + Z[i] * Z[j]
            homo = iso[i] == iso[j]
            h += 2 * np.pi * experiment.dipolar_scale * d * ((3 * Z[i] * Z[j] - dot) if homo else 2 * Z[i] * Z[j])
            jv = jmap.get(frozenset((si.label, sj.label)))
            if jv:
                h += 2 * np.pi * jv * (dot if homo else Z[i] * Z[j])
    obs_idx = [i for i in range(n) if iso[i] == cluster.observe]
    rho = sum(X[i] for i in obs_idx)
    o = sum(X[i] + 1j * Y[i] for i in obs_idx)
    norm = (o * rho).tr()
    out = []
    for t in experiment.times_s:
        u = (-1j * h * t).expm()
        out.append((o * u * rho * u.dag()).tr() / norm)
    return np.array(out)


@pytest.mark.parametrize("n,hetero,seed", [(4, False, 7), (5, True, 8)])
def test_signal_agrees_with_qutip(n, hetero, seed):
    c = random_cluster(np.random.default_rng(seed), n, hetero)
    eng = ExactEngine(build_model(c))
    for ex in c.experiments:
        np.testing.assert_allclose(eng.signal(ex), qutip_signal(c, ex), atol=1e-8, rtol=0)
