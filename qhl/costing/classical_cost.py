"""Classical-cost meter: memory and time that exact classical simulation of a cluster would need.

Two routes, each costed from rates measured once per process on the running machine (small
calls, cached) and the known scaling of the method:

* 'eigendecomposition' (the exact engine, qhl.exact.engine): a dense eigh of every
  magnetisation sector and two products per coupled sector pair,
      seconds = c_eigh * sum_s d_s^3 + c_gemm * sum_(s,p) 2 d_s d_p (d_s + d_p),
  memory = qhl.exact.engine.estimate_memory_bytes (the engine's own model; sum d^2 scaling).
* 'pure-state' (the typical engine, qhl.exact.typicality): sparse Chebyshev propagation of
  random states, each sector once (the engine's one-propagation scheme, psi = sqrt(rho0+) r),
      seconds = sum_windows (c_fixed + c_term * C_w) * K_w * sum_s nnz_s
                + c_build * sum_s nnz_s,
  with M = replicas vectors: C_w = M real columns in the first window (real +-1 start vectors
  stay real until the first restart) and 2M in later ones (complex states), K_w Chebyshev terms
  of window w (qhl.exact.chebyshev.chebyshev_terms, signal cut, over the engine's time windows:
  its window_bytes="auto" rule, one window when half the free memory holds it; spectral
  half-width w = rho * sum_P |c_P|, rho measured by Lanczos on a sub-cluster of at most 12
  spins of this cluster), nnz per sector from the fraction of rows on which each flip-flop pair
  stays in the sector; memory = qhl.exact.typicality.pair_memory_bytes of the largest sector
  pair plus the start states (2^n x M doubles) and, with several windows, every sector's restart
  state (2^n x 2M doubles). The engine's defaults are modelled: double precision, one core (precision="single" was
  measured 1.3-1.5x faster at 18-20 spins; threads help on idle cores only).
  This route gives estimates with a statistical error (about 2^(-n/2) / sqrt(replicas)).

Assumptions (stated with every result): one node as fast as this machine's measured rates;
sectors counted as for one isotope with the cluster's observed spins (heteronuclear clusters
have smaller sectors, so the estimate is an upper bound for them); one signal of the cluster's
costliest experiment (a gradient multiplies the pure-state time by about 1 + P).
'feasible_here': the route fits this machine's memory and engine limits and takes at most a day.

The crossover size: the smallest n at which both routes exceed a day or 1 TiB, for a
hypothetical cluster with this cluster's couplings per spin (flip-flop pairs per spin) and
spectral half-width per spin (both extensive in n): the size from which a quantum computer is
needed for exact simulation.
"""

from dataclasses import dataclass, field
from math import comb
import time

import numpy as np

__all__ = ["ClassicalCost", "Calibration", "calibrate", "classical_cost", "route_costs", "crossover_spins",
           "beyond_reach", "DAY_S", "TIB"]

DAY_S = 86400.0
TIB = 2.0**40
_CACHE = {}


@dataclass(frozen=True)
class Calibration:
    """Rates measured on this machine (seconds per unit of work)."""

    c_eigh: float        # s per d^3 of a dense symmetric eigh
    c_gemm: float        # s per d^3 of a dense matrix product
    c_term: float        # s per (nonzero x real column) of one Chebyshev term, accumulation included
    c_build: float       # s per nonzero of building a sector Hamiltonian
    c_term_fixed: float = 0.0   # s per nonzero of one Chebyshev term, independent of the columns

    def term_seconds(self, nnz: float, real_columns: int) -> float:
        """Seconds of one Chebyshev term on `nnz` nonzeros with `real_columns` vectors."""
        return nnz * (self.c_term_fixed + self.c_term * real_columns)


def _median_time(fun, repeats=3):
    out = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fun()
        out.append(time.perf_counter() - t0)
    return float(np.median(out))


def calibrate(force: bool = False) -> Calibration:
    """Measure the rates once per process (about 1-2 s): dense eigh and product at d = 600, and
    a 16-spin sector Hamiltonian (invented all-to-all couplings) built and propagated with 4 and
    8 real columns (cost per term = nnz (c_fixed + c_term columns))."""
    if "cal" in _CACHE and not force:
        return _CACHE["cal"]
    import scipy.linalg as sla
    from qiskit.quantum_info import SparsePauliOp

    from ..base.blas import single_thread_blas
    from ..exact.chebyshev import chebyshev_window
    from ..exact.sector_operators import SectorSpace, pauli_groups, sector_matrix

    rng = np.random.default_rng(0)
    d = 600
    a = rng.standard_normal((d, d))
    a = a + a.T
    with single_thread_blas(0):
        c_eigh = _median_time(lambda: sla.eigh(a, driver="evd")) / d**3
        c_gemm = _median_time(lambda: a @ a) / d**3
        n = 16
        terms = []
        for i in range(n):
            terms.append(("Z", [i], rng.normal() * 1e3))
            for j in range(i + 1, n):
                c = rng.normal() * 1e4 / (1 + abs(i - j)) ** 1.5
                terms += [("ZZ", [i, j], c), ("XX", [i, j], -c / 2), ("YY", [i, j], -c / 2)]
        op = SparsePauliOp.from_sparse_list(terms, num_qubits=n)
        space = SectorSpace(("1H",) * n)
        t0 = time.perf_counter()
        mat = sector_matrix(space, n // 2, pauli_groups(op))
        c_build = (time.perf_counter() - t0) / mat.nnz
        hw = float(np.abs(op.coeffs).sum())
        taus = np.linspace(0, 40.0 / hw, 16)
        from ..exact.chebyshev import chebyshev_terms
        k = chebyshev_terms(hw * taus[-1], 1e-10)
        per = {}
        for cols in (4, 8):
            x0 = rng.standard_normal((mat.shape[0], cols))
            dt = _median_time(lambda: chebyshev_window(lambda y: mat @ y, x0, taus, -hw, hw, 1e-10), 2)
            per[cols] = dt / (k * mat.nnz)
        c_term = max((per[8] - per[4]) / 4, 0.0)
        c_fixed = max(per[4] - 4 * c_term, 0.0)
    cal = Calibration(c_eigh, c_gemm, c_term, c_build, c_fixed)
    _CACHE["cal"] = cal
    return cal


@dataclass
class ClassicalCost:
    """The best classical route for one cluster, the alternatives, and the crossover size.

    Attributes:
        method: 'eigendecomposition' or 'pure-state'.
        memory_bytes, seconds: of the best route (estimates).
        feasible_here: the best route fits this machine's memory (and the engine's spin limit) and
            takes at most a day here.
        routes: one dict per route: method, memory_bytes, seconds, feasible_here.
        crossover_spins: smallest n at which both routes exceed a day or 1 TiB (None above 80).
        couplings_per_spin: flip-flop pairs per spin of this cluster.
        half_width_per_spin: spectral half-width per spin (rad/s) used for the crossover.
        time_grid: (t_max_s, points) of the costed signal.
        assumptions: list of str.
    """

    method: str
    memory_bytes: float
    seconds: float
    feasible_here: bool
    routes: list
    crossover_spins: int | None
    couplings_per_spin: float
    half_width_per_spin: float = 0.0
    time_grid: tuple = (5e-4, 128)
    assumptions: list = field(default_factory=list)

    def to_json(self) -> dict:
        return {"method": self.method, "memory_bytes": self.memory_bytes, "seconds": self.seconds,
                "feasible_here": self.feasible_here, "routes": self.routes,
                "crossover_spins": self.crossover_spins, "couplings_per_spin": self.couplings_per_spin,
                "half_width_per_spin_rad_s": self.half_width_per_spin, "assumptions": self.assumptions}


def _sector_dims(n):
    return [float(comb(n, k)) for k in range(n + 1)]


def _nnz(n, k, flip_pairs):
    """Nonzeros of sector k (k spins down of n) with `flip_pairs` flip-flop pairs."""
    d = float(comb(n, k))
    frac = 2.0 * k * (n - k) / (n * (n - 1)) if n > 1 else 0.0
    return d * (1.0 + flip_pairs * frac)


def route_costs(n, flip_pairs, half_width, t_max, n_times, n_obs=None, replicas=4, cal=None,
                tol=1e-10) -> list:
    """[eigendecomposition dict, pure-state dict] for an n-spin, one-isotope cluster model.

    Args:
        flip_pairs: pairs with a flip-flop term (homonuclear dipolar or J).
        half_width: spectral half-width of H (rad/s) for the Chebyshev term count.
        t_max, n_times: the signal's time grid (linspace(0, t_max, n_times)).
    """
    from ..base.memory import available_memory_bytes
    from ..exact.chebyshev import chebyshev_terms
    from ..exact.engine import _MAX_SPINS, estimate_memory_bytes
    from ..exact.typicality import (MAX_TYPICAL_SPINS, WINDOW_BYTES, pair_memory_bytes, window_candidates,
                                    window_points)

    cal = cal or calibrate()
    n_obs = n if n_obs is None else n_obs
    avail = 0.8 * available_memory_bytes()
    dims = _sector_dims(n)
    pairs = [(k, k - 1) for k in range(1, n + 1)]          # I+ removes one down spin
    eig_s = cal.c_eigh * sum(d**3 for d in dims) + cal.c_gemm * sum(
        2 * dims[s] * dims[p] * (dims[s] + dims[p]) for s, p in pairs)
    eig_m = float(estimate_memory_bytes(n, np.array(dims), n_times))
    eig = {"method": "eigendecomposition", "memory_bytes": eig_m, "seconds": eig_s,
           "feasible_here": bool(eig_m <= avail and n <= _MAX_SPINS and eig_s <= DAY_S)}
    nnz = [_nnz(n, k, flip_pairs) for k in range(n + 1)]
    m = replicas
    dmax = max(dims[s] + dims[p] for s, p in pairs)

    def pure_memory(wb):
        out = max(pair_memory_bytes(dims[s], dims[p], nnz[s], nnz[p], n_obs, replicas, n_times, window_bytes=wb)
                  for s, p in pairs) + 8.0 * 2**n
        store = 16.0 * m * 2**n if window_points(dmax, m, n_times, wb) < n_times else 0.0
        return max(out + 8.0 * m * 2**n + store, 32.0 * 2**n)

    # the engine's window_bytes="auto" rule: the first candidate that fits half the free memory
    wb = next((b for b in window_candidates(dmax, m, n_times) if pure_memory(b) <= 0.5 * avail / 0.8),
              WINDOW_BYTES)
    w = window_points(dmax, m, n_times, wb)
    t = np.linspace(0.0, t_max, n_times)
    work = sum(nnz)                                # each sector propagated once
    ps_s, tc = cal.c_build * sum(nnz), 0.0
    for start in range(0, n_times, w):
        seg = t[start:start + w]
        cols = m if start == 0 else 2 * m          # real start vectors until the first restart
        ps_s += cal.term_seconds(work, cols) * chebyshev_terms(half_width * (seg[-1] - tc), tol, False)
        tc = seg[-1]
    ps_m = pure_memory(wb)
    ps = {"method": "pure-state", "memory_bytes": ps_m, "seconds": ps_s,
          "feasible_here": bool(ps_m <= avail and n <= MAX_TYPICAL_SPINS and ps_s <= DAY_S)}
    return [eig, ps]


def _flip_pairs(model):
    """Distinct spin pairs with a flip-flop (XX + YY) term."""
    out = set()
    for p in model.parameters:
        if p.kind in ("dipolar", "j") and p.value_hz != 0:
            labels = p.generator.paulis.to_labels()
            if any("X" in lab for lab in labels):
                out.add(frozenset(p.spins))
    return len(out)


def _width_ratio(model, experiment):
    """rho = (Lanczos half-width of the central sector) / sum_P |c_P| on <= 12 spins of the cluster."""
    from dataclasses import replace as dc_replace

    from ..exact.chebyshev import lanczos_bounds
    from ..exact.sector_operators import SectorSpace, pauli_groups, sector_matrix
    from ..exact.sectors import conserves_magnetisation
    n = model.n_spins
    keep = list(range(min(n, 12)))
    if n > 12:
        names = set(model.labels[i] for i in keep)
        params = tuple(p for p in model.parameters if set(p.spins) <= names)
        sub = dc_replace(model, labels=model.labels[:12], isotopes=model.isotopes[:12],
                         observed=model.observed[:12], parameters=_restrict(params, 12), free=())
    else:
        sub = model
    h = sub.hamiltonian(experiment)
    total = float(np.abs(h.coeffs).sum())
    if total == 0:
        return 0.35
    sym = conserves_magnetisation([p.generator for p in sub.parameters], sub.isotopes)
    space = SectorSpace(sub.isotopes, sym)
    k = int(np.argmax(space.dims))
    lo, hi = lanczos_bounds(sector_matrix(space, k, pauli_groups(h)))
    return 0.5 * (hi - lo) / total


def _restrict(params, n):
    """Parameters whose generators act on the first n qubits only, cut to n qubits."""
    from dataclasses import replace as dc_replace
    from qiskit.quantum_info import SparsePauliOp
    out = []
    for p in params:
        labels = p.generator.paulis.to_labels()
        cut = [lab[-n:] for lab in labels]
        out.append(dc_replace(p, generator=SparsePauliOp(cut, p.generator.coeffs)))
    return tuple(out)


def classical_cost(cluster, replicas: int = 4, n_times: int | None = None, cal=None) -> ClassicalCost:
    """Memory and time of exact classical simulation of one signal of `cluster`.

    Args:
        cluster: a Cluster; its costliest experiment (largest sum |c_P| x t_max) gives t_max and
            points (no experiments: 5e-4 s, 128 points).
        replicas: random states for the pure-state route.
        n_times: time points (default: the longest experiment's).

    Returns:
        ClassicalCost (estimates: measured rates times the method's scaling).

    Example:
        >>> from qhl import demo_cluster
        >>> cost = classical_cost(demo_cluster()); cost.method in ("eigendecomposition", "pure-state")
        True
    """
    from ..spins.model import build_model
    cal = cal or calibrate()
    model = build_model(cluster, free=())
    n = model.n_spins
    exps = list(cluster.experiments)
    sums = [float(np.abs(model.hamiltonian(e).coeffs).sum()) for e in exps]
    j = int(np.argmax([s * e.t_max_s for s, e in zip(sums, exps)])) if exps else None
    ex = exps[j] if exps else None
    t_max = ex.t_max_s if ex else 5e-4
    points = n_times or (ex.points if ex else 128)
    sum_c = sums[j] if exps else float(np.abs(model.hamiltonian(None).coeffs).sum())
    rho = _width_ratio(model, ex)
    flips = _flip_pairs(model)
    n_obs = sum(model.observed)
    routes = route_costs(n, flips, rho * sum_c, t_max, points, n_obs, replicas, cal)
    here = [r for r in routes if r["feasible_here"]]
    best = min(here or routes, key=lambda r: r["seconds"])
    per_spin = 2.0 * flips / n
    width_per_spin = rho * sum_c / n
    cross = crossover_spins(per_spin, width_per_spin, t_max, points, replicas, cal)
    assumptions = [
        "rates measured on this machine once per process (dense eigh and product at d = 600; a 16-spin "
        "sector Hamiltonian built and propagated); one node as fast as this machine",
        "the calibration sector fits in cache: larger sectors run slower (measured 3.0x at 18 spins, "
        "benchmarks/bench_typical.py), so pure-state times above 16 spins are optimistic",
        (f"one signal of the costliest experiment ({ex.name}, {t_max:g} s, {points} points)" if ex else
         f"one signal of a default acquisition ({t_max:g} s, {points} points: the cluster defines no experiments)")
        + "; a gradient multiplies the pure-state time by about 1 + P",
        "sectors of one isotope (an upper bound for heteronuclear clusters)",
        f"spectral half-width = {rho:.3f} x sum |Pauli coefficients| (Lanczos on <= 12 spins of this cluster)",
        f"pure-state route: {replicas} random states per sector pair; estimates with a statistical error",
        f"crossover: both routes above a day or 1 TiB, at {per_spin:.2f} flip-flop couplings per spin",
    ]
    return ClassicalCost(best["method"], best["memory_bytes"], best["seconds"], best["feasible_here"],
                         routes, cross, per_spin, width_per_spin, (t_max, points), assumptions)


def beyond_reach(routes) -> bool:
    """True when every route needs more than a day or more than 1 TiB."""
    return all(r["seconds"] > DAY_S or r["memory_bytes"] > TIB for r in routes)


def crossover_spins(couplings_per_spin, half_width_per_spin, t_max, points, replicas=4, cal=None,
                    largest: int = 80):
    """Smallest n (4..largest) of a hypothetical one-isotope cluster with these densities at which
    both routes exceed a day or 1 TiB; None if none does."""
    cal = cal or calibrate()
    for m in range(4, largest + 1):
        fp = min(couplings_per_spin * m / 2.0, m * (m - 1) / 2.0)
        if beyond_reach(route_costs(m, fp, half_width_per_spin * m, t_max, points, m, replicas, cal)):
            return m
    return None
