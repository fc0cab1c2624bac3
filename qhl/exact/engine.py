"""The exact classical engine: NMR signals and their exact parameter derivatives.

Signal (normalised so S(0) = 1):
    S(t) = Tr[O rho(t)] / Tr[O rho0],  rho(t) = U rho0 U^dag,  U = exp(-i H t),
    rho0 = sum Ix (observed spins), O = sum I+ (observed spins), H from qhl.spins.model.

Method. H is block diagonal in magnetisation sectors (qhl.exact.sectors). With H_s = V_s E_s V_s^dag,
    S(t) = (1/N) sum_(s,p) sum_(a in s, b in p) w_ab exp(i (E_b - E_a) t),
    w_ab = (V_p^dag O_ps V_s)_ba (V_s^dag rho0_sp V_p)_ab,  N = Tr[O rho0].
First derivatives follow from the Daleckii-Krein formula with divided differences of exp(-iEt)
split into frequency components (exact, no finite differences): each parameter gives
amplitudes A_ab + i t B_ab at the same frequencies. Degenerate levels (|E_a - E_a'| below
DEGENERACY_RTOL * max|E|) enter through B. Second derivatives use the second divided
differences per time point (qhl.exact.divided_differences). Everything is real where H is real.
"""

from dataclasses import dataclass
import itertools

import numpy as np
import scipy.linalg as sla

from ..base.blas import blas_limited
from ..base.errors import QhlInputError
from .divided_differences import first_divided_difference, second_divided_difference
from ..base.memory import require_memory
from ..spins.model import HamiltonianModel
from .sectors import conserves_magnetisation, full_space, magnetisation_sectors

__all__ = ["ExactEngine", "Spectrum", "DEGENERACY_RTOL", "estimate_memory_bytes"]

DEGENERACY_RTOL = 1e-10
_MAX_SPINS = 20


@dataclass
class _Block:
    s: int            # sector of the ket side (rows of rho0 block)
    p: int            # sector of the bra side
    rho: object       # rho0[s, p] (sparse)
    obs: object       # O[p, s] (sparse)


@dataclass
class Spectrum:
    """Eigen-decomposition of H per sector and the transformed rho0 / O blocks."""

    energies: list        # per sector, rad/s
    vectors: list         # per sector
    rho_t: list           # per block: V_s^dag rho0_sp V_p   (d_s x d_p)
    obs_t: list           # per block: (V_p^dag O_ps V_s)^T  (d_s x d_p)
    tol: float            # degeneracy tolerance in rad/s


def estimate_memory_bytes(n_spins: int, sector_dims, n_times: int, gradient: bool = True) -> float:
    """Peak-memory model: eigenvectors (sum d^2), per-block work (6 d_s d_p), time tables."""
    dims = np.asarray(sector_dims, float)
    eig = 8.0 * np.sum(dims**2) * 2
    biggest = np.max(dims)
    work = 8.0 * 8 * biggest**2 + 16.0 * 4 * biggest * n_times
    sparse = 24.0 * 2**n_spins * n_spins * 3
    return eig + work + sparse


class ExactEngine:
    """Exact signals, gradients, Hessians and Fisher information for one HamiltonianModel.

    Args:
        model: the Hamiltonian model (its free parameters are differentiated).

    Example:
        >>> from qhl import demo_cluster, build_model, ExactEngine
        >>> c = demo_cluster(); eng = ExactEngine(build_model(c))
        >>> s = eng.signal(c.experiments[0]); float(round(abs(s[0]), 12))
        1.0
    """

    def __init__(self, model: HamiltonianModel):
        n = model.n_spins
        if n > _MAX_SPINS:
            raise QhlInputError(f"{n} spins: the exact engine handles at most {_MAX_SPINS}", key="spins")
        self.model = model
        gens = [p.generator for p in model.parameters]
        self.symmetric = conserves_magnetisation(gens, model.isotopes)
        self.sectors = magnetisation_sectors(model.isotopes) if self.symmetric else full_space(n)
        dims = [len(ix) for ix in self.sectors]
        self.largest_sector = max(dims)
        self._dims = dims
        require_memory(f"the exact engine for {n} spins", estimate_memory_bytes(n, dims, 256))
        gmats = [g.to_matrix(sparse=True) for g in gens]
        self.real = all(abs(m.imag).max() == 0 if m.nnz else True for m in gmats)
        dtype = float if self.real else complex
        self._gen_blocks = [[self._cast(m[ix][:, ix], dtype) for ix in self.sectors] for m in gmats]
        rho = model.initial_operator().to_matrix(sparse=True)
        obs = model.detection_operator().to_matrix(sparse=True)
        self.norm = float(np.real((obs @ rho).diagonal().sum()))
        self._blocks = []
        for s, p in itertools.product(range(len(self.sectors)), repeat=2):
            r = rho[self.sectors[s]][:, self.sectors[p]]
            o = obs[self.sectors[p]][:, self.sectors[s]]
            if r.nnz and o.nnz and abs(r).max() > 0 and abs(o).max() > 0:
                self._blocks.append(_Block(s, p, self._cast(r, dtype), self._cast(o, dtype)))
        self._cache = {}

    @staticmethod
    def _cast(m, dtype):
        m = m.tocsr()
        return m.real.astype(float) if dtype is float else m.astype(complex)

    # ------------------------------------------------------------------ parameters
    def _coefficients(self, experiment, free_values_hz):
        """Full vector of 2 pi s_n h_n (rad/s) and the free-parameter scale factors s_n."""
        model = self.model
        values = model.values_hz
        if free_values_hz is not None:
            fv = np.asarray(free_values_hz, float)
            if fv.shape != (len(model.free),):
                raise QhlInputError(f"expected {len(model.free)} free parameter values, got shape {fv.shape}",
                                    key="values")
            values = values.copy()
            values[model.free_indices] = fv
        scale = model.scale_factors(experiment)
        return 2 * np.pi * values * scale, scale[model.free_indices]

    @staticmethod
    def _times(experiment, times):
        if times is None:
            if experiment is None:
                raise QhlInputError("give times or an experiment", key="times")
            times = experiment.times_s
        t = np.atleast_1d(np.asarray(times, float))
        if not np.all(np.isfinite(t)):
            raise QhlInputError("times must be finite", key="times")
        return t

    def _require_times(self, t, rows: int = 1):
        """Refuse up front when the time tables for len(t) points (and `rows` gradient rows) would not fit."""
        n = self.model.n_spins
        need = estimate_memory_bytes(n, self._dims, t.size) + 16.0 * rows * t.size
        require_memory(f"the exact engine for {n} spins and {t.size:,} time points", need)

    @blas_limited
    def spectrum(self, experiment=None, free_values_hz=None) -> Spectrum:
        """Eigen-decomposition of H for `experiment` (cached on the coefficient vector)."""
        coeffs, _ = self._coefficients(experiment, free_values_hz)
        key = coeffs.tobytes()
        if key in self._cache:
            return self._cache[key]
        energies, vectors = [], []
        for k, ix in enumerate(self.sectors):
            d = len(ix)
            h = np.zeros((d, d), dtype=float if self.real else complex)
            for c, blocks in zip(coeffs, self._gen_blocks):
                if c != 0:
                    h += c * blocks[k].toarray()
            e, v = sla.eigh(h, driver="evd") if d > 1 else (np.real(np.diag(h)), np.ones((1, 1), h.dtype))
            energies.append(e)
            vectors.append(v)
        rho_t, obs_t = [], []
        for b in self._blocks:
            vs, vp = vectors[b.s], vectors[b.p]
            rho_t.append(vs.conj().T @ (b.rho @ vp))
            obs_t.append((vp.conj().T @ (b.obs @ vs)).T)
        emax = max(float(np.max(np.abs(e))) for e in energies)
        spec = Spectrum(energies, vectors, rho_t, obs_t, DEGENERACY_RTOL * max(emax, 2 * np.pi))
        if len(self._cache) > 8:
            self._cache.clear()
        self._cache[key] = spec
        return spec

    # ------------------------------------------------------------------ signal
    @blas_limited
    def signal(self, experiment=None, times=None, free_values_hz=None) -> np.ndarray:
        """S(t) for the experiment's times (or `times`), complex array of shape (T,)."""
        t = self._times(experiment, times)
        self._require_times(t)
        spec = self.spectrum(experiment, free_values_hz)
        out = np.zeros(t.shape, complex)
        for b, rt, ot in zip(self._blocks, spec.rho_t, spec.obs_t):
            w = ot * rt
            ea = np.exp(-1j * np.outer(spec.energies[b.s], t))
            eb = np.exp(1j * np.outer(spec.energies[b.p], t))
            out += np.einsum("bt,bt->t", eb, w.T @ ea)
        return out / self.norm

    @blas_limited
    def transitions(self, experiment=None, free_values_hz=None, min_amplitude: float = 1e-14):
        """The line list: frequencies (Hz) and complex amplitudes with S(t) = sum a_k exp(2 pi i f_k t).

        Lines closer than the degeneracy tolerance are merged. Amplitudes sum to S(0) = 1.
        """
        spec = self.spectrum(experiment, free_values_hz)
        freqs, amps = [], []
        for b, rt, ot in zip(self._blocks, spec.rho_t, spec.obs_t):
            w = (ot * rt).ravel() / self.norm
            om = (spec.energies[b.p][None, :] - spec.energies[b.s][:, None]).ravel()
            keep = np.abs(w) > min_amplitude
            freqs.append(om[keep] / (2 * np.pi))
            amps.append(w[keep])
        f = np.concatenate(freqs) if freqs else np.zeros(0)
        a = np.concatenate(amps) if amps else np.zeros(0, complex)
        order = np.argsort(f)
        f, a = f[order], a[order]
        if f.size:
            tol_hz = spec.tol / (2 * np.pi) * 10
            group = np.concatenate([[0], np.cumsum(np.diff(f) > tol_hz)])
            a = np.bincount(group, weights=a.real) + 1j * np.bincount(group, weights=a.imag)
            f = np.bincount(group, weights=f) / np.bincount(group)
        return f, a

    # ------------------------------------------------------------------ gradient
    def _eigen_generators(self, spec, n, scale):
        """V^dag (2 pi s_n G_n) V per sector for parameter index n."""
        out = []
        for k, v in enumerate(spec.vectors):
            g = self._gen_blocks[n][k]
            out.append(None if g.nnz == 0 else (2 * np.pi * scale) * (v.conj().T @ (g @ v)))
        return out

    def _split(self, spec, k, gt):
        """Non-degenerate part K = G/(E_a - E_a') and degenerate part D of an eigen-generator."""
        e = spec.energies[k]
        diff = e[:, None] - e[None, :]
        deg = np.abs(diff) <= spec.tol
        with np.errstate(divide="ignore"):
            inv = np.where(deg, 0.0, 1.0 / np.where(deg, 1.0, diff))
        return gt * inv, gt * deg

    @blas_limited
    def gradient(self, experiment=None, times=None, free_values_hz=None, parameters=None):
        """Exact dS/dh_n for free parameters n (1/Hz).

        Args:
            parameters: names (a subset of the free parameters); default all free.

        Returns:
            (signal (T,), gradient (P, T)) complex arrays.
        """
        model = self.model
        t = self._times(experiment, times)
        self._require_times(t, 1 + len(model.free if parameters is None else parameters))
        spec = self.spectrum(experiment, free_values_hz)
        _, free_scale = self._coefficients(experiment, free_values_hz)
        names = list(model.free) if parameters is None else list(parameters)
        idx_all = model.free_indices
        grad = np.zeros((len(names), t.size), complex)
        tables = [(np.exp(-1j * np.outer(spec.energies[b.s], t)), np.exp(1j * np.outer(spec.energies[b.p], t)))
                  for b in self._blocks]
        for row, name in enumerate(names):
            if name not in model.free:
                raise QhlInputError(f"'{name}' is not a free parameter: free are {', '.join(model.free)}",
                                    key="parameter")
            j = model.free.index(name)
            if free_scale[j] == 0:
                continue
            gts = self._eigen_generators(spec, idx_all[j], free_scale[j])
            parts = [None if g is None else self._split(spec, k, g) for k, g in enumerate(gts)]
            for b, rt, ot, (ea, eb) in zip(self._blocks, spec.rho_t, spec.obs_t, tables):
                ks, ds = parts[b.s] if parts[b.s] is not None else (0.0, 0.0)
                kp, dp = parts[b.p] if parts[b.p] is not None else (0.0, 0.0)
                if parts[b.s] is None and parts[b.p] is None:
                    continue
                a = ot * (_mm(ks, rt) - _mm(rt, kp)) + rt * (_mm(ot, _t(kp)) - _mm(_t(ks), ot))
                bb = ot * (_mm(rt, dp) - _mm(ds, rt))
                x = a.T @ ea
                y = bb.T @ ea
                grad[row] += np.einsum("bt,bt->t", eb, x + 1j * t[None, :] * y)
        sig = self.signal(experiment, t, free_values_hz)
        return sig, grad / self.norm

    # ------------------------------------------------------------------ Hessian
    @blas_limited
    def hessian(self, experiment=None, times=None, free_values_hz=None, parameters=None):
        """Exact d2S/dh_m dh_n (1/Hz^2), shape (P, P, T). Cost grows as P d^3 T: small clusters.

        Returns:
            (signal, gradient (P, T), hessian (P, P, T)).
        """
        model = self.model
        t = self._times(experiment, times)
        self._require_times(t, 1 + len(model.free if parameters is None else parameters))
        spec = self.spectrum(experiment, free_values_hz)
        _, free_scale = self._coefficients(experiment, free_values_hz)
        names = list(model.free) if parameters is None else list(parameters)
        for name in names:
            if name not in model.free:
                raise QhlInputError(f"'{name}' is not a free parameter", key="parameter")
        cols = [model.free.index(nm) for nm in names]
        P = len(names)
        dmax = max(len(e) for e in spec.energies)
        require_memory("the exact Hessian", 16.0 * (3 * dmax**3 + 4 * P * dmax**2))
        nsec = len(self.sectors)
        gstack = []
        for k in range(nsec):
            d = len(spec.energies[k])
            gstack.append(np.zeros((P, d, d), dtype=float if self.real else complex))
        for r, j in enumerate(cols):
            for k, g in enumerate(self._eigen_generators(spec, model.free_indices[j], free_scale[j])):
                if g is not None:
                    gstack[k][r] = g
        hess = np.zeros((P, P, t.size), complex)
        for ti, tau in enumerate(t):
            f1 = [first_divided_difference(e[:, None], e[None, :], tau) for e in spec.energies]
            g1 = [first_divided_difference(e[:, None], e[None, :], -tau) for e in spec.energies]
            acc = np.zeros((P, P), complex)
            for b, rt, ot in zip(self._blocks, spec.rho_t, spec.obs_t):
                es, ep = spec.energies[b.s], spec.energies[b.p]
                lam_s, lam_p = np.exp(-1j * es * tau), np.exp(1j * ep * tau)
                o = ot.T                                   # V_p^dag O V_s  (d_p x d_s)
                m = (rt * lam_p[None, :]) @ o              # d_s x d_s
                nmat = (o * lam_s[None, :]) @ rt           # d_p x d_p
                acc += _second_order_term(m, gstack[b.s], es, tau)
                acc += _second_order_term(nmat, gstack[b.p], ep, -tau)
                x1 = gstack[b.s] * f1[b.s][None]           # dU_s per parameter
                x2 = gstack[b.p] * g1[b.p][None]           # dU_p^dag per parameter
                l1 = np.einsum("bs,psr,rc->pbc", o, x1, rt, optimize=True)
                cross = np.einsum("pbc,qcb->pq", l1, x2, optimize=True)
                acc += cross + cross.T
            hess[:, :, ti] = acc
        sig, grad = self.gradient(experiment, t, free_values_hz, names)
        return sig, grad, hess / self.norm


def _second_order_term(m, g, e, tau):
    """sum_{a,c,a'} m_{a'a} f[E_a,E_c,E_a'] (G^p_ac G^q_ca' + G^q_ac G^p_ca') for all (p, q)."""
    f2 = second_divided_difference(e[:, None, None], e[None, :, None], e[None, None, :], tau)
    t3 = f2 * m.T[:, None, :]                          # t3[a, c, a'] = m[a', a] f2[a, c, a']
    z = np.einsum("acb,pac->pcb", t3, g, optimize=True)
    piece = z.reshape(len(g), -1) @ g.reshape(len(g), -1).T
    return piece + piece.T


def _mm(a, b):
    if isinstance(a, float) or isinstance(b, float):
        return 0.0
    return a @ b


def _t(a):
    return a if isinstance(a, float) else a.T
