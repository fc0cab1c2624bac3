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

Seeds: the Generator drives the draws and Aer's seed_simulator (drawn from it), and Aer runs
single-threaded, so the same seed gives the same numbers.
"""

import time as _time

import os

import numpy as np

from ..circuits.circuit_family import PARTS
from ..base.errors import QhlInputError
from .estimate import Estimate
from .noise import NOISY_BASIS, NoiseSpec, noisy_layers

__all__ = ["FamilyRunner", "outcome_values", "group_settings"]


def outcome_values(family) -> np.ndarray:
    """Eigenvalue of `family.observable` for each measured bit string (clbit k = measured_qubits[k]).

    Returns:
        (2^m,) real array indexed by the integer whose bit k is clbit k.
    """
    measured = list(family.measured_qubits)
    m = len(measured)
    where = {q: k for k, q in enumerate(measured)}
    obs = family.observable
    if np.any(obs.paulis.x):
        raise QhlInputError("the family observable must be diagonal (Z's only)", key="observable")
    outcomes = np.arange(2 ** m)
    values = np.zeros(2 ** m)
    for zrow, c in zip(obs.paulis.z, obs.coeffs):
        mask = 0
        for q in np.flatnonzero(zrow):
            if int(q) not in where:
                raise QhlInputError(f"observable acts on unmeasured qubit {q}", key="observable")
            mask |= 1 << where[int(q)]
        parity = np.array([bin(int(o) & mask).count("1") & 1 for o in outcomes])
        values += float(np.real(c)) * (1 - 2 * parity)
    return values


def group_settings(settings):
    """(distinct rows of [values, scale], shot count of each) for ShotSettings `settings`."""
    key = np.column_stack([settings.values, settings.scale])
    rows, counts = np.unique(key, axis=0, return_counts=True)
    return rows, counts


class FamilyRunner:
    """Transpiles one CircuitFamily once and estimates its Re/Im parts with shots on AerSimulator.

    Args:
        family: a qhl.circuits.circuit_family.CircuitFamily.
        noise: NoiseSpec or None (noiseless).
        threads: Aer threads, spent on running distinct settings in parallel (default: all
            cores). Results do not depend on it: Aer seeds each bound setting from
            `seed_simulator` and its index (checked in tests/test_emulator.py).

    Attributes:
        transpiled: the measured, transpiled circuit that every setting binds.
        layers: noisy layers L of `transpiled` (qhl.emulation.noise), 0 without gate noise.
    """

    def __init__(self, family, noise: NoiseSpec | None = None, threads: int | None = None):
        from qiskit import transpile
        from qiskit_aer import AerSimulator

        self.family = family
        self.noise = noise if noise is not None else NoiseSpec()
        threads = int(threads or os.cpu_count() or 1)
        opts = dict(method="statevector", max_parallel_threads=threads, max_parallel_experiments=threads,
                    max_parallel_shots=1)
        measured = family.with_measurements(family.circuit)
        if self.noise.is_noiseless:
            self.simulator = AerSimulator(**opts)
            self.transpiled = transpile(measured, self.simulator, optimization_level=0)
        else:
            self.simulator = AerSimulator(noise_model=self.noise.noise_model(), **opts)
            self.transpiled = transpile(measured, basis_gates=list(NOISY_BASIS), optimization_level=1)
        self.layers = noisy_layers(self.transpiled) if self.noise.has_gate_noise else 0
        order = {p: k for k, p in enumerate(family.circuit.parameters)}
        self._bound = [(p, order[p]) for p in self.transpiled.parameters]
        self.values = outcome_values(family)

    @property
    def observable_weight(self) -> int:
        """Z's per observable term (w of the readout factor (1 - 2q)^w)."""
        return int(np.max(np.sum(self.family.observable.paulis.z, axis=1)))

    def _simulate(self, rows, shots, seed):
        """Counts (len(rows), 2^m) from one Aer run of every row with `shots` shots."""
        binds = {p: rows[:, k].tolist() for p, k in self._bound}
        result = self.simulator.run(self.transpiled, parameter_binds=[binds] if binds else None, shots=int(shots),
                                    seed_simulator=int(seed)).result()
        if not result.success:
            raise RuntimeError(f"Aer run failed: {result.status}")
        out = np.zeros((len(rows), len(self.values)), np.int64)
        for i in range(len(rows)):
            for key, c in result.data(i)["counts"].items():
                out[i, int(key, 16)] += c
        return out

    def run(self, shots: int, rng, part: str = "re") -> Estimate:
        """Estimate Re X (part 're') or Im X ('im') of the family with `shots` shots.

        Args:
            shots: N >= 1.
            rng: numpy Generator (draws settings, subsamples, seeds Aer).

        Returns:
            Estimate (per-shot sums, N, distinct circuits run, wall seconds).

        Raises:
            QhlInputError: shots < 1 or an unknown part.
        """
        if int(shots) != shots or shots < 1:
            raise QhlInputError(f"expected shots >= 1, got {shots!r}", key="--shots")
        if part not in PARTS:
            raise QhlInputError(f"unknown part '{part}': expected re or im", key="part")
        start = _time.perf_counter()
        settings = self.family.sample(rng, int(shots), part)
        rows, counts = group_settings(settings)
        params, scale = rows[:, :-1], rows[:, -1]
        if self.noise.has_gate_noise:
            buckets = 2 ** np.ceil(np.log2(counts)).astype(int)
        else:
            buckets = np.full(len(counts), counts.max())
        kept = np.zeros((len(rows), len(self.values)), np.int64)
        for b in np.unique(buckets):
            sel = np.flatnonzero(buckets == b)
            drawn = self._simulate(params[sel], b, rng.integers(0, 2 ** 31 - 1))
            for i, d in zip(sel, drawn):
                kept[i] = d if counts[i] == b else rng.multivariate_hypergeometric(d, int(counts[i]))
        per_row = kept @ self.values
        per_row_sq = kept @ self.values ** 2
        total = float(np.sum(scale * per_row))
        total_sq = float(np.sum(scale ** 2 * per_row_sq))
        return Estimate(total, total_sq, int(shots), len(rows), _time.perf_counter() - start)
