"""Reading clusters: qhl's own TOML cluster file and plain XYZ geometry files.

TOML layout (all keys checked; unknown keys are errors):

    field_tesla = 9.4                # required, 0 < B <= 100 T
    field_direction = [0, 0, 1]      # optional, any non-zero vector (normalised)
    observe = "1H"                   # required: the observed isotope
    reference_ppm = 0.0              # optional carrier of the observed isotope for shift_ppm, or one per
                                     # isotope: reference_ppm = {"1H" = 4.7, "13C" = 100.0} (default 0 ppm)
    [[spin]]                         # one per nucleus
    label = "H1"; isotope = "1H"; position_angstrom = [0, 0, 0]; shift_ppm = 1.2  # or offset_hz
    [[pair]]
    spins = ["H1", "H2"]; j_hz = 7.0; dipolar_hz = -1500.0   # both optional
    [[experiment]]
    name = "fid"; t_max_s = 2e-4; points = 128; dipolar_scale = 1.0; noise = 1e-3
    [[experiment.step]]              # optional preparation after the implicit 90-degree pulse, in order;
    delay_s = 1e-3                   # each step is exactly one of: a delay,
    [[experiment.step]]
    pulse_deg = 180; phase_deg = 90  # an ideal pulse (phase 0 = about +x, default 0; isotope = "13C"
                                     # optional, default the observed isotope; duration_s = 2.5e-6
                                     # optional: a finite pulse, evolving under H plus the RF term),
    [[experiment.step]]
    sequence = "wahuha"; tau_s = 5e-6; repeat = 8   # a named sequence (qhl.spins.sequences), or
    [[experiment.step]]
    repeat = 4                       # a repeated block of its own steps, in order:
    steps = [{delay_s = 1e-5}, {pulse_deg = 180}, {delay_s = 1e-5}]
                                     # (or [[experiment.step.steps]] tables; blocks may nest)
    The sampling times count from the end of the last step.
    spinning_hz = 10e3               # optional on an experiment: spin the sample (0 <= rate <= 1 MHz) about an
    spinning_angle_deg = 54.7356     # axis this far from the field (0-90, default the magic angle); rotor frame
                                     # and crystallite orientation: qhl.spins.spinning

Every number is checked for type (no bool, no string, no integer beyond a float) and range
(the constants of qhl.spins.cluster: |offset|, |J|, |dipolar| <= 1e9 Hz, 0 < t_max_s <= 1e3 s,
2 <= points <= 2^20, |dipolar_scale| <= 10, 1e-15 <= noise <= 1e3, at most 1000 spins). Files
above 64 MiB, non-UTF-8 bytes and arrays nested deeper than 32 levels are refused.
"""

from importlib import resources
from pathlib import Path
import tomllib

import numpy as np

from .spinning import MAGIC_ANGLE_DEG
from .cluster import (MAX_ANGLE_DEG, MAX_COORDINATE_ANGSTROM, MAX_FIELD_TESLA, MAX_FREQUENCY_HZ,
                      MAX_NESTING_STEPS, MAX_PPM, MAX_REPEAT, MAX_T_MAX_S, Block, Cluster, Delay, Experiment,
                      Pair, Pulse, Spin, _short, check_experiment, check_spin_count, checked_number)
from .sequences import NAMED_SEQUENCES, named_block
from ..base.errors import QhlInputError
from ..base.files import read_text_file
from .nuclei import larmor_frequency_hz, nucleus

__all__ = ["load_cluster", "parse_cluster_toml", "step_tables", "load_xyz", "read_xyz_atoms", "demo_cluster",
           "DEMO_PATH"]

_TOP = {"name", "field_tesla", "field_direction", "observe", "reference_ppm", "spin", "pair", "experiment"}
_SPIN = {"label", "isotope", "position_angstrom", "offset_hz", "shift_ppm"}
_PAIR = {"spins", "j_hz", "dipolar_hz"}
_EXPERIMENT = {"name", "t_max_s", "points", "dipolar_scale", "noise", "step", "spinning_hz", "spinning_angle_deg"}
_STEP_KINDS = ("delay_s", "pulse_deg", "sequence", "steps")
_STEP_KEYS = {"delay_s": {"delay_s"}, "pulse_deg": {"pulse_deg", "phase_deg", "isotope", "duration_s"},
              "sequence": {"sequence", "tau_s", "repeat", "isotope"}, "steps": {"steps", "repeat"}}

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


MAX_FILE_BYTES = 64 * 2**20     # cluster and XYZ files: 64 MiB at most (a 1000-spin file is < 1 MiB)
MAX_NESTING = 32                # brackets/braces nested deeper than this are refused before parsing


def _nesting_depth(text: str) -> int:
    """Deepest nesting of [ ] and { } outside strings and comments (an upper bound is enough)."""
    depth = deepest = 0
    quote = None
    i, n = 0, len(text)
    while i < n:
        ch = text[i]
        if quote:
            if ch == "\\" and quote == '"':
                i += 2
                continue
            if ch == quote:
                quote = None
        elif ch in "\"'":
            quote = ch
        elif ch == "#":
            j = text.find("\n", i)
            i = n if j < 0 else j
            continue
        elif ch in "[{":
            depth += 1
            deepest = max(deepest, depth)
        elif ch in "]}":
            depth = max(depth - 1, 0)
        i += 1
    return deepest


def _toml(text: str, source: str) -> dict:
    if not isinstance(text, str):
        raise QhlInputError(f"expected TOML text, got {type(text).__name__}", source=source)
    if _nesting_depth(text) > MAX_NESTING:
        raise QhlInputError(f"arrays or tables nested deeper than {MAX_NESTING} levels", source=source)
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise QhlInputError(f"TOML syntax error: {str(e).splitlines()[0]}", source=source) from None
    except RecursionError:
        raise QhlInputError("TOML nested too deeply", source=source) from None
    except (ValueError, OverflowError, MemoryError) as e:   # e.g. a date the library cannot represent
        raise QhlInputError(f"TOML value not readable: {str(e).splitlines()[0] if str(e) else type(e).__name__}",
                            source=source) from None


def _reference_table(reference, observe, source) -> dict:
    """reference_ppm -> {isotope: carrier ppm}; a bare number is the observed isotope's carrier."""
    if isinstance(reference, dict):
        out = {}
        for iso, v in reference.items():
            try:
                sym = nucleus(iso).symbol
            except QhlInputError as e:
                raise QhlInputError(str(e), source=source, key=f"reference_ppm.{str(iso)[:20]}") from None
            out[sym] = checked_number(v, f"reference_ppm.{iso}", source, max_abs=MAX_PPM)
        return out
    return {observe: checked_number(reference, "reference_ppm", source, max_abs=MAX_PPM)}


def _offset_from_shift(ppm, iso, reference, references, field, where, source):
    """offset_hz = (shift_ppm - reference_ppm[isotope]) * 1e-6 * nu0(isotope)."""
    ppm = checked_number(ppm, where + ".shift_ppm", source, max_abs=MAX_PPM)
    if reference is None:
        ref = 0.0
    elif iso in references:
        ref = references[iso]
    elif isinstance(reference, dict):
        raise QhlInputError(f"no carrier for {iso} in reference_ppm (it has {', '.join(references)}); "
                            f"add \"{iso}\" = <ppm> to the reference_ppm table", source=source,
                            key=where + ".shift_ppm")
    else:
        obs = next(iter(references))
        raise QhlInputError(f"reference_ppm = {reference!r} is the carrier of the observed isotope {obs} only; "
                            f"give one per isotope, e.g. reference_ppm = {{\"{obs}\" = {reference!r}, "
                            f"\"{iso}\" = 0.0}}", source=source, key=where + ".shift_ppm")
    return (ppm - ref) * 1e-6 * larmor_frequency_hz(iso, field)


def parse_cluster_toml(text: str, source: str = "<string>") -> Cluster:
    """Parse the text of a cluster file (see the module docstring) into a Cluster.

    Raises:
        QhlInputError: any syntax error, unknown key, wrong type or number out of range (one line
            naming the source, the key, the value and the allowed range; ranges in qhl.spins.cluster).
    """
    doc = _toml(text, source)
    _check_keys(doc, _TOP, "", source)
    field = _require(doc, "field_tesla", "", source)
    observe = _require(doc, "observe", "", source)
    if not isinstance(observe, str):
        raise QhlInputError(f"expected an isotope symbol such as \"1H\", got {_short(observe)}", source=source,
                            key="observe")
    try:
        observe = nucleus(observe).symbol
    except QhlInputError as e:
        raise QhlInputError(str(e), source=source, key="observe") from None
    field = checked_number(field, "field_tesla", source, low=0, high=MAX_FIELD_TESLA, low_open=True)
    reference = doc.get("reference_ppm")
    references = {} if reference is None else _reference_table(reference, observe, source)
    spins = []
    raw_spins = doc.get("spin", [])
    if not isinstance(raw_spins, list):
        raise QhlInputError("expected [[spin]] entries", source=source, key="spin")
    check_spin_count(len(raw_spins), source)
    for i, t in enumerate(raw_spins):
        where = f"spin[{i}]"
        _check_keys(t, _SPIN, where, source)
        label = _require(t, "label", where, source)
        iso = _require(t, "isotope", where, source)
        if not isinstance(iso, str):
            raise QhlInputError(f"expected an isotope symbol, got {_short(iso)}", source=source, key=where + ".isotope")
        try:
            iso = nucleus(iso).symbol
        except QhlInputError as e:
            raise QhlInputError(str(e), source=source, key=where + ".isotope") from None
        if "offset_hz" in t and "shift_ppm" in t:
            raise QhlInputError("give offset_hz or shift_ppm, not both", source=source, key=where)
        offset = checked_number(t.get("offset_hz", 0.0), where + ".offset_hz", source, max_abs=MAX_FREQUENCY_HZ)
        if "shift_ppm" in t:
            offset = _offset_from_shift(t["shift_ppm"], iso, reference, references, field, where, source)
            if abs(offset) > MAX_FREQUENCY_HZ:
                raise QhlInputError(f"shift gives an offset of {offset:.3g} Hz; expected |offset| <= "
                                    f"{MAX_FREQUENCY_HZ:g} Hz", source=source, key=where + ".shift_ppm")
        pos = t.get("position_angstrom")
        if pos is not None:
            if not isinstance(pos, list) or len(pos) != 3:
                raise QhlInputError(f"expected [x, y, z] in angstrom, got {_short(pos)}", source=source,
                                    key=where + ".position_angstrom")
            pos = tuple(checked_number(c, where + ".position_angstrom", source, max_abs=MAX_COORDINATE_ANGSTROM)
                        for c in pos)
        spins.append(Spin(label=label, isotope=iso, position_angstrom=pos, offset_hz=offset))
    for iso in references:
        if iso not in {s.isotope for s in spins} and isinstance(reference, dict):
            raise QhlInputError(f"reference_ppm names {iso}, but no spin has that isotope", source=source,
                                key=f"reference_ppm.{iso}")
    pairs = []
    raw_pairs = doc.get("pair", [])
    if not isinstance(raw_pairs, list):
        raise QhlInputError("expected [[pair]] entries", source=source, key="pair")
    for k, t in enumerate(raw_pairs):
        where = f"pair[{k}]"
        _check_keys(t, _PAIR, where, source)
        sp = _require(t, "spins", where, source)
        if not isinstance(sp, list) or len(sp) != 2:
            raise QhlInputError(f"expected spins = [a, b], got {_short(sp)}", source=source, key=where + ".spins")
        values = {key: None if t.get(key) is None else
                  checked_number(t[key], f"{where}.{key}", source, max_abs=MAX_FREQUENCY_HZ)
                  for key in ("j_hz", "dipolar_hz")}
        pairs.append(Pair(spins=tuple(sp), **values))
    experiments = []
    raw_ex = doc.get("experiment", [])
    if not isinstance(raw_ex, list):
        raise QhlInputError("expected [[experiment]] entries", source=source, key="experiment")
    for k, t in enumerate(raw_ex):
        where = f"experiment[{k}]"
        _check_keys(t, _EXPERIMENT, where, source)
        name = t.get("name", f"experiment{k + 1}")
        if not isinstance(name, str):
            raise QhlInputError(f"expected a name, got {_short(name)}", source=source, key=where + ".name")
        t_max = _require(t, "t_max_s", where, source)
        points = _require(t, "points", where, source)
        raw_steps = t.get("step", [])
        if not isinstance(raw_steps, list):
            raise QhlInputError("expected [[experiment.step]] entries", source=source, key=where + ".step")
        steps = _parse_steps(raw_steps, where + ".step", source, 0)
        if "spinning_angle_deg" in t and not t.get("spinning_hz"):
            raise QhlInputError("spinning_angle_deg needs spinning_hz > 0 (a static sample has no rotor axis)",
                                source=source, key=where + ".spinning_angle_deg")
        ex = Experiment(name=name, t_max_s=t_max, points=points, dipolar_scale=t.get("dipolar_scale", 1.0),
                        noise=t.get("noise"), steps=steps, spinning_hz=t.get("spinning_hz", 0.0),
                        spinning_angle_deg=t.get("spinning_angle_deg", MAGIC_ANGLE_DEG))
        check_experiment(ex, where, source)
        experiments.append(Experiment(name=name, t_max_s=float(t_max), points=int(points),
                                      dipolar_scale=float(ex.dipolar_scale),
                                      noise=None if ex.noise is None else float(ex.noise), steps=steps,
                                      spinning_hz=float(ex.spinning_hz),
                                      spinning_angle_deg=float(ex.spinning_angle_deg)))
    direction = doc.get("field_direction", [0.0, 0.0, 1.0])
    if not isinstance(direction, list) or len(direction) != 3:
        raise QhlInputError(f"expected [x, y, z], got {_short(direction)}", source=source, key="field_direction")
    name = doc.get("name", Path(source).stem if source and not source.startswith("<") else "cluster")
    if not isinstance(name, str):
        raise QhlInputError(f"expected a name, got {_short(name)}", source=source, key="name")
    return Cluster(field_tesla=field, observe=observe, spins=tuple(spins), pairs=tuple(pairs),
                   experiments=tuple(experiments), field_direction=tuple(direction), source=source,
                   name=name)


def _parse_steps(raw, where, source, depth) -> tuple:
    """The step tables of an experiment (module docstring) as Delay, Pulse and Block values."""
    if depth > MAX_NESTING_STEPS:
        raise QhlInputError(f"blocks nested deeper than {MAX_NESTING_STEPS} levels", source=source, key=where)
    out = []
    for j, t in enumerate(raw):
        key = f"{where}[{j}]"
        if not isinstance(t, dict):
            raise QhlInputError(f"expected a table such as {{delay_s = 1e-3}}, got {_short(t)}", source=source,
                                key=key)
        kinds = [k for k in _STEP_KINDS if k in t]
        if len(kinds) != 1:
            raise QhlInputError(f"expected exactly one of {', '.join(_STEP_KINDS)} in a step, got "
                                f"{', '.join(kinds) if kinds else 'none'}", source=source, key=key)
        kind = kinds[0]
        _check_keys(t, _STEP_KEYS[kind], key, source)
        iso = t.get("isotope")
        if iso is not None:
            if not isinstance(iso, str):
                raise QhlInputError(f"expected an isotope symbol such as \"1H\", got {_short(iso)}",
                                    source=source, key=key + ".isotope")
            try:
                iso = nucleus(iso).symbol
            except QhlInputError as e:
                raise QhlInputError(str(e), source=source, key=key + ".isotope") from None
        if kind == "delay_s":
            out.append(Delay(checked_number(t["delay_s"], key + ".delay_s", source, low=0, high=MAX_T_MAX_S,
                                            low_open=True)))
            continue
        if kind == "pulse_deg":
            out.append(Pulse(checked_number(t["pulse_deg"], key + ".pulse_deg", source, max_abs=MAX_ANGLE_DEG),
                             checked_number(t.get("phase_deg", 0.0), key + ".phase_deg", source,
                                            max_abs=MAX_ANGLE_DEG), iso,
                             None if t.get("duration_s") is None else
                             checked_number(t["duration_s"], key + ".duration_s", source, low=0, high=MAX_T_MAX_S,
                                            low_open=True)))
            continue
        repeat = checked_number(t.get("repeat", 1), key + ".repeat", source, low=1, high=MAX_REPEAT, integer=True)
        if kind == "sequence":
            name = t["sequence"]
            if not isinstance(name, str) or name not in NAMED_SEQUENCES:
                raise QhlInputError(f"expected one of {', '.join(sorted(NAMED_SEQUENCES))}, got {_short(name)}",
                                    source=source, key=key + ".sequence")
            tau = checked_number(_require(t, "tau_s", key, source), key + ".tau_s", source, low=0,
                                 high=MAX_T_MAX_S, low_open=True)
            out.append(named_block(name, tau, repeat, iso))
            continue
        inner = t["steps"]
        if not isinstance(inner, list) or not inner:
            raise QhlInputError(f"expected a non-empty list of step tables, got {_short(inner)}", source=source,
                                key=key + ".steps")
        out.append(Block(_parse_steps(inner, key + ".steps", source, depth + 1), repeat))
    return tuple(out)


def step_tables(steps) -> list:
    """Steps as the tables of the cluster file (named sequences written out as their blocks, with
    `sequence_name` beside them for information): plain dicts, ready for JSON."""
    out = []
    for st in steps:
        if isinstance(st, Delay):
            out.append({"delay_s": st.seconds})
        elif isinstance(st, Pulse):
            row = {"pulse_deg": st.angle_deg, "phase_deg": st.phase_deg}
            if st.isotope is not None:
                row["isotope"] = st.isotope
            if getattr(st, "duration_s", None) is not None:
                row["duration_s"] = st.duration_s
            out.append(row)
        else:
            row = {"repeat": st.repeat, "steps": step_tables(st.steps)}
            if st.name is not None:
                row["sequence_name"] = st.name
            out.append(row)
    return out


def _read_text(path: Path) -> str:
    """The file as UTF-8 text; missing, unreadable, too large or undecodable -> one-line QhlInputError."""
    return read_text_file(path, MAX_FILE_BYTES, encoding="utf-8-sig")     # a leading byte-order mark is dropped


_ELEMENT_ISOTOPE = {"H": "1H", "C": "13C", "N": "15N", "F": "19F", "P": "31P", "Si": "29Si"}


def read_xyz_atoms(path):
    """(elements, positions (N, 3) in angstrom) of a plain XYZ file: count line, comment line, atoms.

    Raises:
        QhlInputError: unreadable file, bad count, missing or malformed atom lines, non-finite values.
    """
    path = Path(path)
    src = str(path)
    lines = _read_text(path).splitlines()
    if len(lines) < 2:
        raise QhlInputError("expected an atom count line and a comment line", source=src)
    try:
        count = int(lines[0].split()[0])
    except (ValueError, IndexError):
        raise QhlInputError(f"line 1: expected the number of atoms, got {lines[0]!r}", source=src) from None
    if count < 0:
        raise QhlInputError(f"line 1: expected a number of atoms >= 0, got {count}", source=src)
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
        if not all(np.isfinite(xyz)) or max(abs(c) for c in xyz) > MAX_COORDINATE_ANGSTROM:
            raise QhlInputError(f"line {n + 3}: expected finite coordinates with |value| <= "
                                f"{MAX_COORDINATE_ANGSTROM:g} angstrom, got {_short(ln.strip())}", source=src)
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
    if path.suffix.lower() in (".pdb", ".ent", ".cif", ".mmcif"):
        raise QhlInputError("a structure file, not a cluster file: cut clusters from it with `qhl cut "
                            f"{path.name} --size K --centres N --out FOLDER`", source=str(path))
    return parse_cluster_toml(_read_text(path), source=str(path))


def demo_cluster() -> Cluster:
    """The built-in demo: six protons of an invented molecule (see qhl/data/demo_cluster.toml)."""
    text = resources.files("qhl").joinpath("data", DEMO_PATH).read_text()
    return parse_cluster_toml(text, source="demo_cluster.toml")
