"""Candidate experiments for experiment design: their Fisher information and their cost per shot.

A candidate is an `Experiment` (qhl.spins.cluster) plus, optionally, the subset of its times
that one shot samples. Today's control handles are the experiment's fields (dipolar_scale,
t_max_s, points, noise); a later kind of experiment (a pulse sequence, a spinning rate) is a
candidate as soon as the engine computes its gradient: nothing here looks inside it.

Kinds:
    'file'        an [[experiment]] of the cluster file, as written;
    'generated'   every (dipolar scale, acquisition window) of the grids asked for, with the
                  given points and noise (one shot = one acquisition of its `points` times);
    'time_point'  one sampling time of an experiment (one shot = one acquisition at that time):
                  `time_points = N` replaces each candidate by N times, t_max/N, 2 t_max/N, ... t_max.

Fisher information per shot (qhl.exact.likelihood; Gaussian noise sigma per Re and Im part):
    F_mn = sum_{t in the candidate's times} Re[conj(dS_m(t)) dS_n(t)] / sigma^2.
Whole experiments call qhl.exact.likelihood.fisher_information; time-point candidates take the
terms of that same sum one time at a time, from one exact-engine gradient per experiment.

Cost of one shot in T gates (fault-tolerant; model-based, qhl.costing):
    one circuit per sampled time t > 0: r_p(t, eps_T) Trotter steps of order p
    (qhl.costing.trotter_cost: r = ceil((C_p t^(p+1) / eps_T)^(1/p)), commutator bounds), R_p
    rotations per step (transpiled marginal step, qhl.costing.trotter_cost.TrotterModel), each
    synthesised to eps_S / (r R_p) (the circuit's synthesis error eps_S shared equally by its
    rotations) at qhl.costing.synthesis.t_count_per_rotation T gates (Ross and Selinger rule);
    the order with the fewest T gates is taken; t = 0 costs nothing. The input ensemble and the
    measurement are Clifford. The cost of a shot is the sum over its times. It grows with the
    evolution time (r grows as t^(1 + 1/p)).
    A pulse-sequence candidate evolves for t + T_delays (its delays Trotterised like the
    acquisition, the steps counted over the whole time) and adds its pulses' rotations (count
    rule of qhl.circuits.sequence_circuits.pulse_counts); the synthesis error is shared by all of
    them, and t = 0 still costs the preparation.
"""

from dataclasses import dataclass, field, replace
import fnmatch

import numpy as np

from ..base.errors import QhlInputError
from ..base.memory import require_memory
from ..costing.synthesis import t_count_per_rotation
from ..costing.trotter_cost import ORDERS, rotor_bound_model, trotter_model
from ..exact.likelihood import fisher_information
from ..spins.cluster import Experiment, check_experiment
from ..spins.spinning import is_spinning

__all__ = ["Candidate", "KINDS", "MAX_CANDIDATES", "build_candidates", "candidate_fishers", "TCostModel", "COST_ASSUMPTIONS",
           "select_parameters"]

KINDS = ("file", "generated", "time_point")
MAX_CANDIDATES = 20_000     # the optimiser's support grows in rounds; beyond this the job would take hours

COST_ASSUMPTIONS = {
    "circuits": "one circuit per sampled time t > 0 (the signal at t); t = 0 needs no evolution",
    "trotter_steps": "r = ceil((C_p t^(p+1)/eps_T)^(1/p)) from the commutator bounds (qhl.costing.trotter_cost), "
                     "the order p in (1, 2, 4) with the fewest T gates",
    "rotations": "marginal rotations per Trotter step of the transpiled step circuit (qhl.costing.trotter_cost)",
    "synthesis": "each rotation to eps_S / (r x rotations per step), T per rotation by the Ross-Selinger rule "
                 "(qhl.costing.synthesis.t_count_per_rotation)",
    "spinning": "a spinning candidate: orders 1 and 2 (the circuits qhl.circuits.spinning_circuits builds), "
                "r = max(the commutator-bound steps of H with each coupling h_n times max(1, s_b,n), s_b,n = "
                "the sum of |Fourier coefficients| of s_n >= max_t |s_n(t)|, the rotor rule ceil(8 nu_r t)); a "
                "step has a static step's rotations (other angles); the Magnus error of the time dependence is "
                "covered by the rotor rule, not bounded",
    "clifford": "input ensemble and measurement are Clifford (no T gates)",
    "shot": "one shot of a candidate = one run of each of its times' circuits",
}


@dataclass(frozen=True, eq=False)
class Candidate:
    """One candidate experiment.

    Attributes:
        name: unique label.
        kind: one of KINDS.
        experiment: the Experiment (its dipolar_scale, t_max_s, points, noise).
        times_s: the times one shot samples (default the experiment's own times).
    """

    name: str
    kind: str
    experiment: Experiment
    times_s: np.ndarray = field(default=None)

    @property
    def times(self) -> np.ndarray:
        return self.experiment.times_s if self.times_s is None else np.asarray(self.times_s, float)

    def describe(self) -> dict:
        ex = self.experiment
        t = self.times
        return {"name": self.name, "kind": self.kind, "experiment": ex.name, "dipolar_scale": ex.dipolar_scale,
                "t_max_s": float(t.max()), "points": int(t.size), "noise": ex.noise,
                "times_s": t if self.kind == "time_point" else None}


def _fmt(x):
    return f"{x:.3g}"


def build_candidates(cluster, dipolar_scales=(), windows_s=(), points=None, noise=None, time_points=None,
                     include_file: bool = True) -> list:
    """The cluster file's experiments plus generated candidates (module docstring).

    Args:
        cluster: the Cluster.
        dipolar_scales, windows_s: grids; when either is given, every (scale, window) pair is a
            'generated' candidate (a missing grid takes the file's distinct values).
        points: points of generated candidates (default the file's largest).
        noise: noise per point of every candidate (default each experiment's own; generated ones
            take the file's smallest).
        time_points: replace each candidate by this many single-time candidates.
        include_file: keep the file's experiments as candidates.

    Returns:
        list of Candidate (names unique).

    Raises:
        QhlInputError: no candidates, a value out of the cluster file's ranges, or no noise.
    """
    source = cluster.source
    file_exps = list(cluster.experiments)
    if noise is not None:
        file_exps = [replace(ex, noise=float(noise)) for ex in file_exps]
    out = [Candidate(ex.name, "file", ex) for ex in file_exps] if include_file else []
    scales = [float(s) for s in np.atleast_1d(dipolar_scales if dipolar_scales is not None else ())]
    windows = [float(w) for w in np.atleast_1d(windows_s if windows_s is not None else ())]
    if scales or windows:
        if not scales:
            scales = sorted({ex.dipolar_scale for ex in file_exps})
        if not windows:
            windows = sorted({ex.t_max_s for ex in file_exps})
        if not scales or not windows:
            raise QhlInputError("generated candidates need both dipolar scales and windows (the cluster file "
                                "has no experiments to take them from)", source=source, key="experiment")
        pts = int(points) if points is not None else max((ex.points for ex in file_exps), default=64)
        sig = noise if noise is not None else min((ex.noise for ex in file_exps if ex.noise is not None),
                                                  default=None)
        if sig is None:
            raise QhlInputError("generated candidates need a noise: give noise= (--noise SIGMA) or set noise "
                                "in an [[experiment]]", source=source, key="noise")
        have = {(ex.dipolar_scale, ex.t_max_s, ex.points) for ex in file_exps} if include_file else set()
        for s in scales:
            for w in windows:
                if (s, w, pts) in have:
                    continue
                have.add((s, w, pts))
                ex = Experiment(f"s{_fmt(s)}_t{_fmt(w)}", w, pts, s, float(sig))
                check_experiment(ex, "candidate", source)
                out.append(Candidate(ex.name, "generated", ex))
    if time_points is not None:
        n = int(time_points)
        if n < 1:
            raise QhlInputError(f"time points must be >= 1, got {time_points}", key="time_points")
        if n * len(out) > MAX_CANDIDATES:
            raise QhlInputError(f"{n} time points x {len(out)} candidates = {n * len(out):,} candidates: expected "
                                f"at most {MAX_CANDIDATES:,}", key="time_points")
        split = []
        for c in out:
            t_max = float(c.times.max())
            for t in np.linspace(t_max / n, t_max, n):
                split.append(Candidate(f"{c.name}@{t:.4g}s", "time_point", c.experiment, np.array([t])))
        out = split
    if len(out) > MAX_CANDIDATES:
        raise QhlInputError(f"{len(out):,} candidates: expected at most {MAX_CANDIDATES:,} (fewer --scales or "
                            f"--windows)", key="experiment")
    if not out:
        raise QhlInputError("no candidate experiments: the cluster file has none and no grid was given",
                            source=source, key="experiment")
    names = [c.name for c in out]
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise QhlInputError(f"candidate names repeat: {', '.join(dup[:5])}", source=source, key="experiment")
    for c in out:
        if c.experiment.noise is None:
            raise QhlInputError(f"experiment '{c.experiment.name}' has no noise: set noise = ... in its "
                                f"[[experiment]] or give --noise SIGMA (noise= in Python)", source=source,
                                key="noise")
    return out


def candidate_fishers(engine, candidates, progress=None) -> np.ndarray:
    """(K, P, P) Fisher information per shot of each candidate (1/Hz^2; module docstring)."""
    P = len(engine.model.free)
    n_times = max((c.times.size for c in candidates if c.times_s is not None), default=0)
    require_memory(f"the Fisher matrices of {len(candidates):,} candidates ({P} parameters)",
                   8.0 * P * P * (len(candidates) + 2 * sum(c.times.size for c in candidates if c.times_s is not None))
                   + 16.0 * P * n_times)
    out = np.zeros((len(candidates), P, P))
    groups = {}
    for k, c in enumerate(candidates):
        if c.times_s is None:
            out[k] = fisher_information(engine, [c.experiment])
        else:
            groups.setdefault(id(c.experiment), []).append(k)
        if progress:
            progress(k + 1, len(candidates))
    for ks in groups.values():
        ex = candidates[ks[0]].experiment
        times = np.concatenate([candidates[k].times for k in ks])
        _, g = engine.gradient(ex, times)                       # (P, T): one exact gradient per experiment
        sigma2 = float(ex.noise) ** 2
        per_time = np.real(np.einsum("pt,qt->tpq", np.conj(g), g)) / sigma2
        pos = 0
        for k in ks:
            m = candidates[k].times.size
            out[k] = per_time[pos:pos + m].sum(axis=0)
            pos += m
    return 0.5 * (out + np.transpose(out, (0, 2, 1)))


class TCostModel:
    """T gates of one shot of a candidate (module docstring), with Trotter models cached per dipolar scale.

    Args:
        model: the HamiltonianModel.
        trotter_eps: eps_T, operator-norm Trotter error of each circuit.
        synthesis_eps: eps_S, total synthesis error of each circuit.
    """

    def __init__(self, model, trotter_eps: float = 1e-3, synthesis_eps: float = 1e-4):
        for v, key in ((trotter_eps, "trotter_eps"), (synthesis_eps, "synthesis_eps")):
            if not (np.isfinite(v) and 0 < v < 1):
                raise QhlInputError(f"{key} must be in (0, 1), got {v!r}", key=key)
        self.model = model
        self.trotter_eps = float(trotter_eps)
        self.synthesis_eps = float(synthesis_eps)
        self._models = {}
        self._counts = {}

    def _trotter(self, experiment):
        """(TrotterModel, {order: rotations per step}) of the experiment's Hamiltonian, cached per dipolar
        scale; gates per step are shared by scales with the same Pauli terms (only the angles differ)."""
        spin = is_spinning(experiment)
        key = (float(experiment.dipolar_scale), float(experiment.spinning_angle_deg) if spin else None)
        if key not in self._models:
            bare = replace(experiment, steps=())               # delays: the same H
            # spinning: every coupling at its largest |s_n(t)| (COST_ASSUMPTIONS["spinning"])
            tm = rotor_bound_model(self.model, bare) if spin else trotter_model(self.model, bare)
            labels = tuple(sorted(tm.hamiltonian.simplify(atol=0).paulis.to_labels()))
            if labels not in self._counts:
                self._counts[labels] = {p: float(tm.rotations_per_step(p)) for p in ORDERS}
            self._models[key] = (tm, self._counts[labels])
        return self._models[key]

    def per_time(self, experiment, times) -> np.ndarray:
        """T gates of the circuit at each time (0 at t = 0 for a free evolution; module docstring)."""
        t = np.asarray(times, float)
        tm, rotations = self._trotter(experiment)
        delays, pulse_rot = self._preparation(experiment)
        evolution = t + delays
        best = np.full(t.shape, np.inf)
        orders, rotor = ORDERS, np.zeros(t.shape)
        if is_spinning(experiment):                  # COST_ASSUMPTIONS["spinning"]
            from ..circuits.spinning_circuits import STEPS_PER_ROTOR_PERIOD
            orders = (1, 2)
            rotor = np.ceil(STEPS_PER_ROTOR_PERIOD * experiment.spinning_hz * evolution * (1 - 1e-12))
        for p in orders:
            r = np.maximum(tm.steps(p, np.maximum(evolution, 1e-300), self.trotter_eps), rotor)
            n_rot = r * rotations[p] + pulse_rot
            best = np.minimum(best, n_rot * t_count_per_rotation(self.synthesis_eps / np.maximum(n_rot, 1)))
        return np.where((evolution > 0) | (pulse_rot > 0), best, 0.0)

    def _preparation(self, experiment):
        """(total delay in s, rotations of the pulses) of a pulse-sequence experiment; (0, 0) for an FID."""
        if not getattr(experiment, "steps", ()):
            return 0.0, 0
        from ..circuits.sequence_circuits import PlannedPulse, pulse_counts, sequence_plan
        from ..costing.near_term import total_delay_s
        plan = sequence_plan(self.model, experiment, 1.0, 1, delay_steps=1)
        return total_delay_s(experiment), int(sum(pulse_counts(x)["rotations"] for x in plan
                                                   if isinstance(x, PlannedPulse)))

    def shot(self, candidate) -> float:
        """T gates of one shot of `candidate` (the sum over its times)."""
        return float(np.sum(self.per_time(candidate.experiment, candidate.times)))

    def assumptions(self) -> dict:
        return {**COST_ASSUMPTIONS, "trotter_eps": self.trotter_eps, "synthesis_eps": self.synthesis_eps}


def select_parameters(names, patterns) -> np.ndarray:
    """Indices of the free parameters matching any glob pattern (None: all)."""
    if not patterns:
        return np.arange(len(names))
    pats = [patterns] if isinstance(patterns, str) else list(patterns)
    idx = [i for i, n in enumerate(names) if any(fnmatch.fnmatchcase(n, p) for p in pats)]
    if not idx:
        raise QhlInputError(f"no free parameter matches {', '.join(pats)} (free: {', '.join(names[:6])}"
                            f"{' ...' if len(names) > 6 else ''})", key="parameters")
    return np.array(idx, int)
