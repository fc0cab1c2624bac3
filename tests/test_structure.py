"""Reading structures, cutting clusters and writing cluster files."""

import itertools
import json

import numpy as np
import pytest

from qhl import QhlInputError, demo_cluster, load_cluster, parse_cluster_toml
from qhl.cli import main
from qhl.survey.structure import (choose_centres, cluster_to_toml, cut_clusters, demo_structure_path,
                           invented_offsets_hz, nuclei_from_atoms, read_structure, write_cluster_files)

ase_build = pytest.importorskip("ase.build")
ase_io = pytest.importorskip("ase.io")

# G2 set as shipped by ase (Curtiss et al., J. Chem. Phys. 106, 1063 (1997)): CH4 H-H 1.7794 A.
CH4_HH = 1.7794


def _methane():
    m = ase_build.molecule("CH4")
    return nuclei_from_atoms(m.get_chemical_symbols(), m.positions, "1H", source="CH4", name="CH4")


def _distances(cluster):
    pos = np.array([s.position_angstrom for s in cluster.spins])
    return [float(np.linalg.norm(pos[i] - pos[j])) for i, j in itertools.combinations(range(len(pos)), 2)]


def test_methane_clusters_reproduce_g2_distance():
    nuclei = _methane()
    assert len(nuclei) == 4 and nuclei.labels == ("H1", "H2", "H3", "H4")
    pairs = cut_clusters(nuclei, size=2, centres=4)
    assert 2 <= len(pairs) <= 4
    for c in pairs + cut_clusters(nuclei, size=4, centres=1):
        for d in _distances(c):
            assert d == pytest.approx(CH4_HH, abs=1e-4)   # G2 set via ase


@pytest.mark.parametrize("fmt", ["xyz", "pdb"])
def test_files_written_by_ase_read_back(tmp_path, fmt):
    # ase writes the file, qhl reads it (its own XYZ parser, or gemmi for PDB).
    m = ase_build.molecule("CH4")
    path = tmp_path / f"methane.{fmt}"
    ase_io.write(path, m)
    nuclei = read_structure(path, "1H")
    ref = m.positions[np.array(m.get_chemical_symbols()) == "H"]
    assert np.allclose(nuclei.positions, ref, atol=1e-3)       # PDB keeps 3 decimals
    c = cut_clusters(nuclei, size=4, centres=1)[0]
    assert _distances(c) == pytest.approx([CH4_HH] * 6, abs=2e-3)


def test_mmcif_and_pdb_give_the_same_nuclei(tmp_path):
    gemmi = pytest.importorskip("gemmi")
    st = gemmi.read_structure(str(demo_structure_path()))
    cif = tmp_path / "demo.cif"
    st.setup_entities()
    st.make_mmcif_document().write_file(str(cif))
    a, b = read_structure(demo_structure_path(), "1H"), read_structure(cif, "1H")
    assert a.labels == b.labels
    assert np.array_equal(a.positions, b.positions)


def test_first_alternative_conformation_only(tmp_path):
    # Two conformers A/B of one hydrogen (PDB altloc column): only A is kept.
    rows = [("H1", " ", 0.0), ("H2", "A", 2.0), ("H2", "B", 2.6), ("H3", " ", 4.0)]
    text = "".join(f"HETATM{i + 1:5d}  {n:<3}{alt}XYZ A   1    {x:8.3f}{0.0:8.3f}{0.0:8.3f}  0.50 10.00           H\n"
                   for i, (n, alt, x) in enumerate(rows)) + "END\n"
    path = tmp_path / "alt.pdb"
    path.write_text(text)
    assert read_structure(path, "1H").positions[:, 0].tolist() == [0.0, 2.0, 4.0]


def test_demo_structure_is_plausible():
    nuclei = read_structure(demo_structure_path(), "1H")
    assert len(nuclei) == 48
    d = np.linalg.norm(nuclei.positions[:, None] - nuclei.positions[None], axis=-1)
    d[np.diag_indices(48)] = np.inf
    assert d.min() >= 1.5
    # Methyl and methylene protons: geminal H-H at 1.78 A (tetrahedral C-H 1.09 A, common practice).
    assert d.min() == pytest.approx(1.78, abs=0.01)
    assert len(read_structure(demo_structure_path(), "13C")) == 16


def test_k_nearest_and_radius():
    nuclei = read_structure(demo_structure_path(), "1H")
    pos = nuclei.positions
    clusters = cut_clusters(nuclei, size=7, centres=10)
    for c in clusters:
        centre = nuclei.labels.index(c.spins[0].label)
        dist = np.linalg.norm(pos - pos[centre], axis=1)
        members = [nuclei.labels.index(s.label) for s in c.spins]
        assert len(members) == 7 and members[0] == centre
        assert np.max(dist[members]) <= np.sort(dist)[6] + 1e-12   # exactly the 7 nearest
    assert len({frozenset(s.label for s in c.spins) for c in clusters}) == len(clusters)
    radius = 3.0
    for c in cut_clusters(nuclei, size=40, centres=5, radius=radius):
        centre = nuclei.labels.index(c.spins[0].label)
        dist = np.linalg.norm(pos - pos[centre], axis=1)
        assert sorted(nuclei.labels.index(s.label) for s in c.spins) == sorted(np.flatnonzero(dist <= radius))
    capped = cut_clusters(nuclei, size=3, centres=5, radius=radius)
    assert all(c.n_spins <= 3 for c in capped)


def test_choose_centres_spreads_points():
    pos = np.array([[0.0, 0, 0], [0.3, 1.5, 0], [10, 0, 0], [-10, 0, 0], [0, 9, 0]])
    idx = choose_centres(pos, 4)
    assert idx[0] == 1          # nearest the centroid (0.06, 2.1, 0)
    assert sorted(idx.tolist()[1:]) == [2, 3, 4]


def test_cluster_toml_round_trip_and_files(tmp_path):
    c = demo_cluster()
    text = cluster_to_toml(c, comment="two\nlines")
    back = parse_cluster_toml(text)
    assert cluster_to_toml(back) == cluster_to_toml(c)
    assert [s.offset_hz for s in back.spins] == [s.offset_hz for s in c.spins]
    assert back.pairs == c.pairs and back.experiments == c.experiments
    nuclei = read_structure(demo_structure_path(), "1H")
    offsets = invented_offsets_hz(nuclei, 8.0, 9.4, seed=1)
    assert np.all(np.abs(offsets) <= 4e-6 * 400.2e6)           # +-4 ppm at 400.2 MHz
    clusters = cut_clusters(nuclei, size=6, centres=3, offsets_hz=offsets)
    paths = write_cluster_files(clusters, tmp_path / "out")
    for c, p in zip(clusters, paths):
        r = load_cluster(p)
        assert r.name == c.name and r.spins == c.spins
        assert r.spins[0].offset_hz == offsets[nuclei.labels.index(r.spins[0].label)]


def test_bad_input():
    nuclei = _methane()
    m = ase_build.molecule("CH4")
    with pytest.raises(QhlInputError, match="no nuclei of isotope 19F"):
        nuclei_from_atoms(m.get_chemical_symbols(), m.positions, "19F", source="CH4")
    with pytest.raises(QhlInputError, match="only 4 nuclei of 1H; expected at least size 5"):
        cut_clusters(nuclei, size=5, centres=1)
    with pytest.raises(QhlInputError, match="centres"):
        cut_clusters(nuclei, size=2, centres=9)
    with pytest.raises(QhlInputError, match="no centre has another nucleus"):
        cut_clusters(nuclei, size=2, centres=1, radius=1.0)
    with pytest.raises(QhlInputError, match="spin 1"):
        nuclei_from_atoms(["H"], [[0, 0, 0]], "2H")


@pytest.mark.parametrize("field,axis", [("     abc", "x"), ("     nan", "x"), ("        ", "x")])
def test_pdb_coordinate_that_is_not_a_number_is_refused(tmp_path, field, axis):
    # wwPDB format description v3.3 (2012): x, y, z in columns 31-38, 39-46, 47-54 (8.3f); gemmi
    # read a non-number there as 0.0, which put a nucleus at the origin without a word
    good = "HETATM    2  H2  QXA A   1       1.800   0.000   0.000  1.00 20.00           H  \n"
    bad = "HETATM    1  H1  QXA A   1    " + field + "   0.000   0.000  1.00 20.00           H  \n"
    path = tmp_path / "made_up.pdb"
    path.write_text(good + bad + "END\n")
    with pytest.raises(QhlInputError, match=f"made_up.pdb: line 2: {axis} coordinate \\(columns 31-38\\)"):
        read_structure(path)
    path.write_text(good + good.replace("H2 ", "H3 ").replace("1.800", "3.600") + "END\n")
    assert len(read_structure(path)) == 2


def test_cli_cut(tmp_path, capsys):
    out = tmp_path / "clusters"
    assert main(["cut", str(demo_structure_path()), "--isotope", "1H", "--size", "6", "--centres", "4",
                 "--out", str(out), "--shift-spread", "6", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["nuclei"] == 48 and report["clusters"] == 4 and report["sizes"] == [6] * 4
    assert all(load_cluster(p).n_spins == 6 for p in report["files"])


@pytest.mark.parametrize("argv, message", [
    (["--isotope", "19F", "--size", "4", "--centres", "2"], "no nuclei of isotope 19F"),
    (["--size", "49", "--centres", "2"], "only 48 nuclei of 1H"),
])
def test_cli_cut_bad_input_exit_2(tmp_path, capsys, argv, message):
    rc = main(["cut", str(demo_structure_path()), "--out", str(tmp_path / "o")] + argv)
    err = capsys.readouterr().err
    assert rc == 2
    assert message in err and len(err.strip().splitlines()) == 1 and "Traceback" not in err


def test_cli_cut_missing_or_unknown_file(tmp_path, capsys):
    assert main(["cut", str(tmp_path / "none.pdb"), "--size", "2", "--centres", "1", "--out", str(tmp_path)]) == 2
    assert "no such file" in capsys.readouterr().err
    other = tmp_path / "x.mol2"
    other.write_text("x")
    assert main(["cut", str(other), "--size", "2", "--centres", "1", "--out", str(tmp_path)]) == 2
    assert "unknown structure format" in capsys.readouterr().err
