"""Learnability and ergodicity diagnostics of one cluster at one dipolar scale.

Learnability (from the Fisher information F of one FID, qhl.exact.likelihood):
    eigenvalues and eigenvectors of F (1/Hz^2); Cramer-Rao bounds sqrt(diag F^-1) (Hz);
    participation ratio of a unit eigenvector v over the P parameters
        PR(v) = 1 / sum_n v_n^4,   1 (one parameter: local) ... P (all equally: global).

Ergodicity of H = 2 pi sum_n s_n h_n G_n (qhl.spins.model) at the given dipolar scale:
    mean ratio of consecutive level spacings (Oganesyan and Huse, PRB 75, 155111 (2007);
    Atas, Bogomolny, Giraud, Roux, PRL 110, 084101 (2013)): with sorted levels E and spacings
    s_k = E_{k+1} - E_k,  r_k = min(s_k, s_{k+1}) / max(s_k, s_{k+1});  <r> = mean over k.
    Poisson levels give 2 ln 2 - 1 = 0.3863, the Gaussian orthogonal ensemble 0.5307.
    Levels are taken per conserved magnetisation sector (qhl.exact.sectors); when H also commutes
    with the global spin flip X...X (all offsets zero), sectors mapped onto themselves are
    split further into the flip-even and flip-odd parts. Other symmetries (point groups of a
    symmetric cluster) are not resolved. Pairs of spacings that are both degenerate (below
    qhl.exact.engine.DEGENERACY_RTOL of the largest |E|) give no ratio.
    Inverse participation ratio of a normalised state psi in the computational basis
        IPR = sum_k |psi_k|^4,   D2 = -log(IPR) / log(N)
    with N the dimension of the state's sector (a basis state: IPR 1, D2 0; fully spread: D2 1).
    At finite N even a structureless state has D2 < 1: a random real unit vector (a GOE
    eigenvector) has <IPR> = 3/(N+2), so D2_GOE(N) = ln((N+2)/3)/ln N = 1 - ln 3/ln N + O(1/N)
    (0.748 at N = 70). D2 is therefore reported beside D2_GOE at the same N (`d2_random`); only
    D2 below D2_GOE at the same N points to non-ergodic (multifractal) eigenstates.

Spinning samples (H(t) periodic with the rotor period T_R): the levels are the quasi-energies of
the Floquet operator U_R = U(T_R) (qhl.exact.spinning_engine.period_propagators), the phases
phi_a of its eigenvalues exp(-i phi_a), per sector (flip-split as above). Phases live on a circle:
the spacings are taken cyclically (the last one wraps through 2 pi). The random-matrix reference
is the circular ensemble of the drive's symmetry class: H(t) real at every t, but the rotor factors
s_n(t) of different pairs peak at different times, so no time t0 with H(t0 + t) = H(t0 - t) exists
in general and U_R has no antiunitary symmetry: the circular unitary ensemble, whose <r> equals the
GUE value 0.5996 at large N (Atas et al. 2013; L. D'Alessio and M. Rigol, Phys. Rev. X 4, 041048
(2014), for periodically driven systems, from memory). The eigenvectors of U_R are complex: a
random complex unit vector has <IPR> = 2/(N+1) (the fourth moment of a Haar vector; common
practice), so D2_CUE(N) = ln((N+1)/2)/ln N is the reference there.

Multiple-pulse cycles (`diagnose_cycle`): the levels are the quasi-energy phases of the cycle
propagator U_c (qhl.exact.stroboscopic.cycle_propagator), the Fisher information that of the
signal sampled once per cycle (qhl.exact.stroboscopic.stroboscopic_gradient). The pulses mix the
pulsed isotope's magnetisation sectors, so the levels are resolved only by the total Iz of each
isotope that no pulse touches (conserved by the secular H and by the pulses); other symmetries are
not resolved. Reference: the circular unitary ensemble (<r> = GUE 0.5996, D2_CUE): the toggling-frame
Hamiltonians of a cycle contain Iy terms (complex in the Zeeman basis), so no antiunitary symmetry is
assumed (an assumption; a cycle with one would follow the circular orthogonal ensemble instead).
"""

from dataclasses import dataclass, replace
import math
import time

import numpy as np
from qiskit.quantum_info import SparsePauliOp

from ..spins.cluster import Cluster, Experiment, check_experiment
from ..spins.spinning import MAGIC_ANGLE_DEG
from ..exact.engine import ExactEngine
from ..exact.likelihood import cramer_rao_bounds, fisher_information
from ..spins.model import DEFAULT_FREE, build_model

__all__ = ["POISSON_MEAN_R", "GOE_MEAN_R", "GUE_MEAN_R", "participation_ratio", "circular_spacing_ratios",
           "floquet_sector_levels", "random_complex_vector_d2", "inverse_participation_ratio",
           "fractal_dimension_d2", "random_vector_d2", "spacing_ratios", "mean_spacing_ratio", "symmetry_sector_levels",
           "Diagnostics", "diagnose", "cycle_floquet_levels", "diagnose_cycle"]

# Atas, Bogomolny, Giraud, Roux, PRL 110, 084101 (2013): Poisson 2 ln 2 - 1, GOE 0.5307, GUE 0.5996 (large N).
POISSON_MEAN_R = 2 * math.log(2) - 1
GOE_MEAN_R = 0.5307
GUE_MEAN_R = 0.5996


def participation_ratio(vectors) -> np.ndarray:
    """PR = (sum |v|^2)^2 / sum |v|^4 of each column of `vectors` (1 ... len(column)).

    Example:
        >>> participation_ratio(np.eye(3)).tolist()
        [1.0, 1.0, 1.0]
        >>> float(participation_ratio(np.ones((4, 1)))[0])
        4.0
    """
    v = np.abs(np.asarray(vectors))
    if v.ndim == 1:
        v = v[:, None]
    w = v**2
    return np.sum(w, axis=0) ** 2 / np.sum(w**2, axis=0)


def inverse_participation_ratio(states) -> np.ndarray:
    """IPR = sum_k |psi_k|^4 / (sum_k |psi_k|^2)^2 of each column (a state) of `states`."""
    return 1.0 / participation_ratio(states)


def fractal_dimension_d2(ipr, dimension) -> np.ndarray:
    """D2 = -log(IPR) / log(N) for IPR values of states in dimension N > 1."""
    dimension = np.asarray(dimension, float)
    return -np.log(np.asarray(ipr, float)) / np.log(dimension)


def random_vector_d2(dimension) -> np.ndarray:
    """D2_GOE(N) = ln((N+2)/3)/ln N: D2 of the mean IPR 3/(N+2) of random real unit vectors in dimension N > 1.

    Example:
        >>> round(float(random_vector_d2(70)), 3)
        0.748
    """
    n = np.asarray(dimension, float)
    return np.log((n + 2) / 3) / np.log(n)


def random_complex_vector_d2(dimension) -> np.ndarray:
    """D2_CUE(N) = ln((N+1)/2)/ln N: D2 of the mean IPR 2/(N+1) of random complex unit vectors (N > 1).

    Example:
        >>> round(float(random_complex_vector_d2(70)), 3)
        0.84
    """
    n = np.asarray(dimension, float)
    return np.log((n + 1) / 2) / np.log(n)


def circular_spacing_ratios(phases, degeneracy_tol: float = 0.0) -> np.ndarray:
    """spacing_ratios of phases on the circle: sorted mod 2 pi, the last spacing wrapping through 2 pi
    (N phases give N ratios; fewer than 3 give none)."""
    ph = np.sort(np.mod(np.asarray(phases, float).ravel(), 2 * np.pi))
    if ph.size < 3:
        return np.zeros(0)
    ext = np.concatenate([ph, ph[:2] + 2 * np.pi])
    return spacing_ratios(ext, degeneracy_tol)


def spacing_ratios(levels, degeneracy_tol: float = 0.0) -> np.ndarray:
    """Ratios r_k = min(s_k, s_k+1) / max(s_k, s_k+1) of consecutive spacings of sorted `levels`.

    Pairs whose larger spacing is <= `degeneracy_tol` are skipped (no ratio for exact
    degeneracies). Fewer than 3 levels give an empty array.
    """
    e = np.sort(np.asarray(levels, float).ravel())
    if e.size < 3:
        return np.zeros(0)
    s = np.diff(e)
    a, b = s[:-1], s[1:]
    hi = np.maximum(a, b)
    keep = hi > degeneracy_tol
    return np.minimum(a, b)[keep] / hi[keep]


def mean_spacing_ratio(levels, degeneracy_tol: float = 0.0) -> float:
    """<r> of one set of levels (nan when no ratio exists); see spacing_ratios."""
    r = spacing_ratios(levels, degeneracy_tol)
    return float(np.mean(r)) if r.size else float("nan")


def _flip_symmetric(hamiltonian: SparsePauliOp) -> bool:
    n = hamiltonian.num_qubits
    flip = SparsePauliOp("X" * n)
    diff = (flip.compose(hamiltonian).compose(flip) - hamiltonian).simplify(atol=1e-9)
    scale = max(float(np.max(np.abs(hamiltonian.coeffs))), 1.0)
    return bool(np.all(np.abs(diff.coeffs) <= 1e-12 * scale))


def _flip_bases(ix, mask):
    """The flip-even and flip-odd bases (d, d/2) of a sector mapped onto itself by X...X, else None."""
    partner = ix ^ mask
    order = np.argsort(ix)
    j = order[np.clip(np.searchsorted(ix, partner, sorter=order), 0, len(ix) - 1)]
    if len(ix) < 2 or not np.array_equal(ix[j], partner):
        return None
    lo = np.flatnonzero(np.arange(len(ix)) < j)          # one index of each flip pair
    out = []
    for sign in (1.0, -1.0):
        basis = np.zeros((len(ix), len(lo)))
        basis[lo, np.arange(len(lo))] = 1 / np.sqrt(2)
        basis[j[lo], np.arange(len(lo))] += sign / np.sqrt(2)
        out.append(basis)
    return out


def floquet_sector_levels(engine: ExactEngine, experiment: Experiment, free_values_hz=None) -> list:
    """Quasi-energy phases and Floquet states of a spinning experiment (module docstring), per sector.

    Returns:
        list of (phases (d',) in [0, 2 pi), eigenvectors (d, d') in the sector's computational basis),
        one per resolved sector (flip-split where H(t) commutes with X...X at every time).
    """
    from ..exact.spinning_engine import period_propagators
    model = engine.model if free_values_hz is None else engine.model.with_values(free_values_hz)
    static = replace(experiment, spinning_hz=0.0)
    flip = _flip_symmetric(model.hamiltonian(static))      # s_n(t) multiplies flip-even dipolar terms only
    mask = (1 << engine.model.n_spins) - 1
    out = []
    for ix, u in period_propagators(engine, experiment, free_values_hz):
        bases = _flip_bases(ix, mask) if flip else None
        for basis in ([None] if bases is None else bases):
            w = u if basis is None else basis.T @ u @ basis
            lam, vec = np.linalg.eig(w)
            vec = vec if basis is None else basis @ vec
            out.append((np.mod(-np.angle(lam), 2 * np.pi), vec / np.linalg.norm(vec, axis=0)))
    return out


def symmetry_sector_levels(engine: ExactEngine, experiment: Experiment, free_values_hz=None) -> list:
    """Levels (rad/s) per symmetry sector: magnetisation sectors, flip-split where H allows.

    Returns:
        list of 1-D arrays of energies, one per resolved sector.
    """
    spec = engine.spectrum(experiment, free_values_hz)
    model = engine.model if free_values_hz is None else engine.model.with_values(free_values_hz)
    flip = _flip_symmetric(model.hamiltonian(experiment))
    mask = (1 << engine.model.n_spins) - 1
    out = []
    for ix, e, v in zip(engine.sectors, spec.energies, spec.vectors):
        bases = _flip_bases(ix, mask) if flip else None
        if bases is None:
            out.append(np.asarray(e))
            continue
        h = (v * e[None, :]) @ v.conj().T                    # the sector block of H
        for basis in bases:
            out.append(np.linalg.eigvalsh(basis.T @ h @ basis))
    return out


@dataclass(frozen=True)
class Diagnostics:
    """Diagnostics of one (cluster, dipolar_scale).

    Attributes:
        fisher_eigenvalues: ascending (1/Hz^2); fisher_eigenvectors: columns over `free`.
        fisher_participation: PR of each eigenvector (1 ... P).
        crb_hz: Cramer-Rao bound per free parameter (inf where unlearnable).
        unlearnable: mask of eigenvectors below the rcond cut (qhl.exact.likelihood.cramer_rao_bounds).
        sector_mean_r: <r> per resolved symmetry sector (nan for sectors without a ratio).
        mean_r: <r> over all ratios of all sectors pooled; n_ratios: how many.
        ipr, d2: per eigenstate (states of 1-dimensional sectors are left out of d2).
        d2_random: D2_GOE of a random real vector at each d2 state's sector dimension (D2_CUE of a random
            complex vector for Floquet states).
        spinning_hz: the rotor rate (0: static); level_kind: 'eigenvalues of H' or 'Floquet quasi-energies';
        mean_r_random: the random-matrix <r> of that kind (GOE 0.5307 or CUE = GUE 0.5996).
    """

    cluster: str
    n_spins: int
    dipolar_scale: float
    free: tuple
    fisher_eigenvalues: np.ndarray
    fisher_eigenvectors: np.ndarray
    fisher_participation: np.ndarray
    crb_hz: np.ndarray
    unlearnable: np.ndarray
    sector_mean_r: np.ndarray
    mean_r: float
    n_ratios: int
    ipr: np.ndarray
    d2: np.ndarray
    seconds: float
    d2_random: np.ndarray = None
    spinning_hz: float = 0.0
    level_kind: str = "eigenvalues of H"
    mean_r_random: float = GOE_MEAN_R

    @property
    def median_crb_hz(self) -> float:
        return float(np.median(self.crb_hz)) if self.crb_hz.size else float("nan")

    def summary(self) -> dict:
        """Scalars and short lists for one results row (lists as tuples of floats)."""
        ev = self.fisher_eigenvalues
        soft = self.fisher_participation[0] if ev.size else float("nan")
        return {
            "n_free": len(self.free),
            "fisher_min_eigenvalue": float(ev[0]) if ev.size else float("nan"),
            "fisher_max_eigenvalue": float(ev[-1]) if ev.size else float("nan"),
            "n_unlearnable": int(np.sum(self.unlearnable)),
            "median_crb_hz": self.median_crb_hz,
            "softest_participation": float(soft),
            "mean_participation": float(np.mean(self.fisher_participation)) if ev.size else float("nan"),
            "mean_r": self.mean_r,
            "n_ratios": self.n_ratios,
            "mean_ipr": float(np.mean(self.ipr)),
            "mean_d2": float(np.mean(self.d2)) if self.d2.size else float("nan"),
            "mean_d2_random": float(np.mean(self.d2_random)) if self.d2_random is not None and self.d2_random.size
            else float("nan"),
            "level_kind": self.level_kind,
            "mean_r_random": self.mean_r_random,
            "fisher_eigenvalues": tuple(float(x) for x in ev),
            "fisher_participation": tuple(float(x) for x in self.fisher_participation),
            "sector_mean_r": tuple(float(x) for x in self.sector_mean_r),
        }


def diagnose(cluster: Cluster, dipolar_scale: float, *, t_max_s: float = 5e-4, points: int = 64,
             noise: float = 1e-3, free=DEFAULT_FREE, spinning_hz: float = 0.0,
             spinning_angle_deg: float = MAGIC_ANGLE_DEG) -> Diagnostics:
    """Fisher spectrum, level statistics and eigenstate spreading of `cluster` at `dipolar_scale`.

    The Fisher information is that of one FID, points equally spaced on [0, t_max_s], with
    noise `noise` per Re/Im part (relative to S(0) = 1), at the cluster's own parameter values;
    the cluster's experiments are not used. With spinning_hz > 0 the sample spins (the exact
    spinning engine gives the Fisher information) and the levels are the Floquet quasi-energies of
    one rotor period (module docstring).

    Args:
        cluster: the spin cluster.
        dipolar_scale: factor on every dipolar term (0 = fully decoupled).
        t_max_s, points, noise: the FID.
        free: glob patterns of the free parameters.
        spinning_hz, spinning_angle_deg: the rotor (0: static).

    Returns:
        Diagnostics.

    Raises:
        QhlInputError: a pattern matching no parameter, or a cluster too large for memory.

    Example:
        >>> from qhl import demo_cluster
        >>> d = diagnose(demo_cluster(), 0.5)
        >>> d.n_spins, len(d.free), bool(0 < d.mean_r < 1)
        (6, 21, True)
    """
    start = time.perf_counter()
    model = build_model(cluster).with_free(free)
    engine = ExactEngine(model)
    ex = Experiment(name="scan", t_max_s=float(t_max_s), points=int(points), dipolar_scale=float(dipolar_scale),
                    noise=float(noise), spinning_hz=float(spinning_hz), spinning_angle_deg=float(spinning_angle_deg))
    check_experiment(ex, "diagnose")
    fisher = fisher_information(engine, [ex])
    crb, evals, evecs, bad = cramer_rao_bounds(fisher)
    if ex.spinning_hz > 0:
        return _floquet_diagnostics(cluster, engine, ex, model, evals, evecs, crb, bad, start)
    spec = engine.spectrum(ex)
    tol = spec.tol
    levels = symmetry_sector_levels(engine, ex)
    ratios = [spacing_ratios(e, tol) for e in levels]
    sector_r = np.array([float(np.mean(r)) if r.size else np.nan for r in ratios])
    pooled = np.concatenate(ratios) if ratios else np.zeros(0)
    ipr, d2, d2_random = [], [], []
    for v in spec.vectors:
        q = inverse_participation_ratio(v)
        ipr.append(q)
        if v.shape[0] > 1:
            d2.append(fractal_dimension_d2(q, v.shape[0]))
            d2_random.append(np.full(q.shape, random_vector_d2(v.shape[0])))
    return Diagnostics(
        cluster=cluster.name, n_spins=cluster.n_spins, dipolar_scale=float(dipolar_scale), free=model.free,
        fisher_eigenvalues=evals, fisher_eigenvectors=evecs, fisher_participation=participation_ratio(evecs),
        crb_hz=crb, unlearnable=bad, sector_mean_r=sector_r,
        mean_r=float(np.mean(pooled)) if pooled.size else float("nan"), n_ratios=int(pooled.size),
        ipr=np.concatenate(ipr), d2=np.concatenate(d2) if d2 else np.zeros(0),
        seconds=time.perf_counter() - start, d2_random=np.concatenate(d2_random) if d2_random else np.zeros(0))


FLOQUET_DEGENERACY = 1e-10        # rad: phase spacings below this count as degenerate (no ratio)


def _unitary_level_statistics(levels) -> dict:
    """Diagnostics fields from (eigenphases, eigenvectors) per sector of a unitary: cyclic spacing
    ratios per sector and pooled, IPR and D2 of the eigenvectors beside the random-vector D2."""
    ratios = [circular_spacing_ratios(ph, FLOQUET_DEGENERACY) for ph, _ in levels]
    pooled = np.concatenate(ratios) if ratios else np.zeros(0)
    ipr, d2, d2_random = [], [], []
    for _, v in levels:
        q = inverse_participation_ratio(v)
        ipr.append(q)
        if v.shape[0] > 1:
            d2.append(fractal_dimension_d2(q, v.shape[0]))
            d2_random.append(np.full(q.shape, random_complex_vector_d2(v.shape[0])))
    return dict(sector_mean_r=np.array([float(np.mean(r)) if r.size else np.nan for r in ratios]),
                mean_r=float(np.mean(pooled)) if pooled.size else float("nan"), n_ratios=int(pooled.size),
                ipr=np.concatenate(ipr), d2=np.concatenate(d2) if d2 else np.zeros(0),
                d2_random=np.concatenate(d2_random) if d2_random else np.zeros(0))


def _floquet_diagnostics(cluster, engine, ex, model, evals, evecs, crb, bad, start):
    """Diagnostics of a spinning experiment: level statistics of the Floquet quasi-energies."""
    levels = floquet_sector_levels(engine, ex)
    stats = _unitary_level_statistics(levels)
    return Diagnostics(
        cluster=cluster.name, n_spins=cluster.n_spins, dipolar_scale=float(ex.dipolar_scale), free=model.free,
        fisher_eigenvalues=evals, fisher_eigenvectors=evecs, fisher_participation=participation_ratio(evecs),
        crb_hz=crb, unlearnable=bad, seconds=time.perf_counter() - start, **stats,
        spinning_hz=float(ex.spinning_hz), level_kind="Floquet quasi-energies", mean_r_random=GUE_MEAN_R)


def _unpulsed_sector_labels(model, cycle) -> np.ndarray:
    """Per computational basis index: the tuple (as one integer) of total Iz of each isotope no pulse of
    `cycle` touches (isotope None: the observed spins)."""
    from ..spins.cluster import Block, Pulse, flat_steps
    n = model.n_spins
    steps = flat_steps(cycle.steps if isinstance(cycle, Block) else tuple(cycle))
    pulsed = set()
    for st in steps:
        if isinstance(st, Pulse):
            pulsed |= ({i for i, o in enumerate(model.observed) if o} if st.isotope is None else
                       {i for i, iso in enumerate(model.isotopes) if iso == st.isotope})
    idx = np.arange(2**n)
    label = np.zeros(2**n, np.int64)
    for iso in sorted(set(model.isotopes)):
        qubits = [i for i, s in enumerate(model.isotopes) if s == iso]
        if any(q in pulsed for q in qubits):
            continue
        count = sum((idx >> q) & 1 for q in qubits)
        label = label * (n + 1) + count
    return label


def cycle_floquet_levels(engine: ExactEngine, cycle, dipolar_scale: float = 1.0, free_values_hz=None) -> list:
    """Quasi-energy phases and Floquet states of one multiple-pulse cycle, per resolved sector (module docstring).

    Returns:
        list of (phases (d,) in [0, 2 pi), eigenvectors (d, d) in the sector's computational basis).
    """
    from ..exact.stroboscopic import cycle_propagator
    u = cycle_propagator(engine, cycle, dipolar_scale, free_values_hz)
    label = _unpulsed_sector_labels(engine.model, cycle)
    out = []
    for lab in np.unique(label):
        ix = np.flatnonzero(label == lab)
        lam, vec = np.linalg.eig(u[np.ix_(ix, ix)])
        out.append((np.mod(-np.angle(lam), 2 * np.pi), vec / np.linalg.norm(vec, axis=0)))
    return out


def diagnose_cycle(cluster: Cluster, cycle, cycles: int, *, dipolar_scale: float = 1.0, noise: float = 1e-3,
                   free=DEFAULT_FREE) -> Diagnostics:
    """Fisher spectrum of the signal sampled at the ends of cycles 1 ... `cycles` of `cycle` (noise `noise` per
    Re/Im part of each sample, relative to S(0) = 1), and the level statistics and state spreading of the cycle
    propagator's quasi-energies (module docstring).

    Args:
        cluster: the spin cluster (its experiments are not used).
        cycle: one cycle (qhl.spins.cluster.Block or tuple of steps; ideal pulses), e.g.
            qhl.spins.sequences.named_block.
        cycles: samples K >= 1, one per cycle.
        dipolar_scale, noise, free: as diagnose.

    Returns:
        Diagnostics with level_kind 'Floquet quasi-energies of one cycle' (mean_r_random GUE 0.5996).
    """
    from ..exact.stroboscopic import stroboscopic_gradient
    start = time.perf_counter()
    checked = Experiment(name="cycle", t_max_s=1.0, points=2, noise=float(noise), dipolar_scale=float(dipolar_scale))
    check_experiment(checked, "diagnose")
    model = build_model(cluster).with_free(free)
    engine = ExactEngine(model)
    _, g = stroboscopic_gradient(engine, cycle, cycles, dipolar_scale)
    fisher = np.real(np.conj(g) @ g.T) / float(noise) ** 2
    fisher = 0.5 * (fisher + fisher.T)
    crb, evals, evecs, bad = cramer_rao_bounds(fisher)
    levels = cycle_floquet_levels(engine, cycle, dipolar_scale)
    stats = _unitary_level_statistics(levels)
    return Diagnostics(
        cluster=cluster.name, n_spins=cluster.n_spins, dipolar_scale=float(dipolar_scale), free=model.free,
        fisher_eigenvalues=evals, fisher_eigenvectors=evecs, fisher_participation=participation_ratio(evecs),
        crb_hz=crb, unlearnable=bad, seconds=time.perf_counter() - start, **stats,
        level_kind="Floquet quasi-energies of one cycle", mean_r_random=GUE_MEAN_R)
