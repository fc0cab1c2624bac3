"""Run a circuit family's grouped shot settings through a Qiskit SamplerV2 (primitives interface).

Mapping of settings to PUBs (primitive unified blocs: circuit, parameter value array, shots).
A family (one parameter and time of a gradient, Hessian entry or signal) is ONE parameterised
circuit, transpiled once. `run` draws the shot settings exactly as qhl.emulation.runner does
(stratified or i.i.d. insertion rows, random inputs) and groups equal settings, so setting g has
n_g shots. A PUB carries one shot count for all its parameter rows, and the n_g differ, so:
  * default (`shots_per_pub=None`): one PUB per distinct shot count n; its value array holds
    every setting with n_g = n, and it runs n shots. Every setting gets exactly its n_g i.i.d.
    shots, nothing is discarded; the PUB count is the number of distinct n_g (small: with
    stratified sampling most rows share a few counts).
  * `shots_per_pub=S` (a fixed shot count for every PUB, as some services prefer): setting g
    appears ceil(n_g / S) times in the value arrays, and a uniformly random n_g of its
    ceil(n_g / S) S shots are kept (a multivariate hypergeometric draw from its counts: a random
    subset of i.i.d. shots is i.i.d.; common practice). At most S - 1 extra shots per setting.
Batching: the PUBs are sent in jobs of at most `max_circuits` bound circuits (parameter rows)
each; a PUB with more rows is split. `run_sampler_batch` sends the PUBs of many families (each
drawn as by `run`) together under the same cap, so a group of families needs as few sampler jobs
as `max_circuits` allows (one without it). The single-shot value is scale_g * a, with a the
observable's eigenvalue on the measured bit string, and the estimator, its standard error and
the stratified variance are those of FamilyRunner.run (this class only replaces how the shots of
the distinct settings are produced), so z-scores mean the same on either path.

Samplers:
  * default: qiskit-aer's SamplerV2 (qiskit_aer.primitives.SamplerV2) with the NoiseSpec's
    noise model (none: noiseless); circuits transpiled as in FamilyRunner (noiseless: Aer's
    basis, optimization level 0; noisy: rz, sx, x, cx, level 1).
  * `device=NAME`: an offline fake backend of qiskit-ibm-runtime (qhl.circuits.targets): the
    circuit is transpiled for it with qiskit's preset pass manager (its coupling map and native
    gates; `optimization_level`, `seed_transpiler`), and run on AerSimulator.from_backend(backend),
    i.e. the backend's calibrated noise model (gate depolarising and thermal relaxation errors,
    readout errors; qiskit-aer documentation).
  * `sampler=OBJ` (Python only): any object with the SamplerV2 interface, `run(pubs)` returning
    a job whose `result()` holds one SamplerPubResult per PUB, e.g. a hardware sampler of
    qiskit-ibm-runtime; pass the matching `backend` so that the circuit is transpiled for it
    (ISA circuits; without one the circuit goes to the basis rz, sx, x, cx at optimization level
    1). This is the code path the fake backend takes (transpile for a backend, then
    sampler.run); its seeds are the sampler's own. Hardware is not run in the tests.
Simulation method of the samplers built here (noisy runs; `simulator_options` override it): Aer's
density-matrix method when the transpiled circuit acts on at most DENSITY_MAX_QUBITS qubits (one
noisy state per setting, then its shots are sampled: fast for many shots on few qubits), else its
statevector method (one noisy trajectory per shot). The memory of either is checked up front
(qhl.base.memory.require_memory); Aer drops idle device qubits, so it scales with the active ones.
Seeds: samplers built here get a seed drawn from the caller's Generator per job, so the same seed
gives the same numbers.
"""

import numpy as np

from ..base.errors import QhlInputError
from ..base.memory import require_memory
from .noise import NOISY_BASIS, NoiseSpec
from .runner import FamilyRunner, values_of_outcomes

__all__ = ["SamplerRunner", "device_backend", "pub_plan", "capped_jobs", "DENSITY_MAX_QUBITS", "active_qubits", "run_sampler_batch"]

DENSITY_MAX_QUBITS = 10


def active_qubits(circuit) -> int:
    """Qubits touched by some instruction of `circuit` (Aer simulates only these)."""
    used = {circuit.find_bit(q).index for inst in circuit.data for q in inst.qubits}
    return len(used)


def device_backend(name: str, qubits: int, key: str = "--device", needs: str | None = None):
    """The offline fake backend `name` (the 'fake_' prefix may be left off) for `qubits` qubits
    (`needs`: how the refusal spells them out, e.g. '3 spins + 1 ancilla').

    Raises:
        QhlInputError: one line listing the valid device names for an unknown name (or a
            generic coupling map, which has no noise); both numbers for a circuit wider than
            the device.
    """
    from ..circuits.targets import backend_names, resolve_target
    names = backend_names()
    full = name if str(name).startswith("fake_") else f"fake_{name}"
    if full not in names:
        shown = ", ".join(names) if names else "none (offline fake backends need qiskit-ibm-runtime: " \
                                                "pip install 'qhl[device]')"
        raise QhlInputError(f"unknown device {name!r}: expected one of {shown}", key=key)
    backend = resolve_target(full, 0, key=key).backend
    if qubits > backend.num_qubits:
        what = f"{needs} = {qubits} qubits" if needs else f"{qubits} qubits"
        raise QhlInputError(f"the circuit needs {what}, but {full} has {backend.num_qubits}", key=key)
    return backend


def pub_plan(counts, shots_per_pub=None, max_circuits=None):
    """Jobs of PUB blocks for settings with shot counts `counts` (module docstring).

    Returns:
        list of jobs; a job is a list of (setting indices (array, one per parameter row; a
        setting may repeat), shots of that PUB).
    """
    counts = np.asarray(counts, np.int64)
    blocks = []
    if shots_per_pub is None:
        for n in np.unique(counts):
            blocks.append((np.flatnonzero(counts == n), int(n)))
    else:
        reps = -(-counts // int(shots_per_pub))
        blocks.append((np.repeat(np.arange(len(counts)), reps), int(shots_per_pub)))
    return [[(idx, n) for _, idx, n in job]
            for job in capped_jobs([(None, idx, n) for idx, n in blocks], max_circuits)]


def capped_jobs(blocks, max_circuits=None):
    """[(tag, setting indices, shots)] cut, in order, into jobs of at most `max_circuits` bound circuits
    (None or 0: one job); a block that does not fit is split across jobs, keeping its tag and shots."""
    cap = int(max_circuits) if max_circuits else None
    jobs, job, size = [], [], 0
    for tag, idx, n in blocks:
        start = 0
        while start < len(idx):
            room = len(idx) - start if cap is None else min(len(idx) - start, cap - size)
            job.append((tag, idx[start:start + room], n))
            size += room
            start += room
            if cap is not None and size >= cap:
                jobs.append(job)
                job, size = [], 0
    if job:
        jobs.append(job)
    return jobs


def _positive_or_none(value, key):
    if value is None:
        return None
    if isinstance(value, bool) or int(value) != value or value < 1:
        raise QhlInputError(f"expected an integer >= 1, got {value!r}", key=key)
    return int(value)


class SamplerRunner(FamilyRunner):
    """A FamilyRunner whose shots come from a SamplerV2 (module docstring).

    Args:
        family: CircuitFamily; noise: NoiseSpec or None (default sampler only).
        sampler: a SamplerV2-like object (None: build qiskit-aer's).
        device: name of an offline fake backend (its noise model); excludes `noise` and `sampler`.
        backend: a BackendV2 to transpile for (with `sampler`; set by `device`).
        shots_per_pub: None (one PUB per distinct shot count) or a fixed shot count S per PUB.
        max_circuits: at most this many bound circuits per job (None: one job).
        sampling: 'stratified' or 'iid' (CircuitFamily.sample).
        optimization_level, seed_transpiler: preset pass manager options (backend transpilation).
        simulator_options: AerSimulator options of the samplers built here (e.g. method=
            'density_matrix': one density-matrix run per setting, then its shots are sampled).

    Attributes:
        backend: the backend transpiled for (None: Aer basis); jobs_run, pubs_run: totals so far.

    Raises:
        QhlInputError: unknown device, a circuit wider than the device, conflicting options,
            bad shots_per_pub or max_circuits.
    """

    def __init__(self, family, noise: NoiseSpec | None = None, *, sampler=None, device: str | None = None,
                 backend=None, shots_per_pub: int | None = None, max_circuits: int | None = None,
                 sampling: str = "stratified", optimization_level: int = 1, seed_transpiler: int = 0,
                 simulator_options: dict | None = None):
        super().__init__(family, noise, threads=1, method="aer", sampling=sampling)
        if device is not None and (sampler is not None or not self.noise.is_noiseless):
            raise QhlInputError("--device brings its own noise model and sampler: leave out --noise and sampler",
                                key="--device")
        if sampler is not None and not self.noise.is_noiseless:
            raise QhlInputError("a user sampler brings its own noise: leave out noise", key="noise")
        self.shots_per_pub = _positive_or_none(shots_per_pub, "shots_per_pub")
        self.max_circuits = _positive_or_none(max_circuits, "max_circuits")
        self.device = device
        self.backend = device_backend(device, family.circuit.num_qubits) if device is not None else backend
        self.user_sampler = sampler
        self.optimization_level, self.seed_transpiler = int(optimization_level), int(seed_transpiler)
        self.jobs_run = self.pubs_run = 0
        self._aer_backend = None
        self.simulator_options = dict(simulator_options or {})

    # ---------------------------------------------------------------- transpile once
    def _build_aer(self):
        from qiskit import transpile
        measured = self.family.with_measurements(self.family.circuit)
        if self.backend is not None:
            from qiskit.transpiler import generate_preset_pass_manager
            pm = generate_preset_pass_manager(optimization_level=self.optimization_level, backend=self.backend,
                                              seed_transpiler=self.seed_transpiler)
            self._transpiled = pm.run(measured)
        elif self.noise.is_noiseless and self.user_sampler is None:
            from qiskit_aer import AerSimulator
            self._transpiled = transpile(measured, AerSimulator(), optimization_level=0)
        else:
            self._transpiled = transpile(measured, basis_gates=list(NOISY_BASIS), optimization_level=1)
        order = {p: k for k, p in enumerate(self.family.circuit.parameters)}
        self._bound = [(p, order[p]) for p in self._transpiled.parameters]
        self._simulator = self.user_sampler

    def measured_physical_qubits(self) -> list:
        """Physical qubit read into classical bit k, for k = 0 .. m-1 (transpiled circuit)."""
        tqc = self.transpiled
        phys = {}
        for inst in tqc.data:
            if inst.operation.name == "measure":
                phys[tqc.find_bit(inst.clbits[0]).index] = tqc.find_bit(inst.qubits[0]).index
        return [phys[k] for k in range(len(self.family.measured_qubits))]

    def _sampler(self, seed):
        if self.user_sampler is not None:
            return self.user_sampler
        from qiskit_aer import AerSimulator
        from qiskit_aer.primitives import SamplerV2
        if self._aer_backend is None:
            options = dict(self.simulator_options)
            n = active_qubits(self.transpiled)
            if not self.noise.is_noiseless or self.device is not None:
                options.setdefault("method", "density_matrix" if n <= DENSITY_MAX_QUBITS else "statevector")
            dense = options.get("method") == "density_matrix"
            require_memory(f"Aer {'density matrices' if dense else 'statevectors'} of {n} qubits",
                           16.0 * (4 ** n if dense else 2 ** n))
            if self.device is not None:
                self._aer_backend = AerSimulator.from_backend(self.backend)
            elif self.noise.is_noiseless:
                self._aer_backend = AerSimulator()
            else:
                self._aer_backend = AerSimulator(noise_model=self.noise.noise_model())
            self._aer_backend.set_options(max_parallel_threads=1, **options)
        return SamplerV2.from_backend(self._aer_backend, seed=int(seed))

    # ---------------------------------------------------------------- shots of the distinct settings
    def _draw_aer(self, params, counts, rng):
        """(sum of a, sum of a^2) per distinct setting from SamplerV2 counts (module docstring)."""
        tqc = self.transpiled
        cols = [k for _, k in self._bound]
        shot_sums = np.zeros(len(params))
        shot_sq = np.zeros(len(params))
        got = [dict() for _ in range(len(params))]
        for job in pub_plan(counts, self.shots_per_pub, self.max_circuits):
            pubs = [(tqc, params[idx][:, cols], n) for idx, n in job]
            result = self._sampler(rng.integers(0, 2 ** 31 - 1)).run(pubs).result()
            self.jobs_run += 1
            self.pubs_run += len(pubs)
            for (idx, _), pub_result in zip(job, result):
                bits = pub_result.join_data() if hasattr(pub_result, "join_data") else pub_result.data.m
                for loc, g in enumerate(idx):
                    for key, c in bits.get_int_counts(loc).items():
                        got[g][key] = got[g].get(key, 0) + c
        for g, table in enumerate(got):
            keys = np.fromiter(table.keys(), np.int64, len(table))
            d = np.fromiter(table.values(), np.int64, len(table))
            kept = d if d.sum() == counts[g] else rng.multivariate_hypergeometric(d, int(counts[g]))
            a = values_of_outcomes(self.masks, keys)
            shot_sums[g], shot_sq[g] = float(kept @ a), float(kept @ a ** 2)
        return shot_sums, shot_sq


def _sampler_config(runner):
    """SamplerRunners with equal keys can send their PUBs in one sampler job."""
    return (runner.device, runner.noise, runner.shots_per_pub, runner.max_circuits, id(runner.user_sampler),
            tuple(sorted(runner.simulator_options.items(), key=str)), active_qubits(runner.transpiled))


def run_sampler_batch(jobs, rng) -> list:
    """Estimates of many (SamplerRunner, shots, rng, part) jobs, their PUBs sent together.

    Each job draws and groups its settings with its own rng (as SamplerRunner.run), and its PUBs
    are those of `run` (pub_plan: one per distinct shot count, or fixed `shots_per_pub`). The PUBs
    of all jobs with one configuration (device, noise, options, active qubits) go to the sampler
    together, in jobs of at most `max_circuits` bound circuits (None: one sampler job); a PUB with
    more rows is split. `rng` seeds the samplers; each job's rng draws its kept subsets, so the
    estimates equal in distribution those of `run`.

    Returns:
        ([Estimate] in the order of `jobs`, sampler jobs run, PUBs run); `seconds` of an estimate is
        its own sampling time plus its share (by distinct settings) of the shared sampler time.
    """
    import time as _time
    out = [None] * len(jobs)
    preps, own = {}, {}
    groups = {}
    for j, (runner, shots, job_rng, part) in enumerate(jobs):
        start = _time.perf_counter()
        preps[j] = runner._prepare(int(shots), job_rng, part)
        own[j] = _time.perf_counter() - start
        groups.setdefault(_sampler_config(runner), []).append(j)
    n_jobs = n_pubs = 0
    for members in groups.values():
        first = jobs[members[0]][0]
        blocks = []           # (job index, setting indices, shots of the PUB)
        for j in members:
            for job in pub_plan(preps[j]["counts"], first.shots_per_pub, None):
                blocks += [(j, idx, n) for idx, n in job]
        calls = capped_jobs(blocks, first.max_circuits)
        got = {j: [dict() for _ in range(len(preps[j]["counts"]))] for j in members}
        start = _time.perf_counter()
        for call in calls:
            pubs = []
            for j, idx, n in call:
                runner = jobs[j][0]
                cols = [k for _, k in runner._bound]
                pubs.append((runner.transpiled, preps[j]["params"][idx][:, cols], n))
            result = first._sampler(rng.integers(0, 2 ** 31 - 1)).run(pubs).result()
            n_jobs += 1
            n_pubs += len(pubs)
            for (j, idx, _), pub_result in zip(call, result):
                bits = pub_result.join_data() if hasattr(pub_result, "join_data") else pub_result.data.m
                for loc, g in enumerate(idx):
                    table = got[j][g]
                    for key, c in bits.get_int_counts(loc).items():
                        table[key] = table.get(key, 0) + c
        shared = _time.perf_counter() - start
        n_set = sum(len(preps[j]["counts"]) for j in members)
        for j in members:
            runner, _, job_rng, _ = jobs[j]
            counts = preps[j]["counts"]
            per_row, per_row_sq = np.zeros(len(counts)), np.zeros(len(counts))
            for g, table in enumerate(got[j]):
                keys = np.fromiter(table.keys(), np.int64, len(table))
                d = np.fromiter(table.values(), np.int64, len(table))
                kept = d if d.sum() == counts[g] else job_rng.multivariate_hypergeometric(d, int(counts[g]))
                a = values_of_outcomes(runner.masks, keys)
                per_row[g], per_row_sq[g] = float(kept @ a), float(kept @ a ** 2)
            out[j] = runner._finish(preps[j], per_row, per_row_sq,
                                    own[j] + shared * len(counts) / max(n_set, 1))
    return out, n_jobs, n_pubs
