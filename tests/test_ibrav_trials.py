"""pw.x cells of every ibrav, and layers whichever basis they are written in (real pw.x 6.7 runs,
tests/data/ibrav_trials). References: pw.x's own output, INPUT_PW's ibrav table (as
adapters.espresso.IBRAV_TYPES), ASE's Bravais classification (``Cell.get_bravais_lattice``),
spglib's space group, and ASE's basis-independent dimensionality analysis
(``ase.geometry.dimensionality.analyze_dimensionality``, method RDA)."""

import gzip
import re
from pathlib import Path

import numpy as np
import pytest
import spglib
from ase.geometry.dimensionality import analyze_dimensionality
from ase.io import read, write

from driftwatch import analyze, geometry
from driftwatch.adapters.espresso import IBRAV_TYPES
from driftwatch.errors import NotPeriodicError

DATA = Path(__file__).parent / "data" / "ibrav_trials"
RUNS = sorted((DATA / "runs").iterdir())
LAYERS = sorted((DATA / "layers").iterdir())

# ASE's lattice names -> Pearson symbols (International Tables' 14 Bravais lattices)
ASE_PEARSON = {"CUB": "cP", "FCC": "cF", "BCC": "cI", "HEX": "hP", "RHL": "hR", "TET": "tP",
               "BCT": "tI", "ORC": "oP", "ORCC": "oS", "ORCF": "oF", "ORCI": "oI", "MCL": "mP",
               "MCLC": "mS", "TRI": "aP"}
# spglib: crystal system from the space-group number, centring from the symbol's first letter
SYSTEMS = [(2, "a"), (15, "m"), (74, "o"), (142, "t"), (194, "h"), (230, "c")]


def spglib_type(atoms, symprec=1e-5):
    """The lattice's Bravais type by spglib: the space group of the cell with one atom."""
    ds = spglib.get_symmetry_dataset((atoms.cell[:], [[0, 0, 0]], [1]), symprec=symprec)
    system = next(s for top, s in SYSTEMS if ds.number <= top)
    c = ds.international[0]
    if c == "R":
        return "hR"
    return system + ("S" if c in "ABC" else c)


def ibrav_of(run):
    return int(re.search(r"ibrav\s*=\s*(-?\d+)", (run / "pw.in").read_text()).group(1))


def shear_basis(rng, n=5) -> np.ndarray:
    """A random integer change of basis of determinant +1: a product of ``n`` elementary shears."""
    M = np.eye(3, dtype=int)
    for _ in range(n):
        i, j = rng.choice(3, 2, replace=False)
        E = np.eye(3, dtype=int)
        E[i, j] = rng.choice([-1, 1])
        M = E @ M
    return M


def dimensionality(atoms) -> str:
    """ASE's RDA: the dimensionality of the interval just below 3D, where every atom is bonded
    within its layer, chain or cluster and no further ('2D' a layer, '1D' chains, '0D' bulk)."""
    iv = sorted(analyze_dimensionality(atoms, method="RDA"), key=lambda i: i.a)
    kept = [i for i in iv if i.b > i.a]
    return kept[[i.dimtype for i in kept].index("3D") - 1].dimtype


def test_every_ibrav_reads_as_its_bravais_type():
    """The first frame of a vc-relax of each ibrav: driftwatch's lattice type = INPUT_PW's type of
    that ibrav = ASE's = spglib's; frames = pw.x's '!' energies; the cell_dofree = 'ibrav' note
    names the type the cell could not fall below."""
    seen = set()
    for run in RUNS:
        ibrav = ibrav_of(run)
        seen.add(ibrav)
        first = read(run / "pw.out.gz", 0, format="espresso-out")
        want = IBRAV_TYPES[ibrav]
        assert ASE_PEARSON[first.cell.get_bravais_lattice(eps=2e-4).name] == want, run.name
        assert spglib_type(first) == want, run.name
        rec = analyze(run)
        assert rec["summary"]["initial"]["type"] == want, run.name
        with gzip.open(run / "pw.out.gz", "rt") as fh:
            bangs = sum(1 for line in fh if line.startswith("!"))
        assert rec["run"]["n_frames"] == bangs, run.name
        held = rec["summary"]["cell_held"]
        assert (held is None) == (ibrav == 14 or "'ibrav'" not in (run / "pw.in").read_text())
        if held:
            assert f"its ibrav ({ibrav}, {want}): the cell could not fall below {want}" in held
    assert seen == set(IBRAV_TYPES)                                   # every ibrav pw.x accepts


@pytest.mark.parametrize("run", LAYERS, ids=lambda p: p.name)
def test_stacked_layers_are_layers_in_any_basis(run, tmp_path):
    """Stacked monolayers 14.5 Å apart are layers for ASE's basis-independent dimensionality
    analysis, whether pw.x's cell is primitive tetragonal/orthorhombic (two vectors in the layers'
    plane) or body- or A-centred (no two primitive vectors in it: read as bulk tI / oI / oS before,
    a field trial's finding). driftwatch reads the centred ones in a basis whose first two vectors
    lie in the plane and says so; the answer is the same in the file's basis and in ten random
    unimodular bases of the same structure (the rule: invariance under a change of basis)."""
    atoms = read(run / "pw.out.gz", -1, format="espresso-out")
    assert dimensionality(atoms) == "2D"
    rec = analyze(run)
    assert rec["geometry"]["dimension"] == 2
    own = geometry.vacuum_gaps(atoms.cell[:], atoms.positions)
    said = [w for w in rec["run"]["warnings"] if "no two of the cell's vectors lie" in w]
    assert bool(said) == (own.max() < 6.0), (run.name, own)     # only where the file hid it
    final = rec["summary"]["verdict"]["structure"]["final"]
    want = (rec["summary"]["final"]["type"], final["group"])
    rng = np.random.default_rng(7)
    for k in range(10):
        M = shear_basis(rng, 4)
        other = atoms.copy()
        other.set_cell(M @ atoms.cell[:], scale_atoms=False)
        write(tmp_path / f"b{k}.extxyz", other)
        got = analyze(tmp_path / f"b{k}.extxyz")
        assert got["geometry"]["dimension"] == 2, (run.name, M.tolist())
        assert (got["summary"]["final"]["type"],
                got["summary"]["verdict"]["structure"]["final"]["group"]) == want, M.tolist()


def test_chains_in_a_centred_cell_are_no_layer():
    """One Al atom in an ibrav 11 cell: chains 7 Å apart (ASE's dimensionality analysis: 1D). One
    plane family of pw.x's vectors shows a 6.97 Å gap, which had made it a layer (oc, cmmm); the
    other families with such gaps lie along planes no two of its vectors span. Now refused as
    chains, as the same cell in its reduced basis always was."""
    run = DATA / "wires" / "rp11_0"
    atoms = read(run / "pw.out.gz", 0, format="espresso-out")
    assert dimensionality(atoms) == "1D"
    gaps, normals, _ = geometry.plane_gaps(atoms.cell[:], atoms.positions)
    assert (gaps > 6.0).sum() >= 2                                      # two families: chains
    with pytest.raises(NotPeriodicError, match="chains or molecules in a box"):
        analyze(run)


def test_bulk_runs_of_every_ibrav_are_not_rebased():
    """No ibrav run (one or two atoms, no vacuum: every plane family's gap under 4 Å) is read in
    another basis."""
    for run in RUNS:
        first = read(run / "pw.out.gz", 0, format="espresso-out")
        assert geometry.plane_gaps(first.cell[:], first.positions)[0].max() < 4.0, run.name
        rec = analyze(run)
        assert rec["geometry"]["dimension"] == 3
        assert not [w for w in rec["run"]["warnings"] if "no two of the cell's vectors" in w]


def test_the_final_scf_of_a_vc_relax_is_said():
    """A converged vc-relax ends with pw.x's final scf at the relaxed structure ("Final scf
    calculation at the relaxed structure", pw.x's own line), which ASE's reader, and driftwatch,
    read as one more frame: the same structure as the step before, its energy in a new basis (a
    field trial saw it as an unlabelled ionic step). Where pw.x printed that line and a converged
    energy after it, the record and `inspect` say the last step is that final scf."""
    import subprocess
    import sys
    said = 0
    for run in RUNS:
        with gzip.open(run / "pw.out.gz", "rt") as fh:
            text = fh.read()
        k = text.find("inal scf calculation at the relaxed structure")
        has = k >= 0 and "\n!" in text[k:]
        rec = analyze(run)
        assert bool(rec["run"]["code_settings"].get("final_scf")) == has, run.name
        if not has:
            continue
        a, b = read(run / "pw.out.gz", slice(-2, None), format="espresso-out")       # ASE
        assert np.allclose(a.cell[:], b.cell[:], atol=1e-9)
        assert np.allclose(a.positions, b.positions, atol=1e-9)
        out = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", str(run)],
                             capture_output=True, text=True).stdout
        step = rec["frames"][-1]["step"]
        assert f"note: step {step}, the last, is pw.x's final scf at the relaxed structure" in out
        said += 1
    assert said >= 10


@pytest.mark.parametrize("name", ["L06_emt_bfgs.traj", "L10_emt_bfgs_flip.traj"])
def test_a_chiral_layers_sign_does_not_depend_on_the_basis(name, tmp_path):
    """math.md 1.3: the 2D sign is the lattice's handedness seen from one side, unchanged by any
    change of basis; docs: a layer is seen from the side its cell vector out of the plane points
    to. The bundled oblique EMT relaxations written in random unimodular bases (det +-1, the
    vectors leaning out of the plane, where driftwatch reads them in another basis): every frame's
    sign and chiral distance equal the plain file's, times -1 exactly where the file's vector
    reaching furthest out of the plane points to the other side (a regression review found the
    first version of the re-basing flipping it on 7 of 12 leaning bases)."""
    demo = Path(__file__).parent.parent / "example_runs" / name
    plain = analyze(demo)
    n = np.asarray(plain["geometry"]["viewing_side"])
    signs = [f["sign"] for f in plain["frames"]]
    chiral = np.array([f["chiral_distance"] for f in plain["frames"]])
    assert set(signs) == {-1, 1}                                        # chiral, both hands
    frames = read(demo, ":")
    rng = np.random.default_rng(11)
    for k in range(6):
        M = shear_basis(rng)
        if k % 2:
            M = M[[1, 0, 2]]                                           # det -1
        out = []
        for a in frames:
            b = a.copy()
            b.set_cell(M @ a.cell[:], scale_atoms=False)
            out.append(b)
        write(tmp_path / f"m{k}.extxyz", out)
        got = analyze(tmp_path / f"m{k}.extxyz")
        assert got["geometry"]["dimension"] == 2, M.tolist()
        heights = out[0].cell[:] @ n
        side = np.sign(heights[np.argmax(np.abs(heights))])
        assert [f["sign"] for f in got["frames"]] == [side * s for s in signs], M.tolist()
        np.testing.assert_allclose([f["chiral_distance"] for f in got["frames"]], side * chiral,
                                   atol=1e-9)


def test_the_configured_vacuum_gap_decides_in_every_basis(tmp_path):
    """AB-stacked graphite-like sheets 3.35 Å apart (invented cell, built here): bulk at the
    default geometry.vacuum_gap (6 Å) and layers at 2.5 Å, in the file's basis and in six random
    unimodular ones alike, and the re-basing warning only where the answer is a layer (a field
    trial found the re-basing blind to a configured gap below 4 Å, so a 2.5 Å config read these
    sheets as layers in a third of the bases, and saying 'a layer's vacuum' on bulk cells)."""
    from ase import Atoms
    a, c = 2.46, 6.70
    cell = [[a, 0, 0], [-a / 2, a * np.sqrt(3) / 2, 0], [0, 0, c]]
    sheets = Atoms("C4", cell=cell, pbc=True, scaled_positions=[
        [0, 0, 0.25], [1 / 3, 2 / 3, 0.25], [0, 0, 0.75], [2 / 3, 1 / 3, 0.75]])
    rng = np.random.default_rng(5)
    for k in range(7):
        M = shear_basis(rng, 5 if k else 0)
        b = sheets.copy()
        b.set_cell(M @ sheets.cell[:], scale_atoms=False)
        write(tmp_path / f"g{k}.extxyz", b)
        for gap, dim in ((6.0, 3), (2.5, 2)):
            rec = analyze(tmp_path / f"g{k}.extxyz", {"geometry": {"vacuum_gap": f"{gap} Å"}})
            assert rec["geometry"]["dimension"] == dim, (gap, M.tolist())
            said = [w for w in rec["run"]["warnings"] if "no two of the cell's vectors" in w]
            own = geometry.vacuum_gaps(b.cell[:], b.positions).max()
            assert bool(said) == (dim == 2 and own <= gap), (gap, M.tolist())


def test_bcc_bulk_in_its_cubic_cell_and_a_layer_along_a_diagonal_family(tmp_path):
    """A regression review's cases for the re-basing: bcc Cs in its conventional cubic cell (ASE's
    reference a = 6.05 Å; spglib: Im-3m) leaves a 4.28 Å gap along (011), below vacuum_gap: bulk,
    analysed, not re-based (the first version failed the run with StopIteration); a 4x4 square Al
    sheet (a = 11.44 Å) stacked 7.5 Å apart with an offset (a/2, a/2), written in vectors none of
    which lies in the sheet (T, T - A, T - B): a layer, its vacuum along a family of two
    non-zero indices in the reduced basis, read as the same layer as its plain cell gives."""
    from ase import Atoms
    from ase.build import bulk
    cs = bulk("Cs", "bcc", a=6.05, cubic=True)
    write(tmp_path / "POSCAR", cs, format="vasp")
    rec = analyze(tmp_path / "POSCAR")
    assert rec["geometry"]["dimension"] == 3
    assert rec["summary"]["verdict"]["structure"]["final"]["group"] == spglib.get_symmetry_dataset(
        (cs.cell[:], cs.get_scaled_positions(), cs.numbers), symprec=1e-3).number == 229
    assert not [w for w in rec["run"]["warnings"] if "no two of the cell's vectors" in w]
    a, d = 11.44, 7.5
    A, B = np.array([a, 0, 0]), np.array([0, a, 0])
    T = np.array([a / 2, a / 2, d])
    xy = [[i * a / 4, j * a / 4, 0] for i in range(4) for j in range(4)]
    plain = Atoms("Al16", positions=xy, cell=[A, B, T], pbc=True)
    other = plain.copy()
    other.set_cell([T, T - A, T - B], scale_atoms=False)
    assert abs(abs(np.linalg.det(other.cell[:])) - abs(np.linalg.det(plain.cell[:]))) < 1e-9
    got = {}
    for name, atoms in (("plain", plain), ("leaning", other)):
        write(tmp_path / f"{name}.extxyz", atoms)
        r = analyze(tmp_path / f"{name}.extxyz")
        assert r["geometry"]["dimension"] == 2, name
        got[name] = (r["summary"]["final"]["type"],
                     r["summary"]["verdict"]["structure"]["final"]["group"])
    assert got["plain"] == got["leaning"] == ("tp", 61)


def test_a_tie_of_sides_is_broken_by_the_cartesian_axis_not_the_vectors_order(tmp_path):
    """pw.x's ibrav 13 vectors of a stacked oblique layer reach exactly as far out of its plane on
    both sides (a(1) = (a/2, 0, -c/2), a(3) = (a/2, 0, c/2)): the side the layer is seen from had
    been a(1)'s, so the sign of the ibrav 13 run was the opposite of the same structure's ibrav 12
    run (conventional cell, vacuum vector +z), and a cyclic reordering of the vectors flipped it (a
    review's finding). Now: the side of the Cartesian axis nearest the normal, in every order."""
    runs = DATA / "tie"
    want = analyze(runs / "mP12")
    signs = [f["sign"] for f in want["frames"]]
    assert set(signs) == {-1} and want["geometry"]["viewing_side"] == [0.0, 0.0, 1.0]
    got = analyze(runs / "mC13")
    assert [f["sign"] for f in got["frames"]] == signs
    assert any("as far out on both sides" in w for w in got["run"]["warnings"])
    atoms = read(runs / "mC13" / "pw.out.gz", ":", format="espresso-out")
    out = atoms[0].cell[:] @ np.array([0, 0, 1.0])
    assert np.isclose(out.max(), -out.min())                              # pw.x's own tie
    for k, order in enumerate(([1, 2, 0], [2, 0, 1])):
        frames = []
        for a in atoms:
            b = a.copy()
            b.set_cell(a.cell[:][order], scale_atoms=False)
            frames.append(b)
        write(tmp_path / f"c{k}.extxyz", frames)
        assert [f["sign"] for f in analyze(tmp_path / f"c{k}.extxyz")["frames"]] == signs


def test_a_thin_vacuum_gap_does_not_make_rows_of_a_layer_chains():
    """geometry.vacuum_gap 2.5 Å (what the thin-vacuum hint may lead a user to): an oblique layer
    with 16 Å of vacuum whose rows of atoms leave 2.53 Å between tilted lattice planes had been
    refused as chains (ASE's dimensionality analysis: 2D); the chains and molecule test counts
    only gaps wider than the larger of vacuum_gap and 6 Å. Two water molecules in a 10 Å box
    (invented here; ASE: 0D) are named chains or molecules, not a wire."""
    from ase import Atoms
    from ase.build import molecule
    layer = DATA / "thin_gap" / "s34_oblique_layer.extxyz"
    assert dimensionality(read(layer)) == "2D"
    rec = analyze(layer, {"geometry": {"vacuum_gap": "2.5 Å"}})
    assert rec["geometry"]["dimension"] == 2
    w1, w2 = molecule("H2O"), molecule("H2O")
    w1.translate([3.0, 3.0, 3.0])
    w2.translate([3.0, 3.0, 9.0])                      # stacked along z: under 6 Å apart there
    pair = Atoms(w1 + w2, cell=[12, 12, 12], pbc=True)
    first = min(analyze_dimensionality(pair, method="RDA"), key=lambda iv: iv.a)
    assert first.dimtype == "0D" and first.b > 1.5                  # separate molecules (ASE)
    with pytest.raises(NotPeriodicError, match="chains or molecules in a box"):
        geometry.classify(pair.cell[:], pair.pbc, pair.positions)
