"""The estimated tier: NMR signals and gradients of large clusters from random pure states.

Signal (convention of qhl.exact.engine; S(0) = 1, one spin at offset nu gives exp(+2 pi i nu t)):
    S(t) = Tr[O U rho0 U^dag] / N,  U = exp(-i H t),  rho0 = sum Ix,  O = sum I+,  N = Tr[O rho0],
with N = n_obs 2^n / 4 exactly (Tr[I+_i Ix_j] = delta_ij 2^n / 4).

Dynamical typicality (trace estimation with random vectors; M. F. Hutchinson, Commun. Stat.
Simul. Comput. 18, 1059 (1989); for quantum dynamics, e.g. C. Bartsch and J. Gemmer,
Phys. Rev. Lett. 102, 110403 (2009)). H conserves each isotope's total Iz, O raises the observed
up-count by one and rho0 couples sectors s and p = s + 1 up, so
    Tr[O U rho0 U^dag] = sum_(s,p) Tr_p[U_p^dag O_ps U_s rho0_sp]
                       = sum_(s,p) E_r[ <U_p r| O_ps |U_s rho0_sp r> ],
with r a random vector of sector p with E[r r^dag] = 1. Default (start="real"): real entries
+-1 with equal probability (Rademacher; Hutchinson 1989). H, rho0_sp and the generators are
real in the computational basis (sector_matrix refuses a complex H), so the Chebyshev terms
T_k(H) r stay real and only the series coefficients are complex: until the first restart the
propagation carries M real columns instead of 2M (qhl.exact.chebyshev, real=True), and every
time point of a 64-point signal sits in the first window where memory allows. start="phase":
entries exp(i phi), phi uniform (the earlier default, complex from the start). Both are
unbiased; their variances differ: for Tr[A] the real +-1 vector has variance
(1/2) sum_(i != j) |A_ij + A_ji|^2, the phase vector sum_(i != j) |A_ij|^2 (direct expansion of
E|r^dag A r - Tr A|^2; 4th moments E r_i^4 = 1, E|r_i|^4 = 1, and E r_i^2 = 1 against E r_i^2 = 0).
Each sector pair evolves two vectors forward (Chebyshev series, qhl.exact.chebyshev) in its own
sector: memory is set by the two largest neighbouring sectors, not by 2^n.

Error. One *replica* is one random vector per sector pair; the engine draws R independent
replicas (seeded), returns their mean and the standard error std_R / sqrt(R) of the real and
imaginary parts separately, and 95 % intervals with the Student t quantile at R - 1 degrees of
freedom (the replica sum over many sector pairs is close to normal). The error of one replica
falls as 2^(-n/2) (relative): averaging R replicas divides it by sqrt(R) more.
The Chebyshev cut adds at most `tol` (default 1e-10) per point.

Gradients dS/dh_n use the *same* random vectors (common random numbers) and are exact for them:
each vector is propagated with the block-triangular operator [[H, 0], [2 pi s_n G_n, H]], whose
exponential holds the Duhamel integral -i int_0^t e^{-iH(t-u)} G e^{-iHu} du without quadrature
(Van Loan 1978), so the only errors are the statistical one (stated, per parameter and time) and
the Chebyshev cut. Cost: about (1 + P) times the signal for P parameters.

Speed and memory. One window holds every time point when its outputs fit in half the free
memory (window_bytes="auto"): real start vectors then stay real throughout, and sector p's
matrix is freed before sector s's is built. precision="single" stores the sector matrices,
Chebyshev terms and outputs in float32 (inner products summed in double): rounding adds a
relative error of order K eps_32 ~ 1e-6 (measured |single - double| <= 7e-8 of S(0) at 10-18
spins), far below the statistical error 2^(-n/2) / sqrt(R). threads split each sector's rows
(qhl.exact.chebyshev.RowApply); they help on idle cores only.
"""

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
import math
import os

import numpy as np

from ..base.blas import single_thread_blas
from ..base.pages import small_pages
from ..base.errors import QhlInputError
from ..base.memory import available_memory_bytes, require_memory
from ..spins.cluster import refuse_spinning, refuse_steps
from .chebyshev import PRECISIONS, chebyshev_window, csr_rows, lanczos_bounds, row_parts, sparse_times
from .sector_operators import SectorSpace, csr_bytes, ladder_block, pauli_groups, sector_matrix
from .sectors import conserves_magnetisation

__all__ = ["TypicalEngine", "TypicalEstimate", "typical_memory_bytes", "pair_memory_bytes", "window_points",
           "MAX_TYPICAL_SPINS"]

MAX_TYPICAL_SPINS = 30
WINDOW_BYTES = 2.0**30      # stored time points of one Chebyshev window (complex outputs), at least
MAX_WINDOW_BYTES = 2.0**33  # ... and at most, when window_bytes="auto" finds the memory free
BLOCK_BYTES = 2.0**29       # the buffer of Chebyshev terms waiting to be added to the outputs
MAX_WINDOW_POINTS = 64      # a 64-point signal in one window: real start vectors stay real
TERM_BLOCK = 64             # Chebyshev terms added to the outputs per product (fewer passes over them)


@dataclass
class TypicalEstimate:
    """A typicality estimate of S(t) (and dS/dh) with its statistical error.

    Attributes:
        times_s: (T,) times.
        signal: (T,) complex mean over replicas.
        signal_stderr_real, signal_stderr_imag: (T,) standard errors of Re S and Im S.
        replicas: (R, T) complex, one independent estimate per replica.
        parameters: names of the differentiated parameters (empty without gradients).
        gradient: (P, T) complex dS/dh (1/Hz) or None.
        gradient_stderr_real, gradient_stderr_imag: (P, T) or None.
        gradient_replicas: (R, P, T) or None.
    """

    times_s: np.ndarray
    signal: np.ndarray
    signal_stderr_real: np.ndarray
    signal_stderr_imag: np.ndarray
    replicas: np.ndarray
    parameters: tuple = ()
    gradient: np.ndarray | None = None
    gradient_stderr_real: np.ndarray | None = None
    gradient_stderr_imag: np.ndarray | None = None
    gradient_replicas: np.ndarray | None = None

    @property
    def n_replicas(self) -> int:
        return self.replicas.shape[0]

    def t_quantile(self, level: float = 0.95) -> float:
        """Student t quantile for a two-sided `level` interval with R - 1 degrees of freedom."""
        from scipy.stats import t as student_t
        return float(student_t.ppf(0.5 + level / 2, self.n_replicas - 1))

    def interval_halfwidth(self, level: float = 0.95):
        """(half-width of Re S, half-width of Im S) of the `level` confidence intervals."""
        q = self.t_quantile(level)
        return q * self.signal_stderr_real, q * self.signal_stderr_imag


def idle_cores(most: int = 4) -> int:
    """Cores the 1-minute load average leaves idle (at least 1, at most `most`)."""
    try:
        load = os.getloadavg()[0]
    except OSError:
        load = 0.0
    return int(max(1, min(most, round((os.cpu_count() or 1) - load))))


def _stderr(samples):
    r = samples.shape[0]
    return (np.std(samples.real, axis=0, ddof=1) / math.sqrt(r),
            np.std(samples.imag, axis=0, ddof=1) / math.sqrt(r))


def _flip_fraction(xm, label, groups_bits):
    """Fraction of a sector's rows on which a two-bit flip within one isotope stays inside."""
    if bin(xm).count("1") != 2:
        return 1.0
    for (mask, size), ups in zip(groups_bits, label):
        if xm & mask == xm and size > 1:
            return 2.0 * ups * (size - ups) / (size * (size - 1))
    return 1.0


def typical_memory_bytes(model, n_times: int = 64, replicas: int = 4, n_gradient: int = 0,
                         window: int | None = None) -> float:
    """Peak-memory model of TypicalEngine.estimate without building the engine's tables.

    The key and rank tables (8 bytes per basis state) plus the largest sector pair's
    pair_memory_bytes (window: time points held at once; default the engine's own rule).
    """
    eng = TypicalEngine.__new__(TypicalEngine)
    eng._setup(model)
    eng.replicas, eng.window_bytes, eng.start, eng.precision = replicas, WINDOW_BYTES, "real", "double"
    return eng.memory_bytes(n_times, replicas, n_gradient, window)


def window_points(d_pair: float, m: int, n_times: int, window_bytes: float = WINDOW_BYTES,
                  item: float = 16.0) -> int:
    """Time points per Chebyshev window: as many as `window_bytes` holds (complex outputs of two
    sectors, m columns, `item` bytes a complex number), at most MAX_WINDOW_POINTS and at most n_times."""
    return int(max(1, min(n_times, MAX_WINDOW_POINTS, window_bytes // max(item * d_pair * m, 1.0))))


def window_candidates(d_pair: float, m: int, n_times: int, item: float = 16.0) -> list:
    """window_bytes tried by window_bytes="auto", largest first: enough for every point (when at
    most MAX_WINDOW_BYTES), then halvings of MAX_WINDOW_BYTES down to WINDOW_BYTES."""
    pts = min(n_times, MAX_WINDOW_POINTS)
    need = item * d_pair * m * pts
    out = [need] if WINDOW_BYTES < need <= MAX_WINDOW_BYTES else []
    wb = MAX_WINDOW_BYTES
    while wb >= WINDOW_BYTES:
        if wb < need:
            out.append(wb)
        wb /= 2
    return out or [WINDOW_BYTES]


def pair_memory_bytes(ds, dp, nnz_s, nnz_p, n_obs, replicas, n_times, n_gradient=0,
                      window_bytes=WINDOW_BYTES, window=None, real_start=True, precision="double") -> float:
    """Peak memory (bytes) while one sector pair (dimensions ds, dp) is propagated.

    The sector Hamiltonians (CSR; 4-byte data with precision="single"): both with several time
    windows, the larger one when one window holds every point (the engine then frees sector p's
    before building sector s's), one ladder block (at most n_obs entries per row), and per
    sector the Chebyshev work arrays (4 real arrays of 2M columns, M = replicas (1 + n_gradient)),
    the window's complex outputs (added to in slices of chebyshev.FLUSH_ROWS rows, so no second copy) and
    the blocked accumulation buffer of at most TERM_BLOCK terms and BLOCK_BYTES (real when real
    start vectors cover every point in one window; else complex), plus
    the generators of the differentiated parameters (at most two entries per row each) and the
    double-precision copy of one time point per sector (the inner products are summed in double).
    """
    rsz = 4.0 if precision == "single" else 8.0
    m = replicas * (1 + n_gradient)
    w = window if window is not None else window_points(ds + dp, m, n_times, window_bytes, 2 * rsz)
    blk = window_points(max(ds, dp), m, TERM_BLOCK, BLOCK_BYTES, rsz)
    one = w >= n_times               # one window: one sector matrix at a time (the engine frees p's)
    mats_s, mats_p = csr_bytes(nnz_s, ds, rsz), csr_bytes(nnz_p, dp, rsz)
    mats = max(mats_s, mats_p) if one else mats_s + mats_p
    ladders = csr_bytes(dp * n_obs, ds)
    item = rsz if real_start and w >= n_times else 2 * rsz
    work = ((ds + dp) * (rsz * 2 * m * 4 + 2 * rsz * m * w + 16.0 * 2 * m + 16.0)
            + item * max(ds, dp) * m * blk)
    gens = n_gradient * 2 * csr_bytes(2 * (ds + dp), ds + dp, rsz)
    return mats + ladders + work + gens


class TypicalEngine:
    """Pure-state (dynamical typicality) signals and gradients with stated statistical errors.

    Args:
        model: the HamiltonianModel (real, magnetisation-conserving or not).
        replicas: independent random vectors per sector pair (>= 2, for the error estimate).
        seed: seed of the random vectors (the same seed gives the same vectors for signal and
            gradient: common random numbers).
        tol: Chebyshev cut per point.
        progress: optional callback(fraction_done) called during long runs.
        window_bytes: memory allowed for the stored time points of one Chebyshev window, or
            "auto" (default): the first of window_candidates (all points in one window, else
            8, 4, 2, 1 GiB) whose peak-memory estimate fits in half the memory available when
            the estimate starts (fewer windows: fewer restarts, real start vectors stay real,
            one sector matrix at a time). Windows change results only by rounding.
        start: "real" (random +-1 vectors, real propagation until the first restart; default) or
            "phase" (random-phase complex vectors); see the module docstring.
        precision: "double" (default) or "single": float32 sector matrices, Chebyshev vectors
            and stored time points; inner products summed in double. Rounding adds a relative
            error of order 1e-6 (K eps_32 for K Chebyshev terms; measured in
            tests/test_typicality_fast.py), far below the statistical error 2^(-n/2).
        threads: threads sharing each sector's rows; default (None): the cores the 1-minute load
            average leaves idle when the estimate starts, 1 to 4 (the threads meet after every
            product, so on busy cores they wait on each other: measured 1.2-1.4x faster on two
            cores at 16-22 spins, 1.3-1.6x slower at load 4-7 on 2 cores).

    Example:
        >>> from qhl import demo_cluster, build_model
        >>> c = demo_cluster(); eng = TypicalEngine(build_model(c), replicas=4)
        >>> est = eng.estimate(c.experiments[0]); est.signal.shape
        (192,)
    """

    def __init__(self, model, replicas: int = 4, seed: int = 0, tol: float = 1e-10, progress=None,
                 window_bytes: float | str = "auto", start: str = "real", precision: str = "double",
                 threads: int | None = None):
        if int(replicas) < 2:
            raise QhlInputError(f"expected at least 2 replicas (for the error estimate), got {replicas}",
                                key="replicas")
        if start not in ("real", "phase"):
            raise QhlInputError(f"start {start!r}: expected 'real' or 'phase'", key="start")
        if precision not in PRECISIONS:
            raise QhlInputError(f"precision {precision!r}: expected 'double' or 'single'", key="precision")
        self._setup(model)
        self.start = start
        self.precision = precision
        self.threads = None if threads is None else max(1, int(threads))
        self.replicas = int(replicas)
        self.seed = int(seed)
        self.tol = float(tol)
        self.progress = progress
        self.auto_window = window_bytes == "auto"
        self.window_bytes = WINDOW_BYTES if self.auto_window else float(window_bytes)
        require_memory(f"the typical (pure-state) engine for {model.n_spins} spins",
                       self.memory_bytes(64, self.replicas, 0, 1))

    def _setup(self, model):
        n = model.n_spins
        if n > MAX_TYPICAL_SPINS:
            raise QhlInputError(f"{n} spins: the typical engine handles at most {MAX_TYPICAL_SPINS}",
                                key="spins")
        self.model = model
        gens = [p.generator for p in model.parameters]
        self.symmetric = conserves_magnetisation(gens, model.isotopes)
        self.space = SectorSpace(model.isotopes, self.symmetric)
        self.observed = model.observed_qubits()
        if not self.observed:
            raise QhlInputError("no observed spins", key="observe")
        self.norm = len(self.observed) * 2.0**n / 4.0
        self.blocks = self._sector_pairs()
        self._group_xms = set()
        for p in model.parameters:
            self._group_xms |= set(pauli_groups(p.generator))

    def _sector_pairs(self):
        sp = self.space
        if not sp.masks:
            return [(0, 0)]
        q = self.observed[0]
        g = next(i for i, m in enumerate(sp.masks) if m >> q & 1)
        index = {lab: k for k, lab in enumerate(sp.labels)}
        pairs = []
        for k, lab in enumerate(sp.labels):
            up = list(lab)          # labels count spins down (bit 1); I+ removes one
            up[g] -= 1
            if tuple(up) in index:
                pairs.append((k, index[tuple(up)]))
        return pairs

    # ------------------------------------------------------------------ memory
    def _nnz(self, k):
        sp = self.space
        d = sp.dims[k]
        if not sp.masks:
            return d * (1 + len(self._group_xms))
        gb = [(m, bin(m).count("1")) for m in sp.masks]
        return d * sum(_flip_fraction(xm, sp.labels[k], gb) if xm else 1.0 for xm in self._group_xms)

    def memory_bytes(self, n_times: int = 64, replicas: int | None = None, n_gradient: int = 0,
                     window: int | None = None) -> float:
        """Estimated peak memory (bytes) of one estimate (see typical_memory_bytes)."""
        r = self.replicas if replicas is None else replicas
        dims = self.space.dims
        peak = max(pair_memory_bytes(dims[s], dims[p], self._nnz(s), self._nnz(p), len(self.observed), r,
                                     n_times, n_gradient, self.window_bytes, window, self.start == "real",
                                     self.precision)
                   for s, p in self.blocks)
        return max(peak + self.space.index_bytes(), 32.0 * 2**self.model.n_spins)

    def _window(self, d_pair, m, n_times):
        return window_points(d_pair, m, n_times, self.window_bytes, 2 * self._rdt().itemsize)

    def _block(self, d, m):
        return window_points(d, m, TERM_BLOCK, BLOCK_BYTES, self._rdt().itemsize)

    def _choose_window_bytes(self, n_times, replicas, n_gradient):
        """window_bytes="auto": the first of window_candidates whose memory estimate fits in half
        the available memory (else WINDOW_BYTES)."""
        if not self.auto_window:
            return
        avail = available_memory_bytes()
        dims = self.space.dims
        d_pair = max(dims[s] + dims[p] for s, p in self.blocks)
        for wb in window_candidates(d_pair, replicas * (1 + n_gradient), n_times, 2 * self._rdt().itemsize):
            self.window_bytes = wb
            if self.memory_bytes(n_times, replicas, n_gradient) <= 0.5 * avail:
                return
        self.window_bytes = WINDOW_BYTES

    def _rdt(self):
        return np.dtype(PRECISIONS[self.precision][0])

    # ------------------------------------------------------------------ estimates
    def _times(self, experiment, times):
        if times is None:
            if experiment is None:
                raise QhlInputError("give times or an experiment", key="times")
            times = experiment.times_s
        t = np.atleast_1d(np.asarray(times, float))
        if not np.all(np.isfinite(t)) or np.any(t < 0):
            raise QhlInputError("times must be finite and >= 0", key="times")
        return t

    def _values(self, free_values_hz):
        return self.model.all_values_hz(free_values_hz)

    def _random_vectors(self, block_index, d):
        """(real part, imaginary part or None) of the start vectors of one sector pair."""
        rng = np.random.default_rng([self.seed, block_index, 7919])
        if self.start == "real":
            return 2.0 * rng.integers(0, 2, size=(d, self.replicas)) - 1.0, None
        phi = rng.uniform(0.0, 2 * np.pi, size=(d, self.replicas))
        return np.cos(phi), np.sin(phi)

    def estimate(self, experiment=None, times=None, free_values_hz=None, gradient: bool = False,
                 parameters=None) -> TypicalEstimate:
        """S(t) (and dS/dh for `parameters`, default all free, when gradient=True) with errors.

        BLAS runs on one thread: the dense work here is skinny products (a few columns), which
        multithreaded BLAS slows down on a shared machine (qhl.base.blas).

        Raises:
            MemoryBudgetError: the estimate would not fit (the message gives the estimate).
        """
        threads = self.threads or idle_cores()
        with single_thread_blas(0), small_pages(), ThreadPoolExecutor(threads) as pool:
            return self._estimate(experiment, times, free_values_hz, gradient, parameters, pool, threads)

    def _estimate(self, experiment, times, free_values_hz, gradient, parameters, pool, threads):
        model = self.model
        refuse_steps(experiment, "the typical engine")
        refuse_spinning(experiment, "the typical engine")
        t = self._times(experiment, times)
        order = np.argsort(t, kind="stable")
        ts = t[order]
        values = self._values(free_values_hz)
        scale = model.scale_factors(experiment)
        names = [] if not gradient else (list(model.free) if parameters is None else list(parameters))
        for nm in names:
            if nm not in model.free:
                raise QhlInputError(f"'{nm}' is not a free parameter: free are {', '.join(model.free)}",
                                    key="parameter")
        pidx = [model.names.index(nm) for nm in names]
        P = len(pidx)
        R = self.replicas
        self._choose_window_bytes(t.size, R, P)
        require_memory(f"the typical estimate for {model.n_spins} spins ({P} gradient parameters)",
                       self.memory_bytes(t.size, R, P))
        h_groups = pauli_groups(model.hamiltonian(experiment, values))
        g_groups = [pauli_groups(model.parameters[j].generator, 2 * np.pi * scale[j]) for j in pidx]
        rep_s = np.zeros((R, t.size), complex)
        rep_g = np.zeros((R, P, t.size), complex)
        cache = {}
        sp = self.space
        total = float(sum(sp.dims[s] + sp.dims[p] for s, p in self.blocks))
        done = 0.0

        def ham(k):
            if k not in cache:
                for old in [key for key in cache if key not in current]:
                    del cache[old]
                st = sp.states(k)
                mat, glo, ghi = sector_matrix(sp, k, h_groups, states=st, bounds=True, dtype=rdt)
                llo, lhi = lanczos_bounds(mat, seed=self.seed)
                gens = [sector_matrix(sp, k, g, states=st, dtype=rdt) for g in g_groups]
                cache[k] = [st, mat, max(glo, llo), min(ghi, lhi), gens, (glo, ghi)]
            return cache[k]

        rdt = self._rdt()
        # norm drift that flags a too-tight Lanczos interval: far above the rounding of the series
        # (double: ~1e-13; single: ~K eps_32 ~ 1e-5), far below the growth of a component outside
        drift = 1e-8 if self.precision == "double" else 3e-4

        def propagate(k, apply, x, taus, real):
            entry = cache[k]
            kw = dict(block=blk, real=real, derivative=P > 0, precision=self.precision, pool=pool)
            out = chebyshev_window(apply[real], x, taus, entry[2], entry[3], self.tol, **kw)
            xd = np.asarray(x, float)
            n0 = np.linalg.norm(xd[:, :R], axis=0) ** 2
            if not real:
                n0 += np.linalg.norm(xd[:, m:m + R], axis=0) ** 2
            # checked at the window's largest offset: a component outside [lo, hi] grows most there
            # (its series coefficients J_k(w tau) are largest at the largest tau)
            n1 = np.linalg.norm(np.asarray(out[-1][:, :R], complex), axis=0) ** 2
            if np.any(np.abs(n1 - n0) > drift * np.maximum(n0, 1e-300)):
                entry[2], entry[3] = entry[5]          # the Lanczos estimate was too tight
                out = chebyshev_window(apply[real], x, taus, entry[2], entry[3], self.tol, **kw)
            return out

        for bi, (s, p) in enumerate(self.blocks):
            current = {s, p}
            st_p, h_p, _, _, g_p, _ = ham(p)
            st_s = cache[s][0] if s in cache else sp.states(s)
            ds, dp = st_s.size, st_p.size
            lower = ladder_block(sp, s, p, self.observed, raising=False, row_states=st_s, col_states=st_p)
            if not sp.masks:        # one sector (H mixes magnetisations): rho0 = (I+ + I-) / 2 in full
                lower = lower + ladder_block(sp, s, p, self.observed, raising=True, row_states=st_s,
                                             col_states=st_p)
            re, im = self._random_vectors(bi, dp)
            m = R * (1 + P)
            real = im is None                      # real start: M columns until the first restart
            xa = np.zeros((dp, m if real else 2 * m), rdt, order="F")
            xb = np.zeros((ds, m if real else 2 * m), rdt, order="F")
            xa[:, :R], xb[:, :R] = re, 0.5 * (lower @ re)
            if not real:
                xa[:, m:m + R], xb[:, m:m + R] = im, 0.5 * (lower @ im)
            del re, im, lower
            raise_op = ladder_block(sp, p, s, self.observed, raising=True, row_states=st_p, col_states=st_s)
            w = self._window(ds + dp, m, t.size)
            blk = self._block(max(ds, dp), m)
            apply_a = {flag: _Augmented(h_p, g_p, R, m, flag, row_parts(dp, threads)) for flag in (True, False)}
            apply_b = None
            del h_p, g_p
            tc = 0.0
            for start in range(0, t.size, w):
                sl = slice(start, min(start + w, t.size))
                taus = ts[sl] - tc
                out_a = propagate(p, apply_a, xa, taus, real)
                if w >= t.size and p != s:
                    # one window: sector p is done (the next pair starts from sector s), so its
                    # matrix goes before sector s's is built (one sector matrix held at a time)
                    apply_a = None
                    del cache[p]
                if apply_b is None:
                    _, h_s, _, _, g_s, _ = ham(s)
                    apply_b = {flag: _Augmented(h_s, g_s, R, m, flag, row_parts(ds, threads))
                               for flag in (True, False)}
                    del h_s, g_s
                out_b = propagate(s, apply_b, xb, taus, real)
                real = False                       # restarts carry complex states
                for j, ti in enumerate(range(sl.start, sl.stop)):
                    ob = (raise_op @ np.asarray(out_b[j], complex).view(float)).view(complex)  # (dp, m)
                    a = np.asarray(out_a[j], complex).reshape(dp, 1 + P, R)
                    b = ob.reshape(dp, 1 + P, R)
                    rep_s[:, order[ti]] += np.einsum("xr,xr->r", a[:, 0].conj(), b[:, 0])
                    if P:
                        rep_g[:, :, order[ti]] += (np.einsum("xpr,xr->rp", a[:, 1:].conj(), b[:, 0])
                                                   + np.einsum("xr,xpr->rp", a[:, 0].conj(), b[:, 1:]))
                xa = np.asfortranarray(np.concatenate([out_a[-1].real, out_a[-1].imag], axis=1))
                xb = np.asfortranarray(np.concatenate([out_b[-1].real, out_b[-1].imag], axis=1))
                tc = ts[sl.stop - 1]
                del out_a, out_b
                if self.progress:
                    self.progress((done + (ds + dp) * (sl.stop / t.size)) / total)
            done += ds + dp
        rep_s /= self.norm
        rep_g /= self.norm
        sr, si = _stderr(rep_s)
        est = TypicalEstimate(t, rep_s.mean(axis=0), sr, si, rep_s, tuple(names))
        if P:
            est.gradient = rep_g.mean(axis=0)
            est.gradient_stderr_real, est.gradient_stderr_imag = _stderr(rep_g)
            est.gradient_replicas = rep_g
        return est

    # ------------------------------------------------------------------ ExactEngine-like calls
    def signal(self, experiment=None, times=None, free_values_hz=None) -> np.ndarray:
        """Mean S(t) over replicas (complex (T,)); use `estimate` for the errors."""
        return self.estimate(experiment, times, free_values_hz).signal

    def gradient(self, experiment=None, times=None, free_values_hz=None, parameters=None):
        """(signal (T,), gradient (P, T)) means over replicas, like ExactEngine.gradient."""
        est = self.estimate(experiment, times, free_values_hz, gradient=True, parameters=parameters)
        return est.signal, est.gradient


class _Augmented:
    """Y -> [[H, 0], [G_1, H], [G_2, 0, H], ...] Y on stacked real columns [Re (m) | Im (m)]
    (real=True: m real columns, no imaginary half), by row parts (chebyshev.RowApply protocol)."""

    def __init__(self, h, gens, r, m, real, parts):
        self.parts = parts
        self.h = [csr_rows(h, a, b) for a, b in parts]
        self.g = [[csr_rows(g, a, b) for g in gens] for a, b in parts]
        self.r, self.halves = r, ((0,) if real else (0, m))
        self._out = [None] * len(parts)

    def __call__(self, y, i):
        # the part's result buffer is reused from call to call (qhl.exact.chebyshev.RowApply)
        z = self._out[i] = sparse_times(self.h[i], y, self._out[i])
        r = self.r
        for q, g in enumerate(self.g[i]):
            for half in self.halves:
                z[:, half + r * (1 + q): half + r * (2 + q)] += sparse_times(g, y[:, half: half + r])
        return z
