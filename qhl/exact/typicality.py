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
sector: memory is set by the two largest neighbouring sectors, not by 2^n (scheme="pairs").

One propagation (scheme="positive", the default wherever H conserves the observed isotope's
magnetisation). Split rho0 = rho+ - rho- into its positive and negative parts. The rotation
Pi = exp(-i pi Iz_obs) commutes with such an H (and with every generator), turns rho0 into -rho0,
hence rho+ into rho-, and O into -O; so Tr[O U rho- U^dag] = -Tr[O U rho+ U^dag] and
    Tr[O U rho0 U^dag] = 2 Tr[O U rho+ U^dag] = 2 E_r <U psi| O |U psi>,  psi = sqrt(rho+) r,
a single forward propagation of psi (each sector once) instead of two vectors per sector pair
(derived here; the idea of one pure-state propagation for infinite-temperature spin correlation
functions: T. A. Elsayed and B. V. Fine, Phys. Rev. Lett. 110, 070404 (2013), from memory).
With Q = prod_(observed k) exp(-i pi/2 Iy_k) (real; Q Iz Q^T = Ix), rho+ = Q D^2 Q^T with
D = diag(sqrt(max(m_z, 0))), m_z the observed Iz of a basis state, and psi = Q D r' with r' = Q^T r
(any vector with E[r' r'^T] = 1 will do; the engine draws r' with +-1 or random-phase entries).
Then S(0) is exact for every r' (the estimate at t = 0 is sum_(m_z > 0) m_z^2 / N = 1, zero
spread), and the spread grows with t: measured at 10 spins (64 replicas) the standard error per
replica is 0 at t = 0, 7 times smaller than the pair scheme's at the first point and about 1.5 times
larger once the signal has decayed, i.e. at equal cost (the pair scheme propagates twice as many
rows per replica) the same or smaller everywhere. psi is built in the full 2^n space (double,
2^n x R) and cut into sectors; O = I+ then pairs sector s with p = s - 1 down, taken in chain
order so that only two sectors' outputs are held at once. With several time windows every
sector's restart state is kept (2^n x 2M) and its matrix is built again in each window (one matrix
held at a time; its Lanczos bounds are kept); where the states do not fit, "auto" takes "pairs".

Error. One *replica* is one random vector per sector pair; the engine draws R independent
replicas (seeded), returns their mean and the standard error std_R / sqrt(R) of the real and
imaginary parts separately, and 95 % intervals with the Student t quantile at R - 1 degrees of
freedom (the replica sum over many sector pairs is close to normal). The error of one replica
falls as 2^(-n/2) (relative): averaging R replicas divides it by sqrt(R) more.
The Chebyshev cut adds at most `tol` (default 1e-10; 1e-8 with precision="single") per point.

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

Buffers. Arrays above 32 MiB are fresh mappings whose pages the kernel faults in one by one
(about 1.4 s of system time per GiB here; qhl.exact.chebyshev.Workspace). The outputs of this and
the previous sector (the 64 time points) therefore live in two slots sized once for the largest
sector, the Chebyshev flush products in per-thread buffers, and the inner products
<out_p| O_ps |out_s> are summed in double by chunks of ACCUMULATE_ROWS rows (_Raise) instead of
whole-sector double copies per time point. The sector matrices keep their rows unsorted (the
products do not need sorted columns; sector_matrix's `sort`). Measured side by side
(benchmarks/bench_typical.py, 2 replicas, single precision, two threads, fresh processes, the
tree before against this one): 20 spins 28.8 s against 24.0 s (1.20x), 22 spins 136.8 s against
104.7 s (1.31x); peak 2.70 against 2.61 GiB at 22 spins; at 22 spins the page faults fell from
31 GiB to 10 GiB and the system time from 37 s to 18 s.
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
from .chebyshev import PRECISIONS, Workspace, chebyshev_window, csr_rows, lanczos_bounds, row_parts, sparse_times
from .sector_operators import SectorSpace, csr_bytes, ladder_block, pauli_groups, sector_matrix
from .sectors import conserves_magnetisation

__all__ = ["TypicalEngine", "TypicalEstimate", "typical_memory_bytes", "pair_memory_bytes", "window_points",
           "MAX_TYPICAL_SPINS", "SCHEMES"]

MAX_TYPICAL_SPINS = 30
SCHEMES = ("auto", "positive", "pairs")
WINDOW_BYTES = 2.0**30      # stored time points of one Chebyshev window (complex outputs), at least
MAX_WINDOW_BYTES = 2.0**33  # ... and at most, when window_bytes="auto" finds the memory free
BLOCK_BYTES = 2.0**29       # the buffer of Chebyshev terms waiting to be added to the outputs
MAX_WINDOW_POINTS = 64      # a 64-point signal in one window: real start vectors stay real
DOUBLE_TOL, SINGLE_TOL = 1e-10, 1e-8   # default Chebyshev cut per point, by precision
ACCUMULATE_ROWS = 1 << 14  # rows per chunk of the inner products <out_p| O_ps |out_s> (_Raise)
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
        scheme: "positive" (one propagation per sector) or "pairs" (two per sector pair); see
            the module docstring.
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
    scheme: str = ""

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
    pair_memory_bytes (window: time points held at once; default the engine's own rule), plus
    the start states of the one-propagation scheme where H allows it (TypicalEngine.memory_bytes,
    the default engine's first choice of scheme).
    """
    eng = TypicalEngine.__new__(TypicalEngine)
    eng._setup(model)
    eng.replicas, eng.window_bytes, eng.start, eng.precision = replicas, WINDOW_BYTES, "real", "double"
    eng.scheme = "auto"
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
        tol: Chebyshev cut per point; default (None) 1e-10 in double precision and 1e-8 in single,
            where the rounding of the float32 terms is already larger (measured up to 7e-8 of S(0)):
            6 fewer terms out of 127 at w tau = 90 (qhl.exact.chebyshev.chebyshev_terms).
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
        scheme: "auto" (default: "positive" where H conserves the observed magnetisation and
            its memory estimate fits, else "pairs"), "positive" (one propagation per sector of
            psi = sqrt(rho0+) r) or "pairs" (two propagations per sector pair); see the module
            docstring. The estimate records the one it used (TypicalEstimate.scheme).

    Example:
        >>> from qhl import demo_cluster, build_model
        >>> c = demo_cluster(); eng = TypicalEngine(build_model(c), replicas=4)
        >>> est = eng.estimate(c.experiments[0]); est.signal.shape
        (192,)
    """

    def __init__(self, model, replicas: int = 4, seed: int = 0, tol: float | None = None, progress=None,
                 window_bytes: float | str = "auto", start: str = "real", precision: str = "double",
                 threads: int | None = None, scheme: str = "auto"):
        if int(replicas) < 2:
            raise QhlInputError(f"expected at least 2 replicas (for the error estimate), got {replicas}",
                                key="replicas")
        if start not in ("real", "phase"):
            raise QhlInputError(f"start {start!r}: expected 'real' or 'phase'", key="start")
        if precision not in PRECISIONS:
            raise QhlInputError(f"precision {precision!r}: expected 'double' or 'single'", key="precision")
        if scheme not in SCHEMES:
            raise QhlInputError(f"scheme {scheme!r}: expected one of {', '.join(SCHEMES)}", key="scheme")
        self._setup(model)
        if scheme == "positive" and not self.symmetric:
            raise QhlInputError("scheme 'positive' needs a Hamiltonian that conserves the observed isotope's "
                                "magnetisation (this one mixes sectors); use 'pairs' or 'auto'", key="scheme")
        self.scheme = scheme
        self.start = start
        self.precision = precision
        self.threads = None if threads is None else max(1, int(threads))
        self.replicas = int(replicas)
        self.seed = int(seed)
        self.tol = float(tol) if tol is not None else (SINGLE_TOL if precision == "single" else DOUBLE_TOL)
        self.progress = progress
        self.auto_window = window_bytes == "auto"
        self.window_bytes = WINDOW_BYTES if self.auto_window else float(window_bytes)
        require_memory(f"the typical (pure-state) engine for {model.n_spins} spins",
                       min(self.memory_bytes(64, self.replicas, 0, 1, scheme=sc) for sc in self._schemes()))

    def _setup(self, model):
        n = model.n_spins
        if n > MAX_TYPICAL_SPINS:
            raise QhlInputError(f"{n} spins: the typical engine handles at most {MAX_TYPICAL_SPINS} (one pure state "
                                f"of {n} spins alone is 2^{n} x 8 bytes = {2.0**n * 8 / 2**30:,.0f} GiB); "
                                f"`qhl budget` and `qhl classical` cost clusters of any size", key="spins")
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
        g = self._observed_group()
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

    def _schemes(self):
        """The schemes this engine may run ("auto": positive where H allows it, else pairs)."""
        if self.scheme == "auto":
            return ("positive", "pairs") if self.symmetric else ("pairs",)
        return (self.scheme,)

    def memory_bytes(self, n_times: int = 64, replicas: int | None = None, n_gradient: int = 0,
                     window: int | None = None, scheme: str | None = None) -> float:
        """Estimated peak memory (bytes) of one estimate (see typical_memory_bytes).

        scheme: "positive" or "pairs"; default the first this engine may run. "positive" adds
        the start states of every sector (2^n x R, double) and, when the points need more than
        one window, every sector's restart state (2^n x 2M in the engine's precision)."""
        r = self.replicas if replicas is None else replicas
        scheme = scheme or self._schemes()[0]
        dims = self.space.dims
        peak = max(pair_memory_bytes(dims[s], dims[p], self._nnz(s), self._nnz(p), len(self.observed), r,
                                     n_times, n_gradient, self.window_bytes, window, self.start == "real",
                                     self.precision)
                   for s, p in self.blocks)
        full = 2.0**self.model.n_spins
        out = max(peak + self.space.index_bytes(), 32.0 * full)
        if scheme == "positive":
            item = 8.0 if self.start == "real" else 16.0
            m = r * (1 + n_gradient)
            d_pair = max(dims[s] + dims[p] for s, p in self.blocks)
            w = window if window is not None else self._window(d_pair, m, n_times)
            store = full * 2 * m * self._rdt().itemsize if w < n_times else 0.0
            # the start states live through the first window; building them peaks at about
            # 2^n (24 + (9 + item) R) bytes (index, weights, random signs, product)
            out = max(out + full * r * item + store,
                      self.space.index_bytes() + full * (24.0 + (9.0 + item) * r))
        return out

    def _window(self, d_pair, m, n_times):
        return window_points(d_pair, m, n_times, self.window_bytes, 2 * self._rdt().itemsize)

    def _block(self, d, m):
        return window_points(d, m, TERM_BLOCK, BLOCK_BYTES, self._rdt().itemsize)

    def _scheme_for(self, n_times, replicas, n_gradient):
        """The scheme of one estimate: "positive" where H allows it and (for "auto") its memory
        estimate fits, else "pairs" (whose restarts need no state of every sector)."""
        schemes = self._schemes()
        if len(schemes) == 1:
            return schemes[0]
        self._choose_window_bytes(n_times, replicas, n_gradient, "positive")
        fits = self.memory_bytes(n_times, replicas, n_gradient, scheme="positive") <= 0.8 * available_memory_bytes()
        return "positive" if fits else "pairs"

    def _choose_window_bytes(self, n_times, replicas, n_gradient, scheme=None):
        """window_bytes="auto": the first of window_candidates whose memory estimate fits in half
        the available memory (else WINDOW_BYTES)."""
        if not self.auto_window:
            return
        avail = available_memory_bytes()
        dims = self.space.dims
        d_pair = max(dims[s] + dims[p] for s, p in self.blocks)
        for wb in window_candidates(d_pair, replicas * (1 + n_gradient), n_times, 2 * self._rdt().itemsize):
            self.window_bytes = wb
            if self.memory_bytes(n_times, replicas, n_gradient, scheme=scheme) <= 0.5 * avail:
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
        scheme = self._scheme_for(t.size, R, P)
        self._choose_window_bytes(t.size, R, P, scheme)
        require_memory(f"the typical estimate for {model.n_spins} spins ({P} gradient parameters)",
                       self.memory_bytes(t.size, R, P, scheme=scheme))
        h_groups = pauli_groups(model.hamiltonian(experiment, values))
        g_groups = [pauli_groups(model.parameters[j].generator, 2 * np.pi * scale[j]) for j in pidx]
        run = _SectorRun(self, h_groups, g_groups, R, P, pool, threads)
        rep_s = np.zeros((R, t.size), complex)
        rep_g = np.zeros((R, P, t.size), complex)
        if scheme == "positive":
            self._positive_scheme(run, ts, order, rep_s, rep_g)
        else:
            self._pair_scheme(run, ts, order, rep_s, rep_g)
        rep_s /= self.norm
        rep_g /= self.norm
        sr, si = _stderr(rep_s)
        est = TypicalEstimate(t, rep_s.mean(axis=0), sr, si, rep_s, tuple(names), scheme=scheme)
        if P:
            est.gradient = rep_g.mean(axis=0)
            est.gradient_stderr_real, est.gradient_stderr_imag = _stderr(rep_g)
            est.gradient_replicas = rep_g
        return est

    @staticmethod
    def _accumulate(rep_s, rep_g, column, out_p, out_s, raise_op, j, weight=1.0):
        """Add weight * <out_p[j]| O_ps |out_s[j]> (and its parameter derivatives) to time `column`
        (only that column is written: calls for different times may run on separate threads).
        raise_op: the _Raise of O_ps (its rows in chunks)."""
        P = rep_g.shape[1]
        src = out_s[j].view(out_s.real.dtype)                   # (ds, 2m) real: [Re, Im] per column
        sig = 0.0
        grd = 0.0
        for r0, r1, sub in raise_op.chunks:
            # one chunk of rows at a time, in double (small temporaries: no fresh pages, in cache)
            ob = (sub @ src).view(out_s.dtype).astype(complex)   # (rows, m) = O_ps out_s[j]
            a = np.asarray(out_p[j, r0:r1], complex).reshape(r1 - r0, 1 + P, -1)
            b = ob.reshape(r1 - r0, 1 + P, -1)
            sig = sig + np.einsum("xr,xr->r", a[:, 0].conj(), b[:, 0])
            if P:
                grd = grd + (np.einsum("xpr,xr->rp", a[:, 1:].conj(), b[:, 0])
                             + np.einsum("xr,xpr->rp", a[:, 0].conj(), b[:, 1:]))
        rep_s[:, column] += weight * sig
        if P:
            rep_g[:, :, column] += weight * grd

    def _pair_scheme(self, run, ts, order, rep_s, rep_g):
        """Two propagations per sector pair: r in sector p and rho0_sp r in sector s."""
        sp, R = self.space, run.R
        T = ts.size
        total = float(sum(sp.dims[s] + sp.dims[p] for s, p in self.blocks))
        done = 0.0
        for bi, (s, p) in enumerate(self.blocks):
            run.keep = {s, p}
            st_p = run.states(p)
            st_s = run.states(s)
            ds, dp = st_s.size, st_p.size
            lower = ladder_block(sp, s, p, self.observed, raising=False, row_states=st_s, col_states=st_p)
            if not sp.masks:        # one sector (H mixes magnetisations): rho0 = (I+ + I-) / 2 in full
                lower = lower + ladder_block(sp, s, p, self.observed, raising=True, row_states=st_s,
                                             col_states=st_p)
            re, im = self._random_vectors(bi, dp)
            m = run.m
            real = im is None                      # real start: M columns until the first restart
            xa = run.start(dp, real)
            xb = run.start(ds, real)
            xa[:, :R], xb[:, :R] = re, 0.5 * (lower @ re)
            if not real:
                xa[:, m:m + R], xb[:, m:m + R] = im, 0.5 * (lower @ im)
            del re, im, lower
            raise_op = _Raise(ladder_block(sp, p, s, self.observed, raising=True, row_states=st_p, col_states=st_s),
                              run.rdt)
            w = self._window(ds + dp, m, T)
            tc = 0.0
            for start in range(0, T, w):
                sl = slice(start, min(start + w, T))
                taus = ts[sl] - tc
                out_a = run.propagate(p, xa, taus, real, slot="out_p")
                if w >= T and p != s:
                    # one window: sector p is done (the next pair starts from sector s), so its
                    # matrix goes before sector s's is built (one sector matrix held at a time)
                    run.drop(p)
                out_b = run.propagate(s, xb, taus, real, slot="out_s")
                real = False                       # restarts carry complex states
                run.each(lambda j: self._accumulate(rep_s, rep_g, order[sl.start + j], out_a, out_b, raise_op, j),
                         range(sl.stop - sl.start))
                xa, xb = _restart(out_a), _restart(out_b)
                tc = ts[sl.stop - 1]
                del out_a, out_b
                if self.progress:
                    self.progress((done + (ds + dp) * (sl.stop / T)) / total)
            done += ds + dp

    def _positive_scheme(self, run, ts, order, rep_s, rep_g):
        """One propagation per sector: psi = sqrt(rho0+) r (module docstring, 'One propagation')."""
        sp, R, m = self.space, run.R, run.m
        T = ts.size
        w = self._window(max(sp.dims[s] + sp.dims[p] for s, p in self.blocks), m, T)
        psi0 = self._positive_start()
        seq = self._chain_order()
        pair_of = dict(self.blocks)
        n_windows = -(-T // w)
        total = float(sum(sp.dims)) * n_windows
        # the two output slots sized once for the largest sector (sizes rise sector by sector in
        # chain order: growing them step by step would fault in every intermediate size)
        for slot in ("out0", "out1"):
            run.work.reserve(slot, (min(w, T), max(sp.dims), m), PRECISIONS[self.precision][1])
        done = 0.0
        saved = {}
        tc = 0.0
        for wi, start in enumerate(range(0, T, w)):
            sl = slice(start, min(start + w, T))
            taus = ts[sl] - tc
            prev, prev_out, prev_states = None, None, None
            for ki, k in enumerate(seq):
                run.keep = {k}
                st = run.states(k)
                if wi == 0:
                    real = not np.iscomplexobj(psi0)
                    x = run.start(st.size, real)
                    x[:, :R] = psi0[st].real
                    if not real:
                        x[:, m:m + R] = psi0[st].imag
                else:
                    real, x = False, saved.pop(k)
                out = run.propagate(k, x, taus, real, slot=f"out{ki % 2}")   # this and the previous sector's
                del x
                run.drop(k)
                if n_windows > 1:
                    saved[k] = _restart(out)
                p = pair_of.get(k)
                if p is not None and p == prev:
                    raise_op = _Raise(ladder_block(sp, p, k, self.observed, raising=True, row_states=prev_states,
                                                   col_states=st), run.rdt)
                    run.each(lambda j: self._accumulate(rep_s, rep_g, order[sl.start + j], prev_out, out, raise_op,
                                                        j, 2.0), range(sl.stop - sl.start))
                    del raise_op
                prev, prev_out, prev_states = k, out, st
                del out
                done += st.size
                if self.progress:
                    self.progress(done / total)
            if wi == 0:
                del psi0
            tc = ts[sl.stop - 1]

    def _chain_order(self):
        """Sectors ordered so that every pair (s, p) of self.blocks has p right before s: by the
        other isotopes' labels, then by the observed isotope's down count (O = I+ lowers it by one)."""
        sp = self.space
        if not sp.masks:
            return [0]
        g = self._observed_group()
        return sorted(range(len(sp.labels)),
                      key=lambda k: (sp.labels[k][:g] + sp.labels[k][g + 1:], sp.labels[k][g]))

    def _observed_group(self):
        """Index of the observed isotope's group in the sector labels."""
        q = self.observed[0]
        return next(i for i, mk in enumerate(self.space.masks) if mk >> q & 1)

    def _positive_start(self, r=None):
        """(2^n, R) start states psi_0 = Q D r' in the computational basis (= sqrt(rho0+) Q r').

        r': the random vectors (start="real": +-1; "phase": exp(i phi)), or the (2^n, R) array
        `r`; D = diag(sqrt(max(m_z, 0))) with m_z(x) = n_obs / 2 - (observed down spins of x);
        Q = prod over observed spins of exp(-i pi/2 Iy_k) = c [[1, -1], [1, 1]] (c = 1/sqrt 2;
        real), which turns Iz into Ix."""
        n, R = self.model.n_spins, self.replicas
        rng = np.random.default_rng([self.seed, 7919, 2])
        mask = sum(1 << q for q in self.observed)
        mz = 0.5 * len(self.observed) - np.bitwise_count(np.arange(2**n, dtype=np.int64) & mask)
        weight = np.sqrt(np.maximum(mz, 0.0))
        del mz
        if r is not None:
            psi = np.array(r, dtype=np.result_type(r, float)) * weight[:, None]
            R = psi.shape[1]
        elif self.start == "real":
            psi = (2.0 * rng.integers(0, 2, size=(2**n, R), dtype=np.int8) - 1.0) * weight[:, None]
        else:
            psi = np.exp(1j * rng.uniform(0.0, 2 * np.pi, size=(2**n, R))) * weight[:, None]
        del weight
        for q in self.observed:
            v = psi.reshape(2 ** (n - q - 1), 2, 2**q, R)
            up = v[:, 0].copy()                 # bit q = 0: spin up
            v[:, 0] -= v[:, 1]                  # new up   = c (up - down)
            v[:, 1] += up                       # new down = c (up + down)
            del up
        psi *= 2.0 ** (-0.5 * len(self.observed))
        return psi

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


class _Raise:
    """O_ps (a CSR ladder block, 0/1 entries) cut into chunks of ACCUMULATE_ROWS rows, in the
    outputs' real dtype (float32 with precision="single": each entry of O_ps x is a sum of at most
    n_obs stored numbers, so this adds one rounding of the terms' own size). _accumulate multiplies
    and sums chunk by chunk in double: at 24 spins one time point's whole-sector copies in double
    were 86 MB each, a fresh mapping per time point (qhl.exact.chebyshev.Workspace)."""

    def __init__(self, raise_op, dtype):
        mat = raise_op.astype(dtype)
        d = mat.shape[0]
        self.chunks = [(a, min(a + ACCUMULATE_ROWS, d), csr_rows(mat, a, min(a + ACCUMULATE_ROWS, d)))
                       for a in range(0, d, ACCUMULATE_ROWS)]


def _restart(out):
    """The last time point of a window as the next window's real start array [Re | Im]."""
    return np.asfortranarray(np.concatenate([out[-1].real, out[-1].imag], axis=1))


class _SectorRun:
    """Sector Hamiltonians, generators and Chebyshev propagation for one estimate.

    Holds the matrices of the sectors in `keep` only (others are dropped when a new one is
    built); spectral bounds persist per sector for the whole estimate."""

    def __init__(self, eng, h_groups, g_groups, replicas, n_gradient, pool, threads):
        self.eng, self.h_groups, self.g_groups = eng, h_groups, g_groups
        self.R, self.P, self.pool, self.threads = replicas, n_gradient, pool, threads
        self.m = replicas * (1 + n_gradient)
        self.rdt = eng._rdt()
        self.keep = set()
        self.cache = {}
        self.bounds = {}
        self._states = {}
        self.work = Workspace()      # outputs reused from sector to sector (propagate's slots)
        # norm drift that flags a too-tight Lanczos interval: far above the rounding of the series
        # (double: ~1e-13; single: ~K eps_32 ~ 1e-5), far below the growth of a component outside
        self.drift = 1e-8 if eng.precision == "double" else 3e-4

    def states(self, k):
        """Basis indices of sector k (kept while k is in `keep`)."""
        for old in [key for key in self._states if key not in self.keep and key != k]:
            del self._states[old]
        if k not in self._states:
            self._states[k] = self.eng.space.states(k)
        return self._states[k]

    @property
    def parallel(self):
        """The pool when there are threads to share work among, else None."""
        return self.pool if self.threads > 1 else None

    def each(self, fn, items):
        """fn(item) for every item, on the pool's threads when there are several (results discarded;
        every call must write its own output: _accumulate writes its own time column)."""
        for _ in (map(fn, items) if self.parallel is None else self.pool.map(fn, items)):
            pass

    def start(self, d, real):
        """Zeroed start array of a sector: (d, M) real, or (d, 2M) [Re | Im]."""
        return np.zeros((d, self.m if real else 2 * self.m), self.rdt, order="F")

    def drop(self, k):
        self.cache.pop(k, None)

    def _entry(self, k):
        if k not in self.cache:
            for old in [key for key in self.cache if key not in self.keep]:
                del self.cache[old]
            eng, sp = self.eng, self.eng.space
            st = self.states(k)
            par = dict(pool=self.parallel, threads=self.threads)
            mat, glo, ghi = sector_matrix(sp, k, self.h_groups, states=st, bounds=True, dtype=self.rdt, sort=False,
                                          **par)
            if k not in self.bounds:
                llo, lhi = lanczos_bounds(mat, seed=eng.seed, **par)
                self.bounds[k] = [max(glo, llo), min(ghi, lhi), (glo, ghi)]
            gens = [sector_matrix(sp, k, g, states=st, dtype=self.rdt, **par) for g in self.g_groups]
            parts = row_parts(st.size, self.threads)
            self.cache[k] = {flag: _Augmented(mat, gens, self.R, self.m, flag, parts) for flag in (True, False)}
        return self.cache[k]

    def propagate(self, k, x, taus, real, slot="out"):
        """exp(-i A tau) x for the sector's augmented operator A (chebyshev_window), with the
        Lanczos interval widened to Gershgorin's when the norm drifts. The result is a view of the
        run's Workspace buffer `slot`: valid until the next propagate with the same slot."""
        apply = self._entry(k)[real]
        eng, R, m = self.eng, self.R, self.m
        bnd = self.bounds[k]
        kw = dict(block=eng._block(x.shape[0], m), real=real, derivative=self.P > 0, precision=eng.precision,
                  pool=self.pool, work=self.work, slot=slot)
        out = chebyshev_window(apply, x, taus, bnd[0], bnd[1], eng.tol, **kw)
        xd = np.asarray(x, float)
        n0 = np.linalg.norm(xd[:, :R], axis=0) ** 2
        if not real:
            n0 += np.linalg.norm(xd[:, m:m + R], axis=0) ** 2
        # checked at the window's largest offset: a component outside [lo, hi] grows most there
        # (its series coefficients J_k(w tau) are largest at the largest tau)
        n1 = np.linalg.norm(np.asarray(out[-1][:, :R], complex), axis=0) ** 2
        if np.any(np.abs(n1 - n0) > self.drift * np.maximum(n0, 1e-300)):
            bnd[0], bnd[1] = bnd[2]                 # the Lanczos estimate was too tight
            out = chebyshev_window(apply, x, taus, bnd[0], bnd[1], eng.tol, **kw)
        return out
