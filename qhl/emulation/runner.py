"""Run a compiled circuit family on qiskit-aer with shots: grouped settings, one bind per setting.

Scheme (common practice for sampled circuit ensembles). For N shots of one part (Re or Im):
  1. draw the N per-shot settings from the family (CircuitFamily.sample: insertion row by
     |w_ins|, input state from the ensemble) with the caller's numpy Generator;
  2. group equal settings (np.unique over the rows of [parameter values, scale]): setting g
     gets its multinomial share n_g of the N shots;
  3. transpile the family circuit (with measurements) once, and simulate each distinct setting
     once, binding its parameter values into that circuit through Aer's `parameter_binds`.
Without gate noise the statevector is sampled, so one run call simulates every setting with
max_g n_g shots and setting g keeps a uniformly random n_g of them (a multivariate
hypergeometric draw: a random subset of i.i.d. shots is i.i.d.). With gate noise every shot is a
separate noisy trajectory, so settings are batched by n_g rounded up to a power of two (a few run
calls, at most twice the shots). The single-shot value is scale_g * a, with a the observable's
eigenvalue on the measured bit string.

Fast path (default without noise; qhl.emulation.fast_path): step 3 is replaced by the exact
outcome probabilities p_g of every distinct setting from numpy state vectors, and setting g's
n_g shots are n_g i.i.d. draws from p_g (inverse transform sampling; common practice). Aer
stays for noisy runs, for `method='aer'`, and for `audit`: a random subset of the distinct
settings whose probabilities Aer's statevector method (save_probabilities) must reproduce to
AUDIT_TOLERANCE.

Aer binding (`binding`): 'runtime' (default) hands Aer the parameterised template with all the
value sets of a run call and lets it bind them at run time (AerSimulator option
runtime_parameter_bind_enable, qiskit-aer documentation), and, with gate noise, runs setting g
with exactly n_g shots: the settings are grouped by their shot count, one run call per distinct
count (no extra shots). 'per-setting' is the previous scheme (Aer builds one bound circuit per
value set; noisy settings in power-of-two buckets). Under 'runtime', a noisy setting with many
shots (n_g >= DENSITY_BREAK_EVEN * 2^q, q <= DENSITY_MAX_QUBITS qubits) runs once on Aer's
density-matrix method and its n_g shots are sampled from that noisy state (readout error
included), which costs about as much as 0.5 * 2^q trajectories (measured on the benchmark's
6-qubit circuits); all such settings go in one call with the largest count, each keeping a
random n_g of its shots (as without noise). Both draw every shot from the same circuit
and noise model, so they agree in distribution (checked in tests/test_emulator_batch.py). The
template drops the transpiled circuit's global phase under runtime binding (a global phase
changes no outcome probability; qiskit-aer 0.18 cannot bind a parameterised one at run time).
`run_batch` runs many families (e.g. every parameter and time of a gradient) with one Aer run
call per shot count for all of them together (at most MAX_BINDS_PER_CALL value sets per call).
Transpiled templates are cached per circuit (TEMPLATE_CACHE_SIZE of them), so a family compiled
again is not transpiled again.

Sampling (qhl.circuits.circuit_family.CircuitFamily.sample): 'stratified' (default: fixed shots
per insertion row, the standard error from the within-row variances) or 'iid' (the original
scheme: rows drawn per shot).

Seeds: the Generator drives the draws and Aer's seed_simulator (drawn from it), and Aer runs
single-threaded, so the same seed gives the same numbers.
"""

import time as _time

import os
import sys
from collections import OrderedDict

import numpy as np

from ..circuits.circuit_family import PARTS, SAMPLINGS
from ..base.errors import MemoryBudgetError, QhlInputError
from ..base.blas import single_thread_blas
from ..base.memory import require_memory
from .estimate import Estimate
from .noise import NOISY_BASIS, NoiseSpec, noisy_layers

__all__ = ["FamilyRunner", "outcome_values", "observable_masks", "values_of_outcomes", "group_settings", "METHODS",
           "AUDIT_TOLERANCE", "BINDINGS", "run_batch", "clear_templates"]

METHODS = ("auto", "fast", "aer", "mps")
BINDINGS = ("runtime", "per-setting")
DENSITY_MAX_QUBITS = 10      # noisy settings may run as density matrices up to this many qubits
DENSITY_BREAK_EVEN = 0.5     # ... when they have >= 0.5 * 2^q shots (benchmarks/bench_emulator.py --noisy)
MAX_BINDS_PER_CALL = 20_000   # value sets per Aer run call (bounds the result objects held at once)
TEMPLATE_CACHE_SIZE = 64
_TEMPLATES: "OrderedDict" = OrderedDict()
_NOTES: set = set()
AUDIT_TOLERANCE = 1e-9
MAX_TABLE_BITS = 20      # outcome-value tables up to 2^20 entries; beyond, values per measured key


def outcome_values(family) -> np.ndarray:
    """Eigenvalue of `family.observable` for each measured bit string (clbit k = measured_qubits[k]).

    Returns:
        (2^m,) real array indexed by the integer whose bit k is clbit k.

    Raises:
        QhlInputError: a non-diagonal observable; MemoryBudgetError: a table that would not fit.
    """
    masks = observable_masks(family)
    m = len(family.measured_qubits)
    require_memory("the outcome-value table", 16.0 * 2 ** m)
    return values_of_outcomes(masks, np.arange(2 ** m, dtype=np.int64))


_ANGLE_CODES = (0.0, np.pi, np.pi / 2, -np.pi / 2)   # |0>, |1>, |+>, |-> (qhl.circuits.state_prep)


def settings_bytes(shots: int, parameters: int, inputs: int) -> float:
    """Peak memory (bytes) of one run's per-shot settings: the (shots, parameters) float64 values and
    the insertion angles gathered into them (a temporary of about the same size), the input angles
    with their codes and masks (26 bytes per input qubit and shot) and about 100 bytes per shot of
    rows, scales, keys, sort and outcome arrays (counted from _prepare and _draw_fast; checked against
    tracemalloc in tests/test_fast_path_memory.py)."""
    return float(shots) * (16.0 * parameters + 26.0 * inputs + 100.0)


def _distinct_settings(settings, prep):
    """(index of the first shot of every distinct setting, shots per setting).

    A setting is fixed by its insertion row and its input (the part is the same for all shots,
    and the scale follows from row and input), so shots are keyed by row * 4^n + input code
    (two bits per qubit for the four ry angles); other angles fall back to np.unique over rows.
    """
    angles = settings.values[:, prep]
    code = np.zeros(len(angles), np.int64)
    known = np.zeros(angles.shape, bool)
    for c, a in enumerate(_ANGLE_CODES):
        hit = angles == a
        known |= hit
        code += (hit * c * (4 ** np.arange(angles.shape[1]))).sum(axis=1)
    if not known.all() or angles.shape[1] > 25:
        key = np.column_stack([settings.insertion_rows, angles, settings.scale])
        _, first, counts = np.unique(key, axis=0, return_index=True, return_counts=True)
        return first, counts
    key = settings.insertion_rows.astype(np.int64) * 4 ** angles.shape[1] + code
    _, first, counts = np.unique(key, return_index=True, return_counts=True)
    return first, counts


def observable_masks(family):
    """[(coefficient, bit mask over classical bits)] of the diagonal family observable, so that the
    value of outcome o is sum_c coefficient_c (1 - 2 parity(o & mask_c)) (no 2^m table)."""
    where = {q: k for k, q in enumerate(family.measured_qubits)}
    obs = family.observable
    if np.any(obs.paulis.x):
        raise QhlInputError("the family observable must be diagonal (Z's only)", key="observable")
    out = []
    for zrow, c in zip(obs.paulis.z, obs.coeffs):
        mask = 0
        for q in np.flatnonzero(zrow):
            if int(q) not in where:
                raise QhlInputError(f"observable acts on unmeasured qubit {q}", key="observable")
            mask |= 1 << where[int(q)]
        out.append((float(np.real(c)), mask))
    return out


def values_of_outcomes(masks, outcomes) -> np.ndarray:
    """Observable values of integer outcomes (any number of classical bits up to 62)."""
    outcomes = np.asarray(outcomes, np.int64)
    vals = np.zeros(outcomes.shape)
    for c, mask in masks:
        vals += c * (1.0 - 2.0 * (np.bitwise_count(outcomes & np.int64(mask)) & 1).astype(float))
    return vals


def group_settings(settings):
    """(distinct rows of [values, scale], shot count of each) for ShotSettings `settings`."""
    key = np.column_stack([settings.values, settings.scale])
    rows, counts = np.unique(key, axis=0, return_counts=True)
    return rows, counts


def clear_templates() -> None:
    """Forget the cached transpiled templates."""
    _TEMPLATES.clear()


_PASS_MANAGERS: dict = {}


def _pass_manager(noiseless: bool, simulator):
    """The preset pass manager of the templates, built once per kind (building one reads the
    simulator's target, about 0.2 s; qiskit.transpiler.generate_preset_pass_manager)."""
    from qiskit.transpiler import generate_preset_pass_manager

    key = ("aer", simulator.options.method) if noiseless else ("noisy",)
    if key not in _PASS_MANAGERS:
        if noiseless:
            _PASS_MANAGERS[key] = generate_preset_pass_manager(optimization_level=0, backend=simulator)
        else:
            _PASS_MANAGERS[key] = generate_preset_pass_manager(optimization_level=1, basis_gates=list(NOISY_BASIS))
    return _PASS_MANAGERS[key]


def _circuit_key(qc):
    """A hashable description of a circuit: gates, qubits, clbits and parameters (names or values)."""
    ops = tuple((inst.operation.name, tuple(qc.find_bit(q).index for q in inst.qubits),
                 tuple(qc.find_bit(c).index for c in inst.clbits),
                 tuple(str(p) for p in inst.operation.params)) for inst in qc.data)
    return qc.num_qubits, qc.num_clbits, str(qc.global_phase), ops


class FamilyRunner:
    """Estimates the Re/Im parts of one CircuitFamily with shots (fast path or AerSimulator).

    Args:
        family: a qhl.circuits.circuit_family.CircuitFamily.
        noise: NoiseSpec or None (noiseless).
        threads: Aer threads, spent on running distinct settings in parallel (default: all
            cores). Results do not depend on it: Aer seeds each bound setting from
            `seed_simulator` and its index (checked in tests/test_emulator.py).
        method: 'auto' (default: the numpy fast path for noiseless signal, Hadamard-gradient and
            Hessian families (Hessians up to fast_path.MAX_FAST_QUBITS spins; beyond it signal and
            gradient families in its streaming mode while its memory estimate fits, else Aer's
            statevector method with a one-line note on stderr), Aer's statevector method
            otherwise), 'fast' (refuse when it does not apply), 'aer' (statevector) or 'mps'
            (Aer's matrix_product_state method, for clusters beyond the statevector memory).
        mps_truncation, mps_max_bond: Aer's matrix_product_state_truncation_threshold (Schmidt
            coefficients are dropped while the discarded weight stays below it; Aer's default
            1e-16) and matrix_product_state_max_bond_dimension (None: unbounded), qiskit-aer
            documentation. With the defaults the MPS is exact up to rounding; a bound on the bond
            dimension makes it an approximation whose error Aer does not report.
        sampling: 'stratified' (default) or 'iid' (see CircuitFamily.sample).
        audit: distinct settings per run whose fast-path probabilities are recomputed by Aer
            (statevector method) and must agree to AUDIT_TOLERANCE (0: none).
        binding: 'runtime' (default) or 'per-setting' (Aer path; module docstring). The MPS method
            binds per setting (runtime binding is documented for the statevector-like methods)
            but shares the batching and the exact shot counts of 'runtime'.

    Attributes:
        transpiled: the measured, transpiled circuit that every setting binds (built on first use).
        layers: noisy layers L of `transpiled` (qhl.emulation.noise), 0 without gate noise.
        uses_fast_path: whether `run` computes probabilities with numpy.
    """

    def __init__(self, family, noise: NoiseSpec | None = None, threads: int | None = None, *,
                 method: str = "auto", sampling: str = "stratified", audit: int = 0,
                 mps_truncation: float = 1e-16, mps_max_bond: int | None = None, binding: str = "runtime"):
        from .fast_path import FastFamily, supports_fast_path

        if method not in METHODS:
            raise QhlInputError(f"unknown emulator method '{method}': expected {', '.join(METHODS)}", key="method")
        if binding not in BINDINGS:
            raise QhlInputError(f"unknown Aer binding '{binding}': expected {' or '.join(BINDINGS)}", key="binding")
        self.binding = binding
        if sampling not in SAMPLINGS:
            raise QhlInputError(f"unknown sampling '{sampling}': expected {' or '.join(SAMPLINGS)}", key="sampling")
        self.family = family
        self.noise = noise if noise is not None else NoiseSpec()
        self.threads = int(threads or os.cpu_count() or 1)
        self.sampling, self.audit_settings = sampling, int(audit)
        self.method = method
        self.mps_options = dict(matrix_product_state_truncation_threshold=float(mps_truncation),
                                matrix_product_state_max_bond_dimension=mps_max_bond)
        fast_ok = self.noise.is_noiseless and supports_fast_path(family)
        if method == "fast" and not fast_ok:
            raise QhlInputError("the fast path needs a noiseless signal, Hadamard-gradient or Hessian family",
                                key="method")
        self.uses_fast_path = fast_ok and method in ("auto", "fast")
        self.fast = None
        if self.uses_fast_path:
            try:
                self.fast = FastFamily(family)
            except MemoryBudgetError as err:
                if method == "fast":
                    raise
                self.uses_fast_path = False
                note = (f"qhl: the numpy fast path does not fit ({err.needed_bytes / 2 ** 30:.2f} GiB estimated, "
                        f"{err.available_bytes / 2 ** 30:.2f} GiB available): using Aer's statevector method")
                if note not in _NOTES:           # once per process, not once per family
                    _NOTES.add(note)
                    print(note, file=sys.stderr)
        self._transpiled = self._simulator = self._audit_circuit = self._template = self._density = None
        self.masks = observable_masks(family)
        m = len(family.measured_qubits)
        self.values = outcome_values(family) if m <= MAX_TABLE_BITS else None
        self.last_audit = None

    # ---------------------------------------------------------------- Aer, built on first use
    def _build_aer(self):
        from qiskit_aer import AerSimulator

        runtime = self.binding == "runtime" and self.method != "mps"
        opts = dict(method="statevector", max_parallel_threads=self.threads,
                    max_parallel_experiments=self.threads, max_parallel_shots=1,
                    runtime_parameter_bind_enable=runtime)
        nq = self.family.circuit.num_qubits
        if self.method == "mps":
            opts.update(method="matrix_product_state", **self.mps_options)
        else:
            require_memory(f"Aer statevectors of {nq} qubits ({self.threads} in parallel; use method='mps')",
                           16.0 * 2 ** nq * self.threads * (1 if self.noise.is_noiseless else 2))
        if self.noise.is_noiseless:
            self._simulator = AerSimulator(**opts)
        else:
            self._simulator = AerSimulator(noise_model=self.noise.noise_model(), **opts)
        measured = self.family.with_measurements(self.family.circuit)
        key = (_circuit_key(measured), self.noise.is_noiseless, self.method == "mps")
        if key in _TEMPLATES:
            _TEMPLATES.move_to_end(key)
            tqc = _TEMPLATES[key]
        else:
            tqc = _pass_manager(self.noise.is_noiseless, self._simulator).run(measured)
            _TEMPLATES[key] = tqc
            while len(_TEMPLATES) > TEMPLATE_CACHE_SIZE:
                _TEMPLATES.popitem(last=False)
        self._transpiled = tqc
        if runtime:
            tqc = tqc.copy()
            tqc.global_phase = 0.0
        self._template = tqc
        order = {p.name: k for k, p in enumerate(self.family.circuit.parameters)}
        self._bound = [(p, order[p.name]) for p in self._transpiled.parameters]   # cached: match by name

    @property
    def template(self):
        """The circuit handed to Aer (the transpiled circuit; without global phase under runtime binding)."""
        if self._transpiled is None:
            self._build_aer()
        return self._template

    @property
    def transpiled(self):
        if self._transpiled is None:
            self._build_aer()
        return self._transpiled

    @property
    def simulator(self):
        if self._simulator is None:
            self._build_aer()
        return self._simulator

    @property
    def layers(self) -> int:
        return noisy_layers(self.transpiled) if self.noise.has_gate_noise else 0

    @property
    def observable_weight(self) -> int:
        """Z's per observable term (w of the readout factor (1 - 2q)^w)."""
        return int(np.max(np.sum(self.family.observable.paulis.z, axis=1)))

    def _simulate(self, rows, shots, seed):
        """[(outcome integers, counts)] per row from one Aer run of every row with `shots` shots."""
        template = self.template
        binds = {p: rows[:, k].tolist() for p, k in self._bound}
        result = self.simulator.run(template, parameter_binds=[binds] if binds else None, shots=int(shots),
                                    seed_simulator=int(seed)).result()
        if not result.success:
            raise RuntimeError(f"Aer run failed: {result.status}")
        out = []
        for i in range(len(rows)):
            counts = result.data(i)["counts"]
            out.append((np.array([int(k, 16) for k in counts], np.int64), np.array(list(counts.values()), np.int64)))
        return out

    def aer_probabilities(self, rows) -> np.ndarray:
        """Exact outcome probabilities (len(rows), 2^m) of parameter rows from Aer's statevector
        method (save_probabilities on the measured qubits; qiskit-aer documentation)."""
        from qiskit import transpile
        from qiskit_aer import AerSimulator

        if self._audit_circuit is None:
            qc = self.family.circuit.copy()
            qc.save_probabilities(list(self.family.measured_qubits))
            sim = AerSimulator(method="statevector", max_parallel_threads=1)
            tqc = transpile(qc, sim, optimization_level=0)
            order = {p: k for k, p in enumerate(self.family.circuit.parameters)}
            self._audit_circuit = (sim, tqc, [(p, order[p]) for p in tqc.parameters])
        sim, tqc, bound = self._audit_circuit
        rows = np.atleast_2d(rows)
        binds = {p: rows[:, k].tolist() for p, k in bound}
        result = sim.run(tqc, parameter_binds=[binds] if binds else None).result()
        return np.array([np.asarray(result.data(i)["probabilities"], float) for i in range(len(rows))])

    def template_probabilities(self, rows, binding: str = "runtime") -> np.ndarray:
        """Outcome probabilities (len(rows), 2^m) of the transpiled template bound to parameter rows.

        The template's final measurements are replaced by save_probabilities on the measured
        qubits (clbit order), run by Aer's density-matrix method with the gate noise of the run
        (statevector without it; readout error is not part of saved probabilities), binding all
        rows at run time ('runtime'), one bound circuit per row built by Aer ('per-setting'), or
        each row bound by qiskit's assign_parameters and run alone ('qiskit', a reference).
        """
        from qiskit import QuantumCircuit
        from qiskit_aer import AerSimulator

        tqc = self.transpiled
        where = {}
        runtime = binding == "runtime"
        body = QuantumCircuit(*tqc.qregs, name=tqc.name, global_phase=0.0 if runtime else tqc.global_phase)
        for inst in tqc.data:
            if inst.operation.name == "measure":
                where[tqc.find_bit(inst.clbits[0]).index] = tqc.find_bit(inst.qubits[0]).index
            elif inst.operation.name != "barrier":
                body.append(inst.operation, [body.qubits[tqc.find_bit(q).index] for q in inst.qubits])
        body.save_probabilities([where[k] for k in range(len(where))])
        gate_noise = self.noise.has_gate_noise
        opts = dict(method="density_matrix" if gate_noise else "statevector", max_parallel_threads=1,
                    runtime_parameter_bind_enable=bool(runtime))
        if gate_noise:
            opts["noise_model"] = NoiseSpec(self.noise.depolarizing).noise_model()
        sim = AerSimulator(**opts)
        rows = np.atleast_2d(rows)
        if binding == "qiskit":
            bound = [body.assign_parameters({p: float(r[k]) for p, k in self._bound}) for r in rows]
            result = sim.run(bound).result()
        else:
            binds = {p: rows[:, k].tolist() for p, k in self._bound}
            result = sim.run(body, parameter_binds=[binds] if binds else None).result()
        if not result.success:
            raise RuntimeError(f"Aer run failed: {result.status}")
        return np.array([np.asarray(result.data(i)["probabilities"], float) for i in range(len(rows))])

    # ---------------------------------------------------------------- runs
    def run(self, shots: int, rng, part: str = "re") -> Estimate:
        """Estimate Re X (part 're') or Im X ('im') of the family with `shots` shots.

        Args:
            shots: N >= 1.
            rng: numpy Generator (draws settings, outcomes, seeds Aer).

        Returns:
            Estimate (per-shot sums, N, distinct settings computed, wall seconds; stratified:
            the variance of its mean).

        Raises:
            QhlInputError: shots < 1 or an unknown part.
            RuntimeError: an audited setting whose probabilities disagree with Aer's.
        """
        if int(shots) != shots or shots < 1:
            raise QhlInputError(f"expected shots >= 1, got {shots!r}", key="--shots")
        if part not in PARTS:
            raise QhlInputError(f"unknown part '{part}': expected re or im", key="part")
        start = _time.perf_counter()
        require_memory(f"{int(shots):,} shots of a circuit with {self.family.num_parameters:,} parameters",
                       settings_bytes(int(shots), self.family.num_parameters, len(self.family._index["prep"])),
                       hint="use fewer --shots or --steps")
        prep = self._prepare(int(shots), rng, part)
        if self.uses_fast_path:
            with single_thread_blas(2 ** self.fast.n):
                per_row, per_row_sq = self._draw_fast(prep["params"], prep["ins_rows"], prep["scale"],
                                                      prep["counts"], part, rng)
        else:
            per_row, per_row_sq = self._draw_aer(prep["params"], prep["counts"], rng)
        return self._finish(prep, per_row, per_row_sq, _time.perf_counter() - start)

    def _prepare(self, shots, rng, part):
        """The run's shot settings, grouped: {settings, params, scale, ins_rows, counts, shots}."""
        settings = self.family.sample(rng, int(shots), part, self.sampling)
        first, counts = _distinct_settings(settings, self.family._index["prep"])
        return dict(settings=settings, params=settings.values[first], scale=settings.scale[first],
                    ins_rows=settings.insertion_rows[first], counts=counts, shots=int(shots))

    def _finish(self, prep, per_row, per_row_sq, seconds) -> Estimate:
        """The Estimate from the per-setting sums of a and a^2 (stratified variance when stratified)."""
        settings, scale, ins_rows, shots = prep["settings"], prep["scale"], prep["ins_rows"], prep["shots"]
        total = float(np.sum(scale * per_row))
        total_sq = float(np.sum(scale ** 2 * per_row_sq))
        strat = None
        if settings.strata is not None:
            n_j = settings.strata.astype(float)
            s_j = np.bincount(ins_rows, scale * per_row, len(n_j))
            q_j = np.bincount(ins_rows, scale ** 2 * per_row_sq, len(n_j))
            live = n_j >= 2
            var_j = np.zeros(len(n_j))
            var_j[live] = np.maximum(0.0, (q_j[live] - s_j[live] ** 2 / n_j[live]) / (n_j[live] - 1))
            strat = float(np.sum((n_j[live] / shots) ** 2 * var_j[live] / n_j[live]))
        return Estimate(total, total_sq, int(shots), len(prep["counts"]), seconds, strat)

    def _draw_fast(self, params, ins_rows, scale, counts, part, rng):
        """(sum of a, sum of a^2) over each distinct setting's shots, drawn from exact probabilities.

        Setting g's counts[g] outcomes are i.i.d. draws from p_g by inverse transform sampling (one
        uniform number per shot, searchsorted in the cumulative p_g; common practice).
        """
        prep = self.family._index["prep"]
        live = scale != 0                          # zero-weight inputs add 0 whatever they measure
        per_row, per_row_sq = np.zeros(len(params)), np.zeros(len(params))
        if not np.any(live):
            return per_row, per_row_sq
        idx = np.flatnonzero(live)
        angles, inputs = np.unique(params[idx][:, prep], axis=0, return_inverse=True)
        probs = np.clip(self.fast.probabilities(angles, ins_rows[idx], inputs.ravel(), part), 0.0, None)
        cdf = np.cumsum(probs, axis=1)
        cdf /= cdf[:, -1:]
        cdf[:, -1] = 1.0 + 1e-12
        k = cdf.shape[1]
        shot_setting = np.repeat(np.arange(len(idx)), counts[idx])
        u = rng.random(len(shot_setting))
        flat = (cdf + 2.0 * np.arange(len(idx))[:, None]).ravel()
        outcome = np.searchsorted(flat, u + 2.0 * shot_setting, side="right") - shot_setting * k
        a = self.values[outcome]
        per_row[idx] = np.bincount(shot_setting, a, len(idx))
        per_row_sq[idx] = np.bincount(shot_setting, a * a, len(idx))
        if self.audit_settings > 0:
            pick = rng.choice(len(idx), size=min(self.audit_settings, len(idx)), replace=False)
            ref = self.aer_probabilities(params[idx][pick])
            diff = float(np.max(np.abs(ref - probs[pick])))
            self.last_audit = diff
            if not diff <= AUDIT_TOLERANCE:
                raise RuntimeError(f"fast path disagrees with Aer by {diff:.3g} on audited settings "
                                   f"(tolerance {AUDIT_TOLERANCE:g})")
        return per_row, per_row_sq

    def _aer_blocks(self, counts):
        """[(simulation kind, shots of a run call, indices of the settings it runs)] (module docstring);
        kind 'density' for noisy settings with at least `density_from` shots, else 'shots'."""
        if self.noise.has_gate_noise:
            if self.binding == "runtime":
                buckets = counts.copy()
                dense = counts >= self.density_from
                if np.any(dense):
                    buckets[dense] = -counts[dense].max()          # one density-matrix block
            else:
                buckets = 2 ** np.ceil(np.log2(counts)).astype(int)
        else:
            buckets = np.full(len(counts), counts.max())
        return [("density" if b < 0 else "shots", abs(int(b)), np.flatnonzero(buckets == b))
                for b in np.unique(buckets)]

    @property
    def density_from(self) -> float:
        """Shots per noisy setting from which Aer's density-matrix method runs it (one noisy state,
        then its shots are sampled) instead of one trajectory per shot: DENSITY_BREAK_EVEN * 2^q
        for q <= DENSITY_MAX_QUBITS qubits (inf beyond, and for 'mps')."""
        q = self.family.circuit.num_qubits
        if self.method == "mps" or q > DENSITY_MAX_QUBITS:
            return float("inf")
        return DENSITY_BREAK_EVEN * 2 ** q

    @property
    def density_simulator(self):
        """Aer's density-matrix method with the run's noise model (runtime binding)."""
        if self._density is None:
            from qiskit_aer import AerSimulator

            q = self.family.circuit.num_qubits
            require_memory(f"Aer density matrices of {q} qubits ({self.threads} in parallel)",
                           16.0 * 4 ** q * self.threads)
            self._density = AerSimulator(method="density_matrix", noise_model=self.noise.noise_model(),
                                         max_parallel_threads=self.threads, max_parallel_experiments=self.threads,
                                         runtime_parameter_bind_enable=True)
        return self._density

    def _aer_config(self):
        """Runners with equal keys can share one Aer run call."""
        return (type(self), self.noise, self.method, self.binding, self.threads,
                tuple(sorted(self.mps_options.items(), key=str)) if self.method == "mps" else ())

    def _draw_aer(self, params, counts, rng):
        """(sum of a, sum of a^2) per distinct setting from Aer counts (module docstring)."""
        if self.binding == "per-setting":
            per_row, per_row_sq = np.zeros(len(params)), np.zeros(len(params))
            for _, b, sel in self._aer_blocks(counts):
                drawn = self._simulate(params[sel], b, rng.integers(0, 2 ** 31 - 1))
                for i, (keys, d) in zip(sel, drawn):
                    kept = d if counts[i] == b else rng.multivariate_hypergeometric(d, int(counts[i]))
                    a = values_of_outcomes(self.masks, keys)
                    per_row[i], per_row_sq[i] = float(kept @ a), float(kept @ a ** 2)
            return per_row, per_row_sq
        return _draw_aer_together([(self, params, counts, rng)], rng)[0]


def _draw_aer_together(items, rng):
    """[(sum of a, sum of a^2) per setting] for items [(runner, params, counts, item rng)] that share
    one Aer configuration (`_aer_config`): one run call per shot count for all of them (split at
    MAX_BINDS_PER_CALL value sets). Without gate noise every setting runs with the largest count
    and keeps a random n_g of its shots (module docstring); item rngs draw those subsets."""
    noiseless = not items[0][0].noise.has_gate_noise
    plan = {}
    for i, (runner, params, counts, _) in enumerate(items):
        for kind, b, sel in runner._aer_blocks(counts):
            plan.setdefault((kind, b), []).append((i, sel))
    if plan:      # shots sampled from one state (noiseless, density matrix): one block at the largest count
        for kind in ("shots", "density") if noiseless else ("density",):
            keys = sorted(k for k in plan if k[0] == kind)
            if keys:
                merged = [entry for k in keys for entry in plan.pop(k)]
                plan[(kind, keys[-1][1])] = merged
    out = [(np.zeros(len(params)), np.zeros(len(params))) for _, params, _, _ in items]
    for (kind, b), entries in plan.items():
        sim = items[0][0].density_simulator if kind == "density" else items[0][0].simulator
        pieces = []
        for i, sel in entries:
            for start in range(0, len(sel), MAX_BINDS_PER_CALL):
                pieces.append((i, sel[start:start + MAX_BINDS_PER_CALL]))
        calls, call, size = [], [], 0
        for i, sel in pieces:
            if call and size + len(sel) > MAX_BINDS_PER_CALL:
                calls.append(call)
                call, size = [], 0
            call.append((i, sel))
            size += len(sel)
        if call:
            calls.append(call)
        for call in calls:
            circuits, binds = [], []
            for i, sel in call:
                runner, params = items[i][0], items[i][1]
                circuits.append(runner.template)      # builds the runner's template (and _bound)
                binds.append({p: params[sel, k].tolist() for p, k in runner._bound})
            result = sim.run(circuits, parameter_binds=binds if any(binds) else None, shots=int(b),
                             seed_simulator=int(rng.integers(0, 2 ** 31 - 1))).result()
            if not result.success:
                raise RuntimeError(f"Aer run failed: {result.status}")
            pos = 0
            for i, sel in call:
                runner, _, counts, item_rng = items[i]
                per_row, per_row_sq = out[i]
                for g in sel:
                    got = result.data(pos)["counts"]
                    pos += 1
                    keys = np.array([int(k, 16) for k in got], np.int64)
                    d = np.array(list(got.values()), np.int64)
                    kept = d if counts[g] == b else item_rng.multivariate_hypergeometric(d, int(counts[g]))
                    a = values_of_outcomes(runner.masks, keys)
                    per_row[g], per_row_sq[g] = float(kept @ a), float(kept @ a ** 2)
    return out


def run_batch(jobs, rng) -> list:
    """Estimates of many (runner, shots, rng, part) jobs, with the Aer ones run together.

    Fast-path runners, SamplerRunners and 'per-setting' Aer runners run one by one (`run`); the
    other Aer runners are grouped by configuration and their distinct settings go to Aer in one
    run call per shot count (`_draw_aer_together`). Each job's own rng draws its settings and
    subsets, `rng` the Aer seeds; the estimates equal in distribution those of `run`.

    Returns:
        [Estimate] in the order of `jobs`; `seconds` of a batched job is its own sampling time plus
        its share (by distinct settings) of the shared Aer time.
    """
    out = [None] * len(jobs)
    groups = {}
    for j, (runner, shots, job_rng, part) in enumerate(jobs):
        together = (not runner.uses_fast_path and runner.binding == "runtime"
                    and type(runner)._draw_aer is FamilyRunner._draw_aer)
        if not together:
            out[j] = runner.run(shots, job_rng, part)
        else:
            if int(shots) != shots or shots < 1:
                raise QhlInputError(f"expected shots >= 1, got {shots!r}", key="--shots")
            if part not in PARTS:
                raise QhlInputError(f"unknown part '{part}': expected re or im", key="part")
            groups.setdefault(runner._aer_config(), []).append(j)
    for members in groups.values():
        preps, own = {}, {}
        for j in members:
            runner, shots, job_rng, part = jobs[j]
            start = _time.perf_counter()
            preps[j] = runner._prepare(int(shots), job_rng, part)
            own[j] = _time.perf_counter() - start
        start = _time.perf_counter()
        sums = _draw_aer_together([(jobs[j][0], preps[j]["params"], preps[j]["counts"], jobs[j][2])
                                   for j in members], rng)
        shared = _time.perf_counter() - start
        n_set = sum(len(preps[j]["counts"]) for j in members)
        for j, (per_row, per_row_sq) in zip(members, sums):
            share = shared * len(preps[j]["counts"]) / max(n_set, 1)
            out[j] = jobs[j][0]._finish(preps[j], per_row, per_row_sq, own[j] + share)
    return out
