"""Exact signals and gradients of pulse-sequence experiments (ideal or finite pulses, free delays).

Signal (normalised as the FID, N = Tr[O rho0], so a perfect echo has |S(0)| = 1):
    S(t) = Tr[O U(t) rho_prep U(t)^dag] / N,   rho_prep = W rho0 W^dag,
    W = product of the steps in order: delays U(tau) = exp(-i H tau) (H of the experiment, from the
    same sector blocks and eigendecomposition as qhl.exact.engine) and ideal pulses
    R = prod_k exp(-i theta (cos phi Ix_k + sin phi Iy_k)) over the pulsed spins
    (qhl.spins.cluster.Pulse); t counts from the end of the last step.

Method. rho is held as a dense 2^n x 2^n matrix X in the eigenbasis of H, sectors in order
(X = V^dag rho V with V = blockdiag(V_k)). A delay multiplies X by Lambda_a conj(Lambda_b),
Lambda = exp(-i E tau) (consecutive delays merge); pulses go back to the computational basis
and act one spin at a time on the ket and bra indices of the reshaped tensor (no 2^n x 2^n pulse
matrix), R rho R^dag. The acquisition reads the blocks (s, p) where O_ps is non-zero:
    S(t) = sum_(s,p) sum_(a,b) (O~_ps)_ba X_ab exp(-i (E_a - E_b) t) / N.

Gradients (exact), dS/dh_n = Tr[O U(t) (d rho_prep) U(t)^dag] / N + (the engine's acquisition
derivative with rho_prep held fixed, ExactEngine._general_contraction). d rho_prep is carried
forward through the steps in the same eigenbasis, dX = V^dag (d rho) V:
    delay:  dX -> Lambda dX Lambda^* + (G~ o F) X Lambda^* + Lambda X (G~ o F)^dag,
            G~ = V^dag (2 pi s_n G_n) V per sector, F_ab = f[E_a, E_b] the first divided difference
            of exp(-i E tau) (Daleckii-Krein; R. Bhatia, "Matrix Analysis", 1997, ch. V;
            qhl.exact.divided_differences),
    pulse:  dX -> R dX R^dag (ideal pulses do not depend on h).
    finite pulse (qhl.spins.cluster.Pulse with duration_s): R = exp(-i (H + H_rf) tau_p) in the full
            2^n space (the RF term mixes the magnetisation sectors), from one dense eigendecomposition
            H + H_rf = W diag(eps) W^dag; it depends on h through H, so
            d(R rho R^dag) = R drho R^dag + dR rho R^dag + R rho dR^dag,
            dR = W ((W^dag 2 pi s_n G_n W) o F) W^dag, F_ab = f[eps_a, eps_b] as for a delay.
Parameters go in chunks that fit CHUNK_BYTES; X is propagated once per chunk. Work above
PROGRESS_ABOVE_FLOPS (estimate: 8 D sum_k d_k^2 per matrix and run of steps) shows a progress line.

Size limit: dense density matrices, 16 * 4^n bytes each (n = 12: 256 MiB). At most
MAX_SEQUENCE_SPINS = 12 spins; every call first checks its memory estimate
(sequence_memory_bytes) with qhl.base.memory.require_memory. The Hessian and line list of
sequence experiments are refused by the engine (not covered).
"""

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp

from ..base.blas import blas_limited, blas_threads
from ..base.errors import QhlInputError
from ..base.memory import require_memory
from ..base.progress import Progress
from ..spins.cluster import Delay, Pulse, flat_steps
from ..spins.model import spin_operator
from .divided_differences import first_divided_difference

__all__ = ["sequence_signal", "sequence_gradient", "sequence_memory_bytes", "pulse_rotation",
           "MAX_SEQUENCE_SPINS"]

MAX_SEQUENCE_SPINS = 12
CHUNK_BYTES = 512 << 20      # peak of one chunk of parameters: 9 dense matrices per parameter (measured)
PROGRESS_ABOVE_FLOPS = 5e9   # show progress on stderr above this estimated work (about 2 s here)


def _chunk(n_spins, n_params):
    return min(n_params, max(1, int(CHUNK_BYTES // (9 * 16 * 4.0**n_spins))))


def sequence_memory_bytes(n_spins: int, n_params: int = 0, n_times: int = 64, finite_pulses: int = 0) -> float:
    """Peak-memory model (bytes), D = 2^n: X, O~, rho0 and three work copies (16 D^2 each), the
    eigenvectors (8 D^2 at most), one chunk of c parameters at 9 dense complex matrices each (dX,
    the two delay products, and the copies of a pulse's basis changes), and time tables (48 D T).
    Each finite pulse adds W, R and the divided differences (3 x 16 D^2, held for the run) and, in a
    gradient, the chunk's dR and two work products (16 D^2 each, one pulse at a time).
    Checked against the tracemalloc peak in tests/test_sequences.py (6 and 7 spins)."""
    d2 = 4.0 ** n_spins
    chunk = _chunk(n_spins, n_params) if n_params else 0
    finite = 16.0 * d2 * (3 * finite_pulses + (chunk + 2 if finite_pulses else 0))
    return 16.0 * d2 * (6 + 9 * chunk) + 8.0 * d2 + 48.0 * 2.0**n_spins * n_times + finite


def _finite_count(experiment):
    return sum(1 for st in flat_steps(experiment.steps) if isinstance(st, Pulse) and st.duration_s is not None)


def _require(engine, n_params, n_times, experiment=None):
    n = engine.model.n_spins
    need = sequence_memory_bytes(n, n_params, n_times, 0 if experiment is None else _finite_count(experiment))
    if n > MAX_SEQUENCE_SPINS:
        raise QhlInputError(f"{n} spins: pulse-sequence experiments hold dense 2^n x 2^n density matrices "
                            f"(about {need / 2**30:.3g} GiB here); expected at most {MAX_SEQUENCE_SPINS} spins",
                            key="experiment.step")
    require_memory(f"the pulse-sequence engine for {n} spins", need)


def pulse_rotation(angle_deg: float, phase_deg: float) -> np.ndarray:
    """exp(-i theta (cos phi sx + sin phi sy) / 2) in the basis (up, down) = (bit 0, bit 1)."""
    th, ph = np.deg2rad(angle_deg), np.deg2rad(phase_deg)
    c, s = np.cos(th / 2), np.sin(th / 2)
    return np.array([[c, -1j * s * np.exp(-1j * ph)], [-1j * s * np.exp(1j * ph), c]])


def _pulse_qubits(model, isotope):
    iso = isotope
    qubits = ([i for i, o in enumerate(model.observed) if o] if iso is None else
              [i for i, s in enumerate(model.isotopes) if s == iso])
    if not qubits:
        raise QhlInputError(f"a pulse on {iso}, but no spin has that isotope", key="experiment.step.isotope")
    return qubits


def _apply_pulse(a, rot, qubits, n):
    """R a R^dag for a stack a (..., D, D) in the computational basis, R = rot on each of `qubits`."""
    lead = a.shape[:-2]
    d = 2**n
    a = a.reshape((-1, d, d))
    rc = rot.conj()
    for q in qubits:
        hi, lo = 2 ** (n - 1 - q), 2**q
        a = _two_by_two(rot, a.reshape(-1, hi, 2, lo * d)).reshape(-1, d, d)      # ket index: R
        a = _two_by_two(rc, a.reshape(-1, d * hi, 2, lo)).reshape(-1, d, d)       # bra index: R^dag
    return a.reshape(lead + (d, d))


def _apply_finite(a, pulse, d_r):
    """R a R^dag on a stack a = [A0, dA_1, ...] (computational basis); with d_r (c, D, D), the product rule
    dA_r -> R dA_r R^dag + dR_r A0 R^dag + R A0 dR_r^dag (module docstring)."""
    r, rh = pulse.r, pulse.r.conj().T
    out = r @ a @ rh
    if d_r is not None:
        a0r = a[0] @ rh
        ra0 = r @ a[0]
        out[1:] += d_r @ a0r[None] + ra0[None] @ d_r.conj().transpose(0, 2, 1)
    return out


def _two_by_two(m, a):
    """m (2 x 2) applied to axis -2 (length 2) of a, as two elementwise combinations."""
    a0, a1 = a[..., 0, :], a[..., 1, :]
    return np.stack([m[0, 0] * a0 + m[0, 1] * a1, m[1, 0] * a0 + m[1, 1] * a1], axis=-2)


class _Basis:
    """Sector order and eigenvectors: moves stacks between the computational and eigen bases."""

    def __init__(self, engine, spec):
        self.perm = np.concatenate(engine.sectors)
        self.inv = np.argsort(self.perm)
        bounds = np.cumsum([0] + [len(ix) for ix in engine.sectors])
        self.slices = [slice(int(a), int(b)) for a, b in zip(bounds[:-1], bounds[1:])]
        self.vectors = spec.vectors
        self.energies = np.concatenate(spec.energies)

    def to_eigen(self, a):
        x = a[..., self.perm, :][..., :, self.perm].astype(complex)
        for sl, v in zip(self.slices, self.vectors):
            x[..., sl, :] = v.conj().T @ x[..., sl, :]
            x[..., :, sl] = x[..., :, sl] @ v
        return x

    def to_computational(self, x):
        y = np.array(x, complex)
        for sl, v in zip(self.slices, self.vectors):
            y[..., sl, :] = v @ y[..., sl, :]
            y[..., :, sl] = y[..., :, sl] @ v.conj().T
        return y[..., self.inv, :][..., :, self.inv]


class _FinitePulse:
    """A finite pulse at one parameter point: R = exp(-i (H + H_rf) tau_p) in the full space (docstring)."""

    def __init__(self, model, coeffs, pulse):
        n = model.n_spins
        tau = float(pulse.duration_s)
        nu1 = pulse.angle_deg / 360.0 / tau
        ph = np.deg2rad(pulse.phase_deg)
        h = sum((c * p.generator.to_matrix(sparse=True) for c, p in zip(coeffs, model.parameters) if c != 0),
                start=sp.csr_matrix((2**n, 2**n), dtype=complex))
        for q in _pulse_qubits(model, pulse.isotope):
            h = h + (2 * np.pi * nu1) * (np.cos(ph) * spin_operator("x", q, n).to_matrix(sparse=True)
                                        + np.sin(ph) * spin_operator("y", q, n).to_matrix(sparse=True))
        with blas_threads(2**n):
            self.e, self.w = sla.eigh(h.toarray(), driver="evd")
        self.tau = tau
        self.r = (self.w * np.exp(-1j * self.e * tau)[None, :]) @ self.w.conj().T
        self.f = None

    def derivatives(self, model, rows):
        """dR for each (parameter index, scale) row, stacked (c, D, D)."""
        if self.f is None:
            self.f = first_divided_difference(self.e[:, None], self.e[None, :], self.tau)
        w, wh = self.w, self.w.conj().T
        out = np.empty((len(rows),) + w.shape, complex)
        for r, (idx, scale) in enumerate(rows):
            g = model.parameters[idx].generator.to_matrix(sparse=True)
            out[r] = w @ (((2 * np.pi * scale) * (wh @ (g @ w))) * self.f) @ wh
        return out


def _runs(steps):
    """Merge the flat steps into runs: ('delay', tau) and ('pulses', [(rotation, qubits-key), ...])."""
    out = []
    for st in steps:
        if isinstance(st, Delay):
            if out and out[-1][0] == "delay":
                out[-1] = ("delay", out[-1][1] + st.seconds)
            else:
                out.append(("delay", st.seconds))
        elif isinstance(st, Pulse):
            if out and out[-1][0] == "pulses":
                out[-1][1].append(st)
            else:
                out.append(("pulses", [st]))
    return out


class _Sequence:
    """One experiment's preparation at one parameter point (shared by signal and gradient)."""

    def __init__(self, engine, experiment, free_values_hz):
        self.engine = engine
        model = engine.model
        self.n = model.n_spins
        self.coeffs, _ = engine._coefficients(experiment, free_values_hz)
        self.spec = engine._spectrum(self.coeffs)
        self.basis = _Basis(engine, self.spec)
        self.runs = [(kind, val if kind == "delay" else
                      [_FinitePulse(model, self.coeffs, p) if p.duration_s is not None else
                       (pulse_rotation(p.angle_deg, p.phase_deg), _pulse_qubits(model, p.isotope)) for p in val])
                     for kind, val in _runs(flat_steps(experiment.steps))]
        self.rows = None      # (parameter index, scale) of the chunk being differentiated (finite pulses)
        rho0 = model.initial_operator().to_matrix()
        obs = model.detection_operator().to_matrix()
        self.x0 = self.basis.to_eigen(rho0)
        ot = self.basis.to_eigen(obs)
        self.pairs = []
        sl = self.basis.slices
        for s in range(len(sl)):
            for p in range(len(sl)):
                block = ot[sl[p], sl[s]]
                if np.any(block != 0):
                    self.pairs.append((_Pair(s, p), block.T.copy()))

    def progress(self, matrices, passes, label):
        """A Progress over passes * runs when the estimated work is large, else None."""
        d = 2**self.n
        work = 8.0 * d * sum((sl.stop - sl.start) ** 2 for sl in self.basis.slices) * matrices * len(self.runs)
        if work * passes < PROGRESS_ABOVE_FLOPS:
            return None
        return Progress(label, passes * len(self.runs))

    def propagate(self, x, dx=None, gens=None, progress=None, offset=0):
        """X (and dX for the stacked eigen-generators `gens`, one (c, d_k, d_k) per sector) through every
        run of the preparation."""
        e = self.basis.energies
        sl = self.basis.slices
        for i, (kind, val) in enumerate(self.runs):
            if progress is not None:
                progress.update(offset + i)
            if kind == "delay":
                lam = np.exp(-1j * e * val)
                if dx is not None:
                    dx *= lam[None, :, None] * lam.conj()[None, None, :]
                    mx = np.zeros_like(dx)             # (G~ o F) X, per parameter
                    xm = np.zeros_like(dx)             # X (G~ o F)^dag
                    for k, gk in enumerate(gens):
                        if gk is None:
                            continue
                        ek = self.spec.energies[k]
                        m = gk * first_divided_difference(ek[:, None], ek[None, :], val)[None]
                        mx[:, sl[k], :] = m @ x[sl[k], :]
                        xm[:, :, sl[k]] = x[:, sl[k]] @ m.conj().transpose(0, 2, 1)
                    mx *= lam.conj()[None, None, :]
                    xm *= lam[None, :, None]
                    dx += mx
                    dx += xm
                x = x * (lam[:, None] * lam.conj()[None, :])
            else:
                stack = x[None] if dx is None else np.concatenate([x[None], dx])
                a = self.basis.to_computational(stack)
                for item in val:
                    if isinstance(item, _FinitePulse):
                        a = _apply_finite(a, item, None if dx is None else item.derivatives(self.engine.model,
                                                                                            self.rows))
                    else:
                        a = _apply_pulse(a, item[0], item[1], self.n)
                y = self.basis.to_eigen(a)
                x = y[0]
                if dx is not None:
                    dx = y[1:]
        return x, dx

    def read(self, x, t):
        """sum_(s,p) sum_ab (O~)_ab X_ab exp(-i (E_a - E_b) t) (not normalised; the engine's block formula)."""
        sl = self.basis.slices
        out = np.zeros(t.size, complex)
        for pair, ot in self.pairs:
            out += self.engine._block_signal(self.spec.energies[pair.s], self.spec.energies[pair.p],
                                             ot * x[sl[pair.s], sl[pair.p]], t)
        return out


def _stacked_generators(engine, spec, rows):
    """Per sector: V^dag (2 pi s_n G_n) V stacked over `rows` (c, d_k, d_k), or None where all vanish."""
    out = []
    per_row = [engine._eigen_generators(spec, n, scale) if scale != 0 else [None] * len(spec.vectors)
               for n, scale in rows]
    for k, v in enumerate(spec.vectors):
        blocks = [g[k] for g in per_row]
        if all(b is None for b in blocks):
            out.append(None)
            continue
        d = v.shape[0]
        dtype = complex if any(b is not None and np.iscomplexobj(b) for b in blocks) else float
        stack = np.zeros((len(rows), d, d), dtype)
        for r, b in enumerate(blocks):
            if b is not None:
                stack[r] = b
        out.append(stack)
    return out


class _Pair:
    def __init__(self, s, p):
        self.s, self.p = s, p


@blas_limited
def sequence_signal(engine, experiment, t, free_values_hz=None) -> np.ndarray:
    """S(t) of a pulse-sequence experiment (module docstring), complex (T,)."""
    _require(engine, 0, t.size, experiment)
    seq = _Sequence(engine, experiment, free_values_hz)
    bar = seq.progress(1, 1, f"pulse sequence '{experiment.name}', runs of steps")
    x, _ = seq.propagate(seq.x0, progress=bar)
    if bar is not None:
        bar.update(bar.total)
    return seq.read(x, t) / engine.norm


@blas_limited
def sequence_gradient(engine, experiment, t, free_values_hz, rows):
    """(S (T,), dS/dh (len(rows), T)) of a pulse-sequence experiment; rows as ExactEngine._rows."""
    _require(engine, len(rows), t.size, experiment)
    seq = _Sequence(engine, experiment, free_values_hz)
    chunk = _chunk(seq.n, len(rows))
    grad = np.zeros((len(rows), t.size), complex)
    sl = seq.basis.slices
    x = None
    passes = -(-len(rows) // chunk)
    bar = seq.progress(1 + min(chunk, len(rows)), passes,
                       f"pulse-sequence gradient '{experiment.name}', runs of steps x parameter chunks")
    for c0 in range(0, len(rows), chunk):
        sub = rows[c0:c0 + chunk]
        gens = _stacked_generators(engine, seq.spec, sub)
        seq.rows = sub
        x, dx = seq.propagate(seq.x0, np.zeros((len(sub),) + seq.x0.shape, complex), gens, bar,
                              (c0 // chunk) * len(seq.runs))
        for r in range(len(sub)):
            grad[c0 + r] = seq.read(dx[r], t)
    if bar is not None:
        bar.update(bar.total)
    if x is None:
        x, _ = seq.propagate(seq.x0)
    rho_t = [x[sl[pair.s], sl[pair.p]] for pair, _ in seq.pairs]
    obs_t = [ot for _, ot in seq.pairs]
    grad += engine._general_contraction(seq.spec, [pair for pair, _ in seq.pairs], rho_t, obs_t, t, rows)
    return seq.read(x, t) / engine.norm, grad / engine.norm
