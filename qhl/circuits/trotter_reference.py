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

Memory and time. No dense unitary is formed or cached: the groups' Paulis commute, so each slot
is a product of Pauli rotations e^{-i theta P} (the diagonal Z-type part merged into one phase),
applied to the evolving 2^n x 2^n operators in O(4^n) each (P X is a signed row permutation of X).
The signal keeps rho_s and O; the gradient runs forward to rho_S, then backward carrying rho_s
and O_s together, with Tr[P [rho_s, O_s]] = sum((P rho_s) * O_s^T) - sum((P O_s) * rho_s^T)
(no matrix products). Peak memory: `reference_memory_bytes` (measured against tracemalloc in
tests/test_trotter_reference_memory.py).
"""

import numpy as np
from qiskit.quantum_info import SparsePauliOp

from ..base.errors import QhlInputError
from ..base.memory import require_memory
from .trotter import check_evolution_arguments, product_formula_slots, trotter_terms

__all__ = ["trotter_signal_exact", "trotter_gradient_exact", "trotter_hessian_exact", "family_reference_value",
           "reference_memory_bytes"]

# Dense 2^n x 2^n complex operators alive at the peak of each code path (module docstring):
# signal: rho, O, the operator being conjugated and its two temporaries (row- and column-flipped
# copies); gradient: the same plus O_s carried backward (one trace product is transient).
# tracemalloc on 8-10 spins measured 3.2-3.8 (signal) and 4.2-4.8 (gradient).
_MATRICES = {"signal": 4, "gradient": 5}


def reference_memory_bytes(n_spins: int, kind: str = "gradient") -> float:
    """Peak memory (bytes) of trotter_signal_exact ('signal') or trotter_gradient_exact ('gradient').

    Counts `_MATRICES[kind]` dense complex128 matrices of size 4^n (16 bytes per entry); the slot
    exponentials are applied as Pauli rotations and never stored.
    """
    return 16.0 * 4 ** int(n_spins) * _MATRICES[kind]


def _masks(label: str):
    """(x mask, z mask) of a qiskit Pauli label (last character is qubit 0)."""
    n = len(label)
    x = sum(1 << q for q in range(n) if label[n - 1 - q] in "XY")
    z = sum(1 << q for q in range(n) if label[n - 1 - q] in "ZY")
    return x, z


class _Pauli:
    """P|j> = i^{|x&z|} (-1)^{popcount(j&z)} |j^x> on basis index j (qubit q = bit q).

    j -> j^x flips bits of the index: on the (2,)*n tensor view of a row or column index that is
    np.flip over the flipped qubits' axes (a view, no copy).
    """

    def __init__(self, label: str, index: np.ndarray):
        n = len(label)
        self.n = n
        self.x, z = _masks(label)
        y_phase = 1j ** bin(self.x & z).count("1")
        sign = 1.0 - 2.0 * (np.bitwise_count(index & z) & 1)
        self.col = y_phase * sign                 # (X P)[:, k] = col[k] X[:, k^x]
        self.row = self.col[index ^ self.x]       # (P X)[k, :] = row[k] X[k^x, :]
        self.perm = index ^ self.x
        self.axes = tuple(n - 1 - q for q in range(n) if self.x >> q & 1)
        self.diagonal = self.x == 0

    def flip_rows(self, a):
        """a[j^x, :] as a new array."""
        d = a.shape[0]
        t = np.flip(a.reshape((2,) * self.n + (d,)), self.axes).reshape(d, d)
        return t.copy() if np.may_share_memory(t, a) else t

    def flip_cols(self, a):
        """a[:, j^x] as a new array."""
        d = a.shape[0]
        t = np.flip(a.reshape((d,) + (2,) * self.n), tuple(1 + ax for ax in self.axes)).reshape(d, d)
        return t.copy() if np.may_share_memory(t, a) else t

    def left(self, a):
        """P a."""
        t = self.flip_rows(a) if self.axes else a.copy()
        t *= self.row[:, None]
        return t


class _Group:
    """One group H_g: its diagonal (rad/s) and its off-diagonal Pauli terms, plus derivative Paulis."""

    def __init__(self, group, n, names, index):
        labels, coeffs = [], []
        for b in group.blocks:
            labels += list(b.paulis)
            coeffs += list(b.coeffs)
        op = SparsePauliOp(labels, np.asarray(coeffs, complex)).simplify(atol=0) if labels else None
        self.diag = np.zeros(len(index))
        self.classes = {}          # x mask -> (flipping Pauli, [(row phase d_k, coeff c_k)])
        if op is not None:
            for lab, c in zip(op.paulis.to_labels(), op.coeffs):
                p = _Pauli(lab, index)
                if p.diagonal:
                    self.diag += float(c.real) * np.real(p.row)
                else:
                    self.classes.setdefault(p.x, (p, []))[1].append((p.row, float(c.real)))
        # derivative Paulis: (Pauli, {parameter index: d coeff / d h})
        self.derivs = []
        by_label = {}
        for b in group.blocks:
            for k, lab in enumerate(b.paulis):
                for nm, d in b.derivatives.items():
                    if nm in names and d[k] != 0:
                        by_label.setdefault(lab, {})
                        by_label[lab][names.index(nm)] = by_label[lab].get(names.index(nm), 0.0) + float(d[k])
        self.derivs = [(_Pauli(lab, index), w) for lab, w in by_label.items()]

    def conjugate(self, a, duration):
        """e^{-i duration H_g} a e^{+i duration H_g} (a new array; a is left unchanged).

        The Paulis P_k = diag(d_k) Pi_x of one x mask commute, so their product of rotations
        prod_k (cos th_k - i sin th_k P_k) is diag(A) + diag(B) Pi_x, built by
            A' = cos th A - i sin th B d[j^x],   B' = cos th B - i sin th A d
        (Pi_x diag(d) Pi_x = diag(d[j^x])); the diagonal part multiplies both by e^{-i tau D}.
        """
        e = np.exp(-1j * duration * self.diag)
        if not self.classes:
            out = a * e[:, None]
            out *= e.conj()[None, :]
            return out
        out = a
        for k, (p, terms) in enumerate(self.classes.values()):
            amp, bmp = (e.copy(), np.zeros_like(e)) if k == 0 else (np.ones_like(e), np.zeros_like(e))
            for d, c in terms:
                cs, sn = np.cos(duration * c), np.sin(duration * c)
                amp, bmp = cs * amp - 1j * sn * bmp * d[p.perm], cs * bmp - 1j * sn * amp * d
            left = p.flip_rows(out)
            left *= bmp[:, None]
            left += amp[:, None] * out
            right = p.flip_cols(left)
            right *= bmp.conj()[None, :]
            left *= amp.conj()[None, :]
            left += right
            del right
            out = left
        return out


def _setup(model, experiment, time, steps, order, values_hz, grouping, ordering, kind, names=()):
    check_evolution_arguments(time, steps, order)
    n = model.n_spins
    require_memory(f"the dense Trotter reference ({n} spins, {kind})", reference_memory_bytes(n, kind))
    terms = trotter_terms(model, experiment, values_hz, grouping, ordering)
    slots = product_formula_slots(len(terms.groups), time, steps, order)
    index = np.arange(2 ** n, dtype=np.int64)
    groups = [_Group(g, n, list(names), index) for g in terms.groups]
    rho0 = model.initial_operator().to_matrix()
    obs = model.detection_operator().to_matrix()
    norm = float(np.real(np.trace(obs @ rho0)))
    return groups, slots, rho0 / norm, obs


def _trace_product(a, b) -> complex:
    """Tr[a b] without forming the product."""
    return complex(np.sum(a * b.T))


def trotter_signal_exact(model, experiment=None, time: float = 0.0, steps: int = 1, order: int = 1, *,
                         values_hz=None, grouping="pairs", ordering="offsets-first") -> complex:
    """S_trot(t) = Tr[O U_trot rho~ U_trot^dag] (dense; see the module docstring).

    Raises:
        QhlInputError: bad time, steps or order. MemoryBudgetError: too many spins.
    """
    groups, slots, rho, obs = _setup(model, experiment, time, steps, order, values_hz, grouping, ordering,
                                     "signal")
    for s in slots:
        rho = groups[s.group].conjugate(rho, s.duration)
    return _trace_product(obs, rho)


def trotter_gradient_exact(model, experiment=None, time: float = 0.0, steps: int = 1, order: int = 1,
                           parameters=None, *, values_hz=None, grouping="pairs",
                           ordering="offsets-first", progress=None):
    """dS_trot/dh_n (1/Hz) for `parameters` (default the free ones), exactly for the product formula.

    Args:
        progress: optional callable(done, total) called after each slot of the two sweeps.

    Returns:
        (S_trot complex, gradient complex (P,)).

    Raises:
        QhlInputError: unknown parameter, bad time, steps or order. MemoryBudgetError: too many spins.
    """
    names = list(model.free) if parameters is None else list(parameters)
    for nm in names:
        model.parameter(nm)
    groups, slots, rho, obs = _setup(model, experiment, time, steps, order, values_hz, grouping, ordering,
                                     "gradient", names)
    total = 2 * len(slots)
    for k, s in enumerate(slots):
        rho = groups[s.group].conjugate(rho, s.duration)
        if progress is not None:
            progress(k + 1, total)
    signal = _trace_product(obs, rho)
    o = obs
    grad = np.zeros(len(names), complex)
    for k, s in enumerate(reversed(slots)):
        g = groups[s.group]
        for p, weights in g.derivs:
            t = _trace_product(p.left(rho), o) - _trace_product(p.left(o), rho)
            for idx, w in weights.items():
                grad[idx] += -1j * s.duration * w * t
        rho = g.conjugate(rho, -s.duration)
        o = g.conjugate(o, -s.duration)
        if progress is not None:
            progress(len(slots) + k + 1, total)
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
