"""Exact-engine signals and gradients of spinning-sample experiments (free evolution, no steps).

Signal (normalised as the FID): S(t) = Tr[O U(t) rho0 U(t)^dag] / Tr[O rho0], with U the
time-ordered propagator of H(t) = 2 pi sum_n s_n(t) h_n G_n (s_n from qhl.spins.spinning).
H(t) keeps each isotope's total Iz, so everything is done per magnetisation sector, from the
engine's sector blocks (ExactEngine._h_parts, _gen_blocks, _blocks).

Method. Each rotor period T_R is cut into K slices (equal, or planned: below), the same in every
period. On a slice [a, a + tau] the propagator is the fourth-order commutator-free exponential built on EXACT moments of s_n
(S. Blanes and P. C. Moan, Appl. Numer. Math. 56, 1519 (2006); A. Alvermann and H. Fehske,
J. Comput. Phys. 230, 5930 (2011)):
    U_slice = exp(-i tau (Hbar/2 + 2 M)) exp(-i tau (Hbar/2 - 2 M)),
    Hbar = (1/tau) int H,   M = (1/tau^2) int (t - a - tau/2) H(t) dt,
both from closed-form integrals of the five Fourier terms of s_n (SpinningFactors.mean and
first_moments here). Where H(t) commutes with itself at all times (one isolated pair with equal
offsets) the two exponentials commute and multiply to exp(-i tau Hbar): exact to rounding.
Each exponential is a "stage" exp(-i tau 2 pi sum_n e_n h_n G_n) with e = sbar/2 -+ 2 mu.
  * The 2K stages are the same in every period: stage propagators from one batched eigh per
    sector, prefix products P_i, the period propagator U_R = P_2K and its powers U_R^q.
  * A sampling time t = q T_R + a_j + delta (a_j the start of slice j) gets U(t) = W P_2j U_R^q,
    with W the same two-stage exponential on the part [a_j, a_j + delta] of slice j (exact moments
    over that part); a time on a slice boundary (delta = 0) needs no W.
  * Gradient, the exact derivative of this propagator (Daleckii-Krein for each exponential,
    U^dag dU = V ((V^dag dH V) o F') V^dag, F'_ab = exp(i E_a tau) f[E_a, E_b] with f the first
    divided difference of exp(-i E tau); R. Bhatia, "Matrix Analysis", 1997, ch. V), in the
    interaction form dU(t) = U(t) Xi:
        Xi = (P Q)^dag Omega (P Q) + Q^dag Delta_2j Q + Gamma_q,
        Delta_i = sum_(i' <= i) Y^dag ((V^dag dH V) o F') Y, Y = V^dag P_(i'-1),
        Gamma_q = sum_(l < q) U_R^-l Delta_2K U_R^l,
    Omega the partial slice's part, contracted per time point without a parameter axis (adjoint
    form: the result is a sum over the generators' entries). Delta is never formed stage by stage:
    the stages run as one recursion on M_i = V_i^dag P_i Delta_i P_i^dag V_i (the derivative seen
    from the end of stage i, in that stage's eigenbasis),
        M_i = Phi_i o (O_i M_(i-1) O_i^dag + F'_i o V_i^dag dH_i V_i),  O_i = V_i^dag V_(i-1),
    Phi_i = exp(-i (E_a - E_b) tau): with real eigenvectors (real H) every product is real, two
    per stage for all parameters at once (M is anti-Hermitian, so O M O^dag needs only left
    products), where Y^dag X Y needed two complex products per stage and parameter; each
    sampling time's contraction matrices are carried into the eigenbasis of its mark instead.
    Gamma_q is read in the Floquet basis of U_R (complex Schur form U_R = W diag(lam) W^dag):
    W^dag Gamma_q W = (W^dag Delta_2K W) o Geo_q, Geo_q[e, f] = sum_(l < q) (conj(lam_e) lam_f)^l. The trace with O and rho0 is taken
    per sector: dS = sum_k sum_ab [C_k o dU_k + C'_k o conj(dU_k)], C_k = sum over blocks
    (rho U_p^dag O)^T, C'_k = sum over blocks O U_s rho.

Error. Fourth order in the slice: the local error of the scheme is O(tau^5) per slice (nested
commutators of H and its derivatives), so O(K^-4) per rotor period. Measured on the built-in
six-proton demo at 20 kHz (couplings up to 10.6 kHz; 10 periods, 64 points) against K = 2048: largest
|S| error 1.6e-3, 1.1e-4, 6.9e-6, 4.3e-7 at K = 8, 16, 32, 64 (a factor ~16 per doubling;
tests/test_spinning_engine.py checks the order); the angle rule gives K_a = 31 there.
Default slices. The angle rule: K_a = max(MIN_SLICES, ceil(T_R ||H||_b / MAX_SLICE_ANGLE)), at most
MAX_SLICES, with ||H||_b = sum_n 2 pi |h_n| |s_n|_b ||G_n||_inf (a bound on |H(t)|; ||G||_inf the
largest absolute row sum of the generator, |s_n|_b the sum of the absolute Fourier coefficients),
so no slice longer than T_R / K_a rotates by more than MAX_SLICE_ANGLE radians. The slice plan then
puts boundaries on the sampling phases (t mod T_R) where that saves work: a time on a boundary needs
no partial slice (two eigendecompositions and an adjoint contraction of its own, about PARTIAL_COST
of one stage's cost: 0.55 ms against 0.85 ms for a stage on the demo gradient below). Among all
choices of phases as boundaries, each gap between chosen boundaries cut into ceil(gap K_a) equal
slices, the plan takes the one of least 2 K + PARTIAL_COST (sampling times left inside a slice), by dynamic
programming over the sorted phases (m phases: an m x m table, at most MAX_PLANNED_PHASES phases, else
K_a equal slices). Every slice stays at most T_R / K_a long, so the error stays at or below that of K_a
equal slices. Examples: rotor-synchronised sampling (every time a multiple of T_R / n) gets n equal
gaps of ceil(K_a / n) slices and no partial slice; 64 points over exactly 10 periods (phases k / 63,
K_a = 31) get 32 slices, 31 of 2/63 and one of 1/63 of the period, with every other phase on a boundary
(31 partial slices instead of 62 with 31 equal slices: gradient 0.84x the time). Override with
`slices_per_period` (K equal slices, or boundaries as fractions of the period from 0 to 1) or
ExactEngine.spinning_slices_per_period.

Memory (spinning_memory_bytes, checked with qhl.base.memory.require_memory before any work): per
sector the stage eigendecompositions and the sampling-time propagators; in the gradient, where the
sectors of one dimension d run through the recursion together (G of them, the group with the largest
G d^2), 16 G d^2 R (3 Kc + 4) bytes (R parameters, Kc stages per chunk of CHUNK_BYTES: the chunk's
generator products and the recursion's matrices) plus 16 max(d_max^2, G d^2) T 12 for the time tables
(the group's) and the partial slices' F' (their other work runs in chunks of times, PART_BYTES each).
"""

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp

from ..base.blas import blas_limited
from ..base.errors import QhlInputError
from ..base.memory import require_memory
from ..base.progress import FractionProgress
from ..spins.cluster import refuse_steps
from ..spins.spinning import spinning_factors
from .divided_differences import phase_sinc_tables

__all__ = ["spinning_signal", "period_propagators", "spinning_gradient", "default_slices_per_period",
           "default_slice_fractions", "spinning_memory_bytes",
           "first_moments", "MAX_SLICE_ANGLE", "MIN_SLICES", "MAX_SLICES"]

MAX_SLICE_ANGLE = 1.0        # radians: bound on the largest slice rotation tau ||H||_b (default K)
MIN_SLICES = 8
PARTIAL_COST = 0.65          # a sampling time inside a slice, in units of one stage's cost (slice plan)
MAX_PLANNED_PHASES = 512     # more distinct sampling phases than this: K equal slices (the plan's tables are m^2)
MAX_SLICES = 4096
PART_BYTES = 1 << 17         # partial-slice stages per time chunk: 2 complex d x d matrices per time
CHUNK_BYTES = 2 << 20        # stage derivatives of one chunk (3 complex arrays of Kc R G d^2; small: cache-resident)
_GAUSS_BELOW = 0.05          # phase width below which first moments use Gauss-Legendre quadrature


def first_moments(sf, t0, t1) -> np.ndarray:
    """(M, P) mu = (1/tau^2) int_t0^t1 (t - (t0 + t1)/2) s_n(t) dt, tau = t1 - t0 (0 where tau = 0).

    Closed form from the Fourier terms (integration by parts) for phase widths >= _GAUSS_BELOW,
    else 8-point Gauss-Legendre (error below 1e-20 there)."""
    t0 = np.atleast_1d(np.asarray(t0, float))
    t1 = np.atleast_1d(np.asarray(t1, float))
    w = 2 * np.pi * sf.spinning_hz
    pa, pb = w * t0, w * t1
    dp = pb - pa
    wide = dp >= _GAUSS_BELOW
    safe = np.where(wide, dp, 1.0)
    cols = [np.zeros_like(pa)]
    for k in (1, 2):
        ic = 0.5 * dp * (np.sin(k * pb) + np.sin(k * pa)) / k + (np.cos(k * pb) - np.cos(k * pa)) / k**2
        is_ = -0.5 * dp * (np.cos(k * pb) + np.cos(k * pa)) / k + (np.sin(k * pb) - np.sin(k * pa)) / k**2
        cols += [ic / safe**2, is_ / safe**2]
    out = np.stack(cols, axis=1)
    if np.any(~wide):
        x, wt = np.polynomial.legendre.leggauss(8)
        mid = 0.5 * (pa + pb)
        nodes = mid[:, None] + 0.5 * dp[:, None] * x[None, :]              # (M, 8) phases
        weight = 0.25 * x[None, :] * wt[None, :]                             # (p - mid)/dp^2 dp
        small = [np.zeros_like(pa)]
        for k in (1, 2):
            small += [(np.cos(k * nodes) * weight).sum(1), (np.sin(k * nodes) * weight).sum(1)]
        out = np.where(wide[:, None], out, np.stack(small, axis=1))
    return out @ sf.fourier.T


def _norm_bound(engine, values, fourier):
    """||H||_b in rad/s: a triangle bound from the generators' largest absolute row sums."""
    gnorm = np.zeros(len(values))
    for rows, cols, pidx, vals, d in engine._h_parts:
        if pidx.size == 0:
            continue
        rowsum = np.zeros((len(values), d))
        np.add.at(rowsum, (pidx, rows), np.abs(vals))
        gnorm = np.maximum(gnorm, rowsum.max(axis=1))
    return float((2 * np.pi * np.abs(values) * gnorm) @ np.abs(fourier).sum(axis=1))


def _phases(t, period):
    """(distinct sampling phases (t mod T_R) / T_R strictly inside (0, 1), sorted; how many times lie at
    each). A phase within 1e-9 of a period's start, relative to the time's period count, counts as 0."""
    u = np.asarray(t, float) / period
    frac = u - np.floor(u)
    tol = 1e-9 * np.maximum(1.0, u)
    frac = np.sort(frac[(frac > tol) & (frac < 1 - tol)])
    if frac.size == 0:
        return frac, np.zeros(0, np.int64)
    first = np.concatenate([[True], np.diff(frac) > 1e-12])
    return frac[first], np.diff(np.append(np.nonzero(first)[0], frac.size))


def _slice_fractions(k_rule, phases, counts=None):
    """Slice boundaries of one rotor period as fractions (K + 1,), 0 first and 1 last (module docstring):
    every slice at most 1 / k_rule long, boundaries on the sampling phases where that lowers the cost
    2 (slices) + PARTIAL_COST (sampling times left inside a slice; counts: the times at each phase,
    default one), by dynamic programming over the phases."""
    m = phases.size
    if m == 0 or m > MAX_PLANNED_PHASES:
        return np.linspace(0.0, 1.0, k_rule + 1)
    p = np.concatenate([[0.0], phases, [1.0]])
    counts = np.ones(m) if counts is None else np.asarray(counts, float)
    upto = np.concatenate([[0.0], np.cumsum(counts), [counts.sum()]])       # times at phases 1..k, k = 0..m+1
    # cost[b, a] of the segment between points a < b: 2 stages a slice, PARTIAL_COST a time strictly
    # inside (the times at phases a+1..b-1)
    n_sl = np.maximum(1, np.ceil((p[:, None] - p[None, :]) * k_rule - 1e-9))
    between = upto[np.maximum(np.arange(m + 2) - 1, 0)][:, None] - upto[None, :]
    cost = 2 * n_sl + PARTIAL_COST * np.maximum(0.0, between)
    best = np.zeros(m + 2)
    back = np.zeros(m + 2, np.int64)
    for b in range(1, m + 2):
        c = best[:b] + cost[b, :b]
        back[b] = c.argmin()
        best[b] = c[back[b]]
    cuts, b = [m + 1], m + 1
    while b > 0:
        b = back[b]
        cuts.append(b)
    cuts = np.array(cuts[::-1])
    per_gap = n_sl[cuts[1:], cuts[:-1]].astype(np.int64)                    # equal slices per segment
    lo = np.repeat(p[cuts[:-1]], per_gap)
    width = np.repeat((p[cuts[1:]] - p[cuts[:-1]]) / per_gap, per_gap)
    step = np.arange(per_gap.sum()) - np.repeat(np.cumsum(per_gap) - per_gap, per_gap)
    out = np.concatenate([lo + step * width, [1.0]])
    return out if out.size - 1 <= MAX_SLICES else np.linspace(0.0, 1.0, k_rule + 1)


def _rule(engine, values, sf):
    """The smallest K that keeps every slice rotation below MAX_SLICE_ANGLE (within MIN_SLICES..MAX_SLICES)."""
    k = int(np.ceil(sf.period_s * _norm_bound(engine, values, sf.fourier) / MAX_SLICE_ANGLE))
    return int(min(max(MIN_SLICES, k), MAX_SLICES))


def _fractions(engine, values, sf, t, slices):
    """Slice boundaries (fractions of the period): `slices` None (the default plan for times t), a positive
    integer K (K equal slices) or boundaries already planned (an increasing 1-D array from 0 to 1)."""
    if slices is None:
        return _slice_fractions(_rule(engine, values, sf), *_phases(t, sf.period_s))
    arr = np.asarray(slices, float)
    if arr.ndim == 1 and arr.size >= 2 and arr[0] == 0 and arr[-1] == 1 and np.all(np.diff(arr) > 0):
        return arr
    if arr.ndim == 1:
        raise QhlInputError(f"slices_per_period = {np.array2string(arr, threshold=8)}: expected slice boundaries "
                            f"as fractions of the period, increasing from 0 to 1", key="slices_per_period")
    if arr.ndim != 0 or int(slices) != slices or slices < 1:
        raise QhlInputError(f"slices_per_period = {slices}: expected a positive integer", key="slices_per_period")
    return np.linspace(0.0, 1.0, int(slices) + 1)


def default_slices_per_period(engine, experiment, free_values_hz=None, times=None) -> int:
    """The number of slices per rotor period of the default plan (module docstring) for `experiment`
    (its own times unless `times` is given)."""
    return default_slice_fractions(engine, experiment, free_values_hz, times).size - 1


def default_slice_fractions(engine, experiment, free_values_hz=None, times=None) -> np.ndarray:
    """The default slice boundaries of one rotor period as fractions of it (K + 1,), from 0 to 1."""
    t = experiment.times_s if times is None else np.asarray(times, float)
    return _fractions(engine, engine.model.all_values_hz(free_values_hz), _factors(engine, experiment), t, None)


def _time_plan(t, period, edges):
    """Per sampling time: (q periods, j whole slices, delta seconds into slice j); edges (K + 1,) seconds."""
    if np.any(t < 0):
        raise QhlInputError("spinning experiments: sampling times must be >= 0 (they count from the start of "
                            "the acquisition, rotor phase 0)", key="times")
    k = edges.size - 1
    q = np.floor(t / period)
    phase = t - q * period
    j = np.clip(np.searchsorted(edges, phase, side="right") - 1, 0, k - 1)
    lo, hi = q * period + edges[j], q * period + edges[j + 1]
    # on a slice boundary up to rounding: within 1e-9 of the slice AND of the time itself (a rotor so
    # slow that every time lies in the first slice must not snap them all to t = 0)
    tol = 1e-9 * np.minimum(edges[j + 1] - edges[j], t)
    up = np.abs(t - hi) <= tol
    on = up | (np.abs(t - lo) <= tol)
    delta = np.where(on, 0.0, np.maximum(t - lo, 0.0))
    j = np.where(up, j + 1, j)
    q = q.astype(np.int64) + (j == k)
    return q, np.where(j == k, 0, j), delta


def _stage_chunk(n_stages, n_rows, d):
    return int(max(1, min(n_stages, CHUNK_BYTES // (48.0 * max(n_rows, 1) * d * d))))


def spinning_memory_bytes(dims, k_slices, n_rows, n_times, n_j=None, n_q=None) -> float:
    """Peak-memory model (bytes) of the module docstring; dims: the sector dimensions in use (n_j, n_q:
    distinct slice and period indices of the sampling times, accepted for callers; the recursion's
    memory does not grow with them)."""
    dims = np.asarray(dims, float)
    d = float(dims.max())
    cache = 16.0 * (2 * k_slices + 2 * n_times) * 2 * np.sum(dims**2)
    per_time = 16.0 * 4 * n_times * np.sum(dims**2)
    grad = 0.0
    if n_rows:
        # the recursion runs the sectors of one dimension together: G sectors of dimension dg
        vals, counts = np.unique(dims, return_counts=True)
        k = int(np.argmax(counts * vals**2))
        g, dg = int(counts[k]), float(vals[k])
        kc = _stage_chunk(2 * k_slices, n_rows * g, dg)
        grad = 16.0 * (g * dg * dg * n_rows * (3 * kc + 4) + max(d * d, g * dg * dg) * 12 * n_times)
    return float(cache + per_time + grad)


def _two_stage(sf, t0, t1):
    """Stage factors e (2, M, P) of the two exponentials on [t0, t1], first-applied first."""
    mean, mom = sf.mean(t0, t1), first_moments(sf, t0, t1)
    return np.stack([0.5 * mean - 2 * mom, 0.5 * mean + 2 * mom])


def _expm(e, v, dt):
    """V exp(-i E dt) V^dag for stacks (M, d), (M, d, d), dt (M,) or scalar."""
    dt = np.broadcast_to(np.asarray(dt, float), e.shape[:1])
    ang = e * dt[:, None]
    if np.iscomplexobj(v):
        return (v * np.exp(-1j * ang)[:, None, :]) @ v.conj().transpose(0, 2, 1)
    vt = v.transpose(0, 2, 1)                                  # real V: two real products
    out = np.empty(v.shape, complex)
    out.real = (v * np.cos(ang)[:, None, :]) @ vt
    out.imag = (v * -np.sin(ang)[:, None, :]) @ vt
    return out


def _factors(engine, experiment):
    """spinning_factors of the engine's model in `experiment`, kept on the engine per rotor setting and pose
    (posed crystallite engines of qhl.exact.powder share the template's dictionary)."""
    model = engine.model
    key = (id(model.parameters), experiment.spinning_hz, experiment.spinning_angle_deg, experiment.dipolar_scale,
           tuple(np.asarray(model.field_direction, float)), getattr(model, "rotor_azimuth_deg", 0.0),
           bool(getattr(model, "dipolar_constants", False)))
    cache = engine.__dict__.setdefault("_spinning_factors", {})
    if key not in cache:
        if len(cache) > 64:
            cache.clear()
        cache[key] = spinning_factors(model, experiment)
    return cache[key]


def _linear_map(engine, s):
    """Sparse (d^2, P_all) map from coefficients to the flattened sector-s block of H (kept on the engine)."""
    cache = engine.__dict__.setdefault("_spinning_maps", {})
    if s not in cache:
        rows, cols, pidx, vals, d = engine._h_parts[s]
        cache[s] = sp.csr_matrix((vals, (rows * d + cols, pidx)), shape=(d * d, len(engine.model.parameters)))
    return cache[s]


def _h(a):
    return a.conj().swapaxes(-1, -2)


class _Spinning:
    """One spinning experiment at one parameter point: stage spectra and the sampling-time propagators."""

    def __init__(self, engine, experiment, t, free_values_hz, k_slices, n_rows, steps_ok=False, all_sectors=False):
        # steps_ok: the caller handles the experiment's steps itself (qhl.exact.spinning_sequence);
        # all_sectors: every magnetisation sector, not only those of rho0's and O's blocks
        if not steps_ok:
            refuse_steps(experiment, "spinning experiments (the spinning engine covers free evolution only)")
        self.engine = engine
        model = engine.model
        self.sf = _factors(engine, experiment)
        self.values = model.all_values_hz(free_values_hz)
        self.fractions = _fractions(engine, self.values, self.sf, t, k_slices)      # slice boundaries / T_R
        self.k = self.fractions.size - 1
        self.t = t
        self.edges = self.fractions * self.sf.period_s                             # seconds, (K + 1,)
        self.q, self.j, self.delta = _time_plan(t, self.sf.period_s, self.edges)
        self.sectors = (list(range(len(engine.sectors))) if all_sectors else
                        sorted({b.s for b in engine._blocks} | {b.p for b in engine._blocks}))
        self.need_j = sorted(set(self.j.tolist()))
        self.need_q = sorted(set(self.q.tolist()))
        dims = [engine._dims[s] for s in self.sectors]
        need = spinning_memory_bytes(dims, self.k, n_rows, t.size, len(self.need_j), len(self.need_q))
        require_memory(f"the spinning engine ({model.n_spins} spins, {self.k} slices per period, "
                       f"{t.size} times, {n_rows} gradient rows)", need)
        edges = self.edges
        st = _two_stage(self.sf, edges[:-1], edges[1:])                             # (2, K, P)
        # stages in time order; only those before the last sampling time when it lies in the first period
        self.n_st = 2 * self.k if self.need_q[-1] >= 1 else 2 * self.need_j[-1]
        self.stage_factors = st.transpose(1, 0, 2).reshape(2 * self.k, -1)[:self.n_st]
        self.stage_tau = np.repeat(np.diff(edges), 2)[:self.n_st]                  # each stage's length
        start = edges[self.j]
        self.inside = np.nonzero(self.delta > 0)[0]          # times inside a slice (the others need no W)
        self.part_factors = _two_stage(self.sf, start[self.inside], (start + self.delta)[self.inside])
        self.spec, self.prop = {}, {}
        for s, eig in zip(self.sectors, self._eigensystems()):
            self._sector(s, eig)

    def _eigensystems(self):
        """Per sector in use: (E, V) of its 2K stages followed by its partial-slice stages (one stacked eigh;
        two threads over the sectors gained nothing steady here, measured on two shared cores)."""
        parts = self.part_factors.reshape(-1, self.values.size)
        factors = np.concatenate([self.stage_factors, parts])
        return [np.linalg.eigh(self._hamiltonians(s, factors)) for s in self.sectors]

    def _hamiltonians(self, s, factors):
        """(M, d, d) sector matrices 2 pi sum_n e_mn h_n G_n from the stored generator entries."""
        d = self.engine._h_parts[s][4]
        coeffs = 2 * np.pi * factors * self.values[None, :]
        return np.asarray((_linear_map(self.engine, s) @ coeffs.T).T).reshape(len(factors), d, d)

    def _sector(self, s, eig):
        n_in, n_st = self.inside.size, self.n_st
        e, v, ep, vp = eig[0][:n_st], eig[1][:n_st], eig[0][n_st:], eig[1][n_st:]     # 2K stages, the parts
        parts = [(ep[:n_in], vp[:n_in]), (ep[n_in:], vp[n_in:])]                        # 2 x (inside times)
        u = _expm(e, v, self.stage_tau)
        d = e.shape[-1]
        pref = np.empty((self.n_st + 1, d, d), complex)                                  # P_i, i = 0..n_st
        pref[0] = np.eye(d)
        for i in range(self.n_st):
            pref[i + 1] = u[i] @ pref[i]
        ur = pref[-1]                                                                  # U_R when q > 0 occurs
        pw = np.empty((self.need_q[-1] + 1, d, d), complex)                               # U_R^q
        pw[0] = np.eye(d)
        for q in range(1, len(pw)):
            pw[q] = ur @ pw[q - 1]
        # X = P_2j U_R^q per time; U = W X, W = W2 W1 only for the times inside a slice (else W = 1);
        # w1 holds W1 in the rows of those times (the others are not read)
        x = pref[2 * self.j] @ pw[self.q]
        full = x.copy()
        w1 = np.empty((self.t.size, d, d), complex)
        if n_in:
            ins = self.inside
            w1[ins] = _expm(parts[0][0], parts[0][1], self.delta[ins])
            full[ins] = _expm(parts[1][0], parts[1][1], self.delta[ins]) @ w1[ins] @ x[ins]
        self.spec[s] = (e, v, parts, w1, pref, pw)
        self.prop[s] = (x, full)                                                       # X, U(t) = W X

    def _block_list(self, blocks):
        """(s, p, rho_sp, O_ps) dense, by default rho0's and O's blocks (the engine's _Block list)."""
        if blocks is None:
            return [(b.s, b.p, b.rho.toarray(), b.obs.toarray()) for b in self.engine._blocks]
        return blocks

    def signal(self, blocks=None):
        """S(t) = Tr[O U(t) rho U(t)^dag] / N; blocks: (s, p, rho_sp, O_ps) of another rho (default rho0)."""
        out = np.zeros(self.t.size, complex)
        for s, p, rho, obs in self._block_list(blocks):
            us, up = self.prop[s][1], self.prop[p][1]
            y = us @ rho @ _h(up)
            out += np.einsum("mab,ba->m", y, obs)
        return out / self.engine.norm

    def contraction_matrices(self, blocks=None, trace_out=None):
        """Per sector: (A, B) = (U^T C, U^dag C') with dS = sum_ab A o Xi + B o conj(Xi), dU = U Xi
        (blocks as in signal: rho held fixed, default rho0). trace_out (T,): adds the unnormalised
        signal sum over blocks Tr[O U_s rho U_p^dag] = sum_ab U_s o C (the product C is at hand)."""
        cm = {s: [None, None] for s in self.sectors}
        for s_, p_, rho, obs in self._block_list(blocks):
            us, up = self.prop[s_][1], self.prop[p_][1]
            ca = (rho @ _h(up) @ obs).swapaxes(1, 2)
            if trace_out is not None:
                trace_out += np.einsum("mab,mab->m", us, ca)
            cb = obs @ us @ rho
            cm[s_][0] = ca if cm[s_][0] is None else cm[s_][0] + ca
            cm[p_][1] = cb if cm[p_][1] is None else cm[p_][1] + cb
        out = {}
        for s, (ca, cb) in cm.items():
            u = self.prop[s][1]
            d = u.shape[-1]
            ca = np.zeros((self.t.size, d, d), complex) if ca is None else ca
            cb = np.zeros((self.t.size, d, d), complex) if cb is None else cb
            out[s] = (u.swapaxes(1, 2) @ ca, _h(u) @ cb)
        return out

    def _generators(self, s, idx):
        """(stacked CSR (R d, d), dense (R, d, d)) generator blocks of sector s for parameters idx (cached)."""
        cache = self.engine.__dict__.setdefault("_spinning_generators", {})
        key = (s, tuple(idx))
        if key not in cache:
            if len(cache) > 64:
                cache.clear()
            gst = sp.vstack([self.engine._gen_blocks[n][s] for n in idx]).tocsr()
            d = gst.shape[1]
            cache[key] = (gst, gst.toarray().reshape(len(idx), d, d))
        return cache[key]

    def sector_gradient(self, s, rows, ab):
        """(R, T) contribution of sector s to the unnormalised gradient (module docstring)."""
        return self.group_gradient([s], rows, [ab])

    def group_gradient(self, group, rows, abs_):
        """(R, T) contribution of the sectors `group` (all of one dimension; abs_ their contraction
        matrices) to the unnormalised gradient: one stage recursion for the group, the rest per sector."""
        idx = [n for n, _ in rows]
        if self.engine._dims[group[0]] == 1:
            return self._scalar_gradient(group, idx, abs_)
        gens, real = self._group_generators(group, idx)
        grad = np.zeros((len(rows), self.t.size), complex)
        # per sampling time X = P_2j U_R^q; for the times inside a slice also conj(X) A X^T and X B X^dag
        # (their partial slice's contraction matrices; the marks read A, B and X themselves)
        marks, a3s, b3s = [], [], []
        ins = self.inside
        for s, (a, b) in zip(group, abs_):
            x = self.prop[s][0]
            marks.append((x, a, b))
            a3, b3 = np.zeros_like(a), np.zeros_like(b)
            if ins.size:
                xi = x[ins]
                a3[ins] = xi.conj() @ a[ins] @ xi.swapaxes(1, 2)
                b3[ins] = xi @ b[ins] @ _h(xi)
            a3s.append(a3)
            b3s.append(b3)
        deltas = self._stage_recursion(group, idx, [g[0] for g in gens], real, marks, grad)
        for s, (a, b), (gst, gens_s), a3, b3, delta_r in zip(group, abs_, gens, a3s, b3s, deltas):
            self._sector_rest(s, idx, gens_s, real, a, b, a3, b3, delta_r, grad)
        return grad

    def _scalar_gradient(self, group, idx, abs_):
        """(R, T) of sectors of dimension one, in closed form: there every stage is a phase, so
        U(t) = exp(-i 2 pi sum_n h_n g_n sum_i tau_i e_in), and the two stages of a slice (or of a partial
        slice) carry tau (sbar/2 - 2 mu) + tau (sbar/2 + 2 mu) = the exact integral of s_n over it; hence
        U^dag dU/dh_n = -i 2 pi g_n I_n(t), I_n(t) = int_0^t s_n (SpinningFactors.mean over [0, t] times t),
        and dS = A Xi + B conj(Xi) per time (the stage recursion gives the same to rounding)."""
        t = self.t
        integral = (t[:, None] * self.sf.mean(np.zeros_like(t), t))[:, idx]             # (T, R)
        grad = np.zeros((len(idx), t.size), complex)
        for s, (a, b) in zip(group, abs_):
            g = np.array([self.engine._gen_blocks[n][s].toarray()[0, 0] for n in idx])
            xi = -2j * np.pi * g[:, None] * integral.T
            grad += a[:, 0, 0][None, :] * xi + b[:, 0, 0][None, :] * xi.conj()
        return grad

    def _sector_rest(self, s, idx, gens, real, a, b, a3, b3, delta_r, grad):
        """The period sum Gamma_q and the partial slices of sector s, added to grad."""
        e, v, parts, w1, pref, pw = self.spec[s]
        if delta_r is not None:
            # Gamma_q = sum_(l < q) U_R^-l Delta_R U_R^l in the Floquet basis U_R = W diag(lam) W^dag
            # (complex Schur form; U_R is normal, so the triangular factor is diagonal to rounding):
            # W^dag Gamma_q W = (W^dag Delta_R W) o Geo_q, Geo_q[e, f] = sum_(l < q) (conj(lam_e) lam_f)^l,
            # and sum_ab Gamma_q o A = sum_ef (W^dag Gamma_q W) o (W^T A W^*).
            tri, wf = sla.schur(pw[1], output="complex")
            lam = np.diag(tri)
            ratio = lam.conj()[:, None] * lam[None, :]
            geo = np.empty((self.need_q[-1] + 1, len(lam), len(lam)), complex)
            geo[0] = 0.0
            power = np.ones_like(ratio)
            for q in range(1, len(geo)):
                geo[q] = geo[q - 1] + power
                power = power * ratio
            sel = np.nonzero(self.q > 0)[0]
            dt = _h(wf) @ delta_r @ wf
            g = geo[self.q[sel]]
            grad[:, sel] += _pair(dt, (wf.T @ a[sel] @ wf.conj()) * g, (_h(wf) @ b[sel] @ wf) * g.conj())
        # partial slice: Omega = W1^dag Omega_2 W1 + Omega_1, contracted with conj(X) A X^T; both
        # stages in one batch, the times in chunks (small arrays: cache-resident, reused memory)
        (e1, v1), (e2, v2) = parts
        sel = self.inside
        d = e.shape[-1]
        step = max(1, PART_BYTES // (32 * d * d))
        pos = np.full(self.t.size, -1)
        pos[sel] = np.arange(sel.size)
        if sel.size:
            dl = self.delta[sel]
            fp_all = self._f_prime(np.concatenate([e1, e2]), np.concatenate([dl, dl])).reshape(2, sel.size, d, d)
        for k0 in range(0, sel.size, step):
            ts = sel[k0:k0 + step]
            ks = pos[ts]
            w, a3k, b3k = w1[ts], a3[ts], b3[ts]
            grad[:, ts] += self._adjoint_stages(np.concatenate([e1[ks], e2[ks]]), np.concatenate([v1[ks], v2[ks]]),
                                                gens, idx, np.concatenate([a3k, w.conj() @ a3k @ w.swapaxes(1, 2)]),
                                                np.concatenate([b3k, w @ b3k @ _h(w)]), real,
                                                self.delta[ts], self.part_factors[:, ks],
                                                fp_all[:, ks].reshape(2 * ks.size, d, d))

    def period_derivatives(self, rows):
        """Per sector: Delta_R = U_R^dag dU_R/dh (R, d, d) for the parameters of `rows` (the recursion of
        sector_gradient without sampling marks); the instance must reach one full period (q >= 1)."""
        idx = [n for n, _ in rows]
        out = {}
        for group in self._groups():
            gens, real = self._group_generators(group, idx)
            d = self.spec[group[0]][0].shape[-1]
            deltas = self._stage_recursion(group, idx, [g[0] for g in gens], real, [None] * len(group),
                                           np.zeros((len(idx), self.t.size), complex), marks_ok=False)
            out.update(zip(group, deltas))
        return out

    def _group_generators(self, group, idx):
        """(per sector of `group` the _generators pair, whether every eigenvector and generator is real)."""
        gens = [self._generators(s, idx) for s in group]
        real = not any(np.iscomplexobj(self.spec[s][1]) or np.iscomplexobj(g[1]) for s, g in zip(group, gens))
        return gens, real

    def _groups(self):
        """The sectors in use grouped by dimension (in order of first appearance)."""
        groups = {}
        for s in self.sectors:
            groups.setdefault(self.engine._dims[s], []).append(s)
        return list(groups.values())

    def _stage_recursion(self, group, idx, gsts, real, marks, grad, marks_ok=True):
        """The Lambda recursion over the stages (module docstring), all parameters and the sectors of
        `group` (one dimension d) at once.

        M_i = V_i^dag P_i Delta_i P_i^dag V_i obeys M_i = Phi_i o (O_i M_(i-1) O_i^dag + F'_i o B_i),
        O_i = V_i^dag V_(i-1), B_i = V_i^dag (2 pi e_in G_n) V_i, Phi_i = exp(-i (E_a - E_b) tau). M is
        held as (G, d, R, d) [sector, a, parameter, b], so each product with O is one matrix product
        over all parameters per sector (real products on the (re, im) pairs where V is real). M is
        anti-Hermitian in (a, b), so M O^dag = -conj(transpose(O M)) and O M O^dag = -conj(O^* transpose(O M)):
        two left products. At a mark 2j the contraction sum_ab Delta o A + conj(Delta) o B equals
        sum_ab M o (V^T A3 V^*) + conj(M) o (V^dag B3 V), A3 = conj(X) A X^T, B3 = X B X^dag,
        X = P_2j U_R^q, V = V_(2j-1), summed over the group's sectors; with Y = X^dag V these are
        Y^T A Y^* and Y^dag B Y (marks: per sector (X, A, B), each (T, d, d)). Adds the marks' terms to grad;
        returns per sector Delta_R (R, d, d), or None when no sampling time lies beyond the first period."""
        n_g = len(group)
        e = np.stack([self.spec[s][0] for s in group])                                      # (G, n_st, d)
        v = np.stack([self.spec[s][1] for s in group])                                      # (G, n_st, d, d)
        prefs = [self.spec[s][4] for s in group]
        n_st, d, n_r = self.n_st, e.shape[-1], len(idx)
        need_r = self.need_q[-1] >= 1
        # the marks' contraction matrices in the eigenbasis of the stage ending there, all at once
        at = np.nonzero(self.j > 0)[0] if marks_ok else np.zeros(0, np.int64)
        at = at[np.argsort(self.j[at], kind="stable")]                                   # by mark
        # sum_ab M o A + conj(M) o B = (M A^T)_t + conj(M conj(B)^T)_t, summed over the sectors: one
        # product of M (R, G d^2) with the columns [A_t, conj(B_t)] (G d^2, 2 per time) of the times
        # marked there (times sorted by mark, so a mark's columns are one slice), into res; grad takes
        # res after the last stage
        n_at = at.size
        marks_at = 2 * self.j[at]
        starts = np.flatnonzero(np.diff(marks_at, prepend=-1))
        at_mark = {int(marks_at[lo]): (2 * lo, 2 * hi) for lo, hi in zip(starts, np.append(starts[1:], n_at))}
        full = np.empty((n_at, 2, n_g, d, d), complex)
        for g in range(n_g if n_at else 0):
            xs, a_, b_ = marks[g]
            y = _h(xs[at]) @ v[g, marks_at - 1]                                          # Y = X^dag V
            full[:, 0, g] = y.swapaxes(1, 2) @ a_[at] @ y.conj()
            full[:, 1, g] = (_h(y) @ b_[at] @ y).conj()
        tab = full.reshape(2 * n_at, n_g * d * d).T                                       # (G d^2, 2 n_at)
        res = np.empty((n_r, 2 * n_at), complex)
        tau = self.stage_tau
        ph = np.exp(-1j * e * tau[None, :, None])
        # Phi o F' = exp(i E_b tau) f[E_a, E_b] = -i tau P S for all stages
        pf, stab = phase_sinc_tables(e.reshape(-1, d), np.tile(tau, n_g))
        pf *= stab
        pf *= -1j * np.tile(tau, n_g)[:, None, None]
        pf = pf.reshape(n_g, n_st, d, d)
        del stab
        scale = 2 * np.pi * self.stage_factors[:, idx]                                     # (n_st, R)
        if n_st and np.all(np.abs(scale - scale[:1]) <= 1e-14 * np.abs(scale[:1])):
            # every parameter's factor the same in all stages (no spinning modulation on the free
            # parameters, e.g. shifts and J couplings): scale the generators once, not each stage
            gsts = [sp.diags(np.repeat(scale[0], d)) @ g for g in gsts]
            scale = None
        m = None
        deltas = [None] * n_g
        chunk = _stage_chunk(n_st, n_r * n_g, d)
        for c0 in range(0, n_st, chunk):
            c1 = min(n_st, c0 + chunk)
            vs = v[:, c0:c1]
            c = c1 - c0
            # S_i = [G_1 V_i | ... | G_R V_i] as (d, R d); B_i = V_i^dag S_i, scaled per parameter
            bt = np.empty((c, n_g, d, n_r, d), complex if not real else float)
            for g in range(n_g):
                gv = gsts[g] @ vs[g].transpose(1, 0, 2).reshape(d, c * d)                  # (R d, c d)
                gv = gv.reshape(n_r, d, c, d).transpose(2, 1, 0, 3)                          # (c, d, R, d) view
                if scale is not None:                     # scaled while made contiguous: one pass
                    gv = np.multiply(gv, scale[c0:c1, None, :, None], out=np.empty((c, d, n_r, d), gv.dtype))
                gv = np.ascontiguousarray(gv).reshape(c, d, n_r * d)
                bt[:, g] = (_h(vs[g]) @ gv).reshape(c, d, n_r, d)
            # the source term Phi o F' o B_i of each stage
            bt = bt * pf[:, c0:c1].transpose(1, 0, 2, 3)[:, :, :, None, :]
            if d == 1:
                # one level: O_i M O_i^dag = |O_i|^2 M = M and Phi = 1, so M_i is a running sum
                ms = np.cumsum(bt, axis=0)
                if m is not None:
                    ms += m
                m = ms[-1].copy()
                for i in range(c0, c1):
                    if i + 1 in at_mark or (need_r and i + 1 == n_st):
                        self._at_mark(i, ms[i - c0], at_mark, tab, res, need_r, deltas, v, prefs)
                continue
            negphase = -(ph[:, c0:c1, :, None] * ph[:, c0:c1, None, :].conj()).transpose(1, 0, 2, 3)[:, :, :, None, :]
            prev = v[:, c0 - 1:c1 - 1] if c0 > 0 else np.concatenate([vs[:, :1], vs[:, :-1]], axis=1)
            o_all = (_h(vs) @ prev).transpose(1, 0, 2, 3)                                  # O_i = V_i^dag V_(i-1)
            o_sec = o_all if real else o_all.conj()
            for ii in range(c):
                i = c0 + ii
                if m is None:
                    m = bt[ii].copy()
                else:
                    m = _left(o_sec[ii], np.ascontiguousarray(_left(o_all[ii], m, real).transpose(0, 3, 2, 1)), real)
                    np.conjugate(m, out=m)                             # O M O^dag = -conj(O^* T(O M))
                    m *= negphase[ii]
                    m += bt[ii]
                if i + 1 in at_mark or (need_r and i + 1 == n_st):
                    self._at_mark(i, m, at_mark, tab, res, need_r, deltas, v, prefs)
        if n_at:
            grad[:, at] += res[:, 0::2] + res[:, 1::2].conj()
        return deltas

    def _at_mark(self, i, m, at_mark, tab, res, need_r, deltas, v, prefs):
        """At the end of stage i: the products of M (G, d, R, d), flattened to (R, G d^2), with the columns of
        the sampling times marked there (into their columns of res) and, after the last stage of a period,
        Delta_R = Z^dag M Z per sector (into deltas)."""
        n_g, d, n_r = m.shape[0], m.shape[1], m.shape[2]
        mc = m.transpose(2, 0, 1, 3).reshape(n_r, n_g * d * d)                         # (R, G d^2), a copy
        hit = at_mark.get(i + 1)
        if hit is not None:
            res[:, hit[0]:hit[1]] = mc @ tab[:, hit[0]:hit[1]]
        if need_r and i + 1 == self.n_st:
            mc = mc.reshape(n_r, n_g, d, d)
            for g in range(n_g):
                z = _h(v[g, i]) @ prefs[g][i + 1]                                          # Z = V_i^dag P_(i+1)
                deltas[g] = _h(z) @ mc[:, g] @ z                                           # Delta_R = Z^dag M Z

    @staticmethod
    def _f_prime(e, dt):
        """F'_ab = exp(i E_a dt) f[E_a, E_b] = -i dt conj(P) S (phase_sinc_tables) for stacks e (M, d), dt (M,)."""
        p, s = phase_sinc_tables(e, dt)
        out = p.conj()
        out *= s
        out *= -1j * dt[:, None, None]
        return out

    @staticmethod
    def _adjoint_stages(e, v, gens, idx, a, b, real, delta, part_factors, fp=None):
        """sum_ab [A o Omega + B o conj(Omega)] of the two partial-slice stages, per parameter and time
        (stacks of 2M: the first stage's M times, then the second's; delta (M,) the partial-slice lengths,
        part_factors (2, M, P) their stage factors; fp their F' when already at hand):
        Omega = V (F' o V^dag dH V) V^dag, so sum A o Omega = sum_ef dH_ef (V^* (F' o V^T A V^*) V^T)_ef."""
        n = len(delta)
        if fp is None:
            fp = _Spinning._f_prime(e, np.concatenate([delta, delta]))
        vt, vc = v.swapaxes(1, 2), v.conj()
        flat = gens.reshape(len(idx), -1)
        factor = (2 * np.pi * part_factors[:, :, idx]).transpose(0, 2, 1)               # (2, R, M)
        if real:
            # real V and G: sum G o conj(zb) = sum G o V (conj(F') o V^T B V) V^T, one back-transform:
            # z = V (Re F' o V^T (A + B) V + i Im F' o V^T (A - B) V) V^T, all in real products
            x = np.stack([a.real + b.real, a.imag + b.imag, a.real - b.real, a.imag - b.imag])
            x = np.matmul(np.matmul(vt, x), v)
            y = np.stack([fp.real * x[0] - fp.imag * x[3], fp.real * x[1] + fp.imag * x[2]])
            z = np.matmul(np.matmul(v, y), vt).reshape(2 * len(e), -1)
            out = flat @ z.T
            out = out[:, :len(e)] + 1j * out[:, len(e):]
        else:
            za = vc @ (fp * (vt @ a @ vc)) @ vt
            zb = vc @ (fp * (vt @ b.conj() @ vc)) @ vt
            out = flat @ za.reshape(len(za), -1).T + (flat @ zb.reshape(len(zb), -1).T).conj()
        return factor[0] * out[:, :n] + factor[1] * out[:, n:]


def _left(o, m, real):
    """o @ m over the axis after the sector axis of a complex stack m (G, d, ...), o (G, d, d): one real
    product per sector where o is real."""
    g, d = m.shape[0], m.shape[1]
    if not real:
        return (o @ m.reshape(g, d, -1)).reshape(m.shape)
    return (o @ m.view(np.float64).reshape(g, d, -1)).view(complex).reshape(m.shape)


def _pair(dm, ca, cb):
    """sum_ab dM o A + conj(dM) o B: dm (R, d, d) and ca, cb (M, d, d) -> (R, M)."""
    flat = dm.reshape(len(dm), -1)
    return flat @ ca.reshape(len(ca), -1).T + flat.conj() @ cb.reshape(len(cb), -1).T


def _slices(engine, k):
    return k if k is not None else getattr(engine, "spinning_slices_per_period", None)


@blas_limited
def period_propagators(engine, experiment, free_values_hz=None, slices_per_period=None) -> list:
    """One rotor period's propagator U_R (the Floquet operator) per magnetisation sector in use.

    The same fourth-order slices as the signal (module docstring): U_R = P_2K, the product of the 2K
    stage exponentials of one period, so U(q T_R) = U_R^q.

    Returns:
        list of (basis indices of the sector (int array), U_R (d, d) complex), sectors in the engine's order.
    """
    sf = spinning_factors(engine.model, experiment)
    run = _Spinning(engine, experiment, np.array([sf.period_s]), free_values_hz,
                    _slices(engine, slices_per_period), 0)
    return [(engine.sectors[s], run.prop[s][1][0]) for s in run.sectors]


@blas_limited
def spinning_signal(engine, experiment, t, free_values_hz=None, slices_per_period=None) -> np.ndarray:
    """S(t) of a spinning experiment (module docstring), complex (T,)."""
    run = _Spinning(engine, experiment, np.asarray(t, float), free_values_hz, _slices(engine, slices_per_period), 0)
    return run.signal()


@blas_limited
def spinning_gradient(engine, experiment, t, free_values_hz, rows, slices_per_period=None):
    """(S (T,), dS/dh (len(rows), T)) of a spinning experiment; rows: (full parameter index, unused scale)."""
    t = np.asarray(t, float)
    run = _Spinning(engine, experiment, t, free_values_hz, _slices(engine, slices_per_period), len(rows))
    grad = np.zeros((len(rows), t.size), complex)
    if not rows:
        return run.signal(), grad
    signal = np.zeros(t.size, complex)
    cm = run.contraction_matrices(trace_out=signal)
    bar = FractionProgress(f"spinning gradient '{experiment.name}', sectors")
    done = 0
    for group in run._groups():
        grad += run.group_gradient(group, rows, [cm[s] for s in group])
        done += len(group)
        bar(done / len(run.sectors))
    bar.close()
    return signal / engine.norm, grad / engine.norm
