"""Independent dense references for the circuit tests: Trotterised signals and exact gradients.

It imports nothing of qhl (test clusters and their models are made in made_up_clusters.py).
What it shares with qhl, and nothing more:
  * from the model under test, data only (as in reference_dense.py, whose matrix builders it
    uses): each parameter's name, kind, spins and value_hz, and model.labels / model.isotopes /
    model.observed; from the experiment, its dipolar_scale.
Generator matrices, blocks, grouping, ordering and the product formula are all written here;
nothing from qhl.circuits (trotter_terms, trotter_unitary, circuits, slots, insertion points),
model.hamiltonian, the generators or the initial / detection operators is used.

Product formula, as documented in qhl.circuits.trotter (Childs, Su, Tran, Wiebe, Zhu, "Theory of
Trotter error with commutator scaling", Phys. Rev. X 11, 011020 (2021)): with tau = t / r,
    first order    S1(tau) = e^{-i tau H_G} ... e^{-i tau H_1}                 (H_1 acts first)
    second order   S2(tau) = e^{-i tau/2 H_1} ... e^{-i tau/2 H_G} e^{-i tau/2 H_G} ... e^{-i tau/2 H_1}
and U_trot(t) = S(t/r)^r, each factor by scipy.linalg.expm (Al-Mohy and Higham, SIAM J. Matrix
Anal. Appl. 31, 970 (2009)).
Blocks: one per spin (its offset) and one per spin pair (every dipolar and J term on the pair);
labels 'S0' and 'S0-S1' (spins in qubit order). Ordering before grouping: 'offsets-first' (spin
blocks in spin order, then pair blocks in the order their first parameter appears in the
parameter list), 'offsets-last' (the pair blocks, then the spin blocks), or an explicit list of
every block label. Grouping: 'pairs' (one group per block), 'offsets' (all spin blocks in one
group, placed where the first spin block stands, one group per pair block), 'layers' (greedy:
each block joins the first existing group all of whose blocks it commutes with, else opens a new
group; two blocks commute when they share no spin or when every generator of one commutes with
every generator of the other, tested on the unscaled generator matrices, so the grouping does
not depend on parameter values or on dipolar_scale).
The gradient differentiates each factor with the Frechet derivative of the matrix exponential
(scipy.linalg.expm_frechet; Al-Mohy and Higham, SIAM J. Matrix Anal. Appl. 30, 1639 (2009)),
using that H_g is linear in h: dH_g/dh_n = 2 pi s_n G_n when parameter n lies in group g.
"""

import numpy as np
import scipy.linalg as sla


from reference_dense import generator_matrix, initial_and_detection, scale_factor


def _blocks(model):
    """[(label, qubits, [parameter index, ...])]: spin blocks in spin order, then pair blocks in
    the order their first parameter appears in the parameter list."""
    labels = list(model.labels)
    spin_blocks, pair_blocks = {}, {}
    for k, p in enumerate(model.parameters):
        qubits = tuple(sorted(labels.index(s) for s in p.spins))
        if p.kind == "offset" and len(qubits) == 1:
            spin_blocks.setdefault(qubits, []).append(k)
        elif p.kind in ("dipolar", "j") and len(qubits) == 2:
            pair_blocks.setdefault(qubits, []).append(k)
        else:
            raise ValueError(f"the Trotter reference has no block for parameter {p.name}")
    out = [(labels[q[0]], q, ks) for q, ks in sorted(spin_blocks.items())]
    out += [("-".join(labels[i] for i in q), q, ks) for q, ks in pair_blocks.items()]
    return out


def _order(blocks, ordering):
    if isinstance(ordering, str):
        spins = [b for b in blocks if len(b[1]) == 1]
        pairs = [b for b in blocks if len(b[1]) == 2]
        if ordering == "offsets-first":
            return spins + pairs
        if ordering == "offsets-last":
            return pairs + spins
        raise ValueError(f"unknown ordering {ordering!r}")
    by_label = {b[0]: b for b in blocks}
    order = list(ordering)
    if sorted(order) != sorted(by_label):
        raise ValueError("an explicit ordering must list every block label once")
    return [by_label[lab] for lab in order]


def _commute(a, b, gens):
    if not set(a[1]) & set(b[1]):
        return True
    return all(np.allclose(gens[i] @ gens[j], gens[j] @ gens[i], rtol=0, atol=1e-12)
               for i in a[2] for j in b[2])


def _group(blocks, grouping, gens):
    """Groups as lists of blocks, in product order (the first group acts first)."""
    if grouping == "pairs":
        return [[b] for b in blocks]
    if grouping == "offsets":
        spins = [b for b in blocks if len(b[1]) == 1]
        out, placed = [], False
        for b in blocks:
            if len(b[1]) == 2:
                out.append([b])
            elif not placed:
                out.append(spins)
                placed = True
        return out
    if grouping == "layers":
        groups = []
        for b in blocks:
            for g in groups:
                if all(_commute(b, other, gens) for other in g):
                    g.append(b)
                    break
            else:
                groups.append([b])
        return groups
    raise ValueError(f"unknown grouping {grouping!r}")


def _group_terms(model, experiment, grouping="pairs", ordering="offsets-first"):
    """Per group, {parameter index: 2 pi s_n G_n}, so that H_g = sum_n h_n * entry_n."""
    labels, isotopes = list(model.labels), list(model.isotopes)
    gens = [generator_matrix(p, labels, isotopes) for p in model.parameters]
    groups = _group(_order(_blocks(model), ordering), grouping, gens)
    return [{k: 2 * np.pi * scale_factor(model.parameters[k], experiment) * gens[k]
             for b in g for k in b[2]} for g in groups]


def _values(model, values):
    vals = np.array([p.value_hz for p in model.parameters], dtype=float)
    if values is not None:
        vals = np.asarray(values, dtype=float)
        if vals.shape != (len(model.parameters),):
            raise ValueError("expected one value per parameter")
    return vals


def _sequence(n_groups, time, steps, order):
    """[(group, duration)] of one step S(t/r), first applied first."""
    if order not in (1, 2) or int(steps) != steps or steps < 1:
        raise ValueError("expected order 1 or 2 and an integer number of steps >= 1")
    tau = time / steps
    if order == 1:
        return [(g, tau) for g in range(n_groups)]
    return [(g, tau / 2) for g in range(n_groups)] + [(g, tau / 2) for g in reversed(range(n_groups))]


# ---------------------------------------------------------------- signals and gradients
def trotter_signal(model, experiment, time, steps, order, values=None, grouping="pairs",
                   ordering="offsets-first"):
    """S_trot(t) = Tr[O U_trot rho0 U_trot^dag] / Tr[O rho0] from the dense product unitary."""
    vals = _values(model, values)
    terms = _group_terms(model, experiment, grouping, ordering)
    mats = [sum(vals[k] * m for k, m in g.items()) for g in terms]
    dim = 2 ** len(model.labels)
    step = np.eye(dim, dtype=complex)
    for g, d in _sequence(len(mats), time, steps, order):
        step = sla.expm(-1j * d * mats[g]) @ step
    u = np.linalg.matrix_power(step, steps)
    rho, obs = initial_and_detection(model)
    return np.trace(obs @ u @ rho @ u.conj().T) / np.trace(obs @ rho).real


def five_point(fun, x0, step):
    """d fun / dx at x0 by the five-point central stencil (error O(step^4))."""
    return (-fun(x0 + 2 * step) + 8 * fun(x0 + step) - 8 * fun(x0 - step) + fun(x0 - 2 * step)) / (12 * step)


def _factors(model, experiment, values, time, steps, order, name, grouping, ordering):
    """[(e^{A}, d e^{A}/dh_name)] for every factor of U_trot, first applied first."""
    vals = _values(model, values)
    k_name = [p.name for p in model.parameters].index(name)
    terms = _group_terms(model, experiment, grouping, ordering)
    dim = 2 ** len(model.labels)
    mats = [sum(vals[k] * m for k, m in g.items()) for g in terms]
    dmats = [g.get(k_name, np.zeros((dim, dim), dtype=complex)) for g in terms]
    out = []
    for _ in range(steps):
        for g, d in _sequence(len(mats), time, steps, order):
            out.append(sla.expm_frechet(-1j * d * mats[g], -1j * d * dmats[g]))
    return out


def trotter_gradient(model, experiment, time, steps, order, name, values=None, grouping="pairs",
                     ordering="offsets-first"):
    """Exact dS_trot/dh_name by the product rule over the factors of U_trot."""
    facs = _factors(model, experiment, values, time, steps, order, name, grouping, ordering)
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
    rho, obs = initial_and_detection(model)
    num = np.trace(obs @ du @ rho @ u.conj().T) + np.trace(obs @ u @ rho @ du.conj().T)
    return num / np.trace(obs @ rho).real
