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
  * Eigen-generators from the pair form of each generator block (_pair_decomposition): offsets,
    Ising and flip-flop terms have at most one off-diagonal entry per row, so G = c I +
    sum_m lam_m y_m y_m^T with y_m on one row or a pair of rows, and V^T G V - c I = Y_+^T Y_+ -
    Y_-^T Y_- (rows sqrt|lam_m| y_m^T V split by sign; V orthogonal): symmetric rank-k products
    over the rows whose eigenvalue differs from the most frequent one c (one product where those
    share a sign, as for offsets and dipolar terms; two otherwise), about 0.27 d^3
    multiply-adds for a dipolar term and 0.25 d^3 for an offset in the middle sector, against d^3
    for V^T (G V). c I only moves the diagonal, which K ignores (the diagonal g is read off the
    product, in its precision).
  * Time-basis path (_gradient_basis, chosen by the cost model _path_costs where it is cheaper:
    from about 11 protons at 256 points). The time tables of each sector are replaced by windowed
    low-rank bases (qhl.exact.time_basis; truncated SVD per window of consecutive levels, rows kept
    to _BASIS_RTOL: 1e-7 in float32, 1e-13 in float64): exp(i E_b t) = sum_j U[b, j] w_j(t) with
    J columns, J ~ 90 (float32) and ~120 (float64) at d = 924 against 2T = 512 table columns, for
    the random 12-proton clusters and 0.2 ms. Then the amplitude part is sum_ij C_ij conj(w_i) w_j
    with C = 4 (U_s^T N + N'^T U_p), N[a, j] = sum_c K_s[a, c] M_j[a, c], M_j = R diag(U_p[:, j]) R^T
    (and N' likewise with R^T): the M_j do not depend on the parameter (d_s^2 nnz(U_p) / 2 in all,
    symmetric products; each M_j is one rank-k product over its whole window, shifted by the window's
    R R^T where U_p[:, j] changes sign: _weighted_gram), and each parameter costs d_s^2 J (the batched contraction) instead of
    d_s d_p (d_s + d_p + 2T) for K_s R, R K_p and the table product. It needs a non-degenerate
    spectrum, holds K of one sector for every parameter (P d^2) and runs outside the lean mode.
    Measured (benchmarks/bench_engine.py --gradient-at 12 --against <previous tree> --double: 12
    random protons, 78 parameters, 256 points, one BLAS thread, fresh processes with the engine's
    construction, medians of 3, this 2-core machine at load ~1): "fast" 14.6 s -> 7.9 s, "single"
    15.4 s -> 7.7 s (the pair forms alone: 12.0 s), double 27.6 s -> 15.8 s; peak memory 610 ->
    690 MiB (float32), 880 -> 1110 MiB (double). Largest difference from the previous engine 3e-15
    (double) of the largest entry; "single" 3.6e-7 from it in double. At 10 protons (largest sector
    252) neither cut is taken (smaller sectors: PAIR_FORM_MIN_LEVELS, BASIS_MIN_SECONDS).

precision="single" runs the O(d^3) products (eigen-generators, K R, R K and the time-table
product) in float32, with the eigendecomposition, the degenerate term and all sums over blocks and
parameters in float64 (float32 BLAS sums its own products in float32; the diagonals g of the pair-form
eigen-generators are read off those float32 products). Measured: largest
gradient error relative to the largest gradient entry 2.4e-6 at n = 10 (55 parameters, 256
points) and 4.5e-7 at n = 12 (78 parameters) on benchmarks/bench_engine.py's random proton
clusters, 1e-8 to 4e-7 at n = 3-7 (tests/test_engine_fast.py). SINGLE_RTOL = 1e-4 is the stated
bound. The signal, Hessian, adjoint and weighted paths are always double.

precision="fast" is "single" plus the eigendecomposition of each sector in float32 (LAPACK ssyevd /
cheevd, about 2.1x faster than double at d = 3432 on this machine; eigenvalues and eigenvectors are
then cast to float64, so every later step runs as in "single" for the gradient and as in "double"
for the signal, Hessian and weighted paths). The eigenpairs are those of H + dH with |dH| about
6e-8 |H|, so an eigenvector's error grows as |dH| / (gap to its neighbours): on random proton
clusters of 6-10 spins and the demo (0.5 ms, 128 points) the largest error relative to the largest
entry was 4e-7 to 1.5e-5 for the signal and 6e-6 to 1.2e-4 for the gradient (Rayleigh-quotient
energies in float64 made it worse: the energies must stay those of the same H + dH as the vectors).
FAST_RTOL = 1e-3 is the stated tolerance (measured, not proven: tests/test_engine_fast.py). Not for
references: degenerate levels split by float32 rounding are resolved as separate levels.

Adjoint (time-point) gradient. For few time points the derivative is taken per time point,
    dS(t)/dh = sum_k sum_(a,a') G~_k[a,a'] Z_k[a,a'](t),
    Z_s += F_s o (R Lambda_p^* R_obs^T)^T  (ket side),  Z_p += conj(F_p) o (R_obs^T Lambda_s R)^T
    (bra side), F[a,a'] = f[E_a, E_a'] the first divided difference of exp(-iEt) and
    Lambda = diag(exp(-iEt)) (Daleckii-Krein; R. Bhatia, "Matrix Analysis", 1997, ch. V).
Transformed back, Y_k = V_k Z_k^T V_k^dag, the sum runs over the stored entries of the sparse
generators, so no eigen-generator is formed: in all about T (2 (d_s^2 d_p + d_s d_p^2) + 4 d^3)
real operations against P (d^3 + d_s^2 d_p + d_s d_p^2 + 4 d_s d_p T) for the full path; it is
chosen when its count is lower (gradient(method="auto"), roughly T < P / 3).

Weighted (vector-Jacobian) gradient. v_n = sum_t c_t dS(t)/dh_n for given weights c_t (the
likelihood gradient is Re v with c_t = conj(r_t) / sigma_t^2) sums the adjoint path's Z over time
before the back-transform, through tables C_j[a, b] = sum_t c_t t^j exp(-i (E_a - E_b) t): cost
independent of P and about that of one more signal (ExactEngine.gradient_weighted, which states the
formula).

Memory-lean mode. Above LEAN_ABOVE_BYTES of eigenvectors (n >= 15 protons) signal and gradient
sweep the sector pairs in order, holding the eigenvectors of only the (at most three) sectors in
use (the gradient first runs one eigenvalue-only pass for the degeneracy tolerance); spectrum(),
transitions(), hessian() and the adjoint path still hold all sectors.
"""

from dataclasses import dataclass
import itertools
import math

import numpy as np
import scipy.linalg as sla
from scipy.linalg.blas import get_blas_funcs
import scipy.sparse as sp

from ..base.blas import blas_limited, blas_threads
from ..base.errors import QhlInputError
from .divided_differences import first_divided_difference, second_divided_difference
from ..base.memory import require_memory
from ..spins.cluster import refuse_spinning, refuse_steps
from ..spins.model import HamiltonianModel
from ..spins.spinning import is_spinning
from .sectors import conserves_magnetisation, full_space, magnetisation_sectors

__all__ = ["ExactEngine", "Spectrum", "DEGENERACY_RTOL", "SINGLE_RTOL", "FAST_RTOL", "WEIGHTED_TAYLOR_BELOW", "estimate_memory_bytes"]

DEGENERACY_RTOL = 1e-10
SINGLE_RTOL = 1e-4          # stated bound of precision="single": max |error| / max |gradient|
FAST_RTOL = 1e-3            # stated tolerance of precision="fast" (signal and gradient; module docstring)
LEAN_ABOVE_BYTES = 1 << 30  # eigenvectors of all sectors above this: memory-lean sweep
_CHUNK_BYTES = 256 << 20    # work arrays of one parameter chunk
_KCACHE_BYTES = 768 << 20   # eigen-generators kept for the next sector pair
PAIR_FORM_MIN_LEVELS = 300  # smaller sectors: V^T (G V) directly (building the pair form costs more there)
BASIS_MIN_SECONDS = 0.5     # time-basis path considered only where the table path's model exceeds this
_BASIS_RTOL = {"float32": 1e-7, "float64": 1e-13}   # time-basis truncation (qhl.exact.time_basis)
_MAX_SPINS = 20
# gradient_weighted: pairs with |E_a - E_a'| max|t| below this take the Taylor series of the divided
# difference (K terms); truncation x^K / (K+1)! and cancellation eps / x both near 1e-13 at x = 2e-3
WEIGHTED_TAYLOR_BELOW = 2e-3
_WEIGHTED_TAYLOR_TERMS = 4


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
        eigen-generators of one sector for every parameter (P d^2, below _KCACHE_BYTES, not when
        lean), with the time-basis path's products R diag(u) R^T (P d^2 / 2) and contractions
        (d P^2 / 2);
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
        if not (lean or kcache > _KCACHE_BYTES):
            # K of every parameter for one sector (cache of the table path, or the time-basis path's K),
            # and the time-basis path's products R diag(u) R^T (half as much) and contractions
            total += 1.5 * kcache + 4.0 * big * n_par**2
        total += chunk * per
    return float(total)


class ExactEngine:
    """Exact signals, gradients, Hessians and Fisher information for one HamiltonianModel.

    Args:
        model: the Hamiltonian model (its free parameters are differentiated).
        precision: "double" (default, the reference), "single" (gradient products in float32,
            accumulation in float64; error below SINGLE_RTOL of the largest gradient entry) or "fast"
            ("single" plus float32 eigendecompositions; signal and gradient within FAST_RTOL).
        lean: hold the eigenvectors of only the sector pairs in use during signal/gradient
            (default: automatic, when all eigenvectors would exceed LEAN_ABOVE_BYTES).

    Spinning experiments (spinning_hz > 0) go to qhl.exact.spinning_engine for signal and gradient
    (with rotor-synchronised pulse-sequence steps: qhl.exact.spinning_sequence)
    (so Fisher information, the gradient provider and fits work on them); the attribute
    `spinning_slices_per_period` (default None: the rule in that module) sets its slices per rotor
    period. hessian takes Richardson differences of these exact gradients (as for pulse sequences,
    qhl.exact.gradient_differences); spectrum and transitions refuse them.

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
        if precision not in ("double", "single", "fast"):
            raise QhlInputError(f"precision {precision!r}: expected 'double', 'single' or 'fast'", key="precision")
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
        self._pair_cache = {}
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
        fast = self.precision == "fast"
        if fast:
            h = h.astype(np.complex64 if np.iscomplexobj(h) else np.float32)
        with blas_threads(h.shape[0]):
            if values_only:
                e = sla.eigvalsh(h, driver="evd")
                return e.astype(np.float64) if fast else e
            e, v = sla.eigh(h, driver="evd")
        if fast:
            return e.astype(np.float64), v.astype(np.complex128 if np.iscomplexobj(v) else np.float64)
        return e, v

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
        if is_spinning(experiment) and _has_steps(experiment):
            from .spinning_sequence import spinning_sequence_signal
            return spinning_sequence_signal(self, experiment, t, free_values_hz)
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
        if is_spinning(experiment) and _has_steps(experiment):
            from .spinning_sequence import spinning_sequence_gradient
            return spinning_sequence_gradient(self, experiment, t, free_values_hz, rows)
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

    def _sector_chunk(self, k, e, v, tol, rows, dtype, out=None):
        """Eigen-generator data of sector k for parameter rows: (K (c,d,d) dtype, diag (c,d), D or None);
        K is written into `out` when given (a (c, d, d) array of dtype)."""
        d = len(e)
        inv, deg = _inverse_gaps(e, tol)
        offdeg = bool(np.count_nonzero(deg) > d)
        kk = np.empty((len(rows), d, d), dtype) if out is None else out
        diag = np.zeros((len(rows), d))
        dd = np.zeros((len(rows), d, d)) if offdeg else None
        invx = inv.astype(dtype, copy=False)
        vx = v.astype(dtype, copy=False)                 # V in the products' precision, cast once
        for r, (n, scale) in enumerate(rows):
            g = self._gen_blocks[n][k]
            if scale == 0 or g.nnz == 0:
                kk[r] = 0
                continue
            f = 2 * np.pi * scale
            pairs = self._pair_form(n, k) if d >= PAIR_FORM_MIN_LEVELS else None
            if pairs is not None:
                # the rank-k product straight into K's slot (contiguous), then scaled there in place
                gt, diag[r] = _pair_transform(pairs, v, f, dtype, out=kk[r], vx=vx)
            else:
                gv = g @ v
                diag[r] = f * np.einsum("ia,ia->a", v, gv)
                gt = vx.T @ gv.astype(dtype, copy=False)
                gt *= f
            if offdeg:
                dd[r] = gt * deg
                np.fill_diagonal(dd[r], diag[r])
            np.multiply(gt, invx, out=kk[r])             # in place where gt is K's slot (pair form)
        return kk, diag, dd

    def _pair_form(self, n, k):
        """The sector block of generator n in pair form (_pair_decomposition), cached; None where
        some row has more than one off-diagonal entry (then the dense transform is used)."""
        cache = self._pair_cache
        if (n, k) not in cache:
            g = self._gen_blocks[n][k]
            cache[(n, k)] = None
            if self.real:
                coo = g.tocoo()
                cache[(n, k)] = _pair_arrays(coo.row, coo.col, coo.data, g.shape[0])
        return cache[(n, k)]

    def _gradient_fast(self, coeffs, t, rows):
        """Gradient on the identities of the module docstring (real H, mirrored blocks)."""
        dtype = np.float32 if self.precision in ("single", "fast") else np.float64
        item = np.dtype(dtype).itemsize
        if self._basis_path_fits(coeffs, len(rows), item) and \
                self._table_cost(len(rows), t.size, item) > BASIS_MIN_SECONDS:
            from .time_basis import plan_basis, time_basis
            spec = self._spectrum(coeffs)
            rtol = _BASIS_RTOL[np.dtype(dtype).name]
            used = sorted({b.s for b in self._blocks} | {b.p for b in self._blocks})
            plans = {k: plan_basis(spec.energies[k], t, rtol, len(rows)) for k in used}
            basis_cost, table_cost = self._path_costs(plans, len(rows), t.size, item)
            if basis_cost < table_cost:
                bases = {k: time_basis(spec.energies[k], t, rtol, windows=plans[k].windows) for k in used}
                return self._gradient_basis(coeffs, t, rows, dtype, bases)
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

    def _basis_path_fits(self, coeffs, n_rows, item):
        """The time-basis path holds all sectors and one sector's K for every parameter; it needs a
        non-degenerate spectrum (B from the diagonals only)."""
        if self.lean or n_rows * self.largest_sector**2 * item > _KCACHE_BYTES:
            return False
        spec = self._spectrum(coeffs)
        return not any(np.count_nonzero(np.abs(np.diff(e)) <= spec.tol) for e in spec.energies)

    def _table_cost(self, n_rows, n_t, item):
        """Modelled seconds of the table path's products K_s R, R K_p and the table product (the rate of
        _path_costs; needs no bases, so it also decides whether bases are planned at all)."""
        from .time_basis import GEMM_RATE
        return sum(2.0 * (item / 4.0) * n_rows * self._dims[b.s] * self._dims[b.p]
                   * (self._dims[b.s] + self._dims[b.p] + 2 * n_t) for b in self._blocks) / GEMM_RATE

    def _path_costs(self, plans, n_rows, n_t, item):
        """Modelled costs in seconds (flops over the measured one-core float32 rates of time_basis,
        halved for float64, plus CALL_SECONDS per product R diag(u) R^T) of the time-basis path and
        of the table path, for the products that differ between them."""
        from .time_basis import CALL_SECONDS, CONTRACT_RATE, PRODUCT_RATE
        basis = 0.0
        slow = item / 4.0
        for b in self._blocks:
            ds, dp = self._dims[b.s], self._dims[b.p]
            bs, bp = plans[b.s], plans[b.p]          # estimated nnz(U) and columns (time_basis.plan_basis)
            basis += slow * (ds * ds * bp.nnz + dp * dp * bs.nnz) / PRODUCT_RATE
            basis += slow * 2.0 * n_rows * (ds * ds * bp.size + dp * dp * bs.size) / CONTRACT_RATE
            basis += CALL_SECONDS * (bs.size + bp.size)
        return basis, self._table_cost(n_rows, n_t, item)

    def _gradient_basis(self, coeffs, t, rows, dtype, bases):
        """The fast contraction with windowed low-rank time bases (qhl.exact.time_basis).

        With phi_a(t) = exp(-i E_a t) = sum_i U_s[a, i] conj(w_i(t)), psi_b(t) = exp(i E_b t) =
        sum_j U_p[b, j] w_j(t) (w_j(t) = B[j, :T] + i B[j, T:]), the amplitude part
        sum_ab A_ab phi_a psi_b of A = 4 R o (K_s R - R K_p) is sum_ij C_ij conj(w_i) w_j with
            C = 4 (U_s^T N + N'^T U_p),  N[a, j] = sum_c K_s[a, c] M_j[a, c],  M_j = R diag(U_p[:, j]) R^T,
                                         N'[b, i] = sum_c K_p[b, c] M'_i[b, c], M'_i = R^T diag(U_s[:, i]) R
        (K antisymmetric, M symmetric). M and M' do not depend on the parameter: each costs one
        symmetric product over the rows of its window, and every parameter then needs only the
        contractions N (d^2 J instead of the d_s d_p (d_s + d_p) of K_s R and R K_p). The degenerate
        part B is that of _gradient_fast (diagonals only: this path requires a non-degenerate spectrum).
        """
        spec = self._spectrum(coeffs)
        n_t, n_rows = t.size, len(rows)
        grad = np.zeros((n_rows, n_t), complex)
        used = sorted(bases)
        coef = [np.zeros((n_rows, bases[b.s].size, bases[b.p].size)) for b in self._blocks]
        diags = {}
        dmax = max(len(spec.energies[k]) for k in used)
        budget = n_rows * dmax**2 * np.dtype(dtype).itemsize // 2
        buf = np.empty(n_rows * dmax**2, dtype)                               # K, reused
        # the products M_j of a group (at least one d x d product), reused: a fresh array this size is
        # mapped and faulted in anew on every group (above malloc's mmap threshold), which cost ~1 ms
        # per 2.5 MB matrix here
        mbuf = np.empty(max(budget // np.dtype(dtype).itemsize, dmax**2), dtype)
        for k in used:
            d = len(spec.energies[k])
            with blas_threads(d):
                kk, diags[k], _ = self._sector_chunk(k, spec.energies[k], spec.vectors[k], spec.tol, rows, dtype,
                                                     out=buf[:n_rows * d * d].reshape(n_rows, d, d))
                kt = kk.transpose(1, 0, 2)                            # (a, parameter, c)
                for i, b in enumerate(self._blocks):
                    for side in ("s", "p"):
                        if getattr(b, side) != k:
                            continue
                        r = spec.rho_t[i] if side == "s" else spec.rho_t[i].T     # (d, d_other)
                        other = bases[b.p] if side == "s" else bases[b.s]
                        own = bases[k]
                        rx = r.astype(dtype)
                        group = max(1, min(other.size, budget // (d * d * rx.itemsize)))
                        grams = {}                                    # R R^T of each window (lo, hi)
                        for j0 in range(0, other.size, group):
                            js = range(j0, min(j0 + group, other.size))
                            m = mbuf[:len(js) * d * d].reshape(len(js), d, d)
                            for q, j in enumerate(js):
                                lo, hi = int(other.lo[j]), int(other.hi[j])
                                if (lo, hi) not in grams:
                                    grams[(lo, hi)] = _gram(rx[:, lo:hi])
                                _weighted_gram(rx[:, lo:hi], other.u[lo:hi, j], m[q], grams[(lo, hi)])
                            nn = np.matmul(kt, m.transpose(1, 2, 0))          # (a, parameter, j)
                            del m
                            part = np.empty((own.size,) + nn.shape[1:])          # (i_own, parameter, j)
                            for lo, hi, c0, c1 in own.windows():
                                part[c0:c1] = np.tensordot(4 * own.u[lo:hi, c0:c1], nn[lo:hi], axes=([0], [0]))
                            del nn
                            if side == "s":
                                coef[i][:, :, j0:j0 + len(js)] += part.transpose(1, 0, 2)
                            else:
                                coef[i][:, j0:j0 + len(js), :] += part.transpose(1, 2, 0)
                del kk, kt
        del buf, mbuf
        for i, b in enumerate(self._blocks):
            es, ep, rt = spec.energies[b.s], spec.energies[b.p], spec.rho_t[i]
            bs, bp = bases[b.s], bases[b.p]
            # z = sum_j C_ij w_j(t) as [Re | Im] (the time-table product: in dtype, as in the table path),
            # then sum_i z_i conj(w_i) in real arithmetic summed in float64
            z = (coef[i].reshape(-1, bp.size).astype(dtype) @ bp.b.astype(dtype, copy=False))
            z = z.reshape(n_rows, bs.size, 2 * n_t)
            zr, zi = z[:, :, :n_t], z[:, :, n_t:]
            wr, wi = bs.b[:, :n_t].astype(dtype), bs.b[:, n_t:].astype(dtype)
            grad += (_contract(zr, wr) + _contract(zi, wi)) + 1j * (_contract(zi, wr) - _contract(zr, wi))
            del z, zr, zi
            ea = np.exp(-1j * np.outer(es, t))
            eb = np.exp(1j * np.outer(ep, t))
            w = 2 * rt * rt
            pb = (w.T @ bs.u) @ bs.b                                  # sum_a w_ab exp(-i E_a t), conj below
            pb = pb[:, :n_t] - 1j * pb[:, n_t:]
            pa = (w @ bp.u) @ bp.b                                    # sum_b w_ab exp(+i E_b t)
            pa = pa[:, :n_t] + 1j * pa[:, n_t:]
            deg = diags[b.p] @ (eb * pb) - diags[b.s] @ (ea * pa)
            grad += 1j * t[None, :] * deg
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

    # ------------------------------------------------------------------ weighted gradient
    @blas_limited
    def gradient_weighted(self, experiment=None, weights=None, times=None, free_values_hz=None,
                          parameters=None, real: bool = False):
        """v_n = sum_t c_t dS(t)/dh_n (1/Hz) for complex weights c_t, at about the cost of two signals.

        The vector-Jacobian product of the signal: for the Gaussian log-likelihood of
        qhl.learning.fitting, c_t = conj(r_t) / sigma_t^2 (r = S - D) and its gradient is Re v_n.

        Formula (convention of the module docstring; R = V_s^dag rho0_sp V_p, Q = obs_t =
        (V_p^dag O_ps V_s)^T, both d_s x d_p). The adjoint path's per-time Z(tau) summed with weights c_tau
        before the back-transform; the divided difference is separable,
            F_aa'(tau) = (phi_a - phi_a') / (E_a - E_a'),  phi_a = exp(-i E_a tau),
        so with the tables C_j[a, b] = sum_tau c_tau tau^j exp(-i (E_a - E_b) tau)  (d_s x d_p):
            ket side (sector s)  Z_s[a, a'] = sum_b Q_ab R_a'b W_aa'b,  W_aa'b = sum_tau c F_aa'(tau) exp(i E_b tau)
                                 = ((C_0 o Q) R^T - Q (C_0 o R)^T)_aa' / (E_a - E_a'),
            bra side (sector p)  Z_p[b, b'] = sum_a Q_ab' R_ab W'_bb'a,  W'_bb'a = sum_tau c F_bb'(-tau) exp(-i E_a tau)
                                 = ((C_0 o R)^T Q - R^T (C_0 o Q))_bb' / (E_b - E_b'),
        where o is the elementwise product. On the diagonal Z_s[a, a] = -i sum_b Q_ab R_ab C_1[a, b] and
        Z_p[b, b] = +i sum_a Q_ab R_ab C_1[a, b]. Pairs with |E_a - E_a'| max|t| < WEIGHTED_TAYLOR_BELOW
        (exact and near degeneracies) lose digits to cancellation in the quotient and take the Taylor
        series of the divided difference about E_a instead,
            F_aa'(tau) = exp(-i E_a tau) sum_(k=0..K-1) (-i tau)^(k+1) (E_a' - E_a)^k / (k+1)!,
        i.e. W_aa'b = sum_k (-i)^(k+1) (E_a' - E_a)^k / (k+1)! C_(k+1)[a, b], and on the bra side
        W'_bb'a = sum_k (+i)^(k+1) (E_b' - E_b)^k / (k+1)! C_(k+1)[a, b] (tables built for the rows in such
        pairs only). K = _WEIGHTED_TAYLOR_TERMS = 4: truncation (x^4 / 120 at x = |gap| max|t| = 2e-3)
        and cancellation (1e-16 / x) both stay near 1e-13 relative. Then, as in the adjoint path,
        Y_k = V_k Z_k^T V_k^dag and v_n = sum_k sum_ij (2 pi s_n G_n)_ij (Y_k)_ji / N
        over the stored generator entries (R. Bhatia, "Matrix Analysis", 1997, ch. V, Daleckii-Krein).

        Cost, independent of P: per sector pair 2 d_s d_p T complex products (C_0, C_1), 2 (d_s^2 d_p +
        d_s d_p^2) complex-by-real products, per sector the back-transform 4 d^3 (real V); plus the
        signal; real=True with real H halves the products. Against P (d^3 + ...) for the full Jacobian.
        Measured (benchmarks/bench_engine.py --weighted, shared machine under load): 1.3-2.4 signals
        for the real part at 10-12 protons, 20-24x below the full gradient at 12. Always float64 (precision="single" applies to the full path only). The sector pairs are
        swept in order and each sector's Z is back-transformed after its last pair, so in the
        memory-lean mode (n >= 15) only the sectors in use are held, as for the signal (each sector is
        then diagonalised twice: once for the signal, once in the weighted sweep).

        Args:
            experiment: the experiment (pulse-sequence and spinning experiments are refused).
            weights: c_t, complex (T,), or a callable taking the signal S (T,) and returning c
                (the signal is computed once either way).
            times, free_values_hz, parameters: as in `gradient`.
            real: return Re v only (float), the likelihood gradient; where H is real and the blocks
                mirrored (the usual case) it runs in real arithmetic, about half the products.

        Returns:
            (signal (T,) complex, v (P,) complex, or real with real=True).

        Example:
            >>> from qhl import demo_cluster, build_model, ExactEngine
            >>> import numpy as np
            >>> c = demo_cluster(); eng = ExactEngine(build_model(c)); ex = c.experiments[0]
            >>> s, v = eng.gradient_weighted(ex, lambda s: np.conj(s))    # d/dh of sum |S|^2 / 2 is Re v
            >>> _, jac = eng.gradient(ex)
            >>> bool(np.allclose(v, jac @ np.conj(s), rtol=1e-10, atol=0))
            True
        """
        refuse_steps(experiment, "the weighted gradient")
        refuse_spinning(experiment, "the weighted gradient")
        t = self._times(experiment, times)
        self._require_times(t, 2)
        coeffs, _ = self._coefficients(experiment, free_values_hz)
        _, rows = self._rows(experiment, free_values_hz, parameters)
        sig = self.signal(experiment, t, free_values_hz)
        if weights is None:
            raise QhlInputError("give the weights c_t (one per time point) or a callable of the signal",
                                key="weights")
        c = weights(sig) if callable(weights) else weights
        c = np.asarray(c)
        if c.shape != t.shape or not np.all(np.isfinite(c)):
            raise QhlInputError(f"weights: expected {t.size} finite values (one per time point), got shape "
                                f"{c.shape}", key="weights")
        c = c.astype(complex)
        n = self.model.n_spins
        require_memory(f"the weighted gradient for {n} spins and {t.size:,} time points",
                       self.weighted_memory_bytes(t.size, bool(real)))
        full = self._weighted_full(coeffs, t, c, bool(real))
        v = np.array([(2 * np.pi * scale) * full[n] for n, scale in rows], dtype=float if real else complex)
        return sig, v / self.norm

    def weighted_memory_bytes(self, n_times: int, real: bool = False) -> float:
        """Peak-memory model of gradient_weighted (bytes), the signal's estimate included.

        Terms: estimate_memory_bytes without the gradient (eigenvectors, transformed blocks, sparse
        generators, eigensolver; the memory-lean mode's when lean); the accumulators Z of the sectors
        open at once (d^2 each, from a sector's first sector pair to its last; float64 for the real
        part of a real H, else complex) and the back-transform (2 d^2); for the largest sector pair,
        the time tables ((32 d_s + 64 d_p) T bytes), the tables C_0, C_1 and the elementwise products
        (64 d_s d_p bytes in real arithmetic, 80 complex) and the block products (24 (d_s^2 + d_p^2)
        bytes). Measured with tracemalloc (numpy reports its arrays to it) on
        benchmarks/bench_engine.py's clusters, 256 points (64 at 11): estimate / peak 1.31-1.35 for the
        real part at 10-12 protons, 1.25-1.34 complex at 11-12 and 1.55 complex at 10 (the signal's
        own tables dominate there); checked within 1.5x in tests/test_engine_weighted.py.
        """
        dims = self._dims
        base = estimate_memory_bytes(self.model.n_spins, dims, n_times, gradient=False)
        fast = real and self.mirrored
        first, last = {}, {}
        for i, b in enumerate(self._blocks):
            for k in (b.s, b.p):
                first.setdefault(k, i)
                last[k] = i
        open_sq = max((sum(dims[k] ** 2 for k in first if first[k] <= i <= last[k])
                       for i in range(len(self._blocks))), default=0)
        big = max(dims)
        z = (8.0 if fast else 16.0) * float(open_sq + 2 * big * big)
        block = max(((32.0 * dims[b.s] + 64.0 * dims[b.p]) * n_times + (64.0 if fast else 80.0) * dims[b.s] * dims[b.p]
                     + 24.0 * (dims[b.s] ** 2 + dims[b.p] ** 2) for b in self._blocks), default=0.0)
        return float(base + z + block)

    def _weighted_full(self, coeffs, t, c, real_part=False):
        """sum_t c_t d(N S(t))/d(2 pi s_n h_n) for every model parameter n (gradient_weighted's docstring);
        real_part: only its real part, in real arithmetic where H is real and the blocks mirrored."""
        n_all = len(self.model.parameters)
        tmax = float(np.max(np.abs(t))) if t.size else 0.0
        if tmax == 0.0 or not np.any(c):
            return np.zeros(n_all, float if real_part else complex)
        near = WEIGHTED_TAYLOR_BELOW / tmax
        fast = real_part and self.mirrored            # Re v in real arithmetic (Q = 2 R, V real)
        last = {}                                     # the last block touching each sector
        for i, b in enumerate(self._blocks):
            last[b.s] = last[b.p] = i
        z, pairs = {}, {}    # open accumulators; near-degenerate off-diagonal pairs (a, a', E_a' - E_a)
        full = np.zeros(n_all, float if real_part else complex)
        for i, b, es, vs, ep, vp, rt, ot in self._sweep(coeffs):
            ot = 2 * rt if ot is None else ot                          # lean sweep, mirrored blocks
            for k, e in ((b.s, es), (b.p, ep)):
                if k not in z:
                    pairs[k] = _near_pairs(e, near)
                    z[k] = np.zeros((len(e), len(e)), float if fast else complex)
            ds, dp = len(es), len(ep)
            with blas_threads(max(ds, dp)):
                fs = np.exp(-1j * np.outer(es, t))                              # (d_s, T)
                gp = np.exp(1j * np.outer(ep, t)) * c[None, :]                 # c_t exp(i E_b t), (d_p, T)
                if fast:
                    # [Re C_0 | Im C_1] in one real product: Re(f g) = Re f Re g - Im f Im g, etc.
                    g1 = gp * t[None, :]
                    rhs = np.block([[gp.real.T, g1.imag.T], [-gp.imag.T, g1.real.T]])
                    both = np.concatenate([fs.real, fs.imag], axis=1) @ rhs
                    c0, c1 = both[:, :dp], 1j * both[:, dp:]              # Re C_0, i Im C_1
                else:
                    both = fs @ np.concatenate([gp, gp * t[None, :]]).T         # [C_0 | C_1]
                    c0, c1 = both[:, :dp], both[:, dp:]
                rc = c0 * rt
                if fast:
                    x = rc @ rt.T                                              # (C_0 o R) R^T, Q = 2 R
                    zs = 2.0 * (x - x.T)
                    y = rc.T @ rt                                              # (C_0 o R)^T R
                    zp = 2.0 * (y - y.T)
                elif self.mirrored:
                    x = _cr(rc, rt.T)
                    zs = 2.0 * (x - x.T)
                    y = _cr(rc.T, rt)
                    zp = 2.0 * (y - y.T)
                else:
                    qc = c0 * ot
                    zs = qc @ rt.T - ot @ rc.T
                    zp = rc.T @ ot - rt.T @ qc
                _divide_by_gaps(zs, es, near)
                _divide_by_gaps(zp, ep, near)
                w1 = ot * rt * c1
                d_s, d_p = -1j * w1.sum(axis=1), 1j * w1.sum(axis=0)
                zs[np.diag_indices_from(zs)] += d_s.real if fast else d_s
                zp[np.diag_indices_from(zp)] += d_p.real if fast else d_p
                a, a2, gap = pairs[b.s]
                if a.size:
                    _taylor_pairs(zs, a, a2, gap, ot, rt, fs, gp, t, -1j)
                a, a2, gap = pairs[b.p]
                if a.size:
                    # bra side: rows <-> columns and i for -i; C_j[a, b] = sum c t^j exp(i E_b t) exp(-i E_a t)
                    _taylor_pairs(zp, a, a2, gap, rt.T, ot.T, gp, fs, t, 1j)
            z[b.s] += zs
            z[b.p] += zp
            del zs, zp
            for k, v in ((b.s, vs), (b.p, vp)):
                if last[k] == i and k in z:            # sector complete: back-transform, read off
                    pairs.pop(k)
                    full += self._read_generators(k, v, z.pop(k), fast, real_part)
        return full

    def _read_generators(self, k, v, z, fast, real_part):
        """sum_ij (G_n)_ij Y_ji over the stored entries of sector k, Y = V Z^T V^dag, for every
        parameter n (the 2 pi s_n factors are applied by the caller)."""
        n_all = len(self.model.parameters)
        rows_k, cols_k, pidx, vals, _ = self._h_parts[k]
        with blas_threads(len(v)):
            if fast:
                y = v @ z.T @ v.T
            elif np.isrealobj(v):
                y = _cr(_rc(v, z.T), v.T)
            else:
                y = v @ z.T @ v.conj().T
        contrib = vals * y[cols_k, rows_k]
        if real_part:
            return np.bincount(pidx, contrib.real, minlength=n_all)
        return (np.bincount(pidx, contrib.real, minlength=n_all)
                + 1j * np.bincount(pidx, contrib.imag, minlength=n_all))

    # ------------------------------------------------------------------ Hessian
    @blas_limited
    def hessian(self, experiment=None, times=None, free_values_hz=None, parameters=None):
        """Exact d2S/dh_m dh_n (1/Hz^2), shape (P, P, T). Cost grows as P d^3 T: small clusters.

        Pulse-sequence experiments: Richardson differences of exact gradients
        (qhl.exact.gradient_differences; relative error about 1e-9, 4 P gradients).

        Returns:
            (signal, gradient (P, T), hessian (P, P, T)).
        """
        model = self.model
        t = self._times(experiment, times)
        if _has_steps(experiment) or is_spinning(experiment):
            from .gradient_differences import hessian_from_gradients
            names = list(model.free) if parameters is None else list(parameters)
            for name in names:
                if name not in model.free:
                    raise QhlInputError(f"'{name}' is not a free parameter", key="parameter")
            return hessian_from_gradients(self, experiment, t, free_values_hz, names)
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


def _pair_decomposition(g):
    """A real symmetric sector block G with at most one off-diagonal entry per row as
        G = c I + sum_m lam_m y_m y_m^T,  y_m = w1_m e_(x1_m) + w2_m e_(x2_m)  (orthonormal y_m),
    from the 2 x 2 blocks [[G_xx, G_xy], [G_xy, G_yy]] of the paired rows (their spectral
    decomposition in closed form: G = mean I + rad [[cos 2th, sin 2th], [sin 2th, -cos 2th]] has the
    eigenvectors (cos th, sin th) and (-sin th, cos th) for mean + rad and mean - rad) and the
    diagonal of the unpaired ones. c is the most frequent eigenvalue, so its terms drop out.
    Offsets (diagonal), Ising terms and flip-flop terms (I+ I- + I- I+) of spin pairs have this
    form. Returns (x1, x2, w1, w2, lam, c) or None."""
    g = sp.coo_matrix(g)
    return _pair_arrays(g.row, g.col, g.data, g.shape[0])


def _pair_arrays(r, c, v, d):
    """_pair_decomposition from the entries (rows r, columns c, values v, no duplicates) of a d x d block."""
    v = np.asarray(v).real.astype(float)
    dg = r == c
    off = ~dg & (v != 0)
    ro, co, vo = r[off], c[off], v[off]
    if ro.size and np.bincount(ro, minlength=d).max() > 1:
        return None
    diag = np.bincount(r[dg], weights=v[dg], minlength=d)
    up = ro < co
    x, y, gxy = ro[up], co[up], vo[up]
    if x.size * 2 != ro.size:
        return None
    paired = np.zeros(d, bool)
    paired[x] = paired[y] = True
    single = np.flatnonzero(~paired)
    a, b = diag[x], diag[y]
    mean, half = (a + b) / 2, (a - b) / 2
    rad = np.hypot(half, gxy)
    th = 0.5 * np.arctan2(gxy, half)
    cos, sin = np.cos(th), np.sin(th)
    x1 = np.concatenate([single, x, x])
    x2 = np.concatenate([single, y, y])
    w1 = np.concatenate([np.ones(single.size), -sin, cos])
    w2 = np.concatenate([np.zeros(single.size), cos, sin])
    lam = np.concatenate([diag[single], mean - rad, mean + rad])
    scale = float(np.max(np.abs(lam), initial=0.0))
    if scale == 0:
        return x1[:0], x2[:0], w1[:0], w2[:0], lam[:0], 0.0
    near = 1e-14 * scale
    keys = np.round(lam / (64 * near))
    uniq, first, counts = np.unique(keys, return_index=True, return_counts=True)
    c0 = float(lam[first[np.argmax(counts)]])
    keep = np.abs(lam - c0) > near
    return x1[keep], x2[keep], w1[keep], w2[keep], lam[keep] - c0, c0


def _pair_transform(pairs, v, f, dtype, out=None, vx=None):
    """(f V^T G V - f c I in dtype, diag(f V^T G V) as float64) from G's pair form.

    V^T G V = c I + Y_+^T Y_+ - Y_-^T Y_- with the rows sqrt(|lam_m|) y_m^T V split by the sign of
    lam_m (V orthogonal): two symmetric rank-k products over the rows that differ from c, about
    (rows / d) d^3 / 2 multiply-adds against d^3 for V^T (G V) (one product where every lam_m has
    the sign of the others: offsets and dipolar terms). The c I term is left out of the matrix (only
    its off-diagonal part enters K) and added to the diagonal, which is read off the product: exact
    to rounding in float64, float32 rounding (~1e-7 relative) in float32. The rows are gathered from
    `vx`, V already cast to dtype (the caller casts once per sector), default V.astype(dtype)."""
    x1, x2, w1, w2, lam, c = pairs
    vx = v.astype(dtype, copy=False) if vx is None else vx
    lam = f * lam
    root = np.sqrt(np.abs(lam))
    y = np.take(vx, x1, axis=0)
    y *= (w1 * root).astype(dtype)[:, None]
    two = np.flatnonzero(w2)                 # rows on a pair of basis states (the others: w2 = 0)
    if two.size:
        y[two] += (w2[two] * root[two]).astype(dtype)[:, None] * vx[x2[two]]
    pos = lam > 0
    n_pos = int(np.count_nonzero(pos))
    if n_pos in (0, lam.size):
        gt = np.matmul(y.T, y, out=out)
        if n_pos == 0:
            np.negative(gt, out=gt)
    else:
        yp, ym = y[pos], y[~pos]
        gt = np.matmul(yp.T, yp, out=out)
        gt -= ym.T @ ym
    diag = f * c + np.diagonal(gt).astype(np.float64)
    return gt, diag


def _gram(r):
    """r r^T (a symmetric rank-k product), contiguous."""
    a = np.ascontiguousarray(r)
    return np.matmul(a, a.T)


def _weighted_gram(r, u, out, gram):
    """out = r diag(u) r^T as ONE symmetric rank-k product over all columns of r and a correction:
        r diag(u) r^T = r diag(u + c) r^T - c r r^T,  c = max(0, -min(u)),
    with `gram` = r r^T computed once per window of columns (a weight vector of mixed signs would
    otherwise need two rank-k products of half the rank each, at a lower BLAS rate: measured at d = 924
    and 198 columns, float32, one core, 64 against about 45 GFLOP/s). The price is rounding: the shifted
    terms are larger than the result, so in float32 M carries up to ~8e-6 of its largest entry (the split
    form ~2e-7; measured on the 12-proton benchmark's products), yet the gradients did not move: against
    double, precision "single" 3.9e-7 and "fast" 9.9e-7 of the largest entry with either form (12 protons,
    256 points; 9.2e-7 / 1.4e-6 at 11), far inside SINGLE_RTOL and FAST_RTOL."""
    c = max(0.0, -float(np.min(u))) if u.size else 0.0
    a = r * np.sqrt(u + c).astype(r.dtype)[None, :]
    np.matmul(a, a.T, out=out)
    if c:
        axpy = get_blas_funcs("axpy", (out,))
        axpy(gram.reshape(-1), out.reshape(-1), a=-c)


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


def _near_pairs(e, near):
    """(a, a', E_a' - E_a) for a != a' with |E_a - E_a'| < near, by bisection on the ascending levels e."""
    lo = np.searchsorted(e, e - near, side="right")
    hi = np.searchsorted(e, e + near, side="left")
    counts = hi - lo
    a = np.repeat(np.arange(len(e)), counts)
    a2 = lo[a] + np.arange(a.size) - np.repeat(np.cumsum(counts) - counts, counts)
    off = a != a2
    a, a2 = a[off], a2[off]
    return a, a2, e[a2] - e[a]


def _divide_by_gaps(z, e, near):
    """z[a, a'] /= (E_a - E_a') in place, and 0 where |E_a - E_a'| < near (the diagonal included)."""
    diff = e[:, None] - e[None, :]
    close = np.abs(diff) < near
    diff[close] = 1.0
    z /= diff
    z[close] = 0.0


def _taylor_pairs(zz, a, a2, gap, q, r, left, right, t, unit):
    """zz[a, a'] += sum_b q[a, b] r[a', b] W_aa'b on the near-degenerate pairs (a, a', gap = E_a' - E_a),
        W_aa'b = sum_(k<K) unit^(k+1) gap^k / (k+1)! C_(k+1)[a, b],  C_j[a, b] = sum_t left[a, t] t^j right[b, t]
    (gradient_weighted's docstring; unit = -i on the ket side, +i on the bra side). The tables are built
    for the rows in the pairs only. zz real: the real part is added."""
    uniq, pos = np.unique(a, return_inverse=True)
    K = _WEIGHTED_TAYLOR_TERMS
    tables = np.stack([left[uniq] @ (right * t[None, :] ** j).T for j in range(1, K + 1)])   # (K, u, d')
    k = np.arange(K)
    factorial = np.array([math.factorial(j + 1) for j in k], float)
    step = max(1, (1 << 21) // max(q.shape[1], 1))
    for i0 in range(0, a.size, step):
        sl = slice(i0, i0 + step)
        coef = unit ** (k + 1)[None, :] * gap[sl, None] ** k[None, :] / factorial[None, :]      # (m, K)
        w = np.einsum("mk,kmb->mb", coef, tables[:, pos[sl], :])
        val = np.einsum("mb,mb,mb->m", q[a[sl]], r[a2[sl]], w)
        np.add.at(zz, (a[sl], a2[sl]), val.real if np.isrealobj(zz) else val)


def _cr(x, r):
    """complex x @ real r as two real products (numpy would promote r and use a complex product)."""
    return (x.real @ r) + 1j * (x.imag @ r)


def _rc(r, x):
    """real r @ complex x as two real products."""
    return (r @ x.real) + 1j * (r @ x.imag)


def _mm(a, b):
    if isinstance(a, float) or isinstance(b, float):
        return 0.0
    return a @ b


def _t(a):
    return a if isinstance(a, float) else a.T
