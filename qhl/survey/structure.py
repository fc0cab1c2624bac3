"""Cutting spin clusters out of structure files: read nuclei, choose centres, write cluster files.

Structure files: PDB and mmCIF through gemmi (first model, first alternative conformation),
and plain XYZ (atom count, comment, then `element x y z` lines). Coordinates are used as the
file gives them (angstrom, Cartesian); crystal symmetry is not expanded, so a file must already
hold the neighbours a cluster should see.

Selection. The nuclei of the chosen isotopes (element = the letters of the isotope symbol, so
'1H' picks H atoms, assuming full abundance of that isotope) get labels element + running number
in file order (H1, H2, ...), the same in every cluster cut from one file.

Cutting (common practice for cluster approximations of extended spin systems):
    centres: N nuclei spread over the structure by farthest-point sampling, starting at the
             nucleus nearest the centroid (each next centre maximises its distance to those chosen);
    cluster: the K nuclei nearest each centre (the centre first, ties broken by file order), or
             with a radius R the nuclei within R of the centre, nearest first, at most K.
Clusters holding the same nuclei as an earlier one are dropped. Offsets are zero unless given
(structure files hold no chemical shifts; invented_offsets_hz makes up plausible ones).
"""

from dataclasses import dataclass, replace
import json
import math
import os
from pathlib import Path
import re
import tempfile
from importlib import resources

import numpy as np

from ..spins.cluster import MAX_COORDINATE_ANGSTROM, Cluster, Experiment, Spin
from ..spins.cluster_file import load_cluster, read_xyz_atoms
from ..base.errors import QhlInputError
from ..base.files import read_text_file
from ..spins.nuclei import larmor_frequency_hz, nucleus

__all__ = ["Nuclei", "read_structure", "nuclei_from_atoms", "choose_centres", "cut_clusters",
           "invented_offsets_hz", "cluster_to_toml", "write_cluster_files", "write_text_atomic",
           "demo_structure_path", "DEFAULT_EXPERIMENT", "DEMO_STRUCTURE"]

DEMO_STRUCTURE = "demo_structure.pdb"

DEFAULT_EXPERIMENT = Experiment(name="fid", t_max_s=5e-4, points=128, dipolar_scale=1.0, noise=1e-3)

_GEMMI_SUFFIXES = {".pdb", ".ent", ".cif", ".mmcif", ".pdbx"}


@dataclass(frozen=True)
class Nuclei:
    """The nuclei of the chosen isotopes in one structure.

    Attributes:
        labels: element + running number per element, in file order.
        isotopes: isotope symbol per nucleus.
        positions: (N, 3) array in angstrom.
        source: the file (or a description) they came from.
        name: a short name for cluster names (the file stem).
    """

    labels: tuple
    isotopes: tuple
    positions: np.ndarray
    source: str
    name: str

    def __len__(self):
        return len(self.labels)


def demo_structure_path() -> Path:
    """Path of the invented demo structure shipped with qhl (48 protons; see its REMARK lines)."""
    return Path(str(resources.files("qhl").joinpath("data", DEMO_STRUCTURE)))


def _element_of(isotope: str) -> str:
    return re.sub(r"^\d+", "", nucleus(isotope).symbol)


def nuclei_from_atoms(elements, positions, isotopes=("1H",), source="<atoms>", name="structure") -> Nuclei:
    """Keep the atoms whose element matches one of `isotopes` (e.g. from ase: symbols, positions).

    Args:
        elements: element symbol per atom ('H', 'C', ...; case-insensitive).
        positions: (atoms, 3) Cartesian coordinates in angstrom.
        isotopes: isotope symbols to keep ('1H', '19F', ...), spin-1/2 only.

    Returns:
        Nuclei in the order of the atoms.

    Raises:
        QhlInputError: unknown isotope, non-finite coordinates, or no atom of the isotopes.
    """
    if isinstance(isotopes, str):
        isotopes = (isotopes,)
    if not isotopes:
        raise QhlInputError("expected at least one isotope", source=source, key="isotope")
    by_element = {}
    for iso in isotopes:
        by_element[_element_of(iso).capitalize()] = nucleus(iso).symbol
    pos = np.asarray(positions, float).reshape(-1, 3)
    elements = [str(e).strip().capitalize() for e in elements]
    if len(elements) != len(pos):
        raise QhlInputError(f"{len(elements)} elements but {len(pos)} positions", source=source)
    keep = [i for i, e in enumerate(elements) if e in by_element]
    if not keep:
        raise QhlInputError(f"no nuclei of isotope {', '.join(by_element.values())} "
                            f"(found elements: {', '.join(sorted(set(elements))) or 'none'})",
                            source=source, key="isotope")
    if not np.all(np.isfinite(pos[keep])) or np.max(np.abs(pos[keep])) > MAX_COORDINATE_ANGSTROM:
        raise QhlInputError(f"coordinates must be finite with |value| <= {MAX_COORDINATE_ANGSTROM:g} angstrom",
                            source=source)
    counters, labels, isos = {}, [], []
    for i in keep:
        e = elements[i]
        counters[e] = counters.get(e, 0) + 1
        labels.append(f"{e}{counters[e]}")
        isos.append(by_element[e])
    return Nuclei(tuple(labels), tuple(isos), pos[keep].copy(), source, name)


MAX_STRUCTURE_BYTES = 256 * 2**20   # PDB/mmCIF files above 256 MiB are refused before parsing


def _check_text_file(path: Path) -> None:
    """Refuse an empty, oversized or non-UTF-8 file before the structure library sees it, and a PDB
    coordinate that is not a number (gemmi reads one as 0.0)."""
    text = read_text_file(path, MAX_STRUCTURE_BYTES)
    if not text.strip():
        raise QhlInputError("empty file: expected PDB or mmCIF records", source=str(path))
    if path.suffix.lower() in (".pdb", ".ent"):
        _check_pdb_coordinates(text, str(path))


def _check_pdb_coordinates(text: str, src: str) -> None:
    """Every ATOM/HETATM record's x, y, z (columns 31-38, 39-46, 47-54 of the wwPDB format description,
    version 3.3, 2012) must be a finite number."""
    for number, line in enumerate(text.splitlines(), 1):
        if not line.startswith(("ATOM  ", "HETATM")):
            continue
        for axis, (a, b) in zip("xyz", ((30, 38), (38, 46), (46, 54))):
            field = line[a:b]
            try:
                ok = math.isfinite(float(field))
            except ValueError:
                ok = False
            if not ok:
                raise QhlInputError(f"line {number}: {axis} coordinate (columns {a + 1}-{b}) is "
                                    f"{field.strip()!r}: expected a number in angstrom", source=src)


def _read_gemmi_atoms(path: Path):
    import gemmi

    src = str(path)
    _check_text_file(path)
    try:
        st = gemmi.read_structure(src)
        if len(st) == 0:
            raise QhlInputError("no model in the structure", source=src)
        model = st[0]
    except QhlInputError:
        raise
    except (Exception, MemoryError) as e:       # the library's own errors, whatever their type
        reason = str(e).splitlines()[0] if str(e).strip() else type(e).__name__
        raise QhlInputError(f"cannot read structure: {reason[:200]}", source=src) from None
    elements, positions = [], []
    for chain in model:
        for residue in chain:
            # first alternative conformation only (atoms without altloc, or the residue's first letter);
            # gemmi's own remover also merges atoms sharing a name, which some writers produce
            locs = [a.altloc for a in residue if a.altloc != "\0"]
            keep = locs[0] if locs else "\0"
            for atom in residue:
                if atom.altloc in ("\0", keep):
                    elements.append(atom.element.name)
                    positions.append(atom.pos.tolist())
    return elements, np.array(positions, float).reshape(-1, 3)


def read_structure(path, isotopes=("1H",)) -> Nuclei:
    """Read a PDB, mmCIF or XYZ file and keep the nuclei of `isotopes`.

    Args:
        path: .pdb/.ent or .cif/.mmcif (read with gemmi), or .xyz.
        isotopes: isotope symbols to keep.

    Returns:
        Nuclei (labels, isotopes, positions in angstrom).

    Raises:
        QhlInputError: missing/unreadable file, unknown format, or no nuclei of the isotopes.

    Example:
        >>> len(read_structure(demo_structure_path(), "1H"))
        48
    """
    path = Path(str(path))
    src = str(path)
    if path.is_dir():
        raise QhlInputError("a folder, not a structure file", source=src)
    if not path.is_file():
        raise QhlInputError("no such file", source=src)
    suffix = path.suffix.lower()
    try:
        if suffix == ".xyz":
            elements, positions = read_xyz_atoms(path)
        elif suffix in _GEMMI_SUFFIXES:
            elements, positions = _read_gemmi_atoms(path)
        else:
            raise QhlInputError(f"unknown structure format '{suffix}': expected .pdb, .cif or .xyz", source=src)
    except OSError as e:
        raise QhlInputError(f"cannot read file: {e.strerror or type(e).__name__}", source=src) from None
    stem = re.sub(r"[^A-Za-z0-9_]+", "_", path.stem) or "structure"
    return nuclei_from_atoms(elements, positions, isotopes, source=src, name=stem)


def choose_centres(positions, count: int) -> np.ndarray:
    """Indices of `count` points spread by farthest-point sampling (start: nearest the centroid).

    Example:
        >>> choose_centres([[0, 0, 0], [1, 0, 0], [10, 0, 0]], 2).tolist()
        [1, 2]
    """
    pos = np.asarray(positions, float).reshape(-1, 3)
    if not 1 <= count <= len(pos):
        raise QhlInputError(f"expected between 1 and {len(pos)} centres, got {count}", key="centres")
    first = int(np.argmin(np.linalg.norm(pos - pos.mean(axis=0), axis=1)))
    chosen = [first]
    nearest = np.linalg.norm(pos - pos[first], axis=1)
    for _ in range(count - 1):
        nxt = int(np.argmax(nearest))
        chosen.append(nxt)
        nearest = np.minimum(nearest, np.linalg.norm(pos - pos[nxt], axis=1))
    return np.array(chosen, dtype=int)


def invented_offsets_hz(nuclei: Nuclei, spread_ppm: float, field_tesla: float = 9.4, seed: int = 0) -> np.ndarray:
    """Made-up chemical-shift offsets: uniform in [-spread/2, +spread/2] ppm of each Larmor frequency.

    Structure files carry no shifts; these stand in for them (fixed seed, one value per nucleus,
    so a nucleus has the same offset in every cluster). offset_hz = ppm * 1e-6 * nu0.
    """
    if not (math.isfinite(spread_ppm) and spread_ppm >= 0):
        raise QhlInputError(f"expected a shift spread >= 0 ppm, got {spread_ppm}", key="shift-spread")
    ppm = np.random.default_rng(seed).uniform(-0.5, 0.5, len(nuclei)) * spread_ppm
    nu0 = np.array([larmor_frequency_hz(iso, field_tesla) for iso in nuclei.isotopes])
    return ppm * 1e-6 * nu0


def cut_clusters(nuclei: Nuclei, size: int, centres: int, radius: float | None = None,
                 field_tesla: float = 9.4, experiments=(DEFAULT_EXPERIMENT,), offsets_hz=None,
                 observe: str | None = None) -> list:
    """Cut clusters of `size` nuclei around `centres` centres (see the module docstring).

    Args:
        nuclei: from read_structure or nuclei_from_atoms.
        size: K, spins per cluster (with `radius`: the most spins per cluster), >= 2.
        centres: N, how many centres.
        radius: optional cut-off in angstrom; clusters with fewer than 2 spins are dropped.
        field_tesla: static field of the written clusters (along z of the structure's frame).
        experiments: experiments attached to every cluster (default one FID).
        offsets_hz: optional offset per nucleus (e.g. invented_offsets_hz); default all zero.
        observe: the observed isotope (default: that of the first nucleus); a cluster without a
            spin of it observes its first spin's isotope.

    Returns:
        list of Cluster, named <structure>-<centre label>-n<spins>, spins nearest first.

    Raises:
        QhlInputError: size < 2, fewer nuclei than `size`, bad centres or radius, or no cluster left.
    """
    src = nuclei.source
    n = len(nuclei)
    if size < 2:
        raise QhlInputError(f"expected a cluster size of at least 2, got {size}", source=src, key="size")
    if n < size:
        raise QhlInputError(f"only {n} nuclei of {', '.join(sorted(set(nuclei.isotopes)))}; "
                            f"expected at least size {size}", source=src, key="size")
    if not 1 <= centres <= n:
        raise QhlInputError(f"expected between 1 and {n} centres, got {centres}", source=src, key="centres")
    if radius is not None and not (math.isfinite(radius) and radius > 0):
        raise QhlInputError(f"expected a positive radius in angstrom, got {radius}", source=src, key="radius")
    pos = nuclei.positions
    offsets = np.zeros(n) if offsets_hz is None else np.asarray(offsets_hz, float).ravel()
    if offsets.shape != (n,) or not np.all(np.isfinite(offsets)):
        raise QhlInputError(f"expected {n} finite offsets", source=src, key="offsets_hz")
    observe = nuclei.isotopes[0] if observe is None else nucleus(observe).symbol
    clusters, seen = [], set()
    for c in choose_centres(pos, centres):
        dist = np.linalg.norm(pos - pos[c], axis=1)
        order = np.argsort(dist, kind="stable")
        if radius is not None:
            order = order[dist[order] <= radius]
        members = order[:size]
        if len(members) < 2:
            continue
        key = frozenset(members.tolist())
        if key in seen:
            continue
        seen.add(key)
        spins = tuple(Spin(nuclei.labels[i], nuclei.isotopes[i], tuple(float(x) for x in pos[i]),
                           float(offsets[i]))
                      for i in members)
        isos = {s.isotope for s in spins}
        clusters.append(Cluster(field_tesla=field_tesla, observe=observe if observe in isos else spins[0].isotope,
                                spins=spins, experiments=tuple(experiments), source=src,
                                name=f"{nuclei.name}-{nuclei.labels[c]}-n{len(members)}"))
    if not clusters:
        raise QhlInputError(f"no centre has another nucleus within {radius} A", source=src, key="radius")
    return clusters


def _toml_float(v) -> str:
    v = float(v)
    if math.isnan(v):
        return "nan"
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    return repr(v)


def _toml_string(s) -> str:
    return json.dumps(str(s), ensure_ascii=False)


def cluster_to_toml(cluster: Cluster, comment: str | None = None) -> str:
    """The cluster as qhl cluster-file TOML (see qhl.spins.cluster_file); floats written exactly (repr).

    Offsets are written as offset_hz; the text re-reads to an equal cluster, and equal clusters
    give equal text (a canonical form).

    Example:
        >>> from qhl import demo_cluster, parse_cluster_toml
        >>> c = demo_cluster(); text = cluster_to_toml(c)
        >>> cluster_to_toml(parse_cluster_toml(text)) == text
        True
    """
    out = []
    if comment:
        out += [f"# {line}" for line in comment.splitlines()]
    out += [f"name = {_toml_string(cluster.name)}",
            f"field_tesla = {_toml_float(cluster.field_tesla)}",
            "field_direction = [" + ", ".join(_toml_float(x) for x in cluster.field_direction) + "]",
            f"observe = {_toml_string(cluster.observe)}"]
    for s in cluster.spins:
        out += ["", "[[spin]]", f"label = {_toml_string(s.label)}", f"isotope = {_toml_string(s.isotope)}"]
        if s.position_angstrom is not None:
            out.append("position_angstrom = [" + ", ".join(_toml_float(x) for x in s.position_angstrom) + "]")
        out.append(f"offset_hz = {_toml_float(s.offset_hz)}")
    for p in cluster.pairs:
        out += ["", "[[pair]]", "spins = [" + ", ".join(_toml_string(x) for x in p.spins) + "]"]
        if p.j_hz is not None:
            out.append(f"j_hz = {_toml_float(p.j_hz)}")
        if p.dipolar_hz is not None:
            out.append(f"dipolar_hz = {_toml_float(p.dipolar_hz)}")
    for ex in cluster.experiments:
        out += ["", "[[experiment]]", f"name = {_toml_string(ex.name)}", f"t_max_s = {_toml_float(ex.t_max_s)}",
                f"points = {int(ex.points)}", f"dipolar_scale = {_toml_float(ex.dipolar_scale)}"]
        if ex.noise is not None:
            out.append(f"noise = {_toml_float(ex.noise)}")
        if getattr(ex, "spinning_hz", 0.0):
            out += [f"spinning_hz = {_toml_float(ex.spinning_hz)}",
                    f"spinning_angle_deg = {_toml_float(ex.spinning_angle_deg)}"]
    return "\n".join(out) + "\n"


def write_text_atomic(path, text: str) -> None:
    """Write `text` to `path` through a temporary file in the same folder and an atomic rename."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write_cluster_files(clusters, out_dir, comment: str | None = None) -> list:
    """Write each cluster to `out_dir/<name>.toml` (atomically), re-read it and check it is equal.

    Returns:
        list of Path, one per cluster.

    Raises:
        QhlInputError: the folder cannot be created or a file does not re-read to the same cluster.
    """
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise QhlInputError(f"cannot create folder: {e.strerror}", source=str(out), key="out") from None
    paths = []
    for c in clusters:
        text = cluster_to_toml(c, comment)
        path = out / (re.sub(r"[^A-Za-z0-9_.-]+", "_", c.name) + ".toml")
        try:
            write_text_atomic(path, text)
        except OSError as e:
            raise QhlInputError(f"cannot write file: {e.strerror}", source=str(path), key="out") from None
        back = load_cluster(path)
        if cluster_to_toml(replace(back, source=c.source)) != cluster_to_toml(c):
            raise QhlInputError("written cluster file does not re-read to the same cluster", source=str(path))
        paths.append(path)
    return paths
