"""Targets: generic coupling maps sized to the circuit, fake backends by name, one-line refusals."""

import pytest

from qhl.base.errors import QhlInputError
from qhl.circuits.targets import GENERIC_TARGETS, backend_names, resolve_target, target_names


def _degrees(cmap):
    deg = {}
    for a, b in cmap.get_edges():
        deg[a] = deg.get(a, 0) + 1
    return deg


@pytest.mark.parametrize("qubits", [2, 5, 10, 23])
def test_generic_maps_fit_the_circuit(qubits):
    # Line and ring degrees 1-2, grid at most 4, heavy-hex at most 3 (common practice: the heavy-hexagon
    # lattice has degree-2 and degree-3 vertices only).
    for name, max_degree in (("line", 2), ("ring", 2), ("grid", 4), ("heavy-hex", 3)):
        t = resolve_target(name, qubits)
        assert t.num_qubits >= qubits
        assert t.coupling_map.size() == t.num_qubits
        assert t.coupling_map.is_connected()
        assert max(_degrees(t.coupling_map).values()) <= max_degree
    assert resolve_target("line", qubits).num_qubits == qubits
    assert resolve_target("all-to-all", qubits).all_to_all


def test_heavy_hex_size_formula():
    # (5 d^2 - 2 d - 1) / 2 qubits for distance d (Chamberland, Zhu, Yoder, Hertzberg, Cross, "Topological
    # and subsystem codes on low-degree graphs with flag qubits", PRX 10, 011022 (2020); from memory),
    # against qiskit's own lattice: d = 3 -> 19, 5 -> 57.
    assert resolve_target("heavy-hex", 19).num_qubits == 19
    assert resolve_target("heavy-hex", 20).num_qubits == 57


def test_unknown_target_lists_the_valid_names():
    with pytest.raises(QhlInputError) as e:
        resolve_target("hexagonal-torus", 4)
    msg = str(e.value)
    assert "\n" not in msg and "hexagonal-torus" in msg
    for name in GENERIC_TARGETS:
        assert name in msg


@pytest.mark.skipif(not backend_names(), reason="qiskit-ibm-runtime (the device extra) is not installed")
def test_fake_backend_by_name_and_size_refusal():
    name = backend_names()[0]
    t = resolve_target(name, 1)
    assert t.kind == "backend" and t.num_qubits == t.backend.num_qubits
    assert resolve_target(name.removeprefix("fake_"), 1).name == name
    small = min(backend_names(), key=lambda b: resolve_target(b, 1).num_qubits)
    size = resolve_target(small, 1).num_qubits
    with pytest.raises(QhlInputError) as e:
        resolve_target(small, size + 1)
    assert f"{size + 1}" in str(e.value) and f"{size}" in str(e.value) and "\n" not in str(e.value)
    assert set(backend_names()) <= set(target_names())
