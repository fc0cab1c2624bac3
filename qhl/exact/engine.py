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

Fast gradient contraction (used where H is real and the sectors split rho0 and O, the usual case).
With R = V_s^T rho0_sp V_p, G~ = V^T (2 pi s_n G_n) V per sector and K = G~ / (E_a - E_a')
(zero on degenerate pairs):
  * R_obs = 2 R: the block O_ps = (I+)_ps is the only part of sum I+ between the sectors, and
    rho0_sp = (sum Ix)_sp = (I-)_sp / 2 = (O_ps)^T / 2 (real matrices), so the transformed observable
    (V_p^T O_ps V_s)^T equals 2 R. The engine checks this block by block and otherwise uses the
    general contraction.
  * K is antisymmetric (G~ symmetric), so the four products of the general formula collapse to
    A = 4 R o (K_s R - R K_p) (o: elementwise product).
  * For a non-degenerate spectrum the degenerate part of G~ is its diagonal g, so
    B_ab = 2 R_ab^2 (g_p,b - g_s,a) needs no matrix product.
  * The time sum uses real tables [cos(E t) | sin(E t)], and parameters are taken in chunks so
    that each product is one large BLAS-3 call.

precision="single" runs the O(d^3) products (eigen-generators, K R, R K and the time-table
product) in float32, with the eigendecomposition, the degenerate term and all sums over blocks and
parameters in float64 (float32 BLAS sums its own products in float32). Measured: largest
gradient error relative to the largest gradient entry 2.4e-6 at n = 10 (55 parameters, 256
points) and 4.5e-7 at n = 12 (78 parameters) on benchmarks/bench_engine.py's random proton
clusters, 1e-8 to 4e-7 at n = 3-7 (tests/test_engine_fast.py). SINGLE_RTOL = 1e-4 is the stated
bound. The signal, Hessian and adjoint path are always double.

Adjoint (time-point) gradient. For few time points the derivative is taken per time point,
    dS(t)/dh = sum_k sum_(a,a') G~_k[a,a'] Z_k[a,a'](t),
    Z_s += F_s o (R Lambda_p^* R_obs^T)^T  (ket side),  Z_p += conj(F_p) o (R_obs^T Lambda_s R)^T
    (bra side), F[a,a'] = f[E_a, E_a'] the first divided difference of exp(-iEt) and
    Lambda = diag(exp(-iEt)) (Daleckii-Krein; R. Bhatia, "Matrix Analysis", 1997, ch. V).
Transformed back, Y_k = V_k Z_k^T V_k^dag, the sum runs over the stored entries of the sparse
generators, so no eigen-generator is formed: in all about T (2 (d_s^2 d_p + d_s d_p^2) + 4 d^3)
real operations against P (d^3 + d_s^2 d_p + d_s d_p^2 + 4 d_s d_p T) for the full path; it is
chosen when its count is lower (gradient(method="auto"), roughly T < P / 3).

Memory-lean mode. Above LEAN_ABOVE_BYTES of eigenvectors (n >= 15 protons) signal and gradient
sweep the sector pairs in order, holding the eigenvectors of only the (at most three) sectors in
use (the gradient first runs one eigenvalue-only pass for the degeneracy tolerance); spectrum(),
transitions(), hessian() and the adjoint path still hold all sectors.
"""

from dataclasses import dataclass
import itertools

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp

from ..base.blas import blas_limited, blas_threads
from ..base.errors import QhlInputError
from .divided_differences import first_divided_difference, second_divided_difference
from ..base.memory import require_memory
from ..spins.cluster import refuse_spinning, refuse_steps
from ..spins.model import HamiltonianModel
from ..spins.spinning import is_spinning
from .sectors import conserves_magnetisation, full_space, magnetisation_sectors

__all__ = ["ExactEngine", "Spectrum", "DEGENERACY_RTOL", "SINGLE_RTOL", "estimate_memory_bytes"]

DEGENERACY_RTOL = 1e-10
SINGLE_RTOL = 1e-4          # stated bound of precision="single": max |error| / max |gradient|
LEAN_ABOVE_BYTES = 1 << 30  # eigenvectors of all sectors above this: memory-lean sweep
_CHUNK_BYTES = 256 << 20    # work arrays of one parameter chunk
_KCACHE_BYTES = 768 << 20   # eigen-generators kept for the next sector pair
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


def _lean(dims) -> bool:
    return 8.0 * float(np.sum(np.asarray(dims, float) ** 2)) > LEAN_ABOVE_BYTES


def estimate_memory_bytes(n_spins: int, sector_dims, n_times: int, gradient: bool = True) -> float:
    """Peak-memory model of signal + full gradient (bytes), for `n_times` time points.

    Assumes the default free set, offsets and all dipolar pairs: P = n (n + 1) / 2. Terms (float64):
      * sparse generator blocks, 1.5 * 2^n stored entries per parameter, 36 bytes each (CSR + the
        stacked copy used to assemble H);
      * eigenvectors of all sectors and the transformed rho0 / O of every sector pair, or in the
        memory-lean mode (sum d^2 above LEAN_ABOVE_BYTES) the eigenvectors of three sectors and the
        transformed rho0 and weights of one pair; the eigensolver's work (3 d^2 of the largest sector);
      * gradient: one parameter chunk (_chunk_size: K_s, K_p, products and time tables) and the
        eigen-generators kept for the next sector pair (P d^2, below _KCACHE_BYTES, not when lean);
      * time tables, 64 d T.
    Checked against the tracemalloc peak at 10-12 spins in tests/test_engine_memory.py; measured
    once at 14 spins in the lean mode (one-parameter gradient, 256 points): peak 983 MiB, estimate
    1205 MiB.
    """
    dims = np.sort(np.asarray(sector_dims, float))[::-1]
    n_t = max(int(n_times), 1)
    n_par = n_spins * (n_spins + 1) // 2
    big = dims[0]
    second = dims[1] if dims.size > 1 else dims[0]
    lean = _lean(dims)
    if lean:
        eig = 8.0 * (np.sum(dims[:3] ** 2) + 2 * big * second)
    else:
        eig = 8.0 * (np.sum(dims**2) + 3 * np.sum(dims[:-1] * dims[1:]))
    solver = 8.0 * 3 * big**2
    sparse = 36.0 * 1.5 * 2.0**n_spins * n_par
    tables = 64.0 * big * n_t
    total = eig + solver + sparse + tables
    if gradient:
        per = 8.0 * (big**2 + second**2 + 3 * big * second + 2 * big * n_t)
        chunk = _chunk_size(n_par, [int(d) for d in dims], int(big), int(second), n_t, 8)
        kcache = 8.0 * n_par * big**2
        total += chunk * per + (0.0 if lean or kcache > _KCACHE_BYTES else kcache)
    return float(total)


class ExactEngine:
    """Exact signals, gradients, Hessians and Fisher information for one HamiltonianModel.

    Args:
        model: the Hamiltonian model (its free parameters are differentiated).
        precision: "double" (default, the reference) or "single" (gradient products in float32,
            accumulation in float64; error below SINGLE_RTOL of the largest gradient entry).
        lean: hold the eigenvectors of only the sector pairs in use during signal/gradient
            (default: automatic, when all eigenvectors would exceed LEAN_ABOVE_BYTES).

    Spinning experiments (spinning_hz > 0) go to qhl.exact.spinning_engine for signal and gradient
    (so Fisher information, the gradient provider and fits work on them); the attribute
    `spinning_slices_per_period` (default None: the rule in that module) sets its slices per rotor
    period. spectrum, transitions and hessian refuse them.

    Example:
        >>> from qhl import demo_cluster, build_model, ExactEngine
        >>> c = demo_cluster(); eng = ExactEngine(build_model(c))
        >>> s = eng.signal(c.experiments[0]); float(round(abs(s[0]), 12))
        1.0
    """

    def __init__(self, model: HamiltonianModel, precision: str = "double", lean=None):
        n = model.n_spins
        if n > _MAX_SPINS:
            raise QhlInputError(f"{n} spins: the exact engine handles at most {_MAX_SPINS}", key="spins")
        if precision not in ("double", "single"):
            raise QhlInputError(f"precision {precision!r}: expected 'double' or 'single'", key="precision")
        self.model = model
        self.precision = precision
        gens = [p.generator for p in model.parameters]
        self.symmetric = conserves_magnetisation(gens, model.isotopes)
        self.sectors = magnetisation_sectors(model.isotopes) if self.symmetric else full_space(n)
        dims = [len(ix) for ix in self.sectors]
        self.largest_sector = max(dims)
        self._dims = dims
        self.lean = _lean(dims) if lean is None else bool(lean)
        require_memory(f"the exact engine for {n} spins", estimate_memory_bytes(n, dims, 256))
        gmats = [g.to_matrix(sparse=True) for g in gens]
        self.real = not any(np.any(m.data.imag != 0) for m in gmats)
        dtype = float if self.real else complex
        nsec = len(self.sectors)
        self._sec_of = np.zeros(2**n, dtype=np.int64)
        self._loc = np.zeros(2**n, dtype=np.int64)
        for k, ix in enumerate(self.sectors):
            self._sec_of[ix] = k
            self._loc[ix] = np.arange(len(ix))
        parts = [([], [], [], []) for _ in range(nsec)]
        self._gen_cache = None      # per-parameter sector blocks, built on first use (gradients)
        for j, m in enumerate(gmats):
            split = self._split_blocks(m, dtype)
            for k, (r, c, v) in split.items():
                if k[0] != k[1]:
                    continue
                for lst, x in zip(parts[k[0]], (r, c, np.full(len(v), j), v)):
                    lst.append(x)
        empty = (np.zeros(0, np.int64),) * 3 + (np.zeros(0, dtype),)
        self._h_parts = [tuple(np.concatenate(x) if x else e for x, e in zip(parts[k], empty)) + (dims[k],)
                         for k in range(nsec)]
        rho = model.initial_operator().to_matrix(sparse=True)
        obs = model.detection_operator().to_matrix(sparse=True)
        self.norm = float(np.real((obs @ rho).diagonal().sum()))
        rho_split, obs_split = self._split_blocks(rho, dtype), self._split_blocks(obs, dtype)
        self._blocks = []
        for s_, p_ in itertools.product(range(nsec), repeat=2):
            if (s_, p_) in rho_split and (p_, s_) in obs_split:
                r, c, v = rho_split[(s_, p_)]
                ro, co, vo = obs_split[(p_, s_)]
                self._blocks.append(_Block(s_, p_, sp.csr_matrix((v, (r, c)), shape=(dims[s_], dims[p_])),
                                           sp.csr_matrix((vo, (ro, co)), shape=(dims[p_], dims[s_]))))
        # rho0_sp = O_ps^T / 2 in every block (real H): the transformed observable is 2 R
        self.mirrored = self.real and all(
            (b.rho - 0.5 * b.obs.T).count_nonzero() == 0 for b in self._blocks)
        self._cache = {}
        self.spinning_slices_per_period = None

    @property
    def _gen_blocks(self):
        """[parameter][sector] -> the generator's sector block (CSR), from the entries of H's parts
        (the signal does not need them: built on the first gradient or Hessian)."""
        if self._gen_cache is None:
            n_par = len(self.model.parameters)
            blocks = [[None] * len(self.sectors) for _ in range(n_par)]
            for k, (rows, cols, pidx, vals, d) in enumerate(self._h_parts):
                order = np.argsort(pidx, kind="stable")
                bounds = np.searchsorted(pidx[order], np.arange(n_par + 1))
                for j in range(n_par):
                    sel = order[bounds[j]:bounds[j + 1]]
                    blocks[j][k] = sp.csr_matrix((vals[sel], (rows[sel], cols[sel])), shape=(d, d))
            self._gen_cache = blocks
        return self._gen_cache

    def _split_blocks(self, m, dtype):
        """{(k, l): (rows, cols, values)} of a full-space sparse matrix by the sectors of its rows
        and columns (local indices; stored zeros dropped). One pass over the entries."""
        g = m.tocoo()
        keep = g.data != 0
        r, c, v = g.row[keep], g.col[keep], g.data[keep]
        v = v.real.astype(float) if dtype is float else v.astype(complex)
        nsec = len(self.sectors)
        key = self._sec_of[r] * nsec + self._sec_of[c]
        order = np.argsort(key, kind="stable")
        key, r, c, v = key[order], r[order], c[order], v[order]
        uniq, start = np.unique(key, return_index=True)
        stop = np.append(start[1:], key.size)
        return {(int(u) // nsec, int(u) % nsec): (self._loc[r[a:b]], self._loc[c[a:b]], v[a:b])
                for u, a, b in zip(uniq, start, stop)}

    # ------------------------------------------------------------------ parameters
    def _coefficients(self, experiment, free_values_hz):
        """Full vector of 2 pi s_n h_n (rad/s) and the free-parameter scale factors s_n."""
        model = self.model
        values = model.all_values_hz(free_values_hz)
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

    def _sector_hamiltonian(self, k, coeffs):
        """H in sector k as one sparse sum of all generator entries (duplicates summed)."""
        rows, cols, pidx, vals, d = self._h_parts[k]
        data = vals * coeffs[pidx]
        return sp.coo_matrix((data, (rows, cols)), shape=(d, d)).toarray()

    def _sector_eigh(self, k, coeffs, values_only=False):
        h = self._sector_hamiltonian(k, coeffs)
        if h.shape[0] == 1:
            e = np.real(np.diag(h)).astype(float)
            return e if values_only else (e, np.ones((1, 1), h.dtype))
        with blas_threads(h.shape[0]):
            if values_only:
                return sla.eigvalsh(h, driver="evd")
            return sla.eigh(h, driver="evd")

    @staticmethod
    def _tolerance(emax):
        return DEGENERACY_RTOL * max(emax, 2 * np.pi)

    @blas_limited
    def spectrum(self, experiment=None, free_values_hz=None) -> Spectrum:
        """Eigen-decomposition of H for `experiment` (cached on the coefficient vector)."""
        refuse_spinning(experiment, "the spectrum (time-independent H)")
        coeffs, _ = self._coefficients(experiment, free_values_hz)
        return self._spectrum(coeffs)

    def _spectrum(self, coeffs):
        key = coeffs.tobytes()
        if key in self._cache:
            return self._cache[key]
        energies, vectors = [], []
        for k in range(len(self.sectors)):
            e, v = self._sector_eigh(k, coeffs)
            energies.append(e)
            vectors.append(v)
        rho_t, obs_t = [], []
        for b in self._blocks:
            vs, vp = vectors[b.s], vectors[b.p]
            rho_t.append(vs.conj().T @ (b.rho @ vp))
            obs_t.append(2 * rho_t[-1] if self.mirrored else (vp.conj().T @ (b.obs @ vs)).T)
        emax = max(float(np.max(np.abs(e))) for e in energies)
        spec = Spectrum(energies, vectors, rho_t, obs_t, self._tolerance(emax))
        if len(self._cache) > 8:
            self._cache.clear()
        self._cache[key] = spec
        return spec

    def _sweep(self, coeffs):
        """Per block: (index, block, E_s, V_s, E_p, V_p, rho_t, obs_t), holding few sectors at a time."""
        if not self.lean:
            spec = self._spectrum(coeffs)
            for i, b in enumerate(self._blocks):
                yield (i, b, spec.energies[b.s], spec.vectors[b.s], spec.energies[b.p], spec.vectors[b.p],
                       spec.rho_t[i], spec.obs_t[i])
            return
        held = {}
        for i, b in enumerate(self._blocks):
            nxt = self._blocks[i + 1] if i + 1 < len(self._blocks) else None
            for k in (b.s, b.p):
                if k not in held:
                    held[k] = self._sector_eigh(k, coeffs)
            (es, vs), (ep, vp) = held[b.s], held[b.p]
            rt = vs.conj().T @ (b.rho @ vp)
            ot = None if self.mirrored else (vp.conj().T @ (b.obs @ vs)).T   # mirrored: ot = 2 rt
            yield i, b, es, vs, ep, vp, rt, ot
            keep = {nxt.s, nxt.p} if nxt is not None else set()
            for k in list(held):
                if k not in keep:
                    del held[k]

    def _sweep_tolerance(self, coeffs):
        if not self.lean:
            return self._spectrum(coeffs).tol
        emax = max(float(np.max(np.abs(self._sector_eigh(k, coeffs, values_only=True))))
                   for k in range(len(self.sectors)))
        return self._tolerance(emax)

    # ------------------------------------------------------------------ signal
    @blas_limited
    def signal(self, experiment=None, times=None, free_values_hz=None) -> np.ndarray:
        """S(t) for the experiment's times (or `times`), complex array of shape (T,).

        An experiment with pulse-sequence steps goes to qhl.exact.sequence_engine (the times
        then count from the end of its last step)."""
        t = self._times(experiment, times)
        self._require_times(t)
        if is_spinning(experiment):
            from .spinning_engine import spinning_signal
            return spinning_signal(self, experiment, t, free_values_hz)
        if _has_steps(experiment):
            from .sequence_engine import sequence_signal
            return sequence_signal(self, experiment, t, free_values_hz)
        coeffs, _ = self._coefficients(experiment, free_values_hz)
        out = np.zeros(t.shape, complex)
        for _, b, es, _, ep, _, rt, ot in self._sweep(coeffs):
            out += self._block_signal(es, ep, 2 * rt * rt if ot is None else ot * rt, t)
        return out / self.norm

    def _block_signal(self, es, ep, w, t):
        """sum_ab w_ab exp(-i (E_a - E_b) t) of one sector pair (not normalised); w may be complex."""
        if self.real:
            x = w.T @ _table(es, t, -1.0)                     # sum_a w_ab exp(-i E_a t), (d_p, 2T)
            xa = x[:, :t.size] + 1j * x[:, t.size:]
        else:
            xa = w.T @ np.exp(-1j * np.outer(es, t))
        return np.einsum("bt,bt->t", np.exp(1j * np.outer(ep, t)), xa)

    @blas_limited
    def transitions(self, experiment=None, free_values_hz=None, min_amplitude: float = 1e-14):
        """The line list: frequencies (Hz) and complex amplitudes with S(t) = sum a_k exp(2 pi i f_k t).

        Lines closer than the degeneracy tolerance are merged. Amplitudes sum to S(0) = 1.
        """
        refuse_steps(experiment, "the line list")
        refuse_spinning(experiment, "the line list (H depends on time; the spectrum has rotor sidebands)")
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
        inv, deg = _inverse_gaps(spec.energies[k], spec.tol)
        return gt * inv, gt * deg

    def _rows(self, experiment, free_values_hz, parameters):
        """(names, full parameter index and scale per row) of the requested free parameters."""
        model = self.model
        if is_spinning(experiment):           # the spinning engine applies s_n(t) itself
            free_scale = np.ones(len(model.free))
        else:
            _, free_scale = self._coefficients(experiment, free_values_hz)
        names = list(model.free) if parameters is None else list(parameters)
        rows = []
        for name in names:
            if name not in model.free:
                raise QhlInputError(f"'{name}' is not a free parameter: free are {', '.join(model.free)}",
                                    key="parameter")
            j = model.free.index(name)
            rows.append((int(model.free_indices[j]), float(free_scale[j])))
        return names, rows

    @blas_limited
    def gradient(self, experiment=None, times=None, free_values_hz=None, parameters=None,
                 method: str = "auto"):
        """Exact dS/dh_n for free parameters n (1/Hz).

        Args:
            parameters: names (a subset of the free parameters); default all free.
            method: "full" (all time points at once, cost ~ P d^3), "adjoint" (per time point,
                cost ~ T d^3) or "auto" (the cheaper of the two by the cost model in _choose).

        Returns:
            (signal (T,), gradient (P, T)) complex arrays.
        """
        t = self._times(experiment, times)
        _, rows = self._rows(experiment, free_values_hz, parameters)
        self._require_times(t, 1 + len(rows))
        if method not in ("auto", "full", "adjoint", "general"):
            raise QhlInputError(f"method {method!r}: expected auto, full or adjoint", key="method")
        if is_spinning(experiment):
            from .spinning_engine import spinning_gradient
            return spinning_gradient(self, experiment, t, free_values_hz, rows)
        coeffs, _ = self._coefficients(experiment, free_values_hz)
        if _has_steps(experiment):
            from .sequence_engine import sequence_gradient
            return sequence_gradient(self, experiment, t, free_values_hz, rows)
        if method == "auto":
            method = self._choose(len(rows), t.size)
        if method == "adjoint":
            grad = self._gradient_adjoint(coeffs, t, rows)
        elif method == "full" and self.mirrored:
            grad = self._gradient_fast(coeffs, t, rows)
        else:
            grad = self._gradient_general(coeffs, t, rows)
        sig = self.signal(experiment, t, free_values_hz)
        return sig, grad / self.norm

    def _choose(self, n_params, n_times):
        """'adjoint' where its operation count is below the full path's (real flops, leading terms).

        full (fast contraction): P (sum_k d_k^3 + sum_pairs d_s d_p (d_s + d_p + 4T));
        adjoint: T (2 sum_pairs d_s d_p (d_s + d_p) + 4 sum_k d_k^3); complex H costs 4x in the full
        general path. The memory-lean mode always takes the full path (the adjoint holds all sectors).
        """
        if self.lean:
            return "full"
        dims = [len(ix) for ix in self.sectors]
        cube = float(sum(d**3 for d in dims))
        pairs = [(dims[b.s], dims[b.p]) for b in self._blocks]
        prod = float(sum(a * b * (a + b) for a, b in pairs))
        table = float(sum(4 * a * b for a, b in pairs))
        full = n_params * (cube + prod + table * n_times)
        if not self.mirrored:
            full *= 4.0
        adjoint = n_times * (2 * prod + 4 * cube)
        return "adjoint" if adjoint < full else "full"

    def _gradient_general(self, coeffs, t, rows):
        """The general contraction (complex H, or sectors that do not split rho0 and O)."""
        spec = self._spectrum(coeffs)
        return self._general_contraction(spec, self._blocks, spec.rho_t, spec.obs_t, t, rows)

    def _general_contraction(self, spec, blocks, rho_t, obs_t, t, rows):
        """d/dh of sum_blocks Tr[O_ps U_s rho_sp U_p^dag] with the operator rho held fixed, from the
        transformed blocks rho_t (V_s^dag rho_sp V_p) and obs_t ((V_p^dag O_ps V_s)^T) of `blocks`
        (objects with sector indices .s, .p); rho need not be rho0 (qhl.exact.sequence_engine)."""
        grad = np.zeros((len(rows), t.size), complex)
        tables = [(np.exp(-1j * np.outer(spec.energies[b.s], t)), np.exp(1j * np.outer(spec.energies[b.p], t)))
                  for b in blocks]
        for row, (n, scale) in enumerate(rows):
            if scale == 0:
                continue
            gts = self._eigen_generators(spec, n, scale)
            parts = [None if g is None else self._split(spec, k, g) for k, g in enumerate(gts)]
            for b, rt, ot, (ea, eb) in zip(blocks, rho_t, obs_t, tables):
                ks, ds = parts[b.s] if parts[b.s] is not None else (0.0, 0.0)
                kp, dp = parts[b.p] if parts[b.p] is not None else (0.0, 0.0)
                if parts[b.s] is None and parts[b.p] is None:
                    continue
                a = ot * (_mm(ks, rt) - _mm(rt, kp)) + rt * (_mm(ot, _t(kp)) - _mm(_t(ks), ot))
                bb = ot * (_mm(rt, dp) - _mm(ds, rt))
                x = a.T @ ea
                y = bb.T @ ea
                grad[row] += np.einsum("bt,bt->t", eb, x + 1j * t[None, :] * y)
        return grad

    def _sector_chunk(self, k, e, v, tol, rows, dtype):
        """Eigen-generator data of sector k for parameter rows: (K (c,d,d) dtype, diag (c,d), D or None)."""
        d = len(e)
        inv, deg = _inverse_gaps(e, tol)
        offdeg = bool(np.count_nonzero(deg) > d)
        kk = np.zeros((len(rows), d, d), dtype)
        diag = np.zeros((len(rows), d))
        dd = np.zeros((len(rows), d, d)) if offdeg else None
        vx = v.astype(dtype, copy=False)
        for r, (n, scale) in enumerate(rows):
            g = self._gen_blocks[n][k]
            if scale == 0 or g.nnz == 0:
                continue
            gv = g @ v
            diag[r] = (2 * np.pi * scale) * np.einsum("ia,ia->a", v, gv)
            gt = vx.T @ gv.astype(dtype, copy=False)
            gt *= 2 * np.pi * scale
            if offdeg:
                dd[r] = gt * deg
            np.multiply(gt, inv.astype(dtype, copy=False), out=kk[r])
        return kk, diag, dd

    def _gradient_fast(self, coeffs, t, rows):
        """Gradient on the identities of the module docstring (real H, mirrored blocks)."""
        dtype = np.float32 if self.precision == "single" else np.float64
        item = np.dtype(dtype).itemsize
        n_t = t.size
        tol = self._sweep_tolerance(coeffs)
        grad = np.zeros((len(rows), n_t), complex)
        kcache = {}
        dims = [len(ix) for ix in self.sectors]
        ds, dp = max(dims), max((dims[b.p] for b in self._blocks), default=1)
        chunk = _chunk_size(len(rows), dims, ds, dp, n_t, item)
        for i, b, es, vs, ep, vp, rt, _ in self._sweep(coeffs):
            ds, dp = len(es), len(ep)
            cs, cp = _table(es, t, -1.0), _table(ep, t, 1.0)      # [cos | -sin](E_s t), [cos | sin](E_p t)
            ea = cs[:, :n_t] + 1j * cs[:, n_t:]                   # exp(-i E_s t)
            eb = cp[:, :n_t] + 1j * cp[:, n_t:]                   # exp(+i E_p t)
            w = 2 * rt * rt
            pb = w.T @ cs
            pb = pb[:, :n_t] + 1j * pb[:, n_t:]                   # sum_a w_ab exp(-i E_a t)
            pa = w @ cp
            pa = pa[:, :n_t] + 1j * pa[:, n_t:]                   # sum_b w_ab exp(+i E_b t)
            del w
            rx = rt.astype(dtype, copy=False)
            cpx = cp.astype(dtype)
            nxt = self._blocks[i + 1] if i + 1 < len(self._blocks) else None
            cache_ok = len(rows) * max(ds, dp) ** 2 * item <= _KCACHE_BYTES and not self.lean
            with blas_threads(max(ds, dp)):
                for c0 in range(0, len(rows), chunk):
                    sub = rows[c0:c0 + chunk]
                    c = len(sub)
                    ks, gs, dms = kcache.pop((b.s, c0), None) or self._sector_chunk(b.s, es, vs, tol, sub, dtype)
                    kp, gp, dmp = kcache.pop((b.p, c0), None) or self._sector_chunk(b.p, ep, vp, tol, sub, dtype)
                    if cache_ok and nxt is not None:
                        for k, val in ((b.s, (ks, gs, dms)), (b.p, (kp, gp, dmp))):
                            if k in (nxt.s, nxt.p):
                                kcache[(k, c0)] = val
                    m = (ks.reshape(c * ds, ds) @ rx).reshape(c, ds, dp)
                    # R K_p = -(K_p R^T)^T, K_p antisymmetric
                    m += (kp.reshape(c * dp, dp) @ rx.T).reshape(c, dp, ds).transpose(0, 2, 1)
                    m *= rx
                    m *= 4                                             # A = 4 R o (K_s R - R K_p)
                    x = (m.reshape(c * ds, dp) @ cpx).reshape(c, ds, 2 * n_t)
                    xc, xs = x[:, :, :n_t], x[:, :, n_t:]
                    # sum_a exp(-i E_a t) (xc + i xs), exp(-i E_a t) = cos_a - i sin_a; sums in float64
                    cos_a, sin_a = cs[:, :n_t], -cs[:, n_t:]
                    grad[c0:c0 + c] += (_contract(xc, cos_a) + _contract(xs, sin_a)
                                        + 1j * (_contract(xs, cos_a) - _contract(xc, sin_a)))
                    if dms is None and dmp is None:
                        deg = gp @ (eb * pb) - gs @ (ea * pa)
                    else:
                        dms = dms if dms is not None else _diag_stack(gs)
                        dmp = dmp if dmp is not None else _diag_stack(gp)
                        bm = 2 * rt * (np.matmul(rt, dmp) - np.matmul(dms, rt))   # (c, d_s, d_p)
                        y = (bm.reshape(c * ds, dp) @ cp).reshape(c, ds, 2 * n_t)
                        deg = np.einsum("cat,at->ct", y[:, :, :n_t] + 1j * y[:, :, n_t:], ea)
                    grad[c0:c0 + c] += 1j * t[None, :] * deg
                    del m, x
            for key in [key for key in kcache if nxt is None or key[0] not in (nxt.s, nxt.p)]:
                del kcache[key]
        return grad

    def _gradient_adjoint(self, coeffs, t, rows):
        """Per-time-point gradient (module docstring), sector by sector.

        With Y_k = V_k Z_k^T V_k^dag, dS/dh_n = sum_k sum_ij (2 pi s_n G_n)_ij (Y_k)_ji: a sum over
        the stored entries of the sparse generators, so no eigen-generator is formed.
        """
        spec = self._spectrum(coeffs)
        full = np.zeros((len(self.model.parameters), t.size), complex)
        ket = [[] for _ in self.sectors]
        bra = [[] for _ in self.sectors]
        for b, rt, ot in zip(self._blocks, spec.rho_t, spec.obs_t):
            ket[b.s].append((rt, ot.T, spec.energies[b.p]))
            bra[b.p].append((rt, ot.T, spec.energies[b.s]))
        for k in range(len(self.sectors)):
            if not ket[k] and not bra[k]:
                continue
            e, v = spec.energies[k], spec.vectors[k]
            rows_k, cols_k, pidx, vals, _ = self._h_parts[k]
            for ti, tau in enumerate(t):
                z = 0
                if ket[k]:
                    f = first_divided_difference(e[:, None], e[None, :], tau)
                    for rt, o, ep in ket[k]:
                        z = z + f * ((rt * np.exp(1j * ep * tau)[None, :]) @ o).T     # F o (R L_p^* O~)^T
                if bra[k]:
                    fb = first_divided_difference(e[:, None], e[None, :], -tau)
                    for rt, o, es in bra[k]:
                        z = z + fb * ((o * np.exp(-1j * es * tau)[None, :]) @ rt).T   # F^* o (O~ L_s R)^T
                y = v @ z.T @ v.conj().T
                contrib = vals * y[cols_k, rows_k]
                full[:, ti] += (np.bincount(pidx, contrib.real, minlength=full.shape[0])
                                + 1j * np.bincount(pidx, contrib.imag, minlength=full.shape[0]))
        grad = np.zeros((len(rows), t.size), complex)
        for r, (n, scale) in enumerate(rows):
            grad[r] = (2 * np.pi * scale) * full[n]
        return grad

    # ------------------------------------------------------------------ Hessian
    @blas_limited
    def hessian(self, experiment=None, times=None, free_values_hz=None, parameters=None):
        """Exact d2S/dh_m dh_n (1/Hz^2), shape (P, P, T). Cost grows as P d^3 T: small clusters.

        Returns:
            (signal, gradient (P, T), hessian (P, P, T)).
        """
        model = self.model
        refuse_steps(experiment, "the exact Hessian")
        refuse_spinning(experiment, "the exact Hessian")
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


def _has_steps(experiment) -> bool:
    return experiment is not None and bool(getattr(experiment, "steps", ()))


def _inverse_gaps(e, tol):
    """1/(E_a - E_a') off the degenerate pairs (0 there) and the degenerate mask (|gap| <= tol)."""
    diff = e[:, None] - e[None, :]
    deg = np.abs(diff) <= tol
    with np.errstate(divide="ignore"):
        inv = np.where(deg, 0.0, 1.0 / np.where(deg, 1.0, diff))
    return inv, deg


def _table(e, t, sign):
    """Real time table [cos(E t) | sign * sin(E t)], shape (d, 2T)."""
    ph = np.outer(e, t)
    return np.concatenate([np.cos(ph), sign * np.sin(ph)], axis=1)


def _chunk_size(n_rows, dims, ds, dp, n_t, item):
    """Parameters per chunk: work of one parameter against the chunk budget.

    The budget is four times the eigenvector storage, between 4 MiB and _CHUNK_BYTES, so small
    clusters stay small while each product keeps at least hundreds of rows (BLAS-3).
    """
    per = item * (ds**2 + dp**2 + 3 * ds * dp + 2 * ds * n_t)
    budget = min(_CHUNK_BYTES, max(4 << 20, 32 * sum(d * d for d in dims)))
    return int(max(1, min(n_rows, budget // per)))


def _contract(x, table):
    """sum_a x[c, a, t] table[a, t] in float64."""
    return np.einsum("cat,at->ct", x, table, dtype=np.float64, casting="same_kind")


def _diag_stack(g):
    c, d = g.shape
    out = np.zeros((c, d, d))
    out[:, np.arange(d), np.arange(d)] = g
    return out


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
