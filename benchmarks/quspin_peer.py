"""Peer column for bench_engine.py: the same NMR signal with QuSpin (a general-purpose exact-
diagonalisation library; Weinberg and Bukov, SciPost Phys. 2, 003 (2017)).

Run in an environment that has QuSpin (it is not a qhl dependency), as a subprocess of
bench_engine.py: `python quspin_peer.py CASE.json REPEATS`. CASE.json holds n, the terms
(kind, qubits, coefficient in rad/s), the times, and the output path for the signal.

What is timed (per signal): QuSpin builds H in each magnetisation sector (spin_basis_general with
Nup fixed, hamiltonian(...).toarray()), diagonalises it (numpy eigh), and builds sum I+ between
neighbouring sectors with basis.Op_bra_ket; the signal S(t) = sum_ab w_ab exp(i (E_b - E_a) t),
w = 2 R o R, R = V_k^T (sum I-)/2 V_k+1, is then contracted with a real time table, as a user of
the library would write it. A central-difference gradient costs 2 P such signals.
"""

import json
import statistics
import sys
import time

import numpy as np
import quspin
from quspin.basis import spin_basis_general
from quspin.operators import hamiltonian

NO_CHECKS = dict(check_symm=False, check_herm=False, check_pcon=False)


def static_list(terms):
    """QuSpin static terms for H = sum c G (spin-1/2 operators, pauli=0)."""
    ops = {}
    for kind, q, c in terms:
        if kind == "offset":
            ops.setdefault("z", []).append([c, q[0]])
        elif kind == "dipolar":                   # 3 IzIz - I.I = 2 IzIz - (I+I- + I-I+)/2
            i, j = q
            ops.setdefault("zz", []).append([2 * c, i, j])
            ops.setdefault("+-", []).append([-c / 2, i, j])
            ops.setdefault("-+", []).append([-c / 2, i, j])
        elif kind == "j":                          # I.I = IzIz + (I+I- + I-I+)/2
            i, j = q
            ops.setdefault("zz", []).append([c, i, j])
            ops.setdefault("+-", []).append([c / 2, i, j])
            ops.setdefault("-+", []).append([c / 2, i, j])
        else:
            raise ValueError(kind)
    return [[k, v] for k, v in ops.items()]


def signal(n, terms, times):
    static = static_list(terms)
    bases, energies, vectors = [], [], []
    for nup in range(n + 1):
        basis = spin_basis_general(n, Nup=nup, pauli=0)
        h = hamiltonian(static, [], basis=basis, dtype=np.float64, **NO_CHECKS).toarray()
        e, v = np.linalg.eigh(h)
        bases.append(basis)
        energies.append(e)
        vectors.append(v)
    whole = spin_basis_general(n, pauli=0)      # applies I+ to the states of one sector
    out = np.zeros(len(times), complex)
    norm = 0.0
    ph_cache = {}
    for k in range(n):
        lo, hi = bases[k], bases[k + 1]
        plus = np.zeros((hi.Ns, lo.Ns))
        hi_order, lo_order = np.argsort(hi.states), np.argsort(lo.states)
        for i in range(n):
            me, bra, ket = whole.Op_bra_ket("+", [i], 1.0, np.float64, lo.states)
            keep = me != 0
            rows = hi_order[np.searchsorted(hi.states[hi_order], bra[keep])]
            cols = lo_order[np.searchsorted(lo.states[lo_order], ket[keep])]
            np.add.at(plus, (rows, cols), me[keep])
        norm += 0.5 * np.sum(plus * plus)
        r = vectors[k].T @ (0.5 * plus.T) @ vectors[k + 1]
        w = 2 * r * r
        for kk in (k, k + 1):
            if kk not in ph_cache:
                ph = np.outer(energies[kk], times)
                ph_cache[kk] = (np.cos(ph), np.sin(ph))
        (ca, sa), (cb, sb) = ph_cache[k], ph_cache[k + 1]
        x = w.T @ np.concatenate([ca, -sa], axis=1)       # sum_a w_ab exp(-i E_a t)
        xa = x[:, :len(times)] + 1j * x[:, len(times):]
        out += np.einsum("bt,bt->t", cb + 1j * sb, xa)
    return out / norm


def main():
    case = json.load(open(sys.argv[1]))
    repeats = int(sys.argv[2])
    terms = [(t[0], t[1], t[2]) for t in case["terms"]]
    times = np.asarray(case["times"], float)
    laps = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        s = signal(case["n"], terms, times)
        laps.append(time.perf_counter() - t0)
    np.save(case["out"], s)
    print(json.dumps({"signal_s": statistics.median(laps), "laps": laps,
                      "version": f"QuSpin {getattr(quspin, '__version__', '?')}, numpy {np.__version__}"}))


if __name__ == "__main__":
    main()
