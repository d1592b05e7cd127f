"""Adapters: registry, detection, every format, run folders, truncation, streaming, memory.

External references used here (named beside each check):
* genuine VASP files shipped in ASE's test data (copied to tests/data/vasp/, see its README);
* real Quantum ESPRESSO pw.x outputs made here (tests/data/qe/, pw.x 6.7 from Debian);
* ASE's own readers (ase.io.read, ase.db), pymatgen's Vasprun and Xdatcar;
* multi-step VASP fixtures from tests/vasp_gen.py (invented trajectories, VASP layouts).
"""
from __future__ import annotations

import bz2
import gzip
import json
import lzma
import re
import shutil
import tracemalloc
import warnings
from importlib.metadata import EntryPoint
from pathlib import Path

import numpy as np
import pytest

import ase.db
import ase.io
from ase import Atoms
from ase.calculators.singlepoint import SinglePointCalculator

from driftwatch.adapters import Frame, detect, formats, iter_frames, read_run, register
from driftwatch.adapters import registry, vasp
from driftwatch.errors import InputError, NoIonicStepError, UnknownFormatError

import vasp_gen

DATA = Path(__file__).parent / "data"
VASP = DATA / "vasp"
QE_OUTS = sorted(p for p in (DATA / "qe").glob("*/pw.out*")     # one-output run folders; the
                 if not p.parent.name.startswith("restart_"))    # multi-stage ones: test_batches_*
QE_NSCF = DATA / "qe_nscf" / "pw.out"                          # an output with no ionic step
GENUINE_VASP = [VASP / "vasprun_pstress.xml", VASP / "vasprun_dfpt.xml",
                VASP / "OUTCAR_example_1.gz"]
needs_qe = pytest.mark.skipif(not QE_OUTS, reason="no pw.x outputs in tests/data/qe yet")


@pytest.fixture(autouse=True)
def _restore_registry():
    """Tests that register formats must not leak them (as ASE's test_external_io_formats does)."""
    saved = dict(registry._formats)
    yield
    registry._formats.clear()
    registry._formats.update(saved)


@pytest.fixture(scope="module")
def traj():
    return vasp_gen.drifting_layer(6)


def _ase_images(t, pbc=(True, True, False)):
    out = []
    for k in range(len(t.cells)):
        a = Atoms(t.symbols, cell=t.cells[k], scaled_positions=t.frac[k], pbc=pbc)
        a.calc = SinglePointCalculator(a, energy=t.energies[k], free_energy=t.energies[k],
                                       forces=t.forces[k], stress=np.arange(6) * 1e-3 * k)
        out.append(a)
    return out


def _unzipped(path: Path, tmp_path: Path) -> Path:
    if path.suffix != ".gz":
        return path
    out = tmp_path / path.stem
    out.write_bytes(gzip.decompress(path.read_bytes()))
    return out


def _assert_same_as_ase(run, path, ase_format=None, atol=0.0):
    """Frame by frame: cells, positions, numbers, energies, forces, stress equal to ASE's reader.
    A LAMMPS dump holds no energy: ASE's reader gives 0.0 with its forces
    (ase/io/lammpsrun.py, ``SinglePointCalculator(..., energy=0.0, forces=forces)``), driftwatch
    none (a dump alone) or the log's."""
    ref = ase.io.read(path, ":", format=ase_format)
    assert len(run) == len(ref)
    for i, a in enumerate(ref):
        np.testing.assert_allclose(run.cells[i], a.cell.array, atol=atol, rtol=0)
        np.testing.assert_allclose(run.positions[i], a.positions, atol=atol, rtol=0)
        assert np.array_equal(run.numbers, a.numbers)
        if a.calc is not None:
            res = a.calc.results
            e = res.get("free_energy", res.get("energy"))
            if ase_format == "lammps-dump-text":
                assert e == 0.0 and run.energies is None
            elif e is not None:
                assert run.energies[i] == pytest.approx(e, abs=1e-10)
            if "forces" in res:
                np.testing.assert_allclose(run.forces[i], res["forces"], atol=1e-10, rtol=0)
            if "stress" in res:
                np.testing.assert_allclose(run.stress[i], res["stress"], atol=1e-12, rtol=0)


# ---------------------------------------------------------------- every registered format
def _write_vasp_xml(t, d):
    return vasp_gen.write_vasprun(d / "vasprun.xml", t)


def _write_outcar(t, d):
    return vasp_gen.write_outcar(d / "OUTCAR", t)


def _write_xdatcar(t, d):
    return vasp_gen.write_xdatcar(d / "XDATCAR", t)


def _write_poscar(t, d):
    return vasp_gen.write_poscar(d / "POSCAR", t.cells[0], t.frac[0], t.symbols)


def _write_cif(t, d):
    ase.io.write(d / "cell.cif", _ase_images(t, pbc=True)[0], format="cif")     # ASE's writer
    return d / "cell.cif"


def _write_traj(t, d):
    ase.io.write(d / "relax.traj", _ase_images(t))
    return d / "relax.traj"


def _write_extxyz(t, d):
    ase.io.write(d / "relax.xyz", _ase_images(t), format="extxyz")
    return d / "relax.xyz"


def _write_db(t, d, name="relax.db"):
    with ase.db.connect(d / name) as db:
        for a in _ase_images(t):
            db.write(a, campaign="invented")
    return d / name


def _write_pmg(t, d):
    from pymatgen.io.ase import AseAtomsAdaptor
    p = d / "structures.json"
    p.write_text(json.dumps([AseAtomsAdaptor.get_structure(a).as_dict() for a in _ase_images(t)]))
    return p


def _write_pmg_trajectory(t, d):
    """pymatgen's own Trajectory of the frames (a cell per frame, energies and forces per frame),
    saved as monty's dumpfn saves it (atomate2's traj_file_fmt='pmg')."""
    from monty.serialization import dumpfn
    from pymatgen.core.trajectory import Trajectory
    from pymatgen.io.ase import AseAtomsAdaptor
    structures = [AseAtomsAdaptor.get_structure(a) for a in _ase_images(t)]
    props = [{"energy": float(e), "forces": f.tolist()} for e, f in zip(t.energies, t.forces)]
    traj = Trajectory.from_structures(structures, constant_lattice=False)
    traj.frame_properties = props
    dumpfn(traj, d / "trajectory.json")
    return d / "trajectory.json"


def _write_error_archive(t, d):
    """custodian's own backup (custodian.utils.backup) of a VASP attempt, then its correction:
    CONTCAR copied to POSCAR for the next attempt (custodian's handlers)."""
    from custodian.utils import backup
    job = d / "job"
    job.mkdir()
    vasp_gen.write_vasprun(job / "vasprun.xml", t)
    vasp_gen.write_poscar(job / "POSCAR", t.cells[0], t.frac[0], t.symbols)
    vasp_gen.write_poscar(job / "CONTCAR", t.cells[-1], t.frac[-1], t.symbols)
    backup(["POSCAR", "CONTCAR", "vasprun.xml"], directory=str(job))
    shutil.copy(job / "CONTCAR", job / "POSCAR")
    return job / "error.1.tar.gz"


WRITERS = {
    "vasp-xml": _write_vasp_xml, "vasp-out": _write_outcar, "vasp-xdatcar": _write_xdatcar,
    "vasp-poscar": _write_poscar, "traj": _write_traj, "extxyz": _write_extxyz,
    "ase-db": _write_db, "ase-json-db": lambda t, d: _write_db(t, d, "relax.json"),
    "pymatgen-json": _write_pmg, "cif": _write_cif, "pymatgen-trajectory": _write_pmg_trajectory,
}
BUILTIN = list(formats())
# formats with no writer at hand: genuine files (tests/data/public/README.md) are the round trip
PUBLIC = DATA / "public"
GENUINE_OTHER = {"task-doc": (PUBLIC / "task_docs" / "task_doc_mp-2766060.json.gz", None),
                 "lammps-dump": (PUBLIC / "lammps_relax" / "relax.dump.gz", "lammps-dump-text"),
                 "aims-out": (PUBLIC / "ase_generic" / "aims_relax.out.gz", "aims-output"),
                 "castep": (PUBLIC / "ase_generic" / "si8_md.castep.gz", "castep-castep"),
                 "gpaw-out": (PUBLIC / "ase_generic" / "gpaw_h2.txt", "gpaw-out")}


def _write_castep_geom(t, d):
    ase.io.write(d / "relax.geom", _ase_images(t, pbc=True), format="castep-geom")   # ASE's writer
    return d / "relax.geom"


WRITERS["castep-geom"] = _write_castep_geom


@pytest.mark.parametrize("name", BUILTIN)
def test_every_registered_format_round_trips(name, traj, tmp_path):
    """Parametrised over the registry, like ASE's test_ioformats: write with the format's
    own producer (ASE writers, pymatgen as_dict, tests/vasp_gen.py), detect, read back."""
    if name == "espresso-out":
        if not QE_OUTS:
            pytest.skip("no pw.x outputs yet")
        path = _unzipped(QE_OUTS[0], tmp_path)
        assert detect(path) == name
        _assert_same_as_ase(read_run(path), path)            # real pw.x output vs ASE's reader
        return
    if name == "vasp-error-archive":     # no name or magic of its own: a stage of its folder, or -f
        path = _write_error_archive(traj, tmp_path)
        run = read_run(path, format=name)
        assert run.format == name and run.source == str(path) and len(run) == len(traj.cells)
        np.testing.assert_allclose(run.positions, traj.positions, atol=1e-7, rtol=0)
        np.testing.assert_allclose(run.energies, traj.energies, atol=1e-7)
        assert len(list(iter_frames(path, format=name))) == len(run)
        return
    if name == "vasp-segment":           # a vasprun.xml's copy under a time-stamped name
        path = _write_vasp_xml(traj, tmp_path).rename(tmp_path / "vasprun.xml_10_00_00on01_02_24")
        run = read_run(path, format=name)
        assert run.format == name and run.source == str(path) and len(run) == len(traj.cells)
        np.testing.assert_allclose(run.positions, traj.positions, atol=1e-7, rtol=0)
        np.testing.assert_allclose(run.energies, traj.energies, atol=1e-7)
        return
    if name == "lammps-dump-series":     # never detected: picked by a LAMMPS folder, or -f
        src = Path(__file__).parent / "data" / "lammps_trials" / "si8_dump_per_frame"
        shutil.copytree(src, tmp_path / src.name)
        run = read_run(tmp_path / src.name)          # real LAMMPS files (tests/test_lammps.py)
        assert run.format == name and len(run) == 27
        one = tmp_path / src.name / "relax.39.lammpstrj"
        assert detect(one) == "lammps-dump" and len(read_run(one)) == 1
        assert len(list(iter_frames(one, format=name))) == len(run)
        return
    if name in GENUINE_OTHER:
        src, ase_format = GENUINE_OTHER[name]
        path = tmp_path / src.name
        shutil.copy(src, path)
        assert detect(path) == name
        run = read_run(path)
        assert run.format == name and len(run) > 0
        if ase_format:                                       # ASE's own reader of the format
            _assert_same_as_ase(run, _unzipped(path, tmp_path), ase_format)
        assert len(list(iter_frames(path))) == len(run)
        return
    path = WRITERS[name](traj, tmp_path)
    assert detect(path) == name
    run = read_run(path)
    assert run.format == name and run.source == str(path)
    n = 1 if name in ("vasp-poscar", "cif") else len(traj.cells)
    assert len(run) == n
    # generator values, written as text with >= 8 decimals (extxyz: ASE writes 8)
    np.testing.assert_allclose(run.cells, traj.cells[:n], atol=1e-7, rtol=0)
    np.testing.assert_allclose(run.positions, traj.positions[:n], atol=1e-7, rtol=0)
    assert np.array_equal(run.numbers, traj.numbers)
    assert run.steps.tolist() == list(range(n))
    if name in ("vasp-xml", "vasp-out", "traj", "extxyz", "ase-db", "ase-json-db",
                "pymatgen-trajectory"):
        np.testing.assert_allclose(run.energies, traj.energies, atol=1e-7)
        np.testing.assert_allclose(run.forces, traj.forces, atol=1e-7)
    if name in ("traj", "extxyz", "ase-db", "ase-json-db", "pymatgen-json"):
        assert run.pbc.tolist() == [True, True, False]        # kept from the ASE Atoms
    if name == "castep-geom":           # .geom holds energies and forces in Hartree atomic units
        np.testing.assert_allclose(run.energies, traj.energies, atol=1e-6)
    frames = list(iter_frames(path))
    assert all(isinstance(f, Frame) for f in frames) and len(frames) == n


def test_registry_has_the_formats_of_the_issue():
    """The formats the issue lists (common practice: names follow ASE's where they exist)."""
    assert {"traj", "extxyz", "vasp-xml", "vasp-out", "vasp-xdatcar", "espresso-out",
            "ase-db", "pymatgen-json"} <= set(formats())
    assert set(WRITERS) | set(GENUINE_OTHER) | {"espresso-out", "vasp-error-archive",
                                                "vasp-segment", "lammps-dump-series"} >= \
        set(BUILTIN), \
        "new format without a round trip"


# ---------------------------------------------------------------- detection
def test_detection_by_content_glob_override_and_compression(traj, tmp_path):
    p = vasp_gen.write_outcar(tmp_path / "stage1.log", traj)     # name says nothing: magic decides
    assert detect(p) == "vasp-out"
    x = vasp_gen.write_xdatcar(tmp_path / "XDATCAR_relax", traj)
    assert detect(x) == "vasp-xdatcar"
    poscar = vasp_gen.write_poscar(tmp_path / "CONTCAR", traj.cells[-1], traj.frac[-1],
                                   traj.symbols)
    assert detect(poscar) == "vasp-poscar"                        # glob only (no magic)
    raw = vasp_gen.write_vasprun(tmp_path / "vasprun.xml", traj).read_bytes()
    ref = read_run(tmp_path / "vasprun.xml")
    for ext, comp in ((".gz", gzip.compress), (".bz2", bz2.compress), (".xz", lzma.compress)):
        c = tmp_path / f"vasprun.xml{ext}"
        c.write_bytes(comp(raw))
        run = read_run(c)
        assert run.format == "vasp-xml" and np.array_equal(run.cells, ref.cells)
    # compressed without a suffix: recognised by its own magic bytes
    (tmp_path / "odd").write_bytes(gzip.compress(raw))
    assert detect(tmp_path / "odd") == "vasp-xml"
    # user override beats detection
    xyz = _write_extxyz(traj, tmp_path)
    assert read_run(xyz, format="extxyz").format == "extxyz"
    with pytest.raises(UnknownFormatError, match="unknown format 'nope'"):
        read_run(xyz, format="nope")


def test_a_calculation_without_a_structure_is_not_an_ionic_step(tmp_path):
    """A genuine VASP GW0 vasprun.xml (nomad-coe/electronic-parsers, tests/data/vasp/README.md):
    its one <calculation> holds dielectric functions and no structure. pymatgen's Vasprun gives
    that step no structure (``structure`` None) and its ``final_structure`` from the file's
    <structure name="finalpos">; ASE's reader fails on it. driftwatch reads that final structure
    as the run's one frame, a single-point run, and says so in one line naming the file (it had
    failed the run; pymatgen's LOPTICS run, tests/data/public_more, is read the same way). Among
    ionic steps (generated file, one step's structure removed) only that step is passed over,
    with a warning."""
    gw = VASP / "vasprun_gw.xml.xz"
    from pymatgen.io.vasp.outputs import Vasprun
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = Vasprun(str(gw), parse_dos=False, parse_eigen=False, parse_potcar_file=False)
    assert [s["structure"] for s in ref.ionic_steps] == [None]
    plain = tmp_path / "gw.xml"
    plain.write_bytes(lzma.decompress(gw.read_bytes()))
    with pytest.raises(TypeError):                     # ASE's reader (3.29): 'NoneType' ...
        ase.io.read(plain, index=":", format="vasp-xml")
    run = read_run(gw)
    assert len(run) == 1 and run.energies is None          # the file has no <energy> for it
    np.testing.assert_allclose(run.cells[0], ref.final_structure.lattice.matrix, atol=1e-9)
    np.testing.assert_allclose(run.positions[0], ref.final_structure.cart_coords, atol=1e-8)
    said = [w for w in run.warnings if "holds no <structure>" in w]
    assert len(said) == 1 and "\n" not in said[0] and said[0].startswith(str(gw))
    assert "<structure name=\"finalpos\">" in said[0]
    assert run.not_relaxation.startswith("a single-point calculation")
    traj = vasp_gen.drifting_layer(nsteps=5)
    text = vasp_gen.write_vasprun(tmp_path / "vasprun.xml", traj).read_text()
    calcs = text.split("<calculation>")
    start, end = calcs[3].index("<structure>"), calcs[3].index("</structure>")
    calcs[3] = calcs[3][:start] + calcs[3][end + len("</structure>"):]
    (tmp_path / "vasprun.xml").write_text("<calculation>".join(calcs))
    run = read_run(tmp_path / "vasprun.xml")
    kept = [0, 1, 3, 4]                                  # the third step has no structure
    assert len(run) == 4
    np.testing.assert_allclose(run.cells, traj.cells[kept], atol=1e-9, rtol=0)  # 10 decimals
    assert any("1 <calculation>(s) without a <structure>" in w for w in run.warnings)


def test_a_complete_outcar_without_an_ionic_step_says_what_is_missing(tmp_path):
    """A genuine static DFT+U OUTCAR (nomad-coe/electronic-parsers, tests/data/vasp/README.md):
    complete (its timing section is there) with a free energy but no POSITION/TOTAL-FORCE block.
    ASE's reader fails on it ("Did not find required property positions"); driftwatch's error is
    one line naming the file and what is missing."""
    path = VASP / "OUTCAR_static_no_forces.xz"
    plain = tmp_path / "OUTCAR"
    plain.write_bytes(lzma.decompress(path.read_bytes()))
    with pytest.raises(Exception, match="Did not find required property positions"):
        ase.io.read(plain, format="vasp-out")
    with pytest.raises(InputError) as e:
        read_run(path)
    msg = str(e.value)
    assert "\n" not in msg and msg.startswith(str(path)) and "no completed ionic step" in msg
    assert "complete but no ionic step has both a POSITION/TOTAL-FORCE block" in msg


def test_a_non_self_consistent_pw_run_is_not_truncated_but_has_no_ionic_step():
    """A real pw.x 6.7 nscf run (tests/data/qe/README.md: made here after an scf run of Si2): its
    header ends at 'Band Structure Calculation', not at an SCF; the file ends with JOB DONE. It has
    no ionic step (no SCF energy), and it was not cut: the error says so, in one line naming the
    file (a NoIonicStepError: an audit skips it, it did not fail). ASE's reader gives the header's
    structure with no energy."""
    atoms = ase.io.read(QE_NSCF, index=":", format="espresso-out")
    assert len(atoms) == 1 and "energy" not in atoms[0].calc.results
    text = QE_NSCF.read_text()
    assert "Band Structure Calculation" in text and "JOB DONE" in text
    with pytest.raises(InputError) as e:
        read_run(QE_NSCF.parent)
    msg = str(e.value)
    assert "\n" not in msg and msg.startswith(str(QE_NSCF)) and "no ionic step" in msg
    assert "non-self-consistent run" in msg and "truncated" not in msg
    assert isinstance(e.value, NoIonicStepError)


def test_errors_are_one_line_and_name_the_file(tmp_path):
    (tmp_path / "empty.out").write_text("")
    with pytest.raises(InputError, match="empty.out: empty file"):
        read_run(tmp_path / "empty.out")
    (tmp_path / "notes.txt").write_text("nothing to see\n")
    with pytest.raises(UnknownFormatError) as e:
        read_run(tmp_path / "notes.txt")
    assert "known formats: vasp-xml" in str(e.value) and "\n" not in str(e.value)
    with pytest.raises(InputError, match="no such file"):
        read_run(tmp_path / "missing.traj")
    with pytest.raises(InputError, match="not a run folder"):
        read_run(tmp_path)
    # explicit but wrong format: a one-line InputError naming the file, not a traceback
    with pytest.raises(InputError, match="notes.txt"):
        read_run(tmp_path / "notes.txt", format="vasp-out")


def test_consistency_checks(traj, tmp_path):
    """Frames are validated: atom count, non-finite values (common practice)."""
    a, b = _ase_images(traj)[:2]
    ase.io.write(tmp_path / "grow.xyz", [a, b + Atoms("S", positions=[[0, 0, 9]])],
                 format="extxyz")
    with pytest.raises(InputError, match="atoms count changes at step 1"):
        read_run(tmp_path / "grow.xyz")
    x = vasp_gen.write_xdatcar(tmp_path / "XDATCAR", traj).read_text().splitlines()
    k = [i for i, ln in enumerate(x) if "configuration=     3" in ln][0]
    x[k + 1] = "  nan nan nan"
    (tmp_path / "XDATCAR").write_text("\n".join(x) + "\n")
    run = read_run(tmp_path / "XDATCAR")      # a blow-up: the steps before it are the run
    assert len(run) == 2 and run.unfinished == "damaged: non-finite positions at step 2"
    assert any("non-finite positions at step 2: a run that blew up, or a damaged file; the 2 "
               "steps before it are read" in w for w in run.warnings)
    first = [i for i, ln in enumerate(x) if "configuration=     1" in ln][0]
    x[first + 1] = "  nan nan nan"
    (tmp_path / "XDATCAR").write_text("\n".join(x) + "\n")
    with pytest.raises(InputError, match="non-finite positions at step 0"):
        read_run(tmp_path / "XDATCAR")


# ---------------------------------------------------------------- extension points
def test_new_format_is_one_registered_function(traj, tmp_path):
    p = tmp_path / "frames.npz"
    np.savez(p, cells=traj.cells, pos=traj.positions, numbers=traj.numbers)

    def read_npz(path):                       # a one-argument reader yielding ase.Atoms
        d = np.load(path)
        for c, x in zip(d["cells"], d["pos"]):
            yield Atoms(numbers=d["numbers"], positions=x, cell=c, pbc=True)

    register("npz-demo", read_npz, globs=("*.npz",), description="demo npz")
    assert "npz-demo" in formats() and detect(p) == "npz-demo"
    run = read_run(p)
    assert len(run) == len(traj.cells) and run.steps.tolist() == list(range(len(run)))
    with pytest.raises(ValueError, match="already registered"):
        register("npz-demo", read_npz)


PLUGIN_SPEC = {"name": "spec-plugin", "reader": "driftwatch.adapters.vasp:read_xdatcar",
               "globs": ("*.xdat",), "description": "a plugin given as a dict"}


def test_entry_point_plugins_register_or_warn():
    """Third-party adapters via the entry-point group; a broken one warns (ASE's convention)."""
    good = EntryPoint(name="demo-plugin", value="driftwatch.adapters.vasp:read_xdatcar",
                      group="driftwatch.adapters")
    registry._register_entry_point(good)
    assert "demo-plugin" in formats()
    spec = EntryPoint(name="ignored", value="test_adapters:PLUGIN_SPEC",
                      group="driftwatch.adapters")
    registry._register_entry_point(spec)
    assert formats()["spec-plugin"] == "a plugin given as a dict"
    bad = EntryPoint(name="broken", value="no_such_module_xyz:reader", group="driftwatch.adapters")
    with pytest.warns(UserWarning, match="failed to register external adapter 'broken'"):
        registry._register_entry_point(bad)
    assert "broken" not in formats()


# ---------------------------------------------------------------- genuine VASP files (ASE)
@pytest.mark.parametrize("path", GENUINE_VASP, ids=lambda p: p.name)
def test_genuine_vasp_files_match_ase(path, tmp_path):
    """Genuine VASP files from ASE's test data: frame count, cells and results equal to
    ASE's own reader."""
    run = read_run(path)
    _assert_same_as_ase(run, _unzipped(path, tmp_path))
    assert len(run) == 1 and run.pbc.all()
    # single points (NSW = 0): the one warning says so (VASP's documentation of NSW: common practice)
    assert run.not_relaxation.startswith("a single-point calculation (NSW = 0")
    assert [w.split(": ", 1)[1] for w in run.warnings] == [
        f"not a relaxation: {run.not_relaxation}; one frame: no drift can be measured from it "
        f"alone"]


@pytest.mark.parametrize("which", ["generated", "genuine"])
def test_outcar_scanner_equals_ases_chunk_parser(which, traj, tmp_path):
    """The focused OUTCAR scanner reads cells, positions, forces, stress and the free energy of
    every step exactly as ASE's chunk parser does (ase.io.read 'vasp-out' is the reference),
    on a generated 8-step variable-cell OUTCAR with stress and on ASE's genuine OUTCAR; and it,
    not the ASE fallback, read every step."""
    from ase.io.vasp_parsers.vasp_outcar_parsers import build_header
    from driftwatch.adapters import vasp
    path = (vasp_gen.write_outcar(tmp_path / "OUTCAR", traj) if which == "generated"
            else _unzipped(VASP / "OUTCAR_example_1.gz", tmp_path))
    run = read_run(path)
    _assert_same_as_ase(run, path, "vasp-out")
    with vasp._WatchedLines(path) as fd:
        build_header(fd)
        scanned = list(vasp._scan_outcar_steps(fd, len(run.numbers)))
    assert len(scanned) == len(run) == (len(traj.cells) if which == "generated" else 1)
    if which == "generated":
        assert run.stress is not None and np.abs(run.stress).max() > 0


def test_forces_are_those_ase_optimisers_converge_on(tmp_path):
    """A real ASE EMT relaxation of a Cu(111) slab with an Au adatom, its two bottom layers held by
    FixAtoms, written by BFGS's own trajectory: driftwatch's forces equal ASE's
    ``atoms.get_forces()`` on every frame (zero on the fixed atoms), so the last frame's fmax is
    below the 0.05 eV/Å BFGS stopped at, which the raw forces on the fixed atoms are not."""
    from ase.build import add_adsorbate, fcc111
    from ase.calculators.emt import EMT
    from ase.constraints import FixAtoms
    from ase.optimize import BFGS
    slab = fcc111("Cu", size=(2, 2, 3), vacuum=7.0)
    add_adsorbate(slab, "Au", 1.9, "fcc")
    slab.set_constraint(FixAtoms(indices=[a.index for a in slab if a.tag > 1]))
    slab.calc = EMT()
    with BFGS(slab, trajectory=str(tmp_path / "relax.traj"), logfile=None) as opt:
        assert opt.run(fmax=0.05, steps=200)
    ref = ase.io.read(tmp_path / "relax.traj", index=":")
    run = read_run(tmp_path / "relax.traj")
    assert len(run) == len(ref) > 2
    for got, atoms in zip(run.forces, ref):
        np.testing.assert_array_equal(got, atoms.get_forces())                 # ASE's own
    fixed = ref[-1].constraints[0].index
    assert len(fixed) == 8 and not run.forces[:, fixed].any()
    raw = np.linalg.norm(ref[-1].get_forces(apply_constraint=False), axis=1).max()
    assert np.linalg.norm(run.forces[-1], axis=1).max() < 0.05 < raw


def test_a_database_of_unrelated_structures_says_how_to_pick_rows(tmp_path):
    """An ase.db (real SQLite through ASE) of two unrelated bulk cells and no structure key: one
    line saying the atoms change and that FILE@selection picks rows; the rows picked read."""
    from ase.build import bulk
    path = tmp_path / "mixed.db"
    with ase.db.connect(path) as db:
        db.write(bulk("Cu", "fcc", a=3.6))
        db.write(bulk("NaCl", "rocksalt", a=5.6))
    with pytest.raises(InputError) as err:
        read_run(path)
    msg = str(err.value)
    assert "atoms count changes at step 1 (1 -> 2)" in msg and "FILE@selection" in msg, msg
    assert len(read_run(f"{path}@id=1")) == 1


def test_genuine_vasp_symmetry_settings():
    """Values as printed in the genuine files (ASE test data): OUTCAR_example_1 has
    'ISYM = 0', the two vasprun.xml files ISYM 2 and SYMPREC 1e-5 in <parameters>."""
    out = read_run(VASP / "OUTCAR_example_1.gz").code_settings
    assert out["code"] == "vasp" and out["ISYM"] == 0 and out["IBRION"] == -1
    assert out["ISIF"] == 2
    for name in ("vasprun_pstress.xml", "vasprun_dfpt.xml"):
        s = read_run(VASP / name).code_settings
        assert s["ISYM"] == 2 and s["SYMPREC"] == pytest.approx(1e-5) and s["ISIF"] == 2


# ---------------------------------------------------------------- generated multi-step VASP
def test_generated_vasp_three_readers_agree(traj, tmp_path):
    """tests/vasp_gen.py output read by driftwatch, ASE and pymatgen (Vasprun, Xdatcar):
    the same cells to 1e-8 Å."""
    from pymatgen.io.vasp.outputs import Vasprun, Xdatcar
    d = vasp_gen.write_run_folder(tmp_path / "run", traj)
    xml, out, xdat = (read_run(d / n) for n in ("vasprun.xml", "OUTCAR", "XDATCAR"))
    for run, name in ((xml, "vasprun.xml"), (out, "OUTCAR"), (xdat, "XDATCAR")):
        _assert_same_as_ase(run, d / name, atol=1e-12)                    # ASE
        np.testing.assert_allclose(run.cells, xml.cells, atol=1e-8, rtol=0)
        np.testing.assert_allclose(run.positions, xml.positions, atol=1e-8, rtol=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")                                  # "unconverged run"
        vr = Vasprun(d / "vasprun.xml", parse_dos=False, parse_eigen=False,
                     parse_potcar_file=False)
    pm_cells = np.array([s.lattice.matrix for s in vr.structures])
    np.testing.assert_allclose(xml.cells, pm_cells, atol=1e-8, rtol=0)   # pymatgen Vasprun
    np.testing.assert_allclose(xml.positions, [s.cart_coords for s in vr.structures],
                               atol=1e-8, rtol=0)
    np.testing.assert_allclose(xml.energies, [s["e_fr_energy"] for s in vr.ionic_steps])
    np.testing.assert_allclose(xml.forces, [s["forces"] for s in vr.ionic_steps], atol=1e-12)
    xd = Xdatcar(d / "XDATCAR")                                          # pymatgen Xdatcar
    np.testing.assert_allclose(xdat.cells, [s.lattice.matrix for s in xd.structures],
                               atol=1e-8, rtol=0)
    fixed = vasp_gen.write_xdatcar(tmp_path / "XDATCAR_fixed", traj, variable_cell=False)
    run = read_run(fixed)                                # header once: the first cell throughout
    _assert_same_as_ase(run, fixed, atol=1e-12)
    np.testing.assert_allclose(run.cells, [s.lattice.matrix for s in Xdatcar(fixed).structures],
                               atol=1e-8, rtol=0)
    assert np.all(run.cells == run.cells[0])
    # OUTCAR and vasprun.xml agree on results too (ASE conventions for stress)
    np.testing.assert_allclose(out.stress, xml.stress, atol=1e-12)
    np.testing.assert_allclose(out.energies, xml.energies, atol=1e-10)
    assert xml.code_settings["ISYM"] == 2 and xml.code_settings["ISIF"] == 3
    assert xml.title == "invented drifting layer"


# ---------------------------------------------------------------- run folders
def test_vasp_folder_picks_the_richest_complete_source(traj, tmp_path):
    d = vasp_gen.write_run_folder(tmp_path / "done", traj)
    run = read_run(d)
    assert run.source == str(d / "vasprun.xml") and run.run_dir == str(d)
    assert run.format == "vasp-xml" and len(run) == len(traj.cells) and run.warnings == ()

    # killed job: vasprun.xml cut (VASP buffers it), OUTCAR complete -> OUTCAR, said in warnings
    k = tmp_path / "killed"
    shutil.copytree(d, k)
    raw = (k / "vasprun.xml").read_bytes()
    (k / "vasprun.xml").write_bytes(raw[: len(raw) // 2])
    run = read_run(k)
    assert run.source == str(k / "OUTCAR") and len(run) == len(traj.cells)
    assert any("vasprun.xml is incomplete" in w for w in run.warnings)

    # both cut: OUTCAR still preferred; completed steps + a warning naming the file
    raw = (k / "OUTCAR").read_bytes()
    (k / "OUTCAR").write_bytes(raw[: int(len(raw) * 0.7)])
    run = read_run(k)
    assert run.source == str(k / "OUTCAR") and 0 < len(run) < len(traj.cells)
    assert any(str(k / "OUTCAR") in w and "truncated after step" in w for w in run.warnings)

    # only XDATCAR: positions and cells, settings from INCAR
    x = vasp_gen.write_run_folder(tmp_path / "xdat", traj, files=("XDATCAR", "INCAR"))
    run = read_run(x)
    assert run.format == "vasp-xdatcar" and run.energies is None
    assert run.code_settings["ISYM"] == 2 and run.code_settings["settings_from"] == "INCAR"

    # CONTCAR alone: one frame, and the warning says so
    c = vasp_gen.write_run_folder(tmp_path / "cont", traj, files=("CONTCAR",))
    run = read_run(c)
    assert len(run) == 1 and any("single structure" in w for w in run.warnings)


def test_folder_with_one_ase_trajectory(traj, tmp_path):
    """An ASE-driven relaxation folder (one .traj): read as a folder run; two candidates: error."""
    d = tmp_path / "ase_run"
    d.mkdir()
    _write_traj(traj, d)
    run = read_run(d)
    assert run.format == "traj" and run.run_dir == str(d) and len(run) == len(traj.cells)
    _write_extxyz(traj, d)
    with pytest.raises(InputError, match="ambiguous run folder"):
        read_run(d)
    assert read_run(d, format="extxyz").source == str(d / "relax.xyz")


def test_incar_disagreeing_with_output_is_a_warning(traj, tmp_path):
    d = vasp_gen.write_run_folder(tmp_path / "r", traj, files=("vasprun.xml",))
    vasp_gen.write_incar(d / "INCAR", ISYM=0, SYMPREC="1E-3")
    run = read_run(d)
    assert run.code_settings["ISYM"] == 2                      # what VASP says it used
    assert any("INCAR sets ISYM = 0" in w for w in run.warnings)


@needs_qe
@pytest.mark.parametrize("out", QE_OUTS, ids=lambda p: p.parent.name)
def test_real_pwx_outputs_match_ase_and_report_settings(out, tmp_path):
    """Real pw.x outputs (made here): frames equal to ASE's espresso-out reader; settings from
    pw.in (ASE's namelist reader) and the symmetry-operation count pw.x prints."""
    from ase.io.espresso import read_fortran_namelist
    plain = _unzipped(out, tmp_path)
    run = read_run(out.parent)                                   # the folder
    assert run.source == str(out) and run.run_dir == str(out.parent)
    _assert_same_as_ase(run, plain)
    assert run.warnings == () and run.pbc.all()
    with open(out.parent / "pw.in") as fh:
        nml, _ = read_fortran_namelist(fh)
    s = run.code_settings
    assert s["code"] == "espresso" and s["calculation"] == nml["control"]["calculation"]
    assert s["nosym"] == bool(nml["system"].get("nosym", False))
    text = plain.read_text()
    counts = [int(n) if n else 1 for n, _ in          # 'No symmetry found' = identity only
              re.findall(r"^\s*(\d+) Sym\. Ops\.|^\s*(No symmetry found)", text, re.M)]
    assert s["nsym"] == counts[0]
    if len(counts) > 1:                                   # re-detected in the final scf
        assert s["nsym_final"] == counts[-1]
    if s["calculation"] == "vc-relax":
        assert s["cell_dofree"] == nml["cell"].get("cell_dofree", "all")


def test_ambiguous_folder_is_an_error(traj, tmp_path):
    if not QE_OUTS:
        pytest.skip("no pw.x outputs yet")
    d = vasp_gen.write_run_folder(tmp_path / "mix", traj, files=("OUTCAR",))
    shutil.copy(_unzipped(QE_OUTS[0], tmp_path), d / "pw.out")
    with pytest.raises(InputError, match="ambiguous run folder"):
        read_run(d)
    assert read_run(d / "pw.out").format == "espresso-out"      # naming the file resolves it


# ---------------------------------------------------------------- killed jobs
def _truncation_cases():
    cases = [(p, None) for p in GENUINE_VASP] + [(p, "espresso-out") for p in QE_OUTS]
    return cases + [("gen:vasprun.xml", None), ("gen:OUTCAR", None), ("gen:XDATCAR", None)]


def _materialise(spec, tmp_path, traj):
    if isinstance(spec, str) and spec.startswith("gen:"):
        name = spec[4:]
        return vasp_gen.write_run_folder(tmp_path / "gen", traj, files=(name,)) / name
    return _unzipped(spec, tmp_path)


def _case_id(x):
    if isinstance(x, Path):
        return f"{x.parent.name}/{x.name}"
    return str(x) if x else "auto"


@pytest.mark.parametrize("spec,fmt", _truncation_cases(), ids=_case_id)
def test_truncated_files_give_completed_steps_and_a_warning(spec, fmt, tmp_path, traj):
    """Cut real files (ASE's genuine VASP files, real pw.x outputs) and generated ones at 40
    byte offsets: never a crash, never more frames than the full file, frames equal to the
    full file's prefix, and a warning naming the file whenever a step was lost."""
    src = _materialise(spec, tmp_path, traj)
    fmt = fmt or detect(src)
    full = read_run(src)
    data = src.read_bytes()
    cut = tmp_path / "cut" / src.name
    cut.parent.mkdir()
    offsets = np.unique(np.linspace(1, len(data) - 1, 40).astype(int))
    seen = set()
    for off in offsets:
        cut.write_bytes(data[:off])
        try:
            run = read_run(cut, format=fmt)
        except InputError as exc:                 # only "nothing completed" is allowed
            allowed = r"no completed ionic step"
            assert re.search(allowed, str(exc)), exc
            assert str(cut) in str(exc)
            seen.add(0)
            continue
        n = len(run)
        seen.add(n)
        assert 1 <= n <= len(full)
        assert np.array_equal(run.cells, full.cells[:n])
        assert np.array_equal(run.positions, full.positions[:n])
        for key in ("energies", "forces", "stress"):
            a, b = getattr(run, key), getattr(full, key)
            assert (a is None) == (b is None), (off, key)
            if a is not None:
                assert np.array_equal(a, b[:n], equal_nan=True), (off, key)
        # XDATCAR has no end marker: a cut exactly between two configurations looks like a
        # complete file (nothing of a step was lost, nothing to warn about)
        between = fmt == "vasp-xdatcar" and data[off:].startswith((b"invented", b"Direct"))
        if n < len(full) and not between:
            assert any(str(cut) in w and "truncated" in w for w in run.warnings), \
                (off, run.warnings)
    assert len(seen) >= min(len(full), 3)          # the offsets really exercised several steps


def test_truncated_compressed_files(traj, tmp_path):
    """A cut .gz (a job writing through gzip, or a partial copy): completed steps + warning."""
    d = vasp_gen.write_run_folder(tmp_path / "gen", traj, files=("vasprun.xml", "OUTCAR"))
    specs = [d / "vasprun.xml", d / "OUTCAR"] + [_unzipped(p, tmp_path) for p in QE_OUTS[:1]]
    for src in specs:
        full = read_run(src)
        packed = gzip.compress(src.read_bytes())
        cut = tmp_path / (src.name + ".gz")
        for frac in (0.35, 0.6, 0.85):
            cut.write_bytes(packed[: int(len(packed) * frac)])
            try:
                run = read_run(cut, format=full.format)
            except InputError as exc:
                assert "no completed ionic step" in str(exc)
                continue
            assert len(run) < len(full)
            assert np.array_equal(run.cells, full.cells[: len(run)])
            assert any(str(cut) in w and "truncated" in w for w in run.warnings)


@needs_qe
def test_ase_pwx_failure_modes_are_handled(tmp_path):
    """The killed-job failure modes of ASE's espresso-out reader (../shared/qe-notes.md):
    cuts inside the stress block, inside the forces block and right after an energy line."""
    out = _unzipped(QE_OUTS[0], tmp_path)
    text = out.read_text()
    full = read_run(out)
    starts = {"stress": text.index("total   stress") + 200,
              "forces": text.index("Forces acting on atoms") + 120,
              "energy": text.index("\n", text.index("!    total energy")) + 1}
    for what, off in starts.items():
        cut = tmp_path / f"cut_{what}.out"
        cut.write_text(text[:off])
        with pytest.raises(InputError, match="no completed ionic step") as e:
            read_run(cut)                         # first step incomplete: an error, not a frame
        assert "truncated before the first ionic step" in str(e.value)
    # an SCF that did not converge (no '!' line): the step is skipped and the warning says so
    marks = [m.start() for m in re.finditer("!    total energy", text)]
    unconverged = text[: marks[1]] + " " + text[marks[1] + 1:]
    (tmp_path / "noconv.out").write_text(unconverged)
    run = read_run(tmp_path / "noconv.out")
    assert len(run) == len(full) - 1
    assert np.array_equal(run.cells[1:], full.cells[2:])
    assert any("step 1 has forces but no converged SCF energy" in w for w in run.warnings)
    assert run.steps.tolist() == [0] + list(range(2, len(full)))     # the gap stays visible
    # the same cuts inside the *second* step keep the first step, complete with results
    second = text.index("!    total energy", text.index("!    total energy") + 10)
    cut = tmp_path / "cut2.out"
    cut.write_text(text[: second + 40])
    run = read_run(cut)
    assert len(run) == 1 and run.forces is not None
    assert np.array_equal(run.forces[0], full.forces[0])
    if full.stress is not None:
        assert np.array_equal(run.stress[0], full.stress[0])


# ---------------------------------------------------------------- streaming / live files
def test_iter_frames_follows_a_growing_file(traj, tmp_path):
    """A live job: the partially written last step is never yielded; later reads add steps."""
    src = vasp_gen.write_outcar(tmp_path / "full_OUTCAR", traj).read_text()
    live = tmp_path / "OUTCAR"
    marks = [m.start() for m in re.finditer("FREE ENERGIE", src)]
    counts = []
    for cut in (marks[2] + 10, marks[4] + 10, len(src)):
        live.write_text(src[:cut])
        counts.append(len(list(iter_frames(live))))
    assert counts == [2, 4, len(traj.cells)]
    it = iter_frames(live)
    first = next(it)                              # streams: no need to read everything first
    assert first.step == 0 and first.energy == pytest.approx(traj.energies[0])


def test_streaming_reads_frames_before_a_bad_step(traj, tmp_path):
    """Frames are yielded as they are read (ASE's streaming OUTCAR chunks, not a whole-file
    parse): a step that VASP garbled (Fortran '*****' overflow) comes after the good ones,
    which are kept, and the problem is a warning naming the file."""
    text = vasp_gen.write_outcar(tmp_path / "OUTCAR", traj).read_text()
    pos = [m.start() for m in re.finditer("TOTAL-FORCE", text)][3]
    line_start = text.index("\n", text.index("\n", pos) + 1) + 1
    line_end = text.index("\n", line_start)
    bad = text[:line_start] + "  *****  *****  *****  0.1 0.1 0.1" + text[line_end:]
    (tmp_path / "OUTCAR").write_text(bad)
    it = iter_frames(tmp_path / "OUTCAR")
    assert next(it).step == 0
    run = read_run(tmp_path / "OUTCAR")
    assert len(run) == 3
    np.testing.assert_allclose(run.cells, traj.cells[:3], atol=1e-9)      # 10 decimals written
    assert any("unreadable after step 2" in w and str(tmp_path / "OUTCAR") in w
               for w in run.warnings)


def _warm(path):
    read_run(path)          # imports and caches outside the measurement


def _peak(path):
    tracemalloc.start()
    try:
        run = read_run(path)
        return tracemalloc.get_traced_memory()[1], run
    finally:
        tracemalloc.stop()


def _long_pw_out(tmp_path, nframes):
    """A long pw.x output made from a real one by repeating one real vc-relax step block."""
    src = next(p for p in QE_OUTS if "vc-relax" in (p.parent / "pw.in").read_text())
    text = _unzipped(src, tmp_path).read_text()
    i1 = text.index("CELL_PARAMETERS")
    i2 = text.index("CELL_PARAMETERS", i1 + 10)
    n0 = len(read_run(src))
    out = tmp_path / f"long_{nframes}.out"
    out.write_text(text[:i2] + text[i1:i2] * (nframes - n0) + text[i2:])
    return out


def test_peak_memory_does_not_grow_beyond_the_frames_kept(tmp_path):
    """tracemalloc peak for 100 vs 1000 frames: the growth per frame stays within ~2x the bytes
    of the arrays kept per frame (block buffers + final concatenation), not the file size."""
    t100, t1000 = vasp_gen.drifting_layer(100), vasp_gen.drifting_layer(1000)
    files = [(vasp_gen.write_outcar(tmp_path / "a_OUTCAR", t100),
              vasp_gen.write_outcar(tmp_path / "b_OUTCAR", t1000)),
             (vasp_gen.write_vasprun(tmp_path / "a_vasprun.xml", t100),
              vasp_gen.write_vasprun(tmp_path / "b_vasprun.xml", t1000))]
    if QE_OUTS:
        files.append((_long_pw_out(tmp_path, 100), _long_pw_out(tmp_path, 1000)))
    for small, big in files:
        _warm(small)
        (p1, r1), (p2, r2) = _peak(small), _peak(big)
        assert (len(r1), len(r2)) == (100, 1000)
        kept = sum(getattr(r2, k).nbytes for k in ("cells", "positions", "steps", "energies",
                                                   "forces", "stress")) / len(r2)
        growth = (p2 - p1) / 900
        file_per_frame = big.stat().st_size / 1000
        print(f"{big.name}: peak {p1 / 1e3:.0f} kB (100 frames) -> {p2 / 1e3:.0f} kB (1000); "
              f"growth {growth:.0f} B/frame, kept {kept:.0f} B/frame, "
              f"file {file_per_frame:.0f} B/frame")
        assert growth < 2.5 * kept + 256
        assert growth < 0.5 * file_per_frame          # the text itself is not kept


@pytest.mark.parametrize("kind", ["fractional", "cartesian"])
def test_stacking_peaks_at_twice_the_arrays(kind):
    """collect() holds the blocks and the stacked arrays at once (twice the frame data) and
    nothing per frame beyond that: what it derives from the stacked arrays (the rounding of
    fractional positions reads every cell) is computed after the blocks are freed. Measured as
    the tracemalloc peak beyond twice the arrays, 640 vs 2560 frames of 4 atoms."""
    import tracemalloc
    from driftwatch.adapters.run import Frame, ReadContext, collect
    rng = np.random.default_rng(0)
    cell, numbers = np.eye(3) * 4.0, np.array([29, 29, 8, 8])

    def frames(n):
        for k in range(n):
            yield Frame(cell=cell + rng.normal(0, 0.01, (3, 3)), positions=rng.random((4, 3)),
                        numbers=numbers, pbc=np.ones(3, bool), step=k, energy=-1.0,
                        forces=rng.random((4, 3)), stress=rng.random(6))

    beyond = {}
    for n in (640, 2560):
        ctx = ReadContext("stacked")
        ctx.round_to(kind, 1e-8)
        tracemalloc.start()
        try:
            run = collect(frames(n), path="stacked", fmt="test", ctx=ctx)
            peak = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
        arrays = sum(getattr(run, k).nbytes for k in ("cells", "positions", "steps", "energies",
                                                      "forces", "stress"))
        beyond[n] = peak - 2 * arrays
        assert run.position_precision > 0
    per_frame = (beyond[2560] - beyond[640]) / 1920
    assert per_frame < 40, per_frame        # blocks' own bookkeeping only (~20 B per frame)


@pytest.mark.parametrize("units", ["crystal", "bohr", "angstrom", "alat", "", "crystal_sg"])
def test_plain_positions_equal_ases_card_parser_bit_for_bit(units):
    """The fast ATOMIC_POSITIONS path gives exactly what ASE's get_atomic_positions gives, for
    each unit pw.x prints (and the alat default), and hands expressions ('1/3', ASE's infix
    maths), crystal_sg and malformed if_pos flags back to ASE (None)."""
    from ase.io.espresso import get_atomic_positions
    from driftwatch.adapters.espresso import _plain_positions
    rng = np.random.default_rng(3)
    cell = np.diag([3.1, 3.3, 17.0]) + rng.normal(scale=0.1, size=(3, 3))
    rows = [f"Mo  {x:.10f} {y:.10f} {z:.10f}" + ("  1 1 0" if k % 2 else "") + "\n"
            for k, (x, y, z) in enumerate(rng.random((6, 3)))]
    header = f"ATOMIC_POSITIONS ({units})\n" if units else "ATOMIC_POSITIONS\n"
    got = _plain_positions(header, rows, cell, 5.9)
    if units == "crystal_sg":
        assert got is None
        return
    ref = np.array([c[1] for c in get_atomic_positions([header] + rows, 6, cell=cell, alat=5.9)])
    assert np.array_equal(got, ref)
    assert _plain_positions(header, ["Mo 1/3 2/3 0.5\n"] + rows[1:], cell, 5.9) is None
    assert _plain_positions(header, ["Mo 0.1 0.2 0.3 1 x 0\n"] + rows[1:], cell, 5.9) is None


@pytest.mark.parametrize("size, longest", [(7, 1 << 20), (4096, 3000), (1 << 16, vasp._BLOCK_MAX)],
                         ids=["7-byte-reads", "steps-too-long-to-hold", "default"])
def test_vasprun_reads_the_same_wherever_its_stream_is_cut(size, longest, tmp_path, monkeypatch):
    """vasprun.xml: each whole <calculation> is parsed in one go and the rest element by element.
    Where the byte stream's reads end (7 bytes, 4 kB, the default 64 kB) and whether a step is
    too long to be held whole (a 3000-byte limit: every step is read element by element) change
    nothing: frames equal to ASE's reader (``ase.io.read`` 'vasp-xml') on a genuine 60-step
    68-atom VASP 5.2.11 relaxation (pymatgen-db test files, tests/data/public/README.md)."""
    monkeypatch.setattr(vasp, "_BLOCK_MAX", longest)
    monkeypatch.setattr(vasp._vasprun_pieces, "__defaults__", (size,))
    path = _unzipped(DATA / "public" / "stage_folders" / "relax1" / "vasprun.xml.gz", tmp_path)
    run = read_run(path)
    assert len(run) == 60 and run.warnings == ()
    _assert_same_as_ase(run, path)


def test_a_broken_vasprun_step_is_reported_where_it_is_in_the_file(tmp_path):
    """A byte made invalid inside the 7th <calculation> of the genuine 60-step vasprun.xml: the six
    steps before it are read, and the warning names the line and column that Python's XML parser
    gives for the whole file (``xml.etree.ElementTree.parse``, the reference), although the steps
    before were parsed on their own."""
    import xml.etree.ElementTree as ET
    raw = gzip.decompress((DATA / "public" / "stage_folders" / "relax1" / "vasprun.xml.gz")
                          .read_bytes())
    at = -1
    for _ in range(7):
        at = raw.find(b"<calculation>", at + 1)
    at = raw.find(b"<structure>", at) + 5
    path = tmp_path / "vasprun.xml"
    path.write_bytes(raw[:at] + b"&" + raw[at + 1:])
    with pytest.raises(ET.ParseError) as ref:
        ET.parse(path)
    run = read_run(path)
    assert len(run) == 6
    (w,) = [w for w in run.warnings if "malformed XML" in w]
    assert f"line {ref.value.position[0]}, column {ref.value.position[1]}" in w, w
    assert "damaged there, not cut off" in w and "truncated" not in w


def test_one_frame_files_that_no_optimiser_wrote_are_single_structures(tmp_path):
    """A trajectory or extended XYZ of one frame with nothing saying an optimiser wrote it (found in
    a field trial: a one-frame OC20 .traj counted as a relaxation 'kept' in the campaign advice) is
    a single structure, as a POSCAR alone is; a one-frame .traj an ASE optimiser wrote (BFGS on an
    EMT cell already at its minimum: it stops at once) stays a relaxation."""
    from ase.build import bulk
    from ase.calculators.emt import EMT
    from ase.optimize import BFGS
    atoms = bulk("Cu", "fcc", a=3.6, cubic=True)
    ase.io.write(tmp_path / "one.traj", atoms)
    ase.io.write(tmp_path / "one.extxyz", atoms, format="extxyz")
    for name in ("one.traj", "one.extxyz"):
        run = read_run(tmp_path / name)
        assert len(run) == 1 and run.not_relaxation == (
            f"a single structure ({name}, one frame): an input or a result, no ionic steps")
    atoms.calc = EMT()
    with BFGS(atoms, trajectory=str(tmp_path / "opt.traj"), logfile=None) as opt:
        opt.run(fmax=0.05)
    run = read_run(tmp_path / "opt.traj")
    assert len(run) == 1 and run.not_relaxation is None


def test_a_pwx_run_stopped_on_request_is_unfinished():
    """pw.x stops cleanly when it finds its <prefix>.EXIT file (driftwatch's soft stop writes one):
    "Program stopped by user request", then JOB DONE. Its final structure is no relaxed one, so the
    run is unfinished (a stopped run read afterwards counted as a finished relaxation). Real pw.x
    6.7 runs: relax1 of tests/data/qe/restart_stage_folders (stopped after 2 BFGS steps), and a run
    that found the file when it started (tests/data/qe_trials/si2_exit_at_start): no ionic step,
    said as such (it read "truncated ... no JOB DONE", both false)."""
    first = DATA / "qe" / "restart_stage_folders" / "relax1"
    assert "Program stopped by user request" in (first / "pw.out").read_text()
    run = read_run(first)
    assert run.unfinished.startswith("stopped on request (pw.x: 'Program stopped by user request'")
    assert read_run(DATA / "qe" / "restart_stage_folders").unfinished is None   # relax2 finished
    early = DATA / "qe_trials" / "si2_exit_at_start"
    text = gzip.open(early / "pw.out.gz", "rt").read()
    assert "Program stopped by user request" in text and "JOB DONE." in text
    with pytest.raises(InputError, match="pw.x stopped on request before its first step") as e:
        read_run(early)
    assert "truncated" not in str(e.value) and "\n" not in str(e.value)


def test_a_pwx_bfgs_that_gave_up_is_unfinished_unless_its_thresholds_were_met():
    """pw.x's BFGS gives up when its trust radius falls below the minimum twice ("history already
    reset at previous step: stopping", QE's Modules/bfgs_module.f90) and then prints "bfgs
    converged" whatever its errors. A real pw.x 6.7 vc-relax (tests/data/qe_trials/si2_bfgs_gave_up)
    ends with a gradient error of 8.7E-06 against a 1.0E-06 threshold: unfinished. The bundled B02
    (real pw.x too) gave up the same way with every error within its thresholds (1.4E-09 < 1.0E-06,
    0.0 < 1.0E-04, 2.8E-07 < 5.0E-02): finished."""
    stalled = DATA / "qe_trials" / "si2_bfgs_gave_up"
    text = gzip.open(stalled / "pw.out.gz", "rt").read()
    assert "history already reset at previous step: stopping" in text
    assert "Gradient error          =      8.7E-06" in text and "force <  1.0E-06" in text
    assert read_run(stalled).unfinished.startswith("stopped without converging (pw.x's BFGS:")
    b02 = Path(__file__).parent.parent / "example_runs" / "B02_qe_vcrelax_sym"
    assert "history already reset at previous step" in (b02 / "pw.out").read_text()
    assert read_run(b02).unfinished is None


def test_a_force_printed_as_stars_is_not_a_number_and_a_position_so_is_named(tmp_path):
    """VASP prints a number too wide for its format as a field of '*' (Fortran; pymatgen's
    vasprun.sc_overflow test file has one in a force). A force so printed is read as not a
    number, with a warning, and every step is read, as pymatgen's Vasprun reads it (the same
    generated file); a position so printed names its step and array."""
    traj = vasp_gen.drifting_layer(nsteps=4)
    text = vasp_gen.write_vasprun(tmp_path / "vasprun.xml", traj).read_text()
    def star(text, array):              # the first number of the first step's array
        i = text.index(f'<varray name="{array}"', text.index("<calculation>"))
        j = text.index("<v>", i) + len("<v>")
        field = text[j:text.index("</v>", j)].split()[0]
        return text[:j] + text[j:].replace(field, "*" * len(field), 1)
    starred = star(text, "forces")
    (tmp_path / "stars").mkdir()
    (tmp_path / "stars" / "vasprun.xml").write_text(starred)
    run = read_run(tmp_path / "stars" / "vasprun.xml")
    from pymatgen.io.vasp.outputs import Vasprun
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = Vasprun(str(tmp_path / "stars" / "vasprun.xml"), parse_dos=False,
                      parse_eigen=False, parse_potcar_file=False)
    assert len(run) == len(ref.ionic_steps) == 4
    assert np.isnan(run.forces[0][0][0]) and np.isnan(ref.ionic_steps[0]["forces"][0][0])
    assert np.isfinite(run.forces[1:]).all()
    assert any("step 0: a force printed as a field of '*'" in w for w in run.warnings)
    (tmp_path / "pos").mkdir()
    (tmp_path / "pos" / "vasprun.xml").write_text(star(text, "positions"))
    with pytest.raises(InputError, match=r"step 0's positions hold a field of '\*'"):
        read_run(tmp_path / "pos" / "vasprun.xml")


def test_md_that_ended_cleanly_before_nsw_says_so(tmp_path):
    """A molecular-dynamics vasprun.xml (IBRION = 0) complete after 4 of its NSW = 300 steps (as
    pymatgen's vasprun.bad_random_seed test file is after 264 of 300; pymatgen's
    ``converged_ionic`` is False for it): a warning says it stopped early. It is no relaxation,
    so nothing is marked unfinished."""
    traj = vasp_gen.drifting_layer(nsteps=4)
    text = vasp_gen.write_vasprun(tmp_path / "vasprun.xml", traj, ibrion=0).read_text()
    (tmp_path / "vasprun.xml").write_text(text.replace('name="NSW">     4<', 'name="NSW">   300<'))
    run = read_run(tmp_path / "vasprun.xml")
    assert len(run) == 4 and run.unfinished is None and run.code_settings["NSW"] == 300
    assert any("the molecular dynamics ran 4 of its NSW = 300 steps and ended cleanly" in w
               for w in run.warnings)


def test_images_interpolated_on_a_straight_line_are_a_band_in_any_format(tmp_path):
    """Five images of an invented Cu cell interpolated by ASE's NEB.interpolate between two end
    points (one atom moved 0.9 Å), written as extended XYZ with no description: each image is the
    one before moved by the same displacement, so the file is a band of images, no relaxation (it
    had read as a 5-step relaxation). A real relaxation of the same format is not (L06)."""
    import warnings as _w

    from ase.build import bulk
    from ase.mep import NEB
    a = bulk("Cu", "fcc", a=3.6, cubic=True)
    b = a.copy()
    b.positions[0] += [0.9, 0.0, 0.0]
    images = [a] + [a.copy() for _ in range(3)] + [b]
    with _w.catch_warnings():
        _w.simplefilter("ignore")
        NEB(images, method="improvedtangent").interpolate()
    ase.io.write(tmp_path / "band.extxyz", images)
    moves = np.diff([im.positions for im in images], axis=0)                      # ASE's images
    assert np.abs(moves - moves[0]).max() < 1e-12 and np.abs(moves[0]).max() > 0.2
    run = read_run(tmp_path / "band.extxyz")
    assert len(run) == 5 and run.not_relaxation.startswith(
        "a band of images (its structures are equally spaced on one straight line")
    relax = read_run(Path(__file__).parents[1] / "example_runs" / "L06_emt_bfgs.traj")
    assert relax.not_relaxation is None
