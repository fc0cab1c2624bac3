"""Hardware targets for routing: generic coupling maps and offline fake backends.

A target names the qubit connectivity a circuit is compiled for:
    all-to-all   no coupling map (every pair adjacent; qhl's default counting convention),
    line         a path of `qubits` qubits   (qiskit CouplingMap.from_line),
    ring         a cycle of `qubits` qubits  (CouplingMap.from_ring),
    grid         the smallest near-square rows x cols >= qubits (CouplingMap.from_grid),
    heavy-hex    the smallest odd code distance d whose heavy-hexagon lattice has enough qubits
                 ((5 d^2 - 2 d - 1) / 2 qubits; CouplingMap.from_heavy_hex),
    fake_<name>  an offline snapshot of a real device from qiskit-ibm-runtime's fake provider:
                 its coupling map, native gates and calibrated error rates (the `device` extra:
                 `pip install 'qhl[device]'`); the `fake_` prefix may be left off.
Generic maps are sized to the circuit (`qubits`); a fake backend has its own size, and a circuit
wider than it is refused with both numbers. Generic maps carry no error rates: noise for them comes
from the user (gate and readout error options of the budget).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

from qhl.base.errors import QhlInputError

__all__ = ["GENERIC_TARGETS", "Target", "backend_names", "target_names", "resolve_target"]

GENERIC_TARGETS = ("all-to-all", "line", "ring", "grid", "heavy-hex")


@dataclass(frozen=True)
class Target:
    """A resolved target: its name, kind ('generic' or 'backend'), coupling map (None for
    all-to-all), number of physical qubits (None for all-to-all) and the backend object (fake
    backends only; a qiskit BackendV2 with its calibrated Target)."""

    name: str
    kind: str
    coupling_map: object | None
    num_qubits: int | None
    backend: object | None = None

    @property
    def all_to_all(self) -> bool:
        return self.coupling_map is None


@lru_cache(maxsize=1)
def _fake_backends() -> dict:
    """name -> backend class instance factory of qiskit-ibm-runtime's offline fake provider ({} if absent)."""
    try:
        import warnings
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            from qiskit_ibm_runtime.fake_provider import FakeProviderForBackendV2
            return {b.name: b for b in FakeProviderForBackendV2().backends()}
    except ImportError:
        return {}


def backend_names() -> list[str]:
    """Names of the offline fake backends available here (empty without qiskit-ibm-runtime)."""
    return sorted(_fake_backends())


def target_names() -> list[str]:
    """Every valid target name: the generic maps, then the fake backends."""
    return list(GENERIC_TARGETS) + backend_names()


def _grid_shape(qubits: int) -> tuple[int, int]:
    rows = max(1, math.isqrt(qubits))
    cols = -(-qubits // rows)
    return rows, cols


def _heavy_hex_distance(qubits: int) -> int:
    d = 3
    while (5 * d * d - 2 * d - 1) // 2 < qubits:
        d += 2
    return d


def resolve_target(name: str, qubits: int, *, source: str | None = None, key: str = "target",
                   what: str | None = None) -> Target:
    """The target `name` for a circuit of `qubits` qubits (spins plus ancillas; `what` says so in the
    size refusal, e.g. '6 spins + 1 ancilla').

    Raises QhlInputError (one line) for an unknown name (listing the valid ones) or a backend with
    fewer qubits than the circuit needs (both numbers).
    """
    from qiskit.transpiler import CouplingMap

    if not isinstance(name, str) or not name:
        raise QhlInputError(f"expected a target name, got {name!r}", source=source, key=key)
    qubits = int(qubits)
    if name == "all-to-all":
        return Target(name, "generic", None, None)
    if name == "line":
        return Target(name, "generic", CouplingMap.from_line(max(qubits, 1)), max(qubits, 1))
    if name == "ring":
        n = max(qubits, 3)
        return Target(name, "generic", CouplingMap.from_ring(n), n)
    if name == "grid":
        rows, cols = _grid_shape(max(qubits, 1))
        return Target(name, "generic", CouplingMap.from_grid(rows, cols), rows * cols)
    if name == "heavy-hex":
        cmap = CouplingMap.from_heavy_hex(_heavy_hex_distance(qubits))
        return Target(name, "generic", cmap, cmap.size())
    backends = _fake_backends()
    full = name if name.startswith("fake_") else "fake_" + name
    if full not in backends:
        hint = "" if backends else " (offline fake backends need qiskit-ibm-runtime: pip install 'qhl[device]')"
        shown = ", ".join(target_names())
        raise QhlInputError(f"unknown target {name!r}: expected one of {shown}{hint}", source=source, key=key)
    backend = backends[full]
    if qubits > backend.num_qubits:
        detail = f" ({what})" if what else ""
        raise QhlInputError(f"the circuit needs {qubits} qubits{detail} but {full} has {backend.num_qubits}",
                            source=source, key=key)
    return Target(full, "backend", backend.coupling_map, backend.num_qubits, backend)
