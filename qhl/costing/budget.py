"""Budgets for learning a cluster's Hamiltonian: near-term shots beside fault-tolerant resources.

`BudgetModel(cluster)` prepares everything that does not depend on (t, eps) once: the exact
engine (its eigendecomposition is cached per coefficient vector, so gradients at any number of
times come from one decomposition per experiment), per-parameter ranges, and each experiment's
Trotter constants. `.budget(t, eps)` gives one `Budget`; `.sweep(times, precisions)` a
`BudgetSweep` on a grid, with fitted scaling exponents.

Tiers. Each quantity uses the best method that fits and says which (`Budget.methods`):
    'exact'      means mu from the exact engine (qhl.exact.engine), used only when its memory
                 estimate (qhl.exact.engine.estimate_memory_bytes, sector sizes counted
                 combinatorially before anything is built) fits in EXACT_MEMORY_FRACTION of the
                 available memory and its time estimate (floating-point operations of the
                 eigendecompositions and gradients over a matrix-product rate measured on this
                 machine) is below settings.exact_time_limit_s; otherwise skipped with a note;
    'estimated'  the slot for a pure-state (typicality) engine: pass `estimator=` (an object with
                 the ExactEngine gradient/hessian methods); not available by default;
    'bound'      everything else, at any size: ranges and Hoeffding counts from the Pauli
                 coefficients, commutator-bound Trotter steps (qhl.circuits.pauli_commutators),
                 amplitude-estimation queries, rotations, T-count, logical qubits, surface code,
                 and per-step gate counts from the count rule (qhl.circuits.step_counts) above
                 8 qubits.
Default time (`default_time_s`), at every size: the shortest window of an experiment that sees
every free parameter (the experiment's own t_max; no engine needed).

All numbers are model-based: each formula's assumptions and sources are collected in
`Budget.assumptions` (also printed by `qhl budget --json`).
"""

from dataclasses import dataclass, field
import math
import time as _time

import numpy as np

from ..exact.engine import ExactEngine, estimate_memory_bytes
from ..base.errors import MemoryBudgetError, QhlInputError
from ..base.memory import available_memory_bytes, require_memory
from ..circuits.pauli_commutators import pauli_arrays, quadrature_norms
from ..spins.model import DEFAULT_FREE, build_model
from ..spins.cluster import has_finite_pulses
from . import amplitude_estimation, fault_tolerant, shots, surface_code, synthesis, trotter_cost
from . import coherent_input, family_variance, learning_run, noisy_shots, trotter_order4
from ..circuits import signal_trotter
from .fault_tolerant import DEFAULT_SPLIT, choose_order, fixed_circuit_ft_counts, ft_cost_arrays
from .near_term import near_term_model, sequence_gradient_range, total_delay_s
from .trotter_cost import ORDERS, empirical_flops, empirical_trotter_steps, rotor_bound_model, trotter_model

__all__ = ["BudgetSettings", "BudgetModel", "Budget", "BudgetSweep", "all_assumptions", "fit_exponents",
           "EXPECTED_EXPONENTS", "exact_engine_plan", "bound_tier_memory_bytes", "TIERS"]

TIERS = ("exact", "estimated", "bound")
# Up to this many spins one Trotter step is built and every rotation synthesised (qiskit gridsynth);
# above, the median measured T per rotation times the count rule's rotation depth.
SYNTHESIS_MAX_SPINS = 8
# The near-term circuit of the noise-aware counts: the Hadamard test (one ancilla), second order.
NOISY_ANCILLAS = 1
NOISY_ORDER = 2
NOISY_ORDERS = (1, 2)          # product-formula orders the circuits build (qhl.circuits.trotter)
EXACT_MEMORY_FRACTION = 0.5
SEQUENCE_ASSUMPTION = (
    "pulse-sequence signal circuits (qhl.circuits.sequence_circuits): ideal pulses as single-qubit rotations "
    "RGate(theta, phi) on the pulsed isotope's qubits (exact); delays Trotterised with the fault-tolerant order at one "
    "step length dt = t / r' for delays and acquisition, r' = ceil(r ((t + T_delays) / t)^(1/p)) so that the "
    "Trotter error, which adds over the delays and the acquisition (errors of unitary factors add; error per unit "
    "time ~ C dt^p), stays within the free-evolution share; counts by the step-count rule (CX exact for order 1, "
    "rotations and CX estimates, depth the sum of the parts)")
SEQUENCE_GRADIENT_ASSUMPTION = (
    "gradients of pulse-sequence experiments (per experiment under 'sequences', worst-range component): the "
    "Hadamard test through the preparation (qhl.circuits.sequence_circuits.sequence_gradient_circuit), insertion "
    "points over every delay and the acquisition; single-shot range R = 2 (t + T_delays) ||g_n||_1 2 pi |s_n| N_obs "
    "(the whole Trotterised time; qhl.costing.near_term.sequence_gradient_range, Banchi and Crooks, Quantum 5, 386 "
    "(2021)); shots: Hoeffding 2 R^2 ln(2/delta)/eps^2, bound R^2/eps^2, R^2 - mu^2 with mu the exact sequence "
    "gradient (qhl.exact.sequence_engine; an upper bound for the product-input circuits), and on small clusters the "
    "compiled estimator's exact variance (qhl.emulation.variance; circuit_variance_steps acquisition steps, delays "
    "at the same step length); fault-tolerant: Trotter steps of the whole evolution (the signal circuit's r' "
    "above plus the delays' steps), gradient circuit = signal-circuit counts + one controlled-Pauli gadget "
    "(controlled-((-i)^w P), a Clifford gate; counted as 2 w CX, at most 2 w rz and 3 w + 4 layers, the most a "
    "[cx, rz, sx, x] transpile of qhl.circuits.gradient_circuits' gadget shows, w the largest Pauli weight of g_n); "
    "the top-level near_term and fault_tolerant numbers cover the free-evolution experiments")
SPINNING_ASSUMPTION = (
    "spinning (magic-angle) FIDs, per experiment under 'spinning' (qhl.circuits.spinning_circuits): the acquisition "
    "time t cut into r equal steps, each step the product formula of the step-averaged Hamiltonian (exact averages of "
    "the rotor factors s_n(t); error O(tau^2) for order 2: the Magnus second term and the splitting); r = max(the "
    "free-evolution budget's steps at the same order, ceil(8 nu_r t)) (8 steps per rotor period, 4 per period of the "
    "second harmonic); where every experiment spins (no free-evolution steps) and n <= SPINNING_ERROR_MAX_SPINS, r "
    "doubles until the Richardson signal error below is within the Trotter share of eps; a step has a static step's gates with other angles, so counts per circuit are those of a "
    "transpiled circuit ([cx, rz, sx, x], level 2, all-to-all; 'transpiled', exact for that transpile) up to "
    "SPINNING_TRANSPILE_MAX_SLOTS slots and SYNTHESIS_MAX_SPINS spins, else the step-count rule (estimate); T-count "
    "per circuit = rotations x 3 log2(1/eps_rot) (Ross and Selinger rule) with eps_rot = synthesis share x eps / "
    "rotations (rotation errors add); signal error on small clusters (n <= SPINNING_ERROR_MAX_SPINS): "
    "|S_r - S_4r| 16/15 from the compiled circuits' unitaries (Richardson for an order-2 error; estimate); gradient "
    "circuit = signal circuit + one controlled-Pauli gadget (as for pulse sequences); near-term shots of the worst "
    "gradient component from the compiled estimator's range R = 2 sum_a |beta_a| kappa unit_hz (R^2/eps^2 and "
    "Hoeffding, bounds); above SPINNING_ERROR_MAX_SPINS spins (mixed clusters too), r is at least the "
    "commutator-bound steps (qhl.costing.trotter_cost.rotor_bound_model: every coupling at its largest rotor factor) "
    "with ||U_r - U|| <= Trotter share x eps / (2 kappa) (bound); fault_tolerant.amplitude_estimation: amplitude "
    "estimation of that component on the gradient circuit (qhl.costing.fault_tolerant.fixed_circuit_ft_counts: range "
    "R as above, r' + 1 insertion points in the time register weighted by |beta_a|, the pulse-sequence model; "
    "r' = max(r, the rotor-bound model's steps at ||A~ - A|| <= e_T / (8R)), the circuit's rotations and depth "
    "scaled by r'/r; T-depth a bound). Not covered for spinning "
    "experiments: Hessian/Fisher/learning-run numbers (the "
    "top-level numbers cover the static experiments only; empty when every experiment spins)")
# A spinning signal circuit is transpiled for exact counts up to this many product-formula slots.
SPINNING_TRANSPILE_MAX_SLOTS = 4000
SPINNING_ERROR_MAX_SPINS = 6
# The slots of every step (SpinningEvolution) are listed up to this many blocks in all; above, counts by the rule.
SPINNING_SLOTS_MAX = 200_000
# Exact means of spinning gradient components (the exact spinning engine) up to this many spins.
SPINNING_EXACT_MAX_SPINS = 10
SPINNING_RANGE_GRID = 2048
SPINNING_ERROR_MAX_STEPS = 1024
HESSIAN_FLOPS_PER_ELEMENT = 5000.0
# The compiled sequence estimator's exact variance is computed when its circuit has at most this many Trotter
# steps (acquisition + delays at one step length): each step adds insertion rows of dense unitaries.
SEQUENCE_VARIANCE_MAX_STEPS = 512

EXPECTED_EXPONENTS = {
    "near_term_component_bound": (2.0, -2.0),
    "near_term_component_exact": (2.0, -2.0),
    "near_term_gradient_exact": (2.0, -2.0),
    "near_term_hessian_entry_bound": (4.0, -2.0),
}


def all_assumptions(settings=None) -> dict:
    """Every constant and model choice used, with its source."""
    out = {}
    for mod in (shots, family_variance, amplitude_estimation, synthesis, trotter_order4, trotter_cost, fault_tolerant,
                surface_code, learning_run, coherent_input, signal_trotter, noisy_shots):
        out.update(mod.ASSUMPTIONS)
    out["precision_unit"] = "eps is a standard error on dS/dh with h in units of unit_hz (default 1 kHz)"
    out["time_grids"] = "each experiment's time grid is rescaled to end at t (points kept)"
    out["nll_weights"] = "NLL-gradient strata weighted 1/sigma_x (residuals of the size of the noise), normalised to 1"
    out["comparison"] = "total gate layers executed: shots x layers of one circuit (near-term, the smallest shot " \
                        "count available: compiled estimator's exact variance where computed) against the AE " \
                        "circuits' T layers + Clifford layers, all median runs (fault-tolerant); per component " \
                        "and per full gradient"
    out["precision_hz"] = "parameter resolution eps / |d2S/dh2| of the worst Hessian entry at t: the shift of a " \
                          "zero of a derivative known to +-eps (first order; exact |d2S/dh2| where the engine ran, " \
                          "else its range bound, which gives the finest resolvable change)"
    out["tiers"] = "exact (engine means) where memory/time fit, estimated (pure-state engine, when given), " \
                   "bound (Pauli coefficients, commutator sums, count rule) at any size"
    out["default_time"] = "the shortest window of an experiment that sees every free parameter"
    if settings is not None:
        out["settings"] = settings.to_json()
    return out


@dataclass(frozen=True)
class BudgetSettings:
    """User choices with defaults (each reported with the result).

    Attributes:
        unit_hz: frequency unit of the derivatives (1e3: per kHz).
        delta: failure probability for Hoeffding counts and the AE median boost.
        iterations: learning iterations (an int, or taken from a qhl.learning result).
        split: error shares {'trotter', 'synthesis', 'estimation'} summing to 1.
        synthesis: 'ross-selinger' or 'mixed'.
        physical_error: physical error rate for the surface-code estimate (None: skipped).
        cycle_time_s: surface-code cycle time (1 us: Gidney and Ekera 2021).
        failure_budget: allowed failure probability of the fault-tolerant circuit.
        empirical_trotter: compute the exact-propagator step count (n <= 8).
        hessian_exact: exact variance of the worst Hessian entry at t (one engine Hessian per experiment).
        circuit_variance_max_spins: clusters with at most this many spins also get the compiled
            estimator's exact variance count (qhl.costing.family_variance); 0 turns it off.
        circuit_variance_steps, circuit_variance_order: the Trotterisation of that estimator.
        exact_time_limit_s: skip the exact engine when its time estimate exceeds this (s).
        use_exact: False skips the exact engine at any size (bound tier only).
        classical_meter: put the classical-cost meter (qhl.costing.classical_cost) beside the budget.
        target: hardware target of the near-term circuit (qhl.circuits.targets; 'all-to-all' default).
        gate_error, single_error, readout_error: uniform error rates (qhl.costing.noisy_shots); None: the
            target's calibration (fake backends) or no noise model.
        mitigation: 'none', 'pec' or 'zne' (qhl.costing.noisy_shots); max_shots: the cap of max_useful_time_s.
    """

    unit_hz: float = 1e3
    delta: float = 0.05
    iterations: int = 50
    split: tuple = tuple(DEFAULT_SPLIT.items())
    synthesis: str = "ross-selinger"
    physical_error: float | None = None
    cycle_time_s: float = 1e-6
    failure_budget: float = 0.01
    empirical_trotter: bool = True
    learning_method: str = "gn"
    hessian_exact: bool = True
    circuit_variance_max_spins: int = 6
    circuit_variance_steps: int = 8
    circuit_variance_order: int = 2
    exact_time_limit_s: float = 60.0
    use_exact: bool = True
    classical_meter: bool = True
    target: str = "all-to-all"
    gate_error: float | None = None
    single_error: float | None = None
    readout_error: float | None = None
    mitigation: str = "none"
    max_shots: float = 1e9

    def split_dict(self):
        return dict(self.split)

    def to_json(self):
        d = dict(self.__dict__)
        d["split"] = self.split_dict()
        return d

    def validate(self):
        s = self.split_dict()
        if set(s) != {"trotter", "synthesis", "estimation"} or any(v <= 0 for v in s.values()) \
                or abs(sum(s.values()) - 1) > 1e-9:
            raise QhlInputError("error split needs positive trotter, synthesis and estimation shares summing to 1",
                                key="split")
        if self.synthesis not in synthesis.SYNTHESIS_METHODS:
            raise QhlInputError(f"unknown synthesis {self.synthesis!r}", key="synthesis")
        if not 0 < self.delta < 1:
            raise QhlInputError(f"delta must be in (0, 1), got {self.delta}", key="delta")
        if self.physical_error is not None:
            surface_code.check_physical_error(self.physical_error)
        self.error_rates()
        if self.mitigation not in noisy_shots.MITIGATIONS:
            raise QhlInputError(f"unknown mitigation {self.mitigation!r}: expected one of "
                                f"{', '.join(noisy_shots.MITIGATIONS)}", key="mitigation")
        if not (isinstance(self.max_shots, (int, float)) and math.isfinite(self.max_shots) and self.max_shots >= 1):
            raise QhlInputError(f"expected a shot cap >= 1, got {self.max_shots!r}", key="max_shots")
        return self

    def error_rates(self, backend=None):
        """qhl.costing.noisy_shots.ErrorRates of these settings (uniform rates over a backend's table)."""
        return noisy_shots.ErrorRates(self.gate_error, self.single_error, self.readout_error, backend)


def _iterations(value):
    if hasattr(value, "fit"):
        value = value.fit
    if hasattr(value, "iterations"):
        value = value.iterations
    n = int(value)
    if n < 1:
        raise QhlInputError(f"iterations must be >= 1, got {value}", key="iterations")
    return n


@dataclass
class Budget:
    """One (t, eps) budget: near-term and fault-tolerant side by side (see `to_json`)."""

    time_s: float
    precision: float
    near_term: dict
    fault_tolerant: dict
    error_budget: dict
    comparison: dict
    surface_code: dict | None
    assumptions: dict
    cluster: str = ""
    methods: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)
    tiers: dict = field(default_factory=dict)
    precision_hz: dict | None = None
    classical: dict | None = None
    sequences: dict | None = None
    spinning: list | None = None

    def to_json(self):
        return {"cluster": self.cluster, "time_s": self.time_s, "precision": self.precision,
                "sequences": self.sequences, "spinning": self.spinning,
                "near_term": self.near_term, "fault_tolerant": self.fault_tolerant,
                "error_budget": self.error_budget, "comparison": self.comparison,
                "surface_code": self.surface_code, "assumptions": self.assumptions,
                "methods": self.methods, "tiers": self.tiers, "notes": self.notes,
                "precision_hz": self.precision_hz, "classical": self.classical}


@dataclass
class BudgetSweep:
    """Budgets on a (t, eps) grid: arrays of shape (len(times), len(precisions)).

    Attributes:
        times, precisions: the grid axes.
        tables: {name: (T, E) array}.
        orders: chosen Trotter order per grid point.
        exponents: {name: (fitted t-exponent, fitted eps-exponent, expected t, expected eps)}.
        crossover: per time, the largest eps at which fault-tolerant is cheaper (None if never).
    """

    times: np.ndarray
    precisions: np.ndarray
    tables: dict
    orders: np.ndarray
    exponents: dict = field(default_factory=dict)
    crossover: list = field(default_factory=list)

    def to_json(self):
        return {"times_s": self.times, "precisions": self.precisions,
                "tables": {k: v for k, v in self.tables.items()}, "trotter_order": self.orders,
                "exponents": {k: {"time": v[0], "precision": v[1], "expected_time": v[2], "expected_precision": v[3]}
                              for k, v in self.exponents.items()},
                "crossover": self.crossover}


def fit_exponents(times, precisions, table):
    """Least-squares fit log y = a + b log t + c log eps over the grid; returns (b, c).

    An axis with a single value gets nan for its exponent.
    """
    tt, ee = np.meshgrid(np.log(times), np.log(precisions), indexing="ij")
    y = np.broadcast_to(np.asarray(table, float), tt.shape)
    ok = np.isfinite(y) & (y > 0)
    cols, names = [np.ones(ok.sum())], []
    if len(times) > 1:
        cols.append(tt[ok])
        names.append("t")
    if len(precisions) > 1:
        cols.append(ee[ok])
        names.append("e")
    if ok.sum() < len(cols) + 1:
        return float("nan"), float("nan")
    coef, *_ = np.linalg.lstsq(np.column_stack(cols), np.log(y[ok]), rcond=None)
    got = dict(zip(names, coef[1:]))
    return float(got.get("t", np.nan)), float(got.get("e", np.nan))


def _sector_dims(isotopes):
    """Magnetisation-sector sizes (products of binomials per isotope), without building a basis."""
    dims = np.ones(1)
    for iso in dict.fromkeys(isotopes):
        c = sum(1 for i in isotopes if i == iso)
        dims = np.outer(dims, [math.comb(c, m) for m in range(c + 1)]).ravel()
    return dims


_RATE = {}


def _matmul_rate():
    """Floating-point operations per second of a 256 x 256 matrix product on this machine (measured once)."""
    if "rate" not in _RATE:
        a = np.random.default_rng(0).normal(size=(256, 256))
        a @ a
        t0 = _time.perf_counter()
        for _ in range(8):
            a @ a
        _RATE["rate"] = 8 * 2 * 256**3 / max(_time.perf_counter() - t0, 1e-9)
    return _RATE["rate"]


def exact_engine_plan(model, experiments, settings) -> dict:
    """Memory and time estimates of the exact parts of a budget, decided before anything is built.

    Memory: qhl.exact.engine.estimate_memory_bytes on the magnetisation sectors (binomial sizes),
    and the exact Hessian's 16 (3 d^3 + 8 d^2) bytes (qhl.exact.engine.ExactEngine.hessian, two
    parameters). Time: per experiment 10 sum d^3 for the eigendecompositions plus, per free
    parameter, 12 sum d^3 + 16 sum d^2 T_points for its gradient at every time point, times 1.5 for
    the further gradient calls of a budget, over the measured matrix-product rate (common practice:
    dense eigensolvers and products scale as d^3). The Hessian entry (second divided differences
    on d^3 triples of each of about 2 sum d^3 block elements) is charged HESSIAN_FLOPS_PER_ELEMENT
    per element (set from a 10-spin run here that took over 4 minutes for one entry at one time).

    Returns:
        {memory_bytes, hessian_memory_bytes, seconds, use_engine, use_hessian, reason}.
    """
    dims = _sector_dims(model.isotopes)
    n, P = model.n_spins, len(model.free)
    points = max(ex.points for ex in experiments)
    mem = float(estimate_memory_bytes(n, dims, max(points, 256)))
    dmax = float(dims.max())
    hmem = 16.0 * (3 * dmax**3 + 8 * dmax**2)
    d3, d2 = float(np.sum(dims**3)), float(np.sum(dims**2))
    flops = 1.5 * len(experiments) * (10 * d3 + P * (12 * d3 + 16 * d2 * points))
    seconds = flops / _matmul_rate()
    hseconds = HESSIAN_FLOPS_PER_ELEMENT * 4 * d3 / _matmul_rate()
    limit = EXACT_MEMORY_FRACTION * available_memory_bytes()
    reason = ""
    if not settings.use_exact:
        reason = "the exact engine is turned off (bound tier only)"
    elif n > 20:
        reason = f"{n} spins: the exact engine handles at most 20"
    elif mem > limit:
        reason = f"the exact engine for {n} spins needs about {mem / 2**30:.3g} GiB ({limit / 2**30:.3g} GiB usable)"
    elif seconds > settings.exact_time_limit_s:
        reason = (f"the exact engine for {n} spins would take about {seconds:.3g} s "
                  f"(limit {settings.exact_time_limit_s:g} s)")
    use = not reason
    hreason = ""
    if use and settings.hessian_exact:
        if hmem > limit:
            hreason = f"exact Hessian entry skipped: it needs about {hmem / 2**30:.3g} GiB"
        elif seconds + hseconds > settings.exact_time_limit_s:
            hreason = f"exact Hessian entry skipped: about {hseconds:.3g} s estimated"
    return {"memory_bytes": mem, "hessian_memory_bytes": hmem, "seconds": seconds, "hessian_seconds": hseconds,
            "use_engine": use, "use_hessian": use and settings.hessian_exact and not hreason, "reason": reason,
            "hessian_reason": hreason}


def bound_tier_memory_bytes(model, experiments) -> float:
    """Peak-memory model of the bound tier: packed Pauli terms and their incidence matrices
    (about 64 + n/2 bytes per term), chunks of about 2^20 term pairs (about 400 bytes each), and
    the per-parameter strata arrays (ten float arrays of P x points), plus 200 MB for Python and
    qiskit (common practice: a generous constant)."""
    n, P = model.n_spins, len(model.free)
    terms = n + 3 * n * (n - 1) / 2
    points = max(ex.points for ex in experiments)
    return 2e8 + terms * (64 + n / 2) * 4 + 400.0 * 2**20 + 10 * 8.0 * P * points


class BudgetModel:
    """Everything about one cluster that a budget needs, prepared once.

    Args:
        cluster: a qhl.spins.cluster.Cluster.
        free: glob patterns of free parameters.
        settings: BudgetSettings.
        progress: optional callable(str) for stage messages (the CLI prints them on stderr).
        estimator: optional engine for the 'estimated' tier (gradient/hessian like ExactEngine,
            e.g. a pure-state typicality engine), or 'typical' for qhl.exact.typicality.TypicalEngine
            on this model; used only when the exact engine is skipped. Its means carry a
            statistical error (stated by that engine); the counts built on them are estimates.

    Attributes:
        notes: one line per tier or part that was skipped, with the reason.
        tiers: {'exact', 'estimated', 'bound'} -> what each tier did.

    Example:
        >>> from qhl import demo_cluster
        >>> b = BudgetModel(demo_cluster(), settings=BudgetSettings(empirical_trotter=False)).budget(2e-4, 0.01)
        >>> b.near_term["shots_per_component"] <= b.near_term["shots_per_component_bound"]
        True
    """

    def __init__(self, cluster, free=DEFAULT_FREE, settings: BudgetSettings | None = None, progress=None,
                 estimator=None):
        self.cluster = cluster
        self.settings = (settings or BudgetSettings()).validate()
        say = progress or (lambda msg: None)
        t0 = _time.perf_counter()
        say(f"building the model of {cluster.n_spins} spins")
        self.model = build_model(cluster, free=free)
        if not self.model.free:
            raise QhlInputError("no free parameters to learn", key="free")
        if not cluster.experiments:
            raise QhlInputError("the cluster has no experiments", key="experiment")
        # pulse-sequence experiments are costed per experiment under 'sequences' (SEQUENCE_GRADIENT_ASSUMPTION);
        # the full-gradient, Hessian and Fisher machinery below covers the free-evolution experiments; a cluster
        # of sequence experiments only gets the per-component budget of its worst sequence (sequence_only)
        finite = [ex.name for ex in cluster.experiments if has_finite_pulses(ex)]
        if finite and len(finite) == len(cluster.experiments):
            raise QhlInputError(f"every experiment of '{cluster.name}' has finite pulses (duration_s), which the "
                                "circuits do not compile yet (ideal pulses only): nothing to cost",
                                key="experiment.step.duration_s")
        from ..spins.spinning import is_spinning
        usable = [ex for ex in cluster.experiments if ex.name not in finite]
        self.spinning_experiments = [ex for ex in usable if is_spinning(ex)]
        static = [ex for ex in usable if not is_spinning(ex)]
        self.sequence_experiments = [ex for ex in static if getattr(ex, "steps", ())]
        self.experiments = [ex for ex in static if not getattr(ex, "steps", ())]
        self.notes = []
        if finite:
            self.notes.append(f"experiments with finite pulses ({', '.join(finite)}) are left out: the circuits "
                              "compile ideal pulses only (the exact engine covers finite ones)")
        # spinning experiments are costed per experiment under 'spinning' (SPINNING_ASSUMPTION); a cluster whose
        # every experiment spins gets those entries only (spinning_only)
        self.spinning_only = not static
        self.sequence_only = not self.experiments and not self.spinning_only
        if self.spinning_experiments:
            names = ", ".join(ex.name for ex in self.spinning_experiments)
            self.notes.append(
                f"spinning experiments ({names}): time-dependent Trotter circuit counts under 'spinning'; "
                + ("every experiment spins: near_term, fault_tolerant, error_budget, comparison, precision_hz "
                   "and sweeps are not covered (empty)" if self.spinning_only else
                   "the top-level near_term, fault_tolerant, comparison and precision numbers cover the static "
                   f"experiments ({', '.join(ex.name for ex in static)}) only"))
        if self.spinning_only:
            self._init_spinning_only(say)
            return
        if self.sequence_only:
            self.notes.append(
                f"every experiment of '{cluster.name}' has pulse-sequence steps: the budget is per component of "
                "the worst sequence experiment (range over t + delays, fault-tolerant steps over the whole "
                "evolution); full-gradient, Hessian, Fisher, learning-run, noise-aware and sweep numbers cover "
                "free-evolution experiments only")
        elif self.sequence_experiments:
            self.notes.append(
                f"pulse-sequence experiments ({', '.join(ex.name for ex in self.sequence_experiments)}): signal "
                "circuits, gradient shots (range over the whole Trotterised time t + delays) and fault-tolerant "
                "counts under 'sequences'; the top-level shot and fault-tolerant counts cover the free-evolution "
                f"experiments ({', '.join(ex.name for ex in self.experiments)})")
        require_memory(f"the bound-tier budget of {self.model.n_spins} spins", bound_tier_memory_bytes(
            self.model, self.experiments or self.sequence_experiments))
        from ..circuits.targets import resolve_target
        self.target = resolve_target(self.settings.target, self.model.n_spins + NOISY_ANCILLAS, key="--target",
                                     what=f"{self.model.n_spins} spins + {NOISY_ANCILLAS} ancilla")
        self._routes = {}
        self.exact_plan = exact_engine_plan(self.model, self.experiments or self.sequence_experiments, self.settings)
        self.engine = None
        if self.exact_plan["use_engine"]:
            say(f"exact engine (about {self.exact_plan['memory_bytes'] / 2**30:.2g} GiB, "
                f"{self.exact_plan['seconds']:.2g} s estimated)")
            try:
                self.engine = ExactEngine(self.model)
            except MemoryBudgetError as e:
                self.notes.append(f"exact tier skipped: {e}")
        else:
            self.notes.append(f"exact tier skipped: {self.exact_plan['reason']}")
        if self.engine is not None and self.exact_plan["hessian_reason"]:
            self.notes.append(self.exact_plan["hessian_reason"])
        if isinstance(estimator, str) and self.engine is None:
            from ..exact.engine_choice import make_engine
            say(f"pure-state (typical) engine for the estimated tier ({self.model.n_spins} spins)")
            estimator = make_engine(self.model, estimator)[0]
        self.estimator = estimator if self.engine is None else None
        means, method = (self.engine, "exact") if self.engine is not None else (self.estimator, "estimated")
        if means is None:
            from ..exact.typicality import MAX_TYPICAL_SPINS
            if self.model.n_spins > MAX_TYPICAL_SPINS:
                self.notes.append(f"estimated tier not available: the pure-state engine handles at most "
                                  f"{MAX_TYPICAL_SPINS} spins ({self.model.n_spins} here): bounds are used")
            else:
                self.notes.append("estimated tier not used: the pure-state engine (up to about 24 spins in reasonable "
                                  "time) is opt-in, `qhl budget --typical` or estimator='typical' in Python: "
                                  "bounds are used")
        self.tiers = {"exact": "used" if self.engine is not None else "skipped",
                      "estimated": "used" if self.estimator is not None else "not available",
                      "bound": "used"}
        self.near = near_term_model(means, self.experiments, self.settings.unit_hz, model=self.model,
                                    method=method)
        self.trotter = []
        for x, ex in enumerate(self.experiments):
            say(f"Trotter commutator sums, experiment {x + 1}/{len(self.experiments)} "
                f"({_time.perf_counter() - t0:.1f} s)")
            self.trotter.append(trotter_model(self.model, ex))
        say(f"time-quadrature commutators ({_time.perf_counter() - t0:.1f} s)")
        self._inserted = pauli_arrays([self.model.parameter(n).generator for n in self.model.free])
        self._quad = [self._quadrature(ex) for ex in self.experiments]
        # sequence-only clusters: Trotter constants of each sequence's Hamiltonian (the same during delays and
        # the acquisition: its dipolar scale; pulses are exact rotations)
        self._seq_trotter = {}
        if self.sequence_only:
            import dataclasses
            for ex in self.sequence_experiments:
                bare = dataclasses.replace(ex, steps=())
                self._seq_trotter[ex.name] = (trotter_model(self.model, bare), self._quadrature(bare))
        self._n_terms = np.array([len(self.model.parameter(n).generator) for n in self.model.free])
        self.classical = None
        if self.settings.classical_meter:
            from .classical_cost import classical_cost
            say("classical-cost meter (rates measured on this machine)")
            import dataclasses as _dc
            self.classical = classical_cost(_dc.replace(cluster, experiments=tuple(static))
                                            if self.spinning_experiments else cluster).to_json()
            if self.spinning_experiments:
                self.classical["covers"] = "the static experiments only (the spinning ones cost at least as much)"
        say(f"prepared in {_time.perf_counter() - t0:.1f} s")
        self._say = say

    def _quadrature(self, ex):
        """(max ||[H, P]||, max ||[H, [H, P]]||) over inserted Pauli strings P (qhl.circuits.pauli_commutators)."""
        c1, c2, method = quadrature_norms(pauli_arrays(self.model.hamiltonian(ex)), self._inserted)
        self._quad_method = method
        return c1, c2

    @property
    def default_time_s(self):
        """The shortest experiment window among experiments that see every free parameter."""
        if self.spinning_only:
            return float(min(ex.t_max_s for ex in self.spinning_experiments))
        if self.sequence_only:
            return float(min(ex.t_max_s for ex in self.sequence_experiments))
        full = [ex.t_max_s for x, ex in enumerate(self.experiments) if np.all(self.near.scales[x] != 0)]
        return float(min(full or [ex.t_max_s for ex in self.experiments]))

    # ------------------------------------------------------------------ fault-tolerant pieces
    def _worst_component(self, t):
        """(experiment index, parameter index, range) of the component with the largest range at t."""
        x, n = self.near.worst_range_index()
        r = shots.gradient_shot_range(t, self.near.l1[n], self.near.scales[x, n], self.near.kappa,
                                      self.settings.unit_hz)
        return x, n, float(r)

    def _ft(self, value_range, t, eps, x, n_terms, extra_select=1.0, **kw):
        s = self.settings
        return ft_cost_arrays(value_range, t, eps, self.trotter[x], self._quad[x], n_terms, self.model.n_spins,
                              s.split_dict(), s.synthesis, ORDERS, extra_select, delta=s.delta,
                              n_observed=int(self.near.kappa), **kw)

    def _ft_gradient(self, strata, t, eps):
        """Fault-tolerant full gradient: one coherent sum per parameter, costed on the costliest experiment
        (all parameters at once: the formulas broadcast over the parameter axis)."""
        x = int(np.argmax([tm.constants[2] for tm in self.trotter]))
        rng = strata["range_sum"]                                      # (T, P)
        live = np.flatnonzero(np.any(rng > 0, axis=0))
        if live.size == 0:
            return None
        c = self._ft(rng[:, live], np.asarray(t)[:, None], eps, x, self._n_terms[live], strata["strata"])
        _, ch = choose_order(c)
        total = {k: np.sum(ch[k], axis=1) for k in ("t_count", "gate_layers", "rotations", "t_depth")}
        total["logical_qubits"] = np.max(ch["logical_qubits"], axis=1)
        return total

    # ------------------------------------------------------------------ one budget
    def budget(self, time_s, precision, iterations=None) -> Budget:
        """Near-term and fault-tolerant budgets at evolution time `time_s` and precision `precision`.

        Args:
            time_s: evolution time t (s), > 0.
            precision: eps in (0, 1): standard error per component (per unit_hz).
            iterations: learning iterations (int or a qhl.learning FitResult/LearnReport).

        Returns:
            Budget.

        Raises:
            QhlInputError: t <= 0, eps outside (0, 1).
        """
        shots.check_time(time_s)
        shots.check_precision(precision)
        t, eps = float(time_s), float(precision)
        s = self.settings
        its = _iterations(s.iterations if iterations is None else iterations)
        if self.spinning_only:
            return self._spinning_only_budget(t, eps)
        if self.sequence_only:
            return self._with_spinning(self._sequence_only_budget(t, eps, its), t, eps, NOISY_ORDER, None)
        nt = self.near
        has = nt.has_means
        tier = nt.method if has else "bound"
        say = getattr(self, "_say", lambda msg: None)
        say(f"near-term variances ({tier})")
        vb, ve = nt.component_variances([t])
        per_b, per_e = nt.per_parameter_component(t)
        x, n, r_comp = self._worst_component(t)
        hb, he = nt.hessian_entry_variances(t, exact=s.hessian_exact and self.exact_plan["use_hessian"])
        strata = nt.gradient_strata([t])
        best = {k: (strata[k + "_exact"] if has else strata[k + "_bound"]) for k in ("opt", "uni", "fisher")}
        grad = {k: float(np.sum(strata[k][0]) / eps**2) for k in ("opt_bound", "uni_bound", "fisher_bound")}
        grad.update({k + "_exact": float(np.sum(v[0]) / eps**2) for k, v in best.items()})
        hess_full_bound = grad["fisher_bound"] + float(strata["hessian_bound"][0]) / eps**2
        v_comp = float(ve[0]) if ve is not None else float(vb[0])
        near = {
            "shots_per_component": math.ceil(v_comp / eps**2),
            "shots_per_component_bound": math.ceil(float(vb[0]) / eps**2),
            "shots_per_component_hoeffding": shots.hoeffding_shots(math.sqrt(float(vb[0])), eps, s.delta),
            "component_range": math.sqrt(float(vb[0])),
            "shots_per_gradient": math.ceil(grad["opt_exact"]),
            "shots_per_gradient_uniform": math.ceil(grad["uni_exact"]),
            "shots_per_gradient_bound": math.ceil(grad["opt_bound"]),
            "shots_per_gradient_uniform_bound": math.ceil(grad["uni_bound"]),
            "shots_per_hessian_entry": math.ceil((he if he is not None else hb) / eps**2),
            "shots_per_hessian_entry_bound": math.ceil(hb / eps**2),
            "shots_per_hessian_bound": math.ceil(hess_full_bound),
            "shots_per_fisher": math.ceil(grad["fisher_exact"]),
            "shots_per_fisher_bound": math.ceil(grad["fisher_bound"]),
            "iterations": its,
            "shots_per_learning_run": its * math.ceil(grad["opt_exact"]),
            "learning_run": learning_run.learning_run_cost(
                learning_run.signal_shots(self.experiments, nt.kappa), math.ceil(grad["opt_exact"]),
                math.ceil(grad["fisher_exact"]), s.iterations if iterations is None else iterations,
                s.learning_method).to_json(),
            "strata": int(strata["strata"]),
            "per_parameter": {name: {"shots_exact": None if per_e is None else math.ceil(per_e[k] / eps**2),
                                     "shots_bound": math.ceil(per_b[k] / eps**2)}
                              for k, name in enumerate(nt.names)},
        }
        methods_near = {k: "bound" for k in near if k not in ("iterations", "strata", "per_parameter",
                                                               "learning_run")}
        for k in ("shots_per_component", "shots_per_gradient", "shots_per_gradient_uniform", "shots_per_fisher",
                  "shots_per_learning_run"):
            methods_near[k] = tier
        methods_near["shots_per_hessian_entry"] = tier if he is not None else "bound"
        say("fault-tolerant counts")
        ft_bound = self._ft(r_comp, t, eps, x, self._n_terms[n])
        emp = s.empirical_trotter and self.trotter[x].terms.n_qubits <= 8
        if emp:
            flops = sum(empirical_flops(self.trotter[x].terms, float(ft_bound[p]["steps_trotter"])) for p in ORDERS)
            if flops / _matmul_rate() > s.exact_time_limit_s:
                emp = False
                note = (f"exact-propagator Trotter steps skipped: about {flops / _matmul_rate():.3g} s estimated "
                        f"(limit {s.exact_time_limit_s:g} s)")
                if note not in self.notes:
                    self.notes.append(note)
        empirical = {}
        if emp:
            say(f"exact-propagator Trotter steps (about {flops / _matmul_rate():.2g} s)")
            empirical = {p: empirical_trotter_steps(self.trotter[x].terms, p, t,
                                                    float(ft_bound["split"]["trotter"]) / (8 * r_comp))
                         for p in ORDERS}
        signal_steps = {}
        if s.empirical_trotter and nt.has_means and nt.method == "exact" \
                and self.model.n_spins <= signal_trotter.SIGNAL_MAX_SPINS:
            say("Trotter steps from the error of the signal and gradient (exact engine)")
            for p in signal_trotter.SIGNAL_ORDERS:
                valid = min(float(ft_bound[p]["steps_trotter"]), float((empirical.get(p) or (np.inf,))[0] or np.inf))
                signal_steps[p] = signal_trotter.signal_trotter_steps(
                    self.model, self.experiments[x], nt.engine, t, p, float(ft_bound["split"]["trotter"]),
                    s.unit_hz, r_max=int(min(valid, 1 << 14)))
        tighter = {}
        for p in ORDERS:
            found = [v[0] for v in (empirical.get(p), signal_steps.get(p)) if v and v[0]]
            if found:
                tighter[p] = min(found)
        synthesise = self.model.n_spins <= SYNTHESIS_MAX_SPINS
        if synthesise:
            say("Clifford+T synthesis of one Trotter step (qiskit gridsynth)")
        ft_all = self._ft(r_comp, t, eps, x, self._n_terms[n], trotter_steps=tighter, synthesise=synthesise)
        order, ch = choose_order(ft_all)
        order = int(order)
        per_order = {}
        for p in ORDERS:
            c = ft_all[p]
            entry = {k: float(c[k]) for k in ("steps", "steps_trotter", "steps_trotter_bound", "steps_quadrature",
                                              "queries", "t_count", "t_depth", "gate_layers", "rotations",
                                              "depth_steps", "logical_qubits", "t_per_rotation", "step_t_depth")}
            entry["step_error_constant"] = self.trotter[x].constants[p]
            entry["step_error_constant_method"] = self.trotter[x].methods.get(p, "")
            if p in empirical:
                entry["steps_trotter_empirical"], entry["empirical_error"] = empirical[p]
            if signal_steps.get(p) and signal_steps[p][0]:
                entry["steps_trotter_signal"], entry["signal_error"] = signal_steps[p]
            per_order[str(p)] = entry
        # the same queries at the component's actual amplitude a = (1 + mu/R)/2 (mu: the engine, if any)
        a_exact = q_exact = None
        if has:
            _, g = nt.engine.gradient(self.experiments[x], times=[t], parameters=[nt.names[n]])
            a_exact = 0.5 * (1 + float(np.real(g[0, 0])) * s.unit_hz / r_comp)
            q_exact = amplitude_estimation.queries_for_amplitude_error(
                float(ft_all["split"]["estimation"]) / (2 * r_comp), a_exact)
        say("fault-tolerant full gradient")
        ftg = self._ft_gradient(strata, [t], eps)
        ft = {
            "logical_qubits": int(ch["logical_qubits"]),
            "trotter_order": order,
            "trotter_steps": int(ch["steps"]),
            "depth": int(ch["gate_layers"]),
            "t_depth": int(ch["t_depth"]),
            "clifford_layers": int(ch["clifford_layers"]),
            "step_t_depth": int(ch["step_t_depth"]),
            "step_rotation_depth": int(ch["step_rotation_depth"]),
            "trotter_steps_source": ("time quadrature" if ch["steps_quadrature"] > ch["steps_trotter"] else
                                     "signal and gradient error" if signal_steps.get(order) and
                                     ch["steps_trotter"] == signal_steps[order][0] else
                                     "exact propagator" if ch["steps_trotter"] < ch["steps_trotter_bound"] else
                                     "commutator bound"),
            "phase_qubits": int(ch["phase_qubits"]),
            "queries_total": int(ch["queries_total"]),
            "depth_trotter_steps": int(ch["depth_steps"]),
            "t_count": int(ch["t_count"]),
            "rotations": int(ch["rotations"]),
            "queries": int(ch["queries"]),
            "queries_at_exact_amplitude": q_exact,
            "exact_amplitude": a_exact,
            "t_per_rotation": float(ch["t_per_rotation"]),
            "t_per_rotation_rule": float(ch["t_per_rotation_rule"]),
            "rotation_error": float(ch["rotation_error"]),
            "synthesis": s.synthesis,
            "success_probability": amplitude_estimation.SUCCESS_PROBABILITY,
            "median_repetitions": amplitude_estimation.median_repetitions(s.delta),
            "worst_component": {"experiment": self.experiments[x].name, "parameter": nt.names[n], "range": r_comp},
            "orders": per_order,
            "gradient": {k: float(np.ravel(v)[0]) for k, v in ftg.items()} if ftg else None,
        }
        exact_variance_note = self._add_circuit_variance(near, t, eps)
        self._add_noisy_shots(near, methods_near, t, eps, x, n, ft_bound,
                              lambda: self._noisy_steps(order, ft_all, ft_bound, signal_steps))
        layers_shot = float(ch["layers_per_shot"])
        nt_layers = near["shots_per_component"] * layers_shot
        nt_best = min(nt_layers, (near["shots_per_component_circuit"] or math.inf) * layers_shot)
        nt_grad_layers = near["shots_per_gradient"] * layers_shot
        comparison = {
            "near_term_layers_per_shot": layers_shot,
            "near_term_total_layers_per_component": nt_layers,
            "fault_tolerant_total_layers_per_component": float(ch["gate_layers"]),
            "near_term_total_layers_per_gradient": nt_grad_layers,
            "fault_tolerant_total_layers_per_gradient": ftg["gate_layers"].item() if ftg else None,
            "near_term_total_layers_per_component_circuit": (near["shots_per_component_circuit"] * layers_shot
                                                             if near["shots_per_component_circuit"] else None),
            "fault_tolerant_cheaper": bool(ch["gate_layers"] < nt_best),
            "fault_tolerant_cheaper_per_gradient": bool(ftg["gate_layers"].item() < nt_grad_layers) if ftg else None,
        }
        sc = None
        if s.physical_error is not None:
            sc = surface_code.surface_code_estimate(ft["logical_qubits"], ft["depth"], ft["t_count"],
                                                    s.physical_error, s.cycle_time_s, s.failure_budget,
                                                    t_depth=ft["t_depth"]).to_json()
        err = {k: float(v) for k, v in ft_all["split"].items()}
        assumptions = all_assumptions(s)
        assumptions["exact_variance_used"] = exact_variance_note
        methods_near["shots_per_component_circuit"] = "exact" if near["shots_per_component_circuit"] else None
        tm = self.trotter[x]
        methods_ft = {k: "bound" for k in ("logical_qubits", "trotter_steps", "depth", "depth_trotter_steps",
                                           "t_count", "rotations", "queries")}
        methods_ft["queries_at_exact_amplitude"] = tier if has else None
        methods_ft["steps_trotter_empirical"] = "exact" if \
            per_order[str(order)].get("steps_trotter_empirical") is not None else None
        methods_ft["commutator_sums"] = tm.methods.get(order, "")
        methods_ft["quadrature_sums"] = getattr(self, "_quad_method", "")
        methods_ft["gate_counts_per_step"] = tm.counts_method
        methods = {"near_term": methods_near, "fault_tolerant": methods_ft,
                   "surface_code": "bound" if sc else None}
        sequences = self._sequence_counts(t, order, int(ch["steps"]), eps)
        if sequences:
            assumptions["sequence_circuits"] = SEQUENCE_ASSUMPTION
            assumptions["sequence_gradients"] = SEQUENCE_GRADIENT_ASSUMPTION
        notes = list(self.notes) + [
            f"sequence '{name}': {c['total']['steps']:,} Trotter steps (order {c['order']}; preparation "
            f"{c['preparation']['steps']:,} steps over {c['preparation']['delay_s']:g} s of delays and "
            f"{c['preparation']['pulses']} pulses), {c['total']['cx']:,} CX, {c['total']['rotations']:,} rotations; "
            f"the preparation's share {c['preparation_share']['cx']:.0%} of CX, "
            f"{c['preparation_share']['rotations']:.0%} of rotations" for name, c in (sequences or {}).items()]
        b = Budget(t, eps, near, ft, err, comparison, sc, assumptions, self.cluster.name, methods,
                   notes, dict(self.tiers), self._precision_hz(t, eps, hb), self.classical, sequences)
        return self._with_spinning(b, t, eps, order if order in NOISY_ORDERS else NOISY_ORDER, int(ch["steps"])
                                   if order in NOISY_ORDERS else None)

    # ------------------------------------------------------------------ spinning experiments
    def _init_spinning_only(self, say):
        """State of a cluster whose every experiment spins: no near-term or Trotter models; the exact engine (for
        the exact means of the worst components) up to SPINNING_EXACT_MAX_SPINS; the classical meter on the same
        FIDs without spinning (a lower bound: the time dependence only adds work)."""
        import dataclasses as _dc
        self.engine = self.estimator = self.near = self.classical = None
        self.trotter, self._quad, self._seq_trotter = [], [], {}
        small = self.model.n_spins <= SPINNING_EXACT_MAX_SPINS
        self.exact_plan = {"use_engine": small, "reason": "every experiment spins" + (
            "" if small else f"; exact means only up to {SPINNING_EXACT_MAX_SPINS} spins")}
        self.tiers = {"exact": "used (exact means of the spinning components)" if small else "skipped",
                      "estimated": "not available", "bound": "used"}
        if small:
            from ..exact.engine import ExactEngine
            self.engine = ExactEngine(self.model)
        if self.settings.classical_meter:
            from .classical_cost import classical_cost
            say("classical-cost meter (rates measured on this machine)")
            static = tuple(_dc.replace(ex, spinning_hz=0.0) for ex in self.spinning_experiments)
            self.classical = {**classical_cost(_dc.replace(self.cluster, experiments=static)).to_json(),
                              "covers": "the same FIDs without spinning: a lower bound for the spinning ones "
                                        "(the time dependence adds slices per rotor period)"}
        self._say = say

    def _with_spinning(self, budget, t, eps, order, steps):
        """`budget` with its 'spinning' entries (SPINNING_ASSUMPTION); `steps` the free-evolution budget's r."""
        if not self.spinning_experiments:
            return budget
        budget.spinning = [self._spinning_entry(ex, t, eps, order, steps) for ex in self.spinning_experiments]
        budget.assumptions["spinning_circuits"] = SPINNING_ASSUMPTION
        budget.notes = list(budget.notes) + [
            f"spinning '{e['name']}' ({e['spinning_hz']:g} Hz at {e['angle_deg']:.4g} deg): {e['trotter_steps']:,} "
            f"Trotter steps (order {e['trotter_order']}, {e['steps_from']}), signal circuit "
            f"{e['signal_circuit']['cx']:,} CX, {e['signal_circuit']['rotations']:,} rotations, depth "
            f"{e['signal_circuit']['depth']:,}, T-count {e['signal_circuit']['t_count']:,} ({e['counts_method']})"
            for e in budget.spinning]
        return budget

    def _spinning_only_budget(self, t, eps):
        """A cluster whose every experiment spins: the 'spinning' entries only; the top-level sections are empty
        (not covered: SPINNING_ASSUMPTION)."""
        say = getattr(self, "_say", lambda msg: None)
        say("spinning budget (every experiment spins)")
        assumptions = all_assumptions(self.settings)
        b = Budget(t, eps, {}, {}, {}, {}, None, assumptions, self.cluster.name,
                   {"near_term": {}, "fault_tolerant": {}, "surface_code": None}, list(self.notes), dict(self.tiers),
                   None, self.classical, None)
        return self._with_spinning(b, t, eps, NOISY_ORDER, None)

    def _spinning_entry(self, ex, t, eps, order, steps):
        """Per spinning experiment at acquisition time t: steps, signal- and gradient-circuit counts, T-count."""
        from ..circuits.circuit_counts import family_counts
        from ..circuits.spinning_circuits import (STEPS_RULE_TEXT, spinning_evolution, spinning_signal_circuit,
                                                  steps_rule)
        s = self.settings
        rotor = steps_rule(ex.spinning_hz, t)
        r = steps_rule(ex.spinning_hz, t, steps or 1)
        source = "rotor rule" if r == rotor else "free-evolution budget"
        small = self.model.n_spins <= SPINNING_ERROR_MAX_SPINS
        target = float(s.split_dict()["trotter"]) * eps
        known_error = None
        kappa = shots.observable_factor(int(sum(bool(o) for o in self.model.observed)))
        bound_model = rotor_bound_model(self.model, ex)
        r_bound = int(bound_model.steps(order, t, target / (2 * kappa)))
        if steps is None and small:
            # no free-evolution budget to follow: double r until the Richardson signal error is within the
            # Trotter share of eps (the rotor rule alone does not see the couplings' own Trotter error)
            known_error = self._spinning_signal_error(ex, t, r, order)
            while known_error > target and 2 * r <= SPINNING_ERROR_MAX_STEPS:
                r *= 2
                source = "signal error (Richardson) within the Trotter share"
                known_error = self._spinning_signal_error(ex, t, r, order)
        elif not small and r_bound > r:
            # larger clusters: no Richardson estimate; the commutator bound of H with every coupling at its
            # largest rotor factor, ||U_r - U|| <= target / (2 kappa) (a signal of range kappa moves by <= 2 kappa
            # times the operator error). The free-evolution budget's steps (mixed clusters) are for the static
            # couplings, which the rotor factors exceed, so they do not replace this bound.
            r = r_bound
            source = "commutator bound (couplings at their largest rotor factor), signal within the Trotter share"
        from ..circuits.step_counts import evolution_counts_rule
        from ..circuits.trotter import trotter_terms
        terms = trotter_terms(self.model, None)
        per_step_blocks = sum(len(g.blocks) for g in terms.groups)
        # the slots of every step are built only where they stay small; above, the count rule needs the terms
        # alone and the near-term range its integral bound (_spinning_near_term)
        evo = spinning_evolution(self.model, ex, t, r, order) if r * per_step_blocks <= SPINNING_SLOTS_MAX else None
        rule = evolution_counts_rule(terms, order, r)        # the spinning circuits' terms (s_n = 1), their slots
        n_blocks = r * per_step_blocks if evo is None else \
            sum(len(evo.terms.groups[sl.group].blocks) for sl in evo.slots)
        counts = None
        if self.model.n_spins <= SYNTHESIS_MAX_SPINS and n_blocks <= SPINNING_TRANSPILE_MAX_SLOTS:
            fam = spinning_signal_circuit(self.model, ex, t, r, order)
            counts = family_counts(fam)
            method = "transpiled ([cx, rz, sx, x], level 2, all-to-all), exact"
        else:
            counts = {"qubits": self.model.n_spins, **rule, "steps": r}
            method = "count rule (qhl.circuits.step_counts; all-to-all), estimate"
        rot = max(int(counts["rotations"]), 1)
        eps_rot = min(float(s.split_dict()["synthesis"]) * eps / rot, 0.5)
        t_rot = synthesis.t_count_per_rotation(eps_rot)
        signal = {k: int(counts[k]) for k in ("qubits", "cx", "rotations", "depth")}
        signal["t_count"] = int(math.ceil(int(counts["rotations"]) * t_rot))
        if "per_step" in counts:
            signal["per_step"] = counts["per_step"]
        w = max(len(label.replace("I", "")) for name in self.model.free
                for label in self.model.parameter(name).generator.paulis.to_labels())
        gradient = {"qubits": signal["qubits"] + 1, "cx": signal["cx"] + 2 * w,
                    "rotations": signal["rotations"] + 2 * w, "depth": signal["depth"] + 3 * w + 4,
                    "t_count": int(math.ceil((signal["rotations"] + 2 * w) * t_rot)),
                    "method": "signal circuit + one controlled-Pauli gadget (estimate)"}
        near = self._spinning_near_term(ex, evo, eps, t)
        worst = near["worst_parameter"]
        # amplitude estimation needs ||A~ - A|| <= e_T / (8R) (qhl.costing.fault_tolerant): at least the
        # commutator-bound steps of the rotor-bound Hamiltonian there; the circuit's counts scale with r
        r_ft = max(int(r), int(bound_model.steps(order, t, float(s.split_dict()["trotter"]) * eps
                                                 / (8 * max(near["component_range"], 1e-300)))))
        grow = r_ft / r
        ft = {"trotter_steps": r_ft,
              "steps_from": "commutator bound, ||A~ - A|| <= e_T / (8R) (couplings at their largest rotor factor)"
              if r_ft > r else "the signal circuit's steps",
              "amplitude_estimation": fixed_circuit_ft_counts(
                  near["component_range"], eps, r_ft, int(math.ceil(signal["rotations"] * grow)) + 2 * w,
                  int(math.ceil(signal["depth"] * grow)) + 3 * w + 4,
                  len(self.model.parameter(worst).generator), self.model.n_spins, int(sum(self.model.observed)),
                  s.split_dict(), s.delta),
              "parameter": worst,
              "method": "estimate (the gradient circuit's counts scaled to the steps; T-depth a bound, rotations "
                        "in series)"}
        err = None
        if small and r <= SPINNING_ERROR_MAX_STEPS:
            value = known_error if known_error is not None else self._spinning_signal_error(ex, t, r, order)
            err = {"value": value, "at_steps": r, "target": target,
                   "method": "|S_r - S_4r| 16/15 from the compiled circuits (Richardson, order 2; estimate)"
                   if order == 2 else "|S_r - S_4r| 4/3 from the compiled circuits (Richardson, order 1; estimate)"}
        return {"name": ex.name, "spinning_hz": float(ex.spinning_hz), "angle_deg": float(ex.spinning_angle_deg),
                "time_s": float(t), "rotor_periods": float(t * ex.spinning_hz), "trotter_order": int(order),
                "trotter_steps": int(r), "step_s": t / r, "steps_rule": STEPS_RULE_TEXT, "steps_rotor_rule": int(rotor),
                "steps_free_evolution": None if steps is None else int(steps),
                "steps_from": source,
                "signal_circuit": signal, "gradient_circuit": gradient, "near_term": near, "fault_tolerant": ft,
                "count_rule": rule,
                "counts_method": method, "rotation_error": eps_rot, "t_per_rotation_rule": float(t_rot),
                "signal_error": err}

    def _spinning_near_term(self, ex, evo, eps, t):
        """Worst gradient component of a spinning experiment: single-shot range of its compiled Hadamard estimator,
        R_n = 2 sum_a |beta_a| kappa unit_hz (beta_a of qhl.circuits.spinning_circuits.spinning_insertion_points:
        the time-dependent form of 2 t ||c_n||_1 2 pi |s_n| kappa, with t |s_n| -> sum_k tau |sbar_{n,k}|), and
        the shots R^2 / eps^2 and Hoeffding 2 R^2 ln(2/delta) / eps^2 (bounds). Without the slots (evo None: too
        many steps to list) sum_k tau |sbar_{n,k}| <= int_0^t |s_n(u)| du (the triangle inequality per step; the
        limit as r grows) gives R_n <= 2 (2 pi ||g_n||_1) int_0^t |s_n| kappa unit_hz."""
        s = self.settings
        kappa = shots.observable_factor(int(sum(bool(o) for o in self.model.observed)))
        if evo is None:
            ranges = self._spinning_range_bounds(ex, t, kappa)
            method = "bound: 2 (2 pi ||g_n||_1) int_0^t |s_n(u)| du kappa unit_hz (>= the compiled estimator's range)"
        else:
            from ..circuits.spinning_circuits import spinning_insertion_points
            ranges = {name: 2.0 * sum(abs(p.beta) for p in spinning_insertion_points(evo, name)) * kappa * s.unit_hz
                      for name in self.model.free}
            method = "bound: range of the compiled Hadamard estimator (2 sum |beta_a| kappa unit_hz)"
        name = max(ranges, key=ranges.get)
        rng = float(ranges[name])
        out = {"worst_parameter": name, "component_range": rng,
               "shots_per_component_bound": math.ceil(rng**2 / eps**2 * (1 - 1e-12)),
               "shots_per_component_hoeffding": shots.hoeffding_shots(rng, eps, s.delta),
               "shots_per_component_circuit": None,
               "method": method, "mean": None, "shots_per_component": None}
        if self.engine is not None and self.model.n_spins <= SPINNING_EXACT_MAX_SPINS:
            # the exact mean mu of the component (the exact spinning engine): shots lie in [-R, R], so the
            # variance is at most R^2 - mu^2 (Bhatia-Davis; qhl.costing.shots.two_valued_variance, reached by a
            # +-R estimator)
            try:
                _, g = self.engine.gradient(ex, times=[t], parameters=[name])
                mu = float(np.real(g[0, 0])) * s.unit_hz
                out["mean"] = mu
                out["shots_per_component"] = math.ceil(float(shots.two_valued_variance(rng, mu)) / eps**2
                                                       * (1 - 1e-12))
                out["method_mean"] = ("bound: variance <= R^2 - mu^2 with the exact mean mu (qhl.exact.spinning_engine; "
                                      "Bhatia-Davis for shots in [-R, R])")
            except MemoryBudgetError as e:
                self._note(f"spinning '{ex.name}': exact mean skipped: {e}")
        if evo is not None and evo.steps <= SEQUENCE_VARIANCE_MAX_STEPS and \
                family_variance.fits_circuit_variance(self.model.n_spins, s.circuit_variance_max_spins):
            from ..circuits.spinning_circuits import spinning_gradient_circuit
            from ..emulation.variance import family_moments
            fam = spinning_gradient_circuit(self.model, ex, name, evo.time, evo.steps, evo.order)
            mo = family_moments(fam, "re")
            out["shots_per_component_circuit"] = math.ceil(mo.variance * s.unit_hz**2 / eps**2 * (1 - 1e-12))
            out["method_circuit"] = "exact variance of the compiled estimator (qhl.emulation.variance), Re part"
        return out

    def _spinning_range_bounds(self, ex, t, kappa):
        """{free name: 2 (2 pi ||g_n||_1) int_0^t |s_n(u)| du kappa unit_hz} (_spinning_near_term); the integral
        over whole rotor periods plus the remainder, trapezoids on SPINNING_RANGE_GRID points per period (s_n is a
        trigonometric polynomial of degree 2: |s_n| has kinks only at its <= 4 zeros per period)."""
        from ..spins.spinning import spinning_factors
        sf = spinning_factors(self.model, ex)
        period = sf.period_s
        q, rem = divmod(float(t), period)
        grid = np.linspace(0.0, period, SPINNING_RANGE_GRID + 1)
        whole = np.trapezoid(np.abs(sf.at(grid)), grid, axis=0)                        # (P,)
        part = np.linspace(0.0, rem, max(2, int(math.ceil(SPINNING_RANGE_GRID * rem / period)) + 1))
        integral = q * whole + np.trapezoid(np.abs(sf.at(part)), part, axis=0)
        out = {}
        for name in self.model.free:
            k = self.model.names.index(name)
            g1 = float(np.abs(self.model.parameter(name).generator.coeffs).sum())
            out[name] = 2.0 * 2 * np.pi * g1 * float(integral[k]) * kappa * self.settings.unit_hz
        return out

    def _spinning_signal_error(self, ex, t, r, order):
        """Richardson estimate of the compiled signal's error at r steps from r and 4r (dense unitaries of the
        evolution circuits; small clusters)."""
        from qiskit.quantum_info import Operator
        from ..circuits.spinning_circuits import spinning_evolution, spinning_evolution_circuit
        n = self.model.n_spins
        require_memory("the spinning signal-error estimate", 16.0 * 4 ** n * 6)
        rho = self.model.initial_operator().to_matrix()
        det = self.model.detection_operator().to_matrix()
        vals = []
        for k in (r, 4 * r):
            u = Operator(spinning_evolution_circuit(spinning_evolution(self.model, ex, t, k, order))).data
            vals.append(np.trace(det @ u @ rho @ u.conj().T) / np.trace(det @ rho))
        fac = 2 ** (2 * order)
        return float(abs(vals[0] - vals[1]) * fac / (fac - 1))

    def _sequence_counts(self, t, order, steps, eps=None):
        """Per pulse-sequence experiment at acquisition time t: its signal-circuit counts (SEQUENCE_ASSUMPTION)
        and, with eps, the near-term shots and fault-tolerant counts of its worst gradient component
        (SEQUENCE_GRADIENT_ASSUMPTION; `_sequence_gradient`)."""
        if not self.sequence_experiments:
            return None
        out = {}
        for ex in self.sequence_experiments:
            delays = total_delay_s(ex)
            r = max(int(steps), math.ceil(steps * ((t + delays) / t) ** (1.0 / order) * (1 - 1e-12)))
            out[ex.name] = self._sequence_block(ex, t, order, r, eps)
            out[ex.name]["acquisition_steps_free_evolution"] = int(steps)
        return out

    def _sequence_block(self, ex, t, order, r, eps):
        """Signal-circuit counts of `ex` with r acquisition steps (delays at the same step length t / r) and,
        with eps, its gradient budget (_sequence_gradient)."""
        from ..circuits.sequence_circuits import acquisition_terms, sequence_counts
        c = sequence_counts(self.model, ex, t, r, order, terms=acquisition_terms(self.model, ex))
        c.update({"order": int(order), "step_s": t / r,
                  "method": "count rule (qhl.circuits.step_counts; all-to-all), estimate"})
        if eps is not None:
            c.update(self._sequence_gradient(ex, t, eps, c))
        return c

    def _sequence_only_budget(self, t, eps, its):
        """The budget of a cluster whose every experiment has pulse-sequence steps: per experiment the worst-range
        component, fault-tolerant counts (qhl.costing.fault_tolerant) over the whole evolution t + T_delays with
        that experiment's Hamiltonian (Trotter errors of the segments add: the bound for a free evolution of
        length t + T_delays), its signal/gradient circuit with the acquisition's share of those steps; the top
        level carries the experiment with the largest range (SEQUENCE_GRADIENT_ASSUMPTION)."""
        s = self.settings
        say = getattr(self, "_say", lambda msg: None)
        say("pulse-sequence budget (every experiment has steps)")
        chosen, sequences = [], {}
        for ex in self.sequence_experiments:
            total = t + total_delay_s(ex)
            scales = self.model.scale_factors(ex)[self.model.free_indices]
            ranges = sequence_gradient_range(t, ex, self.near.l1, scales, self.near.kappa, s.unit_hz)
            n = int(np.argmax(ranges))
            tm, quad = self._seq_trotter[ex.name]
            ft_all = ft_cost_arrays(float(ranges[n]), total, eps, tm, quad, self._n_terms[n], self.model.n_spins,
                                    s.split_dict(), s.synthesis, ORDERS, 1.0, delta=s.delta,
                                    n_observed=int(self.near.kappa))
            order, ch = choose_order(ft_all)
            order, r_total = int(order), int(ch["steps"])
            r_acq = max(1, math.ceil(r_total * t / total * (1 - 1e-12)))
            blk = self._sequence_block(ex, t, order, r_acq, eps)
            blk["fault_tolerant"].update({
                "logical_qubits": int(ch["logical_qubits"]), "steps_whole_evolution": r_total,
                "depth": int(ch["gate_layers"]), "t_depth": int(ch["t_depth"]), "t_count": int(ch["t_count"]),
                "rotations_fault_tolerant": int(ch["rotations"]), "queries": int(ch["queries"]),
                "trotter_steps_source": "time quadrature" if ch["steps_quadrature"] > ch["steps_trotter"]
                else "commutator bound", "error_split": {k: float(v) for k, v in ft_all["split"].items()}})
            sequences[ex.name] = blk
            chosen.append((float(ranges[n]), ex.name))
        worst = max(chosen)[1]
        blk = sequences[worst]
        near = dict(blk["near_term"], experiment=worst, iterations=its)
        ftw = blk["fault_tolerant"]
        ft = {k: ftw[k] for k in ("logical_qubits", "trotter_order", "depth", "t_depth", "t_count", "queries",
                                  "trotter_steps_source")}
        ft.update({"trotter_steps": ftw["steps_whole_evolution"], "rotations": ftw["rotations_fault_tolerant"],
                   "evolution_time_s": blk["evolution_time_s"], "gradient_circuit": ftw["gradient_circuit"],
                   "worst_component": {"experiment": worst, "parameter": near["worst_parameter"],
                                       "range": near["component_range"]},
                   "synthesis": s.synthesis})
        layers = float(ftw["gradient_circuit"]["depth"])
        best = near["shots_per_component_circuit"] or near["shots_per_component"]
        comparison = {"near_term_layers_per_shot": layers,
                      "near_term_total_layers_per_component": near["shots_per_component"] * layers,
                      "near_term_total_layers_per_component_circuit": (near["shots_per_component_circuit"] * layers
                                                                       if near["shots_per_component_circuit"] else None),
                      "fault_tolerant_total_layers_per_component": float(ft["depth"]),
                      "fault_tolerant_cheaper": bool(ft["depth"] < best * layers)}
        methods = {"near_term": dict(blk["methods"]),
                   "fault_tolerant": {k: "bound" for k in ("logical_qubits", "trotter_steps", "depth", "t_count",
                                                           "rotations", "queries")},
                   "sources": {"component_range": "qhl.costing.near_term.sequence_gradient_range (Banchi and Crooks "
                                                  "2021, whole Trotterised time)",
                               "shots_per_component_hoeffding": "qhl.costing.shots.hoeffding_shots (Hoeffding 1963)",
                               "shots_per_component": "R^2 - mu^2, mu from qhl.exact.sequence_engine"
                                                      if near["mean"] is not None else "R^2 (no exact mean)",
                               "shots_per_component_circuit": "qhl.emulation.variance.family_moments of "
                                                              "qhl.circuits.sequence_circuits.sequence_gradient_circuit",
                               "trotter_steps": "qhl.costing.fault_tolerant.ft_cost_arrays over t + T_delays",
                               "gradient_circuit": "qhl.circuits.sequence_circuits.sequence_counts + one "
                                                   "controlled-Pauli gadget"},
                   "surface_code": None}
        sc = None
        if s.physical_error is not None:
            sc = surface_code.surface_code_estimate(ft["logical_qubits"], ft["depth"], ft["t_count"],
                                                    s.physical_error, s.cycle_time_s, s.failure_budget,
                                                    t_depth=ft["t_depth"]).to_json()
            methods["surface_code"] = "bound"
        assumptions = all_assumptions(s)
        assumptions["sequence_circuits"] = SEQUENCE_ASSUMPTION
        assumptions["sequence_gradients"] = SEQUENCE_GRADIENT_ASSUMPTION
        notes = list(self.notes)
        return Budget(t, eps, near, ft, ftw["error_split"], comparison, sc, assumptions, self.cluster.name, methods,
                      notes, dict(self.tiers), None, self.classical, sequences)

    def _sequence_gradient(self, ex, t, eps, counts):
        """{evolution_time_s, near_term, fault_tolerant, methods} of the worst-range gradient component of one
        sequence experiment (module constant SEQUENCE_GRADIENT_ASSUMPTION states the model)."""
        s, nt = self.settings, self.near
        scales = self.model.scale_factors(ex)[self.model.free_indices]
        ranges = sequence_gradient_range(t, ex, nt.l1, scales, nt.kappa, s.unit_hz)
        n = int(np.argmax(ranges))
        name, rng = nt.names[n], float(ranges[n])
        near = {"worst_parameter": name, "component_range": rng,
                "shots_per_component_bound": math.ceil(rng**2 / eps**2 * (1 - 1e-12)),
                "shots_per_component_hoeffding": shots.hoeffding_shots(rng, eps, s.delta),
                "shots_per_component_circuit": None}
        methods = {"component_range": "bound", "shots_per_component_bound": "bound",
                   "shots_per_component_hoeffding": "bound", "shots_per_component": "bound",
                   "shots_per_component_circuit": None}
        mu = None
        if self.engine is not None:
            try:
                _, g = self.engine.gradient(ex, times=[t], parameters=[name])
                mu = float(np.real(g[0, 0])) * s.unit_hz
            except MemoryBudgetError as e:
                self._note(f"sequence '{ex.name}': exact mean skipped: {e}")
        near["mean"] = mu
        var = float(shots.two_valued_variance(rng, mu)) if mu is not None else rng**2
        near["shots_per_component"] = math.ceil(var / eps**2 * (1 - 1e-12))
        if mu is not None:
            methods["shots_per_component"] = "exact"
        circuit_steps = s.circuit_variance_steps * (1 + total_delay_s(ex) / t)
        if circuit_steps > SEQUENCE_VARIANCE_MAX_STEPS:
            self._note(f"sequence '{ex.name}': compiled estimator's variance skipped: about {circuit_steps:.0f} "
                       f"Trotter steps at the acquisition's step length (at most {SEQUENCE_VARIANCE_MAX_STEPS})")
        elif family_variance.fits_circuit_variance(self.model.n_spins, s.circuit_variance_max_spins):
            from ..circuits.sequence_circuits import sequence_gradient_circuit
            from ..emulation.variance import family_moments
            fam = sequence_gradient_circuit(self.model, ex, name, t, s.circuit_variance_steps,
                                            s.circuit_variance_order)
            mo = family_moments(fam, "re")
            near["shots_per_component_circuit"] = math.ceil(mo.variance * s.unit_hz**2 / eps**2 * (1 - 1e-12))
            near["circuit_range"] = float(mo.value_range * s.unit_hz)
            methods["shots_per_component_circuit"] = "exact"
        w = max(len(label.replace("I", "")) for label in self.model.parameter(name).generator.paulis.to_labels())
        tot = counts["total"]
        ft = {"trotter_order": counts["order"], "trotter_steps": int(tot["steps"]),
              "gadget": {"pauli_weight": int(w), "cx": 2 * int(w), "rotations": 2 * int(w), "depth": 3 * int(w) + 4},
              "gradient_circuit": {"cx": int(tot["cx"]) + 2 * int(w), "rotations": int(tot["rotations"]) + 2 * int(w),
                                   "depth": int(tot["depth"]) + 3 * int(w) + 4}}
        ft["amplitude_estimation"] = fixed_circuit_ft_counts(
            rng, eps, int(tot["steps"]), ft["gradient_circuit"]["rotations"], ft["gradient_circuit"]["depth"],
            len(self.model.parameter(name).generator), self.model.n_spins, int(sum(self.model.observed)), s.split_dict(),
            s.delta)
        methods.update({"trotter_steps": "bound", "gradient_circuit": "estimate (count rule)",
                        "amplitude_estimation": "estimate (count rule; T-depth a bound, rotations in series)"})
        return {"evolution_time_s": t + total_delay_s(ex), "total_delay_s": total_delay_s(ex), "near_term": near,
                "fault_tolerant": ft, "methods": methods}

    # ------------------------------------------------------------------ noise-aware near-term counts
    @staticmethod
    def _noisy_steps(order, ft_all, ft_bound, signal_steps):
        """(order, r, source, r_bound) of the noisy circuit: the budget's chosen order when the circuits build it
        (qhl.circuits: orders 1 and 2), else the circuit order with the fewest valid steps; r = that order's
        smallest valid Trotter count (min of the commutator bound, exact-propagator and signal-error counts,
        without the fault-tolerant time quadrature), r_bound its commutator-bound count."""
        if order not in NOISY_ORDERS:
            order = min(NOISY_ORDERS, key=lambda p: (float(ft_all[p]["steps_trotter"]), -p))
        steps = max(int(ft_all[order]["steps_trotter"]), 1)
        bound = max(int(ft_bound[order]["steps_trotter"]), 1)
        source = ("signal and gradient error" if signal_steps.get(order) and steps == signal_steps[order][0] else
                  "exact propagator" if steps < bound else "commutator bound")
        return order, steps, source, bound

    def _route(self, x, n, t, steps, order=NOISY_ORDER):
        """Routed one- and two-step Hadamard-test circuits of component (x, n) at Trotter order `order` on the
        target (cached; the per-step counts do not depend on t)."""
        if (x, n, order) not in self._routes:
            from ..circuits.gradient_circuits import gradient_circuit
            from ..circuits.routing import ROUTE_MAX_QUBITS, routed_step_counts
            width = self.model.n_spins + NOISY_ANCILLAS
            if width > ROUTE_MAX_QUBITS:
                self._routes[(x, n, order)] = {"computed": False, "reason": f"routing not computed: {width} circuit "
                                                                            f"qubits exceed the {ROUTE_MAX_QUBITS} routed here"}
                return self._routes[(x, n, order)]
            ex, name, tau = self.experiments[x], self.near.names[n], float(t) / float(steps)
            say = getattr(self, "_say", lambda m: None)
            say(f"routing the near-term circuit on {self.target.name}")
            self._routes[(x, n, order)] = routed_step_counts(
                lambda k: gradient_circuit(self.model, ex, name, k * tau, k, order), steps, self.target,
                progress=say if self.model.n_spins > 8 else None)
        return self._routes[(x, n, order)]

    def _add_noisy_shots(self, near, methods_near, t, eps, x, n, ft_bound, chosen=None):
        """Put shots_per_component_noisy, circuit_fidelity, mitigation, max_useful_time_s and routing into
        `near` (qhl.costing.noisy_shots, qhl.circuits.routing; None where no noise model is given).

        `chosen`: callable() -> (order, r, source, r_bound) from _noisy_steps, the budget's own valid step count
        (default: the commutator bound at NOISY_ORDER); called only when a noise model is given."""
        s = self.settings
        rates = s.error_rates(self.target.backend)
        near.update({"shots_per_component_noisy": None, "circuit_fidelity": None, "mitigation": None,
                     "max_useful_time_s": None, "routing": None})
        if self.target.all_to_all and not rates.given:
            return
        if chosen is None:
            b = max(int(ft_bound[NOISY_ORDER]["steps_trotter"]), 1)
            order, steps, source, bound = NOISY_ORDER, b, "commutator bound", b
        else:
            order, steps, source, bound = chosen()
        route = self._route(x, n, t, steps, order)
        routing = {"target": self.target.name, "computed": route["computed"], "trotter_order": order,
                   "trotter_steps": steps, "trotter_steps_source": source, "trotter_steps_bound": bound,
                   "circuit": f"Hadamard test of {self.near.names[n]} in {self.experiments[x].name}",
                   "error_rates": rates.source}
        near["routing"] = routing
        if not route["computed"]:
            routing["reason"] = route["reason"]
            self._note(f"noise-aware shots not computed: {route['reason']}")
            return
        from ..circuits.routing import extrapolate_counts
        one, two = route["one"], route["two"]
        at_r = extrapolate_counts(one, two, steps)
        routing.update({"method": route["method"], "two_qubit_gate": one.two_qubit_gate,
                        "two_qubit": at_r["two_qubit"], "depth": at_r["depth"], "swaps": at_r["swaps"],
                        "rotations": at_r["rotations"],
                        "per_step": {k: getattr(two, k) - getattr(one, k) for k in ("two_qubit", "depth", "swaps")},
                        "one_step": one.to_dict(), "two_steps": two.to_dict(), "layout": one.layout,
                        "layout_method": one.layout_method})
        if not rates.given:
            self._note(f"noise-aware shots need error rates: {self.target.name} has no calibration "
                       "(give --gate-error and --readout-error)")
            return
        f1 = noisy_shots.circuit_fidelity(one.transpiled, rates)
        f2 = noisy_shots.circuit_fidelity(two.transpiled, rates)
        fr = noisy_shots.extrapolate_fidelity(f1, f2, steps)
        noisy = float(noisy_shots.noisy_shots(near["shots_per_component_bound"], fr, s.mitigation))
        over = float(noisy_shots.mitigation_overhead(s.mitigation, fr))
        mitigation = {"method": s.mitigation, "overhead": over, "source": noisy_shots.ASSUMPTIONS["noisy_shots"]}
        if s.mitigation == "pec":
            mitigation["gamma"] = float(fr["gamma"])
        if s.mitigation == "zne":
            mitigation["noise_factors"] = list(noisy_shots.ZNE_FACTORS)
            mitigation["richardson_weights"] = noisy_shots.richardson_weights().tolist()
            mitigation["residual_attenuation"] = float(noisy_shots.zne_attenuation(fr))
        # the largest t whose noisy count stays under the cap: on the grid, the commutator-bound count of the
        # same order scaled by the ratio valid / bound found at t (ASSUMPTIONS['max_useful_time'])
        grid = t * np.geomspace(1e-3, 1e3, 241)
        rng = shots.gradient_shot_range(grid, self.near.l1[n], self.near.scales[x, n], self.near.kappa, s.unit_hz)
        r_bound_grid = np.asarray(self._ft(rng, grid, eps, x, self._n_terms[n])[order]["steps_trotter"], float)
        r_grid = np.maximum(np.ceil(r_bound_grid * (steps / bound) * (1 - 1e-12)), 1.0)
        counts = noisy_shots.noisy_shots(np.ceil(rng**2 / eps**2 * (1 - 1e-12)),
                                         noisy_shots.extrapolate_fidelity(f1, f2, r_grid), s.mitigation)
        t_max, k = noisy_shots.largest_time_below(grid, counts, s.max_shots)
        if k is not None and k == grid.size - 1:
            self._note(f"max_useful_time_s: the noisy count stays below {s.max_shots:g} up to the grid's end "
                       f"({grid[-1]:.3g} s, 1000 t): a lower bound")
        if k is None:
            self._note(f"max_useful_time_s: even t = {grid[0]:.3g} s needs more than {s.max_shots:g} shots")
        if not math.isfinite(noisy):
            self._note("shots_per_component_noisy: beyond floating-point range (the circuit fidelity underflows)")
        near.update({"shots_per_component_noisy": int(noisy) if math.isfinite(noisy) else None,
                     "circuit_fidelity": float(fr["fidelity"]), "mitigation": mitigation, "max_useful_time_s": t_max})
        routing.update({"log10_circuit_fidelity": float(fr["log_fidelity"]) / math.log(10),
                        "gate_fidelity": float(fr["gate_fidelity"]), "readout_fidelity": float(fr["readout_fidelity"]),
                        "max_shots": float(s.max_shots),
                        "max_useful_trotter_steps": None if k is None else int(r_grid[k]),
                        "fidelity_model": noisy_shots.ASSUMPTIONS["circuit_fidelity"]})
        methods_near["shots_per_component_noisy"] = "estimated"
        methods_near["circuit_fidelity"] = "estimated"

    def _note(self, note):
        if note not in self.notes:
            self.notes.append(note)

    def _precision_hz(self, t, eps, hessian_bound_sq):
        """eps (per unit_hz) on a derivative -> the parameter change in Hz it resolves (see all_assumptions)."""
        mu = self.near.worst_hessian_mean(t) if self.exact_plan["use_hessian"] else None
        mu = abs(mu) if mu is not None else None
        curv, method = (mu, self.near.method) if mu else (math.sqrt(hessian_bound_sq), "bound")
        if not curv:
            return None
        return {"value": eps / curv * self.settings.unit_hz, "method": method,
                "derivative_error_per_hz": eps / self.settings.unit_hz}

    def _add_circuit_variance(self, near, t, eps):
        """Put the compiled estimator's exact-variance count of the worst component into `near`
        (small clusters; the R^2 - mu^2 count otherwise) and say which one `near` carries."""
        s = self.settings
        x, n = self.near.worst_range_index()
        near["shots_per_component_circuit"] = None
        if not family_variance.fits_circuit_variance(self.model.n_spins, s.circuit_variance_max_spins):
            near["exact_variance_method"] = "two-valued"
            return (f"shots_per_component: R^2 - mu^2 (two-valued bound; {self.model.n_spins} spins exceed the "
                    f"{s.circuit_variance_max_spins} allowed for the compiled estimator's exact variance)")
        var, _, _ = family_variance.component_circuit_variance(
            self.model, self.experiments[x], self.near.names[n], t, s.circuit_variance_steps,
            s.circuit_variance_order, s.unit_hz)
        near["shots_per_component_circuit"] = math.ceil(var / eps**2)
        near["exact_variance_method"] = "circuit"
        return (f"shots_per_component_circuit: exact variance of the compiled Hadamard-test estimator of "
                f"{self.near.names[n]} in {self.experiments[x].name} (real part, {s.circuit_variance_steps} "
                f"Trotter steps, order {s.circuit_variance_order}); shots_per_component: R^2 - mu^2 (two-valued "
                "bound, kept for the sweeps)")

    # ------------------------------------------------------------------ sweeps
    def sweep(self, times, precisions, progress=None) -> BudgetSweep:
        """Budgets on the grid times x precisions (log grids in the CLI), with fitted exponents.

        One engine gradient call per experiment covers every time of the sweep; eps enters as
        1/eps^2 for the near-term counts and through the vectorised fault-tolerant formulas.
        """
        if self.spinning_only:
            raise QhlInputError("sweeps (and their --plot) of a cluster whose every experiment spins are not covered "
                                "yet: give one --time and --precision", key="--sweep-time")
        if self.sequence_only:
            raise QhlInputError("sweeps of a cluster whose every experiment has pulse-sequence steps are not "
                                "covered yet: give one --time and --precision", key="--sweep-time")
        times = np.atleast_1d(np.asarray(times, float))
        precisions = np.atleast_1d(np.asarray(precisions, float))
        shots.check_time(times, "sweep-time")
        shots.check_precision(precisions, "sweep-precision")
        nt = self.near
        e2 = precisions[None, :] ** 2
        if progress:
            progress("near-term variances")
        vb, ve = nt.component_variances(times)
        strata = nt.gradient_strata(times)
        nan = np.full(times.shape, np.nan)       # exact columns without an engine (bound tier)
        tables = {
            "near_term_component_bound": vb[:, None] / e2,
            "near_term_component_exact": (nan if ve is None else ve)[:, None] / e2,
            "near_term_hessian_entry_bound": nt.hessian_bound_over_t(times)[:, None] / e2,
            "near_term_gradient_exact": (nan if strata["opt_exact"] is None
                                         else np.sum(strata["opt_exact"], axis=1))[:, None] / e2,
            "near_term_gradient_uniform_exact": (nan if strata["uni_exact"] is None
                                                 else np.sum(strata["uni_exact"], axis=1))[:, None] / e2,
        }
        if progress:
            progress("fault-tolerant counts")
        x, n = nt.worst_range_index()
        r = shots.gradient_shot_range(times, nt.l1[n], nt.scales[x, n], nt.kappa, self.settings.unit_hz)
        order, ch = choose_order(self._ft(r[:, None], times[:, None], precisions[None, :], x, self._n_terms[n]))
        tables.update({
            "fault_tolerant_t_count": ch["t_count"],
            "fault_tolerant_depth": ch["gate_layers"],
            "fault_tolerant_trotter_steps": ch["steps"],
            "fault_tolerant_logical_qubits": ch["logical_qubits"],
            "near_term_total_layers": (tables["near_term_component_bound"] if ve is None
                                       else tables["near_term_component_exact"]) * ch["layers_per_shot"],
            "fault_tolerant_total_layers": ch["gate_layers"],
        })
        exps = {}
        for name, (et, ee) in EXPECTED_EXPONENTS.items():
            b, c = fit_exponents(times, precisions, tables[name])
            exps[name] = (b, c, et, ee)
        p = int(np.bincount(np.ravel(order)).argmax())
        b, c = fit_exponents(times, precisions, tables["fault_tolerant_depth"])
        exps["fault_tolerant_depth"] = (b, c, 2.0 + 2.0 / p, -1.0 - 1.0 / p)
        wins = tables["fault_tolerant_total_layers"] < tables["near_term_total_layers"]
        cross = []
        for i, t in enumerate(times):
            ok = np.nonzero(wins[i])[0]
            cross.append({"time_s": float(t), "largest_precision_ft_cheaper": float(precisions[ok].max()) if ok.size else None})
        return BudgetSweep(times, precisions, tables, order, exps, cross)
