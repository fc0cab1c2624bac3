"""Coherent input for amplitude estimation: purification of rho0 = sum Ix with partner qubits.

Amplitude estimation needs one pure input and one +-1 "good" flag; the near-term circuits sample
rho0 = sum_k Ix_k (traceless, not a state) as a signed mixture of product states
(qhl.circuits.state_prep), which cannot sit inside a coherent circuit. Scheme used here:

Purification. With n partner qubits and |Phi> = prod_i (|0_i 0_i'> + |1_i 1_i'>)/sqrt 2 (one Bell
pair per spin: n H + n CX), <Phi| M x 1 |Phi> = Tr M / 2^n and (M x 1)|Phi> = (1 x M^T)|Phi>.
Hence, with |psi(t)> = (U(t) x 1)|Phi> and X^T = X,
    Tr[A U X_k U^dag] = 2^n <Phi| (U^dag A U X_k) x 1 |Phi> = 2^n <psi(t)| A x X'_k |psi(t)>,
where X'_k acts on the partner of spin k: the signed input becomes an observable on the partners,
commuting with everything on the system. With O = sum_j I+_j and N = Tr[O rho0] = N_obs 2^n / 4:
    Re S(t) = (1/N_obs) sum_(j,k observed) <X_j X'_k>,   Im S(t) = (1/N_obs) sum_(j,k) <Y_j X'_k>.
So S is N_obs times the mean of <M_jk> over the N_obs^2 pairs (j, k), each M_jk a Pauli (+-1 valued).

Derivative (Hadamard test, Banchi and Crooks, Quantum 5, 386 (2021)): for U = exp(-i t (H0 + theta P)),
    d<M>/dtheta = 2 int_0^t <Y_anc x M>_s ds,
with the ancilla in |+>, P applied controlled on it at time s. With P = 2 pi s_n G_n = sum_m c_m P_m
(G_n's Pauli terms, s_n the scale) and the sign of c_m put on the ancilla (a Z: Clifford),
    dS/dh_n = R (2a - 1),   R = 2 t ||c||_1 2 pi |s_n| N_obs unit_hz,
    a = (1 + E_(j,k uniform; s uniform on [0,t]; m by |c_m|)[sign(c_m) <Y_anc x M_jk>_(s,m)]) / 2,
the probability that the parity of Y_anc x M_jk (x sign) is +1: one flag qubit computed by
Cliffords after basis changes. R is the near-term single-shot range (qhl.costing.shots, kappa =
N_obs): amplitude estimation of a at error e / (2R) estimates dS/dh to e.

Cost of the coherent input per call of A (counted by qhl.costing.fault_tolerant):
    qubits  n partners + 2 ceil(log2 N_obs) pair-register qubits (uniform superposition: H gates
            when N_obs is a power of two, else one rotation each) + 1 parity flag;
    T       two selects over N_obs values (which X_j / Y_j, which X'_k joins the parity) by unary
            iteration: 2 x 4 (N_obs - 1) T, T-depth 2 x 2 (N_obs - 1) (Babbush et al., PRX 8,
            041015 (2018), from memory); Bell pairs, basis changes and parity: Cliffords.
"""

import math

import numpy as np

__all__ = ["coherent_input_counts", "bell_pairs", "coherent_amplitude", "ASSUMPTIONS"]

ASSUMPTIONS = {
    "coherent_input": "rho0 = sum Ix purified with one partner qubit per spin (Bell pairs): Tr[A U X_k U^dag] = "
                      "2^n <psi|A x X'_k|psi>, so S = N_obs mean over (j,k) of <X_j X'_k> (Re) or <Y_j X'_k> (Im); "
                      "extra qubits n + 2 ceil(log2 N_obs) + 1 flag, 8 (N_obs - 1) T per call of A (two unary "
                      "selects, from memory); checked against the exact derivative with qiskit Statevector",
}


def _clog2(x):
    return int(math.ceil(math.log2(max(int(x), 1))))


def coherent_input_counts(n_spins: int, n_observed: int) -> dict:
    """Extra qubits, T gates, T-depth, rotations and Clifford layers of the purified input per call of A.

    Example:
        >>> coherent_input_counts(6, 6)["qubits"]
        13
    """
    reg = 2 * _clog2(n_observed)
    pow2 = n_observed > 0 and (n_observed & (n_observed - 1)) == 0
    return {"qubits": n_spins + reg + 1, "t_count": 8 * max(n_observed - 1, 0),
            "t_depth": 4 * max(n_observed - 1, 0), "rotations": 0 if pow2 else reg,
            "clifford_layers": 2 + 2 + 2 * max(n_observed, 1)}


def bell_pairs(n_spins: int):
    """QuantumCircuit on 2n qubits (system 0..n-1, partners n..2n-1) preparing |Phi>."""
    from qiskit import QuantumCircuit
    qc = QuantumCircuit(2 * n_spins)
    for i in range(n_spins):
        qc.h(i)
        qc.cx(i, n_spins + i)
    return qc


def coherent_amplitude(model, experiment, parameter: str, time: float, part: str = "re", nodes: int = 24,
                       unit_hz: float = 1e3):
    """(a, R) of the purified Hadamard test of dS/dh_parameter at `time`, by qiskit Statevector.

    The insertion time is integrated by `nodes`-point Gauss-Legendre quadrature (numpy) of the
    exact continuous-time evolution (scipy expm); Pauli terms weighted by |c_m|, pairs (j, k)
    uniform. Small clusters only (2n + 1 qubits). dS/dh ~ R (2a - 1).
    """
    from qiskit import QuantumCircuit
    from qiskit.circuit.library import UnitaryGate
    from qiskit.quantum_info import SparsePauliOp, Statevector
    from scipy.linalg import expm

    n = model.n_spins
    h = model.hamiltonian(experiment).to_matrix()
    names = [p.name for p in model.parameters]
    idx = names.index(parameter)
    scale = float(model.scale_factors(experiment)[idx])
    gen = model.parameter(parameter).generator
    coeffs = np.real(gen.coeffs) * 2 * np.pi * scale          # P = 2 pi s_n G_n = sum c_m P_m
    l1 = float(np.sum(np.abs(coeffs)))
    obs = [i for i, flag in enumerate(model.observed) if flag]
    n_obs = len(obs)
    x_nodes, w_nodes = np.polynomial.legendre.leggauss(nodes)
    s_nodes = 0.5 * time * (x_nodes + 1)
    w_nodes = 0.5 * w_nodes                                    # weights of E_s over [0, t] (sum 1)
    anc = 2 * n
    total = 0.0
    base = bell_pairs(n)
    for s, ws in zip(s_nodes, w_nodes):
        u1, u2 = UnitaryGate(expm(-1j * h * s)), UnitaryGate(expm(-1j * h * (time - s)))
        for lab, c in zip(gen.paulis.to_labels(), coeffs):
            qc = QuantumCircuit(2 * n + 1)
            qc.compose(base, range(2 * n), inplace=True)
            qc.h(anc)
            qc.append(u1, range(n))
            ctrl = SparsePauliOp(lab).to_operator().to_instruction().control(1)
            qc.append(ctrl, [anc] + list(range(n)))
            qc.append(u2, range(n))
            sv = Statevector(qc)
            for j in obs:
                for k in obs:
                    label = ["I"] * (2 * n + 1)
                    label[anc] = "Y"
                    label[j] = "X" if part == "re" else "Y"
                    label[n + k] = "X"
                    val = float(np.real(sv.expectation_value(SparsePauliOp("".join(reversed(label))))))
                    total += ws * (abs(c) / l1) * np.sign(c) * val / n_obs**2
    r = 2 * time * l1 * n_obs * unit_hz
    return (1 + total) / 2, r
