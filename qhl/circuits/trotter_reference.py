"""Exact (no-shot) Trotterised signal, gradient and Hessian from dense matrices.

The one Trotterised reference: every emulated estimate and every compiled circuit family
(qhl.circuits.circuit_family.exact_expectation) is checked against it. Convention as in qhl.circuits.trotter and
qhl.circuits.gradient_circuits: U = U_S ... U_1 with slot unitaries U_s = e^{-i tau_s H_g(s)}, the
normalised input rho~ = rho0 / Tr[O rho0] and S_trot = Tr[O U rho~ U^dag]. Writing
W_s = U_s ... U_1, rho_s = W_s rho~ W_s^dag and O_s = W_s (U^dag O U) W_s^dag (the detection
operator carried back to just after slot s), the derivative of slot s with respect to h_n is
-i tau_s G_{s,n} U_s with G_{s,n} = sum_k (d c_k / d h_n) P_k over the Paulis of its group
(they commute with H_g), so (reverse-mode sweep, one pass forward, common practice)
    dS_trot/dh_n = sum_s -i tau_s Tr[G_{s,n} [rho_s, O_s]] .
The Hessian is the central difference of that analytic gradient (five-point rule, step
1e-3 of the parameter scale), accurate to ~1e-10 relative: far below any shot-noise error bar.
"""

import numpy as np
import scipy.linalg as sla
from qiskit.quantum_info import SparsePauliOp

from ..base.errors import QhlInputError
from ..base.memory import require_memory
from .trotter import check_evolution_arguments, product_formula_slots, trotter_terms

__all__ = ["trotter_signal_exact", "trotter_gradient_exact", "trotter_hessian_exact", "family_reference_value"]


def _setup(model, experiment, time, steps, order, values_hz, grouping, ordering):
    check_evolution_arguments(time, steps, order)
    n = model.n_spins
    require_memory("the dense Trotter reference", 16.0 * 4 ** n * 8)
    terms = trotter_terms(model, experiment, values_hz, grouping, ordering)
    slots = product_formula_slots(len(terms.groups), time, steps, order)
    rho0 = model.initial_operator().to_matrix()
    obs = model.detection_operator().to_matrix()
    norm = float(np.real(np.trace(obs @ rho0)))
    return terms, slots, rho0 / norm, obs


def _slot_unitaries(terms, slots):
    cache = {}
    mats = [g.operator().to_matrix() for g in terms.groups]
    out = []
    for s in slots:
        key = (s.group, s.duration)
        if key not in cache:
            cache[key] = sla.expm(-1j * s.duration * mats[s.group])
        out.append(cache[key])
    return out


def trotter_signal_exact(model, experiment=None, time: float = 0.0, steps: int = 1, order: int = 1, *,
                         values_hz=None, grouping="pairs", ordering="offsets-first") -> complex:
    """S_trot(t) = Tr[O U_trot rho~ U_trot^dag] (dense; see the module docstring).

    Raises:
        QhlInputError: bad time, steps or order. MemoryBudgetError: too many spins.
    """
    terms, slots, rho, obs = _setup(model, experiment, time, steps, order, values_hz, grouping, ordering)
    u = np.eye(2 ** model.n_spins, dtype=complex)
    for us in _slot_unitaries(terms, slots):
        u = us @ u
    return complex(np.trace(obs @ u @ rho @ u.conj().T))


def trotter_gradient_exact(model, experiment=None, time: float = 0.0, steps: int = 1, order: int = 1,
                           parameters=None, *, values_hz=None, grouping="pairs",
                           ordering="offsets-first"):
    """dS_trot/dh_n (1/Hz) for `parameters` (default the free ones), exactly for the product formula.

    Returns:
        (S_trot complex, gradient complex (P,)).

    Raises:
        QhlInputError: unknown parameter, bad time, steps or order.
    """
    names = list(model.free) if parameters is None else list(parameters)
    for nm in names:
        model.parameter(nm)
    terms, slots, rho, obs = _setup(model, experiment, time, steps, order, values_hz, grouping, ordering)
    n = model.n_spins
    gens = []
    for g in terms.groups:
        stack = []
        for nm in names:
            labels, coeffs = [], []
            for b in g.blocks:
                if nm in b.derivatives:
                    labels += list(b.paulis)
                    coeffs += list(b.derivatives[nm])
            stack.append(SparsePauliOp(labels, np.asarray(coeffs, complex)).to_matrix() if labels else None)
        gens.append(stack)
    unitaries = _slot_unitaries(terms, slots)
    u = np.eye(2 ** n, dtype=complex)
    for us in unitaries:
        u = us @ u
    o_back = u.conj().T @ obs @ u
    w = np.eye(2 ** n, dtype=complex)
    grad = np.zeros(len(names), complex)
    for s, us in zip(slots, unitaries):
        w = us @ w
        stack = gens[s.group]
        if all(m is None for m in stack):
            continue
        rs = w @ rho @ w.conj().T
        os_ = w @ o_back @ w.conj().T
        comm = rs @ os_ - os_ @ rs
        for p, gm in enumerate(stack):
            if gm is not None:
                grad[p] += -1j * s.duration * np.sum(gm.T * comm)
    signal = complex(np.trace(obs @ u @ rho @ u.conj().T))
    return signal, grad


def trotter_hessian_exact(model, experiment=None, time: float = 0.0, steps: int = 1, order: int = 1,
                          parameters=None, *, values_hz=None, grouping="pairs", ordering="offsets-first",
                          relative_step: float = 1e-3):
    """d2S_trot/dh_m dh_n (1/Hz^2), five-point central differences of the analytic gradient.

    The step for h_m is relative_step * max(|h_m|, RMS of all |h|) Hz.

    Returns:
        complex (P, P), symmetrised.
    """
    names = list(model.free) if parameters is None else list(parameters)
    base = model.values_hz if values_hz is None else np.asarray(values_hz, float)
    scale = float(np.sqrt(np.mean(base ** 2))) or 1.0
    hess = np.zeros((len(names), len(names)), complex)
    kw = dict(grouping=grouping, ordering=ordering)
    for a, nm in enumerate(names):
        k = model.names.index(nm)
        h = relative_step * max(abs(base[k]), scale)
        cols = []
        for mult in (-2, -1, 1, 2):
            v = base.copy()
            v[k] += mult * h
            cols.append(trotter_gradient_exact(model, experiment, time, steps, order, names, values_hz=v, **kw)[1])
        hess[a] = (cols[0] - 8 * cols[1] + 8 * cols[2] - cols[3]) / (12 * h)
    if not np.all(np.isfinite(hess)):
        raise QhlInputError("the Trotter Hessian is not finite", key="hessian")
    return 0.5 * (hess + hess.T)


def family_reference_value(family) -> complex:
    """X of a compiled circuit family (signal, gradient or Hessian entry) from this reference.

    Uses the family's `evolution` (model, experiment, values, grouping, ordering), its time,
    steps, order and differentiated parameters; no circuit is simulated.

    Raises:
        QhlInputError: a family built without its evolution.
    """
    spec = family.evolution
    if not spec:
        raise QhlInputError("this circuit family carries no evolution to recompute it from", key="family")
    model = spec["model"]
    args = (model, spec["experiment"], family.time, family.steps, family.order)
    kw = dict(values_hz=spec["values_hz"], grouping=spec["grouping"], ordering=spec["ordering"])
    if family.kind == "signal":
        return trotter_signal_exact(*args, **kw)
    if family.kind in ("gradient", "gradient-shift"):
        return complex(trotter_gradient_exact(*args, list(family.parameters), **kw)[1][0])
    m, n = family.parameters
    names = [m] if m == n else [m, n]
    return complex(trotter_hessian_exact(*args, names, **kw)[0, -1])
