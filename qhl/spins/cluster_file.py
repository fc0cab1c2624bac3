"""Reading clusters: qhl's own TOML cluster file and plain XYZ geometry files.

TOML layout (all keys checked; unknown keys are errors):

    field_tesla = 9.4                # required, > 0
    field_direction = [0, 0, 1]      # optional unit vector
    observe = "1H"                   # required: the observed isotope
    reference_ppm = 0.0              # optional carrier position for shift_ppm
    [[spin]]                         # one per nucleus
    label = "H1"; isotope = "1H"; position_angstrom = [0, 0, 0]; shift_ppm = 1.2  # or offset_hz
    [[pair]]
    spins = ["H1", "H2"]; j_hz = 7.0; dipolar_hz = -1500.0   # both optional
    [[experiment]]
    name = "fid"; t_max_s = 2e-4; points = 128; dipolar_scale = 1.0; noise = 1e-3
"""

from importlib import resources
from pathlib import Path
import tomllib

import numpy as np

from .cluster import Cluster, Experiment, Pair, Spin
from ..base.errors import QhlInputError
from .nuclei import larmor_frequency_hz, nucleus

__all__ = ["load_cluster", "parse_cluster_toml", "load_xyz", "read_xyz_atoms", "demo_cluster", "DEMO_PATH"]

_TOP = {"name", "field_tesla", "field_direction", "observe", "reference_ppm", "spin", "pair", "experiment"}
_SPIN = {"label", "isotope", "position_angstrom", "offset_hz", "shift_ppm"}
_PAIR = {"spins", "j_hz", "dipolar_hz"}
_EXPERIMENT = {"name", "t_max_s", "points", "dipolar_scale", "noise"}

DEMO_PATH = "demo_cluster.toml"


def _check_keys(table, allowed, where, source):
    if not isinstance(table, dict):
        raise QhlInputError("expected a table", source=source, key=where)
    for k in table:
        if k not in allowed:
            raise QhlInputError(f"unknown key '{k}'; expected one of {', '.join(sorted(allowed))}",
                                source=source, key=where or k)


def _require(table, key, where, source):
    if key not in table:
        raise QhlInputError("missing required key", source=source, key=f"{where}.{key}" if where else key)
    return table[key]


def parse_cluster_toml(text: str, source: str = "<string>") -> Cluster:
    """Parse the text of a cluster file (see the module docstring) into a Cluster."""
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise QhlInputError(f"TOML syntax error: {e}", source=source) from None
    _check_keys(doc, _TOP, "", source)
    field = _require(doc, "field_tesla", "", source)
    observe = _require(doc, "observe", "", source)
    if not isinstance(observe, str):
        raise QhlInputError("expected an isotope symbol such as \"1H\"", source=source, key="observe")
    try:
        nucleus(observe)
    except QhlInputError as e:
        raise QhlInputError(str(e), source=source, key="observe") from None
    if not isinstance(field, (int, float)) or isinstance(field, bool):
        raise QhlInputError(f"expected a number, got {field!r}", source=source, key="field_tesla")
    if not np.isfinite(field) or field <= 0:
        raise QhlInputError(f"expected a positive field in tesla, got {field}", source=source, key="field_tesla")
    reference = doc.get("reference_ppm", 0.0)
    if not isinstance(reference, (int, float)) or isinstance(reference, bool) or not np.isfinite(reference):
        raise QhlInputError(f"expected a finite number, got {reference!r}", source=source, key="reference_ppm")
    spins = []
    raw_spins = doc.get("spin", [])
    if not isinstance(raw_spins, list):
        raise QhlInputError("expected [[spin]] entries", source=source, key="spin")
    for i, t in enumerate(raw_spins):
        where = f"spin[{i}]"
        _check_keys(t, _SPIN, where, source)
        label = _require(t, "label", where, source)
        iso = _require(t, "isotope", where, source)
        if not isinstance(iso, str):
            raise QhlInputError(f"expected an isotope symbol, got {iso!r}", source=source, key=where + ".isotope")
        try:
            iso = nucleus(iso).symbol
        except QhlInputError as e:
            raise QhlInputError(str(e), source=source, key=where + ".isotope") from None
        if "offset_hz" in t and "shift_ppm" in t:
            raise QhlInputError("give offset_hz or shift_ppm, not both", source=source, key=where)
        offset = t.get("offset_hz", 0.0)
        if "shift_ppm" in t:
            ppm = t["shift_ppm"]
            if not isinstance(ppm, (int, float)) or isinstance(ppm, bool) or not np.isfinite(ppm):
                raise QhlInputError(f"expected a finite number, got {ppm!r}", source=source, key=where + ".shift_ppm")
            offset = (ppm - reference) * 1e-6 * larmor_frequency_hz(iso, field)
        if isinstance(offset, bool) or not isinstance(offset, (int, float)):
            raise QhlInputError(f"expected a number, got {offset!r}", source=source, key=where + ".offset_hz")
        pos = t.get("position_angstrom")
        if pos is not None:
            if (not isinstance(pos, list) or len(pos) != 3
                    or not all(isinstance(c, (int, float)) and not isinstance(c, bool) for c in pos)):
                raise QhlInputError(f"expected [x, y, z] in angstrom, got {pos!r}", source=source,
                                    key=where + ".position_angstrom")
            pos = tuple(float(c) for c in pos)
        spins.append(Spin(label=label, isotope=iso, position_angstrom=pos, offset_hz=offset))
    pairs = []
    raw_pairs = doc.get("pair", [])
    if not isinstance(raw_pairs, list):
        raise QhlInputError("expected [[pair]] entries", source=source, key="pair")
    for k, t in enumerate(raw_pairs):
        where = f"pair[{k}]"
        _check_keys(t, _PAIR, where, source)
        sp = _require(t, "spins", where, source)
        if not isinstance(sp, list) or len(sp) != 2:
            raise QhlInputError(f"expected spins = [a, b], got {sp!r}", source=source, key=where + ".spins")
        for key in ("j_hz", "dipolar_hz"):
            v = t.get(key)
            if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float))):
                raise QhlInputError(f"expected a number, got {v!r}", source=source, key=f"{where}.{key}")
        pairs.append(Pair(spins=tuple(sp), j_hz=t.get("j_hz"), dipolar_hz=t.get("dipolar_hz")))
    experiments = []
    raw_ex = doc.get("experiment", [])
    if not isinstance(raw_ex, list):
        raise QhlInputError("expected [[experiment]] entries", source=source, key="experiment")
    for k, t in enumerate(raw_ex):
        where = f"experiment[{k}]"
        _check_keys(t, _EXPERIMENT, where, source)
        name = t.get("name", f"experiment{k + 1}")
        t_max = _require(t, "t_max_s", where, source)
        points = _require(t, "points", where, source)
        for key, v in (("t_max_s", t_max), ("dipolar_scale", t.get("dipolar_scale", 1.0)),
                       ("noise", t.get("noise", 1.0))):
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                raise QhlInputError(f"expected a number, got {v!r}", source=source, key=f"{where}.{key}")
        experiments.append(Experiment(name=str(name), t_max_s=float(t_max), points=points,
                                      dipolar_scale=float(t.get("dipolar_scale", 1.0)),
                                      noise=None if t.get("noise") is None else float(t["noise"])))
    direction = doc.get("field_direction", [0.0, 0.0, 1.0])
    if (not isinstance(direction, list) or len(direction) != 3
            or not all(isinstance(c, (int, float)) and not isinstance(c, bool) for c in direction)):
        raise QhlInputError(f"expected [x, y, z], got {direction!r}", source=source, key="field_direction")
    name = doc.get("name", Path(source).stem if source and not source.startswith("<") else "cluster")
    return Cluster(field_tesla=float(field), observe=observe, spins=tuple(spins), pairs=tuple(pairs),
                   experiments=tuple(experiments), field_direction=tuple(direction), source=source,
                   name=str(name))


_ELEMENT_ISOTOPE = {"H": "1H", "C": "13C", "N": "15N", "F": "19F", "P": "31P", "Si": "29Si"}


def read_xyz_atoms(path):
    """(elements, positions (N, 3) in angstrom) of a plain XYZ file: count line, comment line, atoms.

    Raises:
        QhlInputError: unreadable file, bad count, missing or malformed atom lines, non-finite values.
    """
    path = Path(path)
    src = str(path)
    try:
        lines = path.read_text().splitlines()
    except OSError as e:
        raise QhlInputError(f"cannot read file: {e.strerror}", source=src) from None
    if len(lines) < 2:
        raise QhlInputError("expected an atom count line and a comment line", source=src)
    try:
        count = int(lines[0].split()[0])
    except (ValueError, IndexError):
        raise QhlInputError(f"line 1: expected the number of atoms, got {lines[0]!r}", source=src) from None
    body = [ln for ln in lines[2:] if ln.strip()]
    if len(body) < count:
        raise QhlInputError(f"expected {count} atom lines, found {len(body)}", source=src)
    elements, positions = [], []
    for n, ln in enumerate(body[:count]):
        parts = ln.split()
        try:
            xyz = [float(c) for c in parts[1:4]]
        except ValueError:
            xyz = []
        if len(parts) < 4 or len(xyz) != 3:
            raise QhlInputError(f"line {n + 3}: expected 'element x y z', got {ln!r}", source=src)
        if not all(np.isfinite(xyz)):
            raise QhlInputError(f"line {n + 3}: coordinates must be finite", source=src)
        elements.append(parts[0])
        positions.append(xyz)
    return elements, np.array(positions, float).reshape(-1, 3)


def load_xyz(path, *, field_tesla: float = 9.4, isotopes=("1H",), observe: str | None = None,
             experiments=None) -> Cluster:
    """Read a plain XYZ file; keep atoms whose element maps to one of `isotopes`.

    Each kept atom becomes a spin labelled element + running number (H1, H2, ...) with zero
    offset; all pairs couple through geometry. Without `experiments`, one FID of 128 points to
    0.5 ms is attached.
    """
    path = Path(path)
    src = str(path)
    elements, positions = read_xyz_atoms(path)
    wanted = {nucleus(i).symbol for i in isotopes}
    spins, counters = [], {}
    for raw, xyz in zip(elements, positions):
        element = raw.capitalize() if len(raw) <= 2 else raw
        iso = _ELEMENT_ISOTOPE.get(element)
        if iso in wanted:
            counters[element] = counters.get(element, 0) + 1
            spins.append(Spin(label=f"{element}{counters[element]}", isotope=iso,
                              position_angstrom=tuple(float(c) for c in xyz)))
    if not spins:
        raise QhlInputError(f"no atoms of isotopes {', '.join(sorted(wanted))}", source=src)
    if experiments is None:
        experiments = (Experiment(name="fid", t_max_s=5e-4, points=128),)
    return Cluster(field_tesla=field_tesla, observe=observe or sorted(wanted)[0], spins=tuple(spins),
                   experiments=tuple(experiments), source=src, name=path.stem)


def load_cluster(path) -> Cluster:
    """Load a cluster from a `.toml` cluster file or a `.xyz` geometry file.

    Raises:
        QhlInputError: for a missing file or any invalid content (one line, naming file and key).
    """
    path = Path(path)
    if path.suffix.lower() == ".xyz":
        return load_xyz(path)
    try:
        text = path.read_text()
    except FileNotFoundError:
        raise QhlInputError("no such file", source=str(path)) from None
    except OSError as e:
        raise QhlInputError(f"cannot read file: {e.strerror}", source=str(path)) from None
    return parse_cluster_toml(text, source=str(path))


def demo_cluster() -> Cluster:
    """The built-in demo: six protons of an invented molecule (see qhl/data/demo_cluster.toml)."""
    text = resources.files("qhl").joinpath("data", DEMO_PATH).read_text()
    return parse_cluster_toml(text, source="demo_cluster.toml")
