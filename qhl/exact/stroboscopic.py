"""Exact signals, gradients and Floquet operators of a pulse cycle sampled once per cycle.

A multiple-pulse cycle (a tuple of Delay and ideal Pulse steps, qhl.spins.cluster; e.g. a named
sequence of qhl.spins.sequences) is repeated K times after the implicit 90-degree excitation, and
the signal is sampled stroboscopically at the end of each cycle (windowed detection: one point per
cycle, taken in the window after the cycle's last pulse; common practice):
    S_k = Tr[O U_c^k rho0 U_c^-k] / N,   k = 1 ... K,   N = Tr[O rho0],
    U_c = product of the cycle's steps in time order (delays exp(-i H tau), pulses as in
    qhl.exact.sequence_engine).
S_k is the signal of the pulse-sequence experiment "k cycles, then acquisition at t = 0"
(qhl.exact.sequence_engine), and so are its gradients; here the density matrix and its derivatives
are carried forward one cycle at a time and read after each cycle (K cycles of work instead of
K (K + 1) / 2 for K separate experiments). The acquisition at t = 0 adds no derivative (exp(-i H 0) = 1).

The cycle (Floquet) operator U_c is built densely in the full 2^n space (the pulses mix the
magnetisation sectors): one dense eigendecomposition of H for the delays and the pulse rotations
as Kronecker products of 2 x 2 rotations (qhl.exact.sequence_engine.pulse_rotation). Memory: a few
dense 2^n x 2^n matrices (checked with qhl.base.memory.require_memory).
"""

import numpy as np
import scipy.linalg as sla

from ..base.blas import blas_limited, blas_threads
from ..base.errors import QhlInputError
from ..base.memory import require_memory
from ..base.progress import Progress
from ..spins.cluster import Block, Delay, Experiment, Pulse, flat_steps
from .sequence_engine import (_Sequence, _chunk, _pulse_qubits, _require, _stacked_generators,
                              pulse_rotation)

__all__ = ["stroboscopic_gradient", "stroboscopic_signal", "cycle_propagator", "cycle_experiment"]

PROGRESS_ABOVE_CYCLES = 200      # show progress over cycles x parameter chunks above this many passes


def cycle_experiment(cycle, cycles: int = 1, dipolar_scale: float = 1.0, noise=None, name="cycle") -> Experiment:
    """The pulse-sequence experiment "`cycles` cycles, then acquisition": read it at t = 0 (times=[0.0]) for
    the stroboscopic sample S_cycles (module docstring). `cycle`: a Block (its own repeat is kept) or steps."""
    block = cycle if isinstance(cycle, Block) else Block(tuple(cycle), 1)
    steps = (Block(block.steps, block.repeat * int(cycles), block.name),)
    period = sum(st.seconds for st in flat_steps((block,)) if isinstance(st, Delay))
    return Experiment(name=name, t_max_s=max(period, 1e-12), points=2, dipolar_scale=float(dipolar_scale),
                      noise=noise, steps=steps)


def _check_cycle(cycle):
    steps = flat_steps(cycle.steps if isinstance(cycle, Block) else tuple(cycle))
    if not steps:
        raise QhlInputError("an empty cycle: expected delays and pulses", key="sequence")
    for st in steps:
        if isinstance(st, Pulse) and st.duration_s is not None:
            raise QhlInputError("a finite pulse in the cycle: stroboscopic sampling covers ideal pulses only",
                                key="sequence")


@blas_limited
def stroboscopic_gradient(engine, cycle, cycles: int, dipolar_scale: float = 1.0, free_values_hz=None,
                          parameters=None, progress: bool = True):
    """(S (K,), dS/dh (P, K)) at the ends of cycles 1 ... K (module docstring), K = `cycles`.

    Args:
        engine: qhl.exact.engine.ExactEngine (its free parameters are differentiated).
        cycle: one cycle (Block or tuple of steps; ideal pulses).
        cycles: K >= 1.
        dipolar_scale: of the Hamiltonian during the cycle.
        parameters: names (default all free).

    Raises:
        QhlInputError: K < 1, finite pulses, too many spins; MemoryBudgetError: too large.
    """
    if int(cycles) < 1:
        raise QhlInputError(f"expected at least one cycle, got {cycles}", key="cycles")
    _check_cycle(cycle)
    K = int(cycles)
    ex = cycle_experiment(cycle, 1, dipolar_scale)
    _, rows = engine._rows(ex, free_values_hz, parameters)
    _require(engine, len(rows), K, ex)
    seq = _Sequence(engine, ex, free_values_hz)
    t0 = np.zeros(1)
    sig = np.zeros(K, complex)
    grad = np.zeros((len(rows), K), complex)
    if not rows:
        x = seq.x0
        for k in range(K):
            x, _ = seq.propagate(x)
            sig[k] = seq.read(x, t0)[0]
        return sig / engine.norm, grad
    chunk = _chunk(seq.n, len(rows))
    passes = -(-len(rows) // chunk) * K
    bar = Progress(f"stroboscopic gradient, {K} cycles x parameter chunks", passes) \
        if progress and passes > PROGRESS_ABOVE_CYCLES else None
    done = 0
    for c0 in range(0, len(rows), chunk):
        sub = rows[c0:c0 + chunk]
        gens = _stacked_generators(engine, seq.spec, sub)
        seq.rows = sub
        x, dx = seq.x0, np.zeros((len(sub),) + seq.x0.shape, complex)
        for k in range(K):
            x, dx = seq.propagate(x, dx, gens)
            if c0 == 0:
                sig[k] = seq.read(x, t0)[0]
            for r in range(len(sub)):
                grad[c0 + r, k] = seq.read(dx[r], t0)[0]
            done += 1
            if bar is not None:
                bar.update(done)
    if bar is not None:
        bar.update(passes)
        bar.close()
    return sig / engine.norm, grad / engine.norm


def stroboscopic_signal(engine, cycle, cycles: int, dipolar_scale: float = 1.0, free_values_hz=None) -> np.ndarray:
    """S_k, k = 1 ... K (module docstring), complex (K,)."""
    return stroboscopic_gradient(engine, cycle, cycles, dipolar_scale, free_values_hz, parameters=[])[0]


def cycle_propagator(engine, cycle, dipolar_scale: float = 1.0, free_values_hz=None) -> np.ndarray:
    """U_c, the propagator of one cycle (dense 2^n x 2^n, qiskit's qubit order: qubit i = bit i).

    U_c = prod over steps in time order of exp(-i H tau) (delays; H = 2 pi sum_n s_n h_n G_n) and
    prod_k exp(-i theta (cos phi Ix_k + sin phi Iy_k)) over the pulsed spins (ideal pulses).
    """
    _check_cycle(cycle)
    model = engine.model if free_values_hz is None else engine.model.with_values(free_values_hz)
    n = model.n_spins
    d = 2**n
    require_memory(f"the dense cycle propagator of {n} spins", 6 * 16.0 * d * d)
    ex = cycle_experiment(cycle, 1, dipolar_scale)
    h = model.hamiltonian(ex).to_matrix()
    with blas_threads(d):
        e, v = sla.eigh(h, driver="evd")
    u = np.eye(d, dtype=complex)
    for st in flat_steps(ex.steps):
        if isinstance(st, Delay):
            u = (v * np.exp(-1j * e * st.seconds)[None, :]) @ (v.conj().T @ u)
        else:
            rot = pulse_rotation(st.angle_deg, st.phase_deg)
            pulsed = set(_pulse_qubits(model, st.isotope))
            r = np.ones((1, 1), complex)
            for q in range(n - 1, -1, -1):             # kron(m_(n-1), ..., m_0): qubit q is bit q
                r = np.kron(r, rot if q in pulsed else np.eye(2))
            u = r @ u
    return u
