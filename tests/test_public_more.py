"""Genuine outputs of public repositories' test data (tests/data/public_more/README.md: repository,
commit, path and licence of each), checked against the files' own text, ASE's readers and spglib."""
from __future__ import annotations

import gzip
import re
import subprocess
import sys
from pathlib import Path

import ase.data
import ase.io
import numpy as np
import pytest

import driftwatch
from driftwatch.adapters import read_run
from driftwatch.campaign import discover
from driftwatch.errors import InputError

MORE = Path(__file__).parent / "data" / "public_more"


def test_an_edited_cell_card_without_a_unit_is_read_in_the_unit_its_printed_volume_gives():
    """pwtools' copy of a pw.x 4.3.2 vc-relax with the unit removed from its CELL_PARAMETERS lines:
    each block is read in units of alat, whose volume equals the 'new unit-cell volume' pw.x
    printed before it (ASE's reader takes them as bohr, 0.208 Å^3); the cells equal those of the
    unedited output, and the edit is said."""
    d = MORE / "pwtools_edited_cell_unit"
    edited = read_run(d / "pw.vc_relax_no_cell_unit.out.gz")
    whole = read_run(d / "pw.vc_relax_cell_unit.out.gz")
    text = gzip.decompress((d / "pw.vc_relax_no_cell_unit.out.gz").read_bytes()).decode()
    printed = [float(v) for v in re.findall(r"new unit-cell volume =.*\(\s*([\d.]+) Ang\^3", text)]
    volumes = [abs(np.linalg.det(c)) for c in edited.cells]
    assert len(printed) == len(volumes) - 1 == 6
    np.testing.assert_allclose(volumes[1:], printed, rtol=1e-5)               # the file's own
    np.testing.assert_allclose(edited.cells, whole.cells, atol=1e-8)
    assert any("CELL_PARAMETERS without a unit (an edited output?): read in units of alat" in w
               for w in edited.warnings)
    assert not any("without a unit" in w for w in whole.warnings)
    with open(MORE / "pwtools_edited_cell_unit" / "pw.vc_relax_no_cell_unit.out.gz", "rb") as fh:
        ase_cells = [a.cell.volume for a in ase.io.read(gzip.open(fh, "rt"), ":",
                                                        format="espresso-out")]
    assert ase_cells[-1] < 1.0                            # ASE: bohr, 200x too small


def test_the_jobs_xyz_dump_is_no_run_of_its_own():
    """A LAMMPS job (pwtools' AlN NPT archive) writes a custom dump and an xyz dump (no cell) of the
    same frames: its folder is one run of the custom dump, and the xyz dump is said, not listed as
    a skipped molecule."""
    run = read_run(MORE / "pwtools_lammps_md_npt")
    assert run.source.endswith("lmp.out.dump.gz") and len(run) == 101
    assert any(w.endswith("lmp.out.xyz: the job's 'xyz' dump (no cell, or binary), not read: "
                          "the run is its dump lmp.out.dump.gz") for w in run.warnings)
    xyz = ase.io.read(MORE / "pwtools_lammps_md_npt" / "lmp.out.xyz", ":")        # ASE
    assert len(xyz) == len(run) and not xyz[0].pbc.any()
    assert sorted(xyz[0].get_chemical_symbols()) == sorted(ase.data.chemical_symbols[z]
                                                           for z in run.numbers)


def test_a_relaxation_whose_energy_jumps_up_says_it_may_have_blown_up():
    """custodian's POTIM test run: the OUTCAR's energies are -283.72, -284.41, then +83.58 eV (the
    ionic step blew the slab apart): the run says so beside its verdict."""
    run = read_run(MORE / "custodian_potim_blowup")
    text = gzip.decompress((MORE / "custodian_potim_blowup" / "OUTCAR.gz").read_bytes()).decode()
    toten = [float(v) for v in re.findall(r"free  energy   TOTEN  =\s*(\S+) eV", text)]
    np.testing.assert_allclose(run.energies, toten[:len(run)], atol=1e-6)
    rec = driftwatch.analyze(MORE / "custodian_potim_blowup")
    rise = toten[2] - min(toten[:2])
    assert any(f"the energy ends {rise:.4g} eV" in w and "above the lowest it reached (step 1)"
               in w and "blew up" in w for w in rec["run"]["warnings"])
    quiet = driftwatch.analyze(Path(__file__).parent.parent / "example_runs" /
                               "B05_emt_bfgs.extxyz")
    assert not any("blew up" in w for w in quiet["run"]["warnings"])
    # an uphill first step the relaxation recovered from (a real FIRE run of a Lennard-Jones
    # chain, tests/data/atoms_trials: +4.8 eV, then down to -2.0 eV) is not said
    lj = Path(__file__).parent / "data" / "atoms_trials" / "Q12_LJ_chain_equalise" / "relax.traj"
    e = [a.get_potential_energy() for a in ase.io.read(lj, ":")]
    assert e[1] - e[0] > 2 * 1.0 and e[-1] < e[0]
    assert not any("blew up" in w for w in driftwatch.analyze(lj)["run"]["warnings"])


def test_a_vasp_job_that_died_before_its_first_step_quotes_its_standard_output():
    d = MORE / "custodian_died_real_optlay"
    assert "REAL_OPTLAY: internal error" in (d / "vasp.out").read_text()
    with pytest.raises(InputError, match="vasp.out ends with 'REAL_OPTLAY: internal error"):
        read_run(d / "OUTCAR")


def test_the_atoms_line_prefers_the_larger_point_group_when_a_supercell_ties_the_counts():
    """pyiron's VASP 4.6.28 slab in an orthohexagonal cell: spglib finds cm11 (layer group 8 as
    the layer, Cm as the crystal) at 1e-5 Å and p3m1 at 0.00115 Å, each with 8 operations in this
    cell (2 of p3m1's 6 rotations fit the rectangular cell); the atoms line measures p3m1, the
    more symmetric (its point group, 3m, has order 6 against m's 2: International Tables)."""
    rec = driftwatch.analyze(MORE / "pyiron_vasp4628_slab")
    at = rec["summary"]["atoms"]
    table = rec["frames"][-1]["symmetry"]["displacement"]
    ops = {d["symbol"]: (d["operations"], d["point_operations"]) for d in table.values()
           if "rms" in d}
    assert ops["p3m1"][0] == ops["cm11"][0] and ops["p3m1"][1] > ops["cm11"][1]
    assert at["symbol"] == "p3m1"


def test_a_vasp_run_stopped_by_its_stopcar_is_unfinished(tmp_path):
    """pymatgen's OUTCAR.stopped (VASP 5.2.11, NSW = 200, IBRION = 2): VASP read a STOPCAR with
    LSTOP after its first ionic step and printed "soft stop encountered!  aborting job ...", never
    "reached required accuracy" (the file's own lines). Its final structure is its start: the run
    is unfinished, stopped on request, as pw.x's stop on its .EXIT file is (it read as a finished
    relaxation). A vasprun.xml has no such line; the same stage's OUTCAR beside it tells (invented
    files from tests/vasp_gen.py, in VASP's layout, with the genuine line's wording)."""
    import lzma

    import vasp_gen
    path = MORE / "vasp5211_soft_stop" / "OUTCAR.xz"
    text = lzma.open(path, "rt").read()
    assert " soft stop encountered!  aborting job ..." in text
    assert "reached required accuracy" not in text and re.search(r"NSW\s*=\s*200\b", text)
    run = read_run(path)
    (tmp_path / "OUTCAR").write_text(text)
    assert len(run) == 1 == len(ase.io.read(tmp_path / "OUTCAR", ":", format="vasp-out"))  # ASE
    assert run.unfinished == (
        "stopped on request (VASP: 'soft stop encountered' after 1 of NSW = 200 ionic steps: a "
        "STOPCAR with LSTOP = .TRUE. in its folder, written by a user or by driftwatch's soft "
        "stop)")
    assert any(w.endswith("; the final structure is not a relaxed one") for w in run.warnings)
    traj = vasp_gen.drifting_layer(6)
    line = [ln for ln in text.splitlines() if "soft stop encountered" in ln][0]
    for converged in (False, True):
        d = tmp_path / f"converged_{converged}"
        d.mkdir()
        vasp_gen.write_vasprun(d / "vasprun.xml", traj)
        out = vasp_gen.write_outcar(d / "OUTCAR", traj).read_text()
        if not converged:
            out = out.replace(" reached required accuracy - stopping structural energy "
                              "minimisation\n", "")
        out = out.replace("\n General timing", f"\n{line}\n\n General timing", 1)
        (d / "OUTCAR").write_text(out)
        for source in (d, d / "OUTCAR", d / "vasprun.xml"):
            got = read_run(source).unfinished
            if converged:          # it converged before VASP read the STOPCAR
                assert got is None, source
            else:
                assert got is not None and got.startswith(
                    "stopped on request (VASP: 'soft stop encountered' after 6 of NSW = 6 ionic "
                    "steps"), source


def _pymatgen_vasprun(path, tmp_path):
    import lzma
    import warnings

    from pymatgen.io.vasp.outputs import Vasprun
    plain = tmp_path / "vasprun.xml"
    opener = lzma.open if path.suffix == ".xz" else gzip.open
    plain.write_bytes(opener(path).read())
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return Vasprun(str(plain), parse_dos=False, parse_eigen=False, parse_potcar_file=False)


def test_the_machine_learned_force_fields_steps_are_read_in_file_order(tmp_path):
    """pymatgen's on-the-fly machine-learned MD (ML_LMLFF = T, NSW = 100): VASP wrote 20 steps in
    <calculation>s and the force field's 80 between them. All 100 are read, in file order, and
    equal pymatgen's ``md_data`` (cells, positions, forces, free energies); ASE's reader, like
    driftwatch before, reads the 20 <calculation>s only, so its last frame is MD step 91."""
    path = MORE / "vasp_ml_md" / "vasprun.xml.xz"
    ref = _pymatgen_vasprun(path, tmp_path).md_data
    run = read_run(path)
    assert len(ref) == len(run) == 100 and run.steps.tolist() == list(range(100))
    np.testing.assert_array_equal(run.cells, [m["structure"].lattice.matrix for m in ref])
    np.testing.assert_allclose(run.positions, [m["structure"].cart_coords for m in ref],
                               atol=1e-12)
    np.testing.assert_array_equal(run.forces, [m["forces"] for m in ref])
    np.testing.assert_array_equal(run.energies, [m["energy"]["e_fr_energy"] for m in ref])
    assert len(ase.io.read(tmp_path / "vasprun.xml", ":", format="vasp-xml")) == 20      # ASE
    assert any("80 of the 100 steps read are the machine-learned force field's" in w
               for w in run.warnings)
    assert run.not_relaxation.startswith("molecular dynamics (IBRION = 0)")


def test_a_static_optics_run_is_one_frame_of_its_final_structure(tmp_path):
    """pymatgen's LOPTICS vasprun.xml (NSW = 0): its one <calculation> holds no <structure>; the
    run is the file's finalpos structure, as pymatgen's ``final_structure``, a single-point run
    (it had failed the audit: "no completed ionic step")."""
    path = MORE / "vasp_loptics_static" / "vasprun.xml.gz"
    ref = _pymatgen_vasprun(path, tmp_path)
    assert [s["structure"] for s in ref.ionic_steps] == [None]
    run = read_run(path)
    assert len(run) == 1 and run.energies is None
    np.testing.assert_allclose(run.cells[0], ref.final_structure.lattice.matrix, atol=1e-12)
    np.testing.assert_allclose(run.positions[0], ref.final_structure.cart_coords, atol=1e-8)
    assert [int(z) for z in run.numbers] == [s.specie.Z for s in ref.final_structure]
    assert run.not_relaxation.startswith("a single-point calculation (NSW = 0")


def test_a_relaxation_with_no_convergence_criterion_is_not_unfinished_at_nsw(tmp_path):
    """pymatgen's EDIFFG = 0 relaxation (IBRION = 1, NSW = 3) ran its 3 steps by design (pymatgen's
    ``converged_ionic`` is True for it): said so, not marked unfinished at its step limit."""
    path = MORE / "vasp_ediffg0" / "vasprun.xml.xz"
    ref = _pymatgen_vasprun(path, tmp_path)
    assert ref.parameters["EDIFFG"] == 0 and ref.parameters["NSW"] == 3 and ref.converged_ionic
    run = read_run(path)
    assert len(run) == 3 and run.unfinished is None and run.code_settings["EDIFFG"] == 0
    assert any("ran all NSW = 3 ionic steps as set: EDIFFG = 0 gives VASP no convergence "
               "criterion" in w for w in run.warnings)


def test_a_bands_inputs_beside_its_outputs_are_no_runs(tmp_path):
    """atomate2's NEB job keeps its inputs in ``inputs/`` (an image folder each, ``01/`` to ``03/``
    holding a POSCAR) beside ``outputs/``, where the images ran (each ``inputs/0N/POSCAR.gz`` is the
    same file as ``outputs/0N/POSCAR.gz``). The audit lists the three images of ``outputs/`` and
    nothing of ``inputs/`` (it had failed three "jobs not run yet", exit 4); ``inspect`` of an
    input image names the output image to pass."""
    import subprocess
    import sys
    neb = MORE / "atomate2_neb" / "Si_NEB" / "NEB"
    for k in ("01", "02", "03"):
        assert gzip.decompress((neb / "inputs" / k / "POSCAR.gz").read_bytes()) == \
            gzip.decompress((neb / "outputs" / k / "POSCAR.gz").read_bytes())
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(MORE / "atomate2_neb"),
                           "-o", str(tmp_path / "out"), "--no-report"], capture_output=True,
                          text=True, timeout=600)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    rows = [ln.split()[0] for ln in proc.stdout.splitlines() if ln.startswith("atomate2_neb/")]
    assert rows == [f"atomate2_neb/Si_NEB/NEB/outputs/{k}" for k in ("01", "02", "03")]
    for folder, out in ((neb / "inputs" / "01", "../outputs/01"), (neb / "inputs", "outputs")):
        proc = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", str(folder)],
                              capture_output=True, text=True, timeout=600)
        assert proc.returncode != 0 and proc.stderr.count("\n") == 1, proc.stderr
        assert f"the inputs of the job whose outputs are in {out}/ beside it" in proc.stderr


def test_atoms_the_codes_constraints_hold_are_said_and_leave_fmax(tmp_path):
    """pymatgen's vasprun.indirect.xml (two atoms, selective dynamics `T T T` / `F F F`, as
    pymatgen's ``selective_dynamics`` site property reads them): one atom held, said; its force
    does not count in fmax (as ASE's FixAtoms). FAIR-Chem's slab relaxation (tests/data/public:
    extended XYZ ``move_mask``, ASE's FixAtoms on 18 atoms) says the same of its 18 atoms."""
    path = MORE / "vasp_selective_static" / "vasprun.xml.gz"
    ref = _pymatgen_vasprun(path, tmp_path)
    flags = ref.final_structure.site_properties["selective_dynamics"]
    assert [list(map(bool, f)) for f in flags] == [[True] * 3, [False] * 3]
    run = read_run(path)
    assert run.code_settings["constrained_atoms"] == 1
    said = [w for w in run.warnings if "atoms are held" in w]
    assert len(said) == 1 and "1 of 2 atoms are held (in part or whole) by VASP's selective " \
        "dynamics" in said[0] and "fmax counts their free force components only" in said[0]
    np.testing.assert_array_equal(run.forces[0][1], 0.0)
    np.testing.assert_allclose(run.forces[0][0], ref.ionic_steps[0]["forces"][0], atol=1e-8)
    slab = Path(__file__).parent / "data" / "public" / "fairchem_slab_relax" / \
        "toy_c3h8_relax.extxyz.xz"
    first = ase.io.read(slab, 0)                                                      # ASE
    fixed = [c for c in first.constraints if type(c).__name__ == "FixAtoms"]
    assert len(fixed) == 1 and len(fixed[0].index) == 18
    run = read_run(slab)
    assert run.code_settings["constrained_atoms"] == 18
    assert any("18 of 38 atoms are held (in part or whole) by the file's constraints (ASE's "
               "FixAtoms, as ASE reads them)" in w
               for w in run.warnings)


def test_outputs_of_codes_without_a_reader_are_listed_as_skipped(tmp_path):
    """quacc's ph.x output named ``run1.txt.gz`` (tests/data/public/broken), its Gaussian 16 log
    and its Psi4 output (their banners: "Program PHONON v.6.0", "Entering Gaussian System",
    "Psi4: An Open-Source Ab Initio Electronic Structure Package"), beside a pw.x run: the audit
    lists each as skipped, naming the code (they had been dropped unsaid)."""
    import json
    import shutil
    import subprocess
    import sys
    data = Path(__file__).parent / "data"
    camp = tmp_path / "camp"
    (camp / "phonons").mkdir(parents=True)
    shutil.copy(data / "public" / "broken" / "quacc_ph" / "run1.txt.gz", camp / "phonons")
    shutil.copytree(MORE / "quacc_molecular", camp / "molecular")
    shutil.copytree(data / "qe" / "bulk_tetragonal_to_cubic", camp / "relax")
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                           str(tmp_path / "out"), "--no-report", "--json"], capture_output=True,
                          text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    skipped = {k["run"]: k["reason"] for k in json.loads(proc.stdout)["skipped"]}
    assert skipped == {
        "camp/molecular/Gaussian.log.gz": "an output of Gaussian, which driftwatch has no reader "
                                          "for",
        "camp/molecular/psi_test.out.gz": "an output of Psi4, which driftwatch has no reader for",
        "camp/phonons/run1.txt.gz": "an output of Quantum ESPRESSO's ph.x, which driftwatch has "
                                    "no reader for"}


def test_reject_on_gates_relaxations_and_says_flags_on_md(tmp_path):
    """atomate2's MD job (IBRION = 0; spglib at 1e-3 Å: Fd-3m at step 0, P-1 from step 1) beside
    the bundled B03 relaxation that lost its group: ``--reject-on group-lost`` exits 3 for B03
    alone; the MD run's group-lost is said on stderr as not gated (it had counted, so every MD
    job from a symmetric start stopped a pipeline)."""
    import shutil
    import subprocess
    import sys
    import spglib
    md = MORE / "atomate2_md"
    xml = tmp_path / "vasprun.xml"
    xml.write_bytes(gzip.decompress(next(md.rglob("vasprun.xml.gz")).read_bytes()))
    frames = ase.io.read(xml, ":", format="vasp-xml")                                  # ASE
    assert [spglib.get_symmetry_dataset((a.cell[:], a.get_scaled_positions(), a.numbers),
                                        symprec=1e-3).number for a in frames][:2] == [227, 2]
    camp = tmp_path / "camp"
    shutil.copytree(md, camp / "md")
    shutil.copytree(Path(__file__).parents[1] / "example_runs" / "B03_qe_vcrelax_nosym",
                    camp / "B03")
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                           str(tmp_path / "out"), "--no-report", "--reject-on", "group-lost",
                           "--progress", "off"], capture_output=True, text=True, timeout=600)
    assert proc.returncode == 3, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert lines == [
        "driftwatch: not gated by --reject-on: flags it names on no relaxation (molecular "
        "dynamics, a single point, a band image: marked ~) on 1 run: "
        "camp/md/Si_multi_md/molecular_dynamics_1/outputs: group-lost (step 1)",
        "driftwatch: exit 3: a flag named by --reject-on was raised on 1 run: camp/B03: "
        "group-lost (step 1)"]
    alone = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", str(camp / "md" /
                            "Si_multi_md" / "molecular_dynamics_1" / "outputs"), "--reject-on",
                            "group-lost"], capture_output=True, text=True, timeout=600)
    assert alone.returncode == 0 and "not gated by --reject-on" in alone.stderr


def test_a_bands_task_document_and_its_interpolated_images_are_no_relaxation():
    """atomate2's NEB task document (emmet's NebTaskDoc: ``images``, ``neb_method``) is a
    skipped file saying what it is (it had failed as "not a pymatgen Structure list"); its list of
    images interpolated between the end points (each structure the one before moved by the same
    displacement, pymatgen's own Structures) is a band of images, no relaxation (it had read as
    a relaxation that kept P-43m)."""
    import json

    from driftwatch.errors import ForeignOutputError
    d = MORE / "atomate2_neb_json"
    doc = json.loads(gzip.decompress((d / "neb_task_doc.json.gz").read_bytes()))
    assert {"images", "neb_method"} <= set(doc)
    with pytest.raises(ForeignOutputError, match="a nudged-elastic-band task document"):
        read_run(d / "neb_task_doc.json.gz")
    images = json.loads(gzip.decompress((d / "get_images_from_endpoints.json.gz").read_bytes()))
    frac = np.array([[s["abc"] for s in im["sites"]] for im in images])
    moves = np.diff(frac, axis=0)
    assert len(images) == 5 and np.abs(moves - moves[0]).max() < 1e-12        # the file's own
    run = read_run(d / "get_images_from_endpoints.json.gz")
    assert len(run) == 5 and run.not_relaxation.startswith("a band of images (its structures are "
                                                           "equally spaced on one straight line")


def test_a_vasp_band_structure_run_is_called_non_self_consistent():
    """atomate2's band-structure job (its OUTCAR prints ICHARG = 11, NSW = 0): "a
    non-self-consistent run", as pw.x's 'bands' runs are called, not a plain single point."""
    d = MORE / "atomate2_nscf_line"
    text = gzip.decompress((d / "OUTCAR.gz").read_bytes()).decode()
    assert re.search(r"ICHARG =\s+11\b", text)
    run = read_run(d)
    assert len(run) == 1 and run.code_settings["ICHARG"] == 11
    assert run.not_relaxation.startswith("a non-self-consistent run (ICHARG = 11, NSW = 0")


def test_an_xdatcar_line_of_two_numbers_run_together_is_named():
    """pymatgen's XDATCAR.bad_fmt: its line 17 reads "-0.63265286-0.11227753 -0.15402785" (the
    file's own text). The first configuration is read, and the warning names the line and what
    is wrong with it (it had quoted numpy's "inhomogeneous shape")."""
    path = MORE / "xdatcar_fused" / "XDATCAR.gz"
    assert gzip.decompress(path.read_bytes()).decode().splitlines()[16].startswith(
        "-0.63265286-0.11227753")
    run = read_run(path)
    assert len(run) == 1 and run.unfinished.startswith("unreadable after step 0")
    assert any("line 17 holds '-0.63265286-0.11227753 -0.15402785', not three numbers (two "
               "numbers run together?)" in w for w in run.warnings)


# ------------------------------------------------ QE's own test-suite (seventeenth session)
def _pw_text(folder: str) -> str:
    return gzip.decompress((MORE / folder / "pw.out.gz").read_bytes()).decode()


def test_an_input_of_the_workflows_next_step_is_not_taken_as_the_vc_relaxs_own(tmp_path):
    """q-e's pw_workflow_vc-relax_dos: step 1's vc-relax output beside step 2's nscf input, as a
    user's folder holds them after the next step. The output's own lines show 38 '!' energies,
    'new unit-cell volume' and 'bfgs converged' (ASE reads 38 frames): the input's calculation =
    'nscf' is not this output's. Before, the run was "a single-point calculation ... no ionic
    steps" and --reject-on let its lattice-lost through (exit 0)."""
    d = MORE / "qe_ts_nscf_input_beside_vcrelax"
    text = _pw_text(d.name)
    assert re.search(r"calculation\s*=\s*[\"']nscf", (d / "pw.in").read_text())  # the input's own
    assert len(re.findall(r"^!\s+total energy", text, re.M)) == 38 and "bfgs converged" in text
    assert len(ase.io.read(gzip.open(d / "pw.out.gz", "rt"), ":", format="espresso-out")) == 38
    run = read_run(d)
    assert len(run) == 38 and run.not_relaxation is None
    assert "settings_from" not in run.code_settings and run.code_settings.get("code") == "espresso"
    assert any("the pw.x input pw.in beside it is not this output's (calculation = 'nscf', the "
               "output shows ionic steps)" in w for w in run.warnings)
    alone = tmp_path / "alone"
    alone.mkdir()
    (alone / "pw.out.gz").write_bytes((d / "pw.out.gz").read_bytes())
    assert driftwatch.analyze(read_run(alone))["flags"] == driftwatch.analyze(run)["flags"]
    r = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", str(d), "--reject-on",
                        "lattice-lost"], capture_output=True, text=True)
    assert r.returncode == 3, r.stderr


def test_a_makov_payne_cluster_is_an_isolated_system_skipped_naming_its_file(tmp_path):
    """q-e's pw_cluster cluster5: assume_isolated = 'makov-payne' in its input, and pw.x prints
    'MAKOV-PAYNE CORRECTION' after its SCF: an isolated molecule, skipped as the Martyna-Tuckerman
    ones are (it had been a bulk cP crystal). The audit's reason names the file of the folder."""
    from driftwatch.campaign import audit
    from driftwatch.errors import NotPeriodicError
    d = MORE / "qe_ts_makov_payne_cluster"
    assert "assume_isolated = 'makov-payne'" in (d / "pw.in").read_text()
    assert "MAKOV-PAYNE CORRECTION" in _pw_text(d.name)
    with pytest.raises(NotPeriodicError, match="makov-payne"):
        read_run(d)
    s = audit([d], tmp_path / "out", report=False, progress="off", workers=1)
    (skip,) = s["skipped"]
    assert skip["reason"].startswith("pw.out.gz: a molecule or cluster: pw.x computed it as an "
                                     "isolated system (assume_isolated = 'makov-payne'")


def test_a_hybrid_run_cut_at_exx_maxstep_is_unfinished_and_its_energy_is_the_double_bang_line():
    """q-e's pw_workflow_exx_nscf ncpp-gamma-restart-1 sets exx_maxstep = 2 and pw.x prints
    'Calculation (EXX) stopped after iteration # 2', no 'EXX self-consistency reached': it stopped
    without converging. pw_b3lyp b3lyp-O converges its EXX loop: its energy is pw.x's final '!!'
    line (x the Ry of ASE's pw.x reader), not the '!' before it, nor ASE's first '!' (the
    non-hybrid SCF)."""
    from ase.io.espresso import units
    Ry = units["Ry"]
    text = _pw_text("qe_ts_exx_maxstep")
    assert "exx_maxstep = 2" in (MORE / "qe_ts_exx_maxstep" / "pw.in").read_text()
    assert "Calculation (EXX) stopped after iteration" in text
    assert "EXX self-consistency reached" not in text
    run = read_run(MORE / "qe_ts_exx_maxstep")
    assert run.unfinished == ("stopped without converging (pw.x: 'Calculation (EXX) stopped after "
                              "iteration #     2')")                   # quoted as pw.x prints it
    text = _pw_text("qe_ts_exx_energy")
    final = float(re.search(r"^!!\s+total energy\s+=\s+(\S+) Ry", text, re.M).group(1)) * Ry
    bangs = [float(v) * Ry for v in re.findall(r"^!\s+total energy\s+=\s+(\S+) Ry", text, re.M)]
    run = read_run(MORE / "qe_ts_exx_energy")
    assert len(run) == 1 and run.unfinished is None
    assert run.energies[-1] == pytest.approx(final, abs=1e-9) and abs(final - bangs[-1]) > 1e-7
    first = ase.io.read(gzip.open(MORE / "qe_ts_exx_energy" / "pw.out.gz", "rt"),
                        format="espresso-out").get_potential_energy()
    assert first == pytest.approx(bangs[0], abs=1e-6) and abs(first - final) > 0.5   # ASE's


# ---------------------------------------------------------------- janus-core's ASE outputs (extxyz)
def test_extended_xyz_says_what_its_frames_are_as_a_trajectory_file_does():
    """What the frames alone say is read the same from extended XYZ as from an ASE trajectory
    (they had been relaxations in extended XYZ only), on stfc/janus-core's genuine files:
    - the first 12 frames of its MACE-MP molecular dynamics (time_fs 0, 5, 10, ...), whose
      momenta columns change from frame to frame (ASE's reader): molecular dynamics;
    - its LiFePO4 band of 7 images, named by system_name, whose end points carry no energy and
      whose 5 images between do (ASE's reader): a band of images;
    - its one-frame NaCl result named by system_name: a single structure."""
    md = MORE / "janus_md_head" / "precomputed_NaCl-traj.first12.xyz.gz"
    frames = ase.io.read(gzip.open(md, "rt"), ":")
    assert [a.info["time_fs"] for a in frames[:3]] == [0.0, 5.0, 10.0]
    assert np.any(frames[0].get_momenta() != frames[1].get_momenta())             # ASE's
    run = read_run(md)
    assert len(run) == 12 and run.not_relaxation.startswith("molecular dynamics")
    band = MORE / "janus_neb_band" / "LiFePO4-neb-band.xyz.gz"
    images = ase.io.read(gzip.open(band, "rt"), ":")
    energies = [a.calc.results.get("energy") if a.calc else None for a in images]
    assert len(images) == 7 and energies[0] is None is energies[-1]
    assert None not in energies[1:-1] and images[0].info["system_name"] == "LiFePO4_start"
    run = read_run(band)
    assert len(run) == 7 and run.not_relaxation.startswith("a band of images")
    one = MORE / "janus_single_result" / "NaCl-results.extxyz"
    assert [a.info["system_name"] for a in ase.io.read(one, ":")] == ["NaCl"]
    run = read_run(one)
    assert len(run) == 1 and run.not_relaxation.startswith("a single structure")


def test_a_file_named_traj_that_is_no_ulm_trajectory_says_what_it_is(tmp_path):
    """matgl's MoS_relax.traj is a Python pickle (its first byte 0x80, pickle's protocol mark;
    common practice), matscipy's aC.traj ASE's old pickle trajectory (it begins
    'PickleTrajectory'), and a gzipped trajectory begins with gzip's magic: each is said, where
    ASE's 'This is not an ULM formatted file' had named none."""
    import gzip as _gzip
    d = MORE / "not_ulm_traj"
    assert (d / "MoS_relax.traj").read_bytes()[:1] == b"\x80"
    assert (d / "aC.first256bytes.traj").read_bytes().startswith(b"PickleTrajectory")
    with pytest.raises(InputError, match="a Python pickle"):
        read_run(d / "MoS_relax.traj")
    with pytest.raises(InputError, match="ASE's old pickle trajectory"):
        read_run(d / "aC.first256bytes.traj")
    traj = tmp_path / "x.traj"
    ase.io.write(traj, ase.Atoms("Cu", cell=[2.5, 2.5, 2.5], pbc=True))
    packed = tmp_path / "packed.traj"
    packed.write_bytes(_gzip.compress(traj.read_bytes()))
    with pytest.raises(InputError, match="gzip-compressed; ASE reads trajectories uncompressed"):
        read_run(packed)


def _doped_segment_and_outcar(tmp_path):
    """ASE's reading of doped's saved segment and of the final OUTCAR beside it."""
    import io
    import lzma
    d = MORE / "doped_resubmitted_segments"
    seg = ase.io.read(io.BytesIO(lzma.decompress(
        (d / "vasprun.xml_11_19_39on29_01_24.xz").read_bytes())), ":", format="vasp-xml")
    outcar = tmp_path / "OUTCAR"
    outcar.write_bytes(lzma.decompress((d / "OUTCAR.xz").read_bytes()))
    return d, seg, ase.io.read(outcar, ":", format="vasp-out")


def test_a_saved_segment_of_a_resubmitted_job_is_read_as_its_first_stage(tmp_path):
    """doped's MgO antisite folder keeps an earlier segment of its resubmitted relaxation as
    vasprun.xml_11_19_39on29_01_24 (a job script's copy, named by ``date +%H_%M_%Son%d_%m_%y``,
    the layout of ShakeNBreak's resubmission script) beside the final OUTCAR: its 26 steps end
    where the OUTCAR's start (ASE reads both; fractional positions equal to 1e-5). It had been
    said and left out, the run reduced to the OUTCAR's 2 steps; it is the run's first stage."""
    d, seg, out = _doped_segment_and_outcar(tmp_path)
    gap = seg[-1].get_scaled_positions() - out[0].get_scaled_positions()
    assert len(seg) == 26 and np.abs(gap - np.round(gap)).max() < 1e-5          # ASE's
    run = read_run(d)
    assert len(run) == len(seg) + len(out) == 28
    assert [(s["name"], s["n_frames"]) for s in run.stages] == \
        [("11_19_39on29_01_24", 26), ("final", 2)]
    for k, atoms in enumerate(seg + out):                 # the frames are ASE's, in that order
        assert np.abs(run.positions[k] - atoms.positions).max() < 1e-4
        assert np.abs(run.cells[k] - atoms.cell.array).max() < 1e-6
    assert not any("not read" in w or "still running" in w or "no complete VASP output" in w
                   for w in run.warnings) and run.unfinished is None
    assert any("a saved segment of a resubmitted job, cut where its job stopped after 26 "
               "complete ionic steps" in w for w in run.warnings)
    alone = read_run(f"{d}@11_19_39on29_01_24")
    assert len(alone) == 26


def test_a_saved_segment_the_job_started_again_from_is_said_not_read(tmp_path):
    """The same segment saved before the job started again from its first structure (the
    current vasprun.xml is the segment's own bytes: its first structure is the segment's first,
    not its last): the segment is no part of the trajectory, and a warning says why."""
    d, seg, _ = _doped_segment_and_outcar(tmp_path)
    run_dir = tmp_path / "restarted"
    run_dir.mkdir()
    for name in ("vasprun.xml_11_19_39on29_01_24.xz", "INCAR"):
        (run_dir / name).write_bytes((d / name).read_bytes())
    (run_dir / "vasprun.xml.xz").write_bytes((d / "vasprun.xml_11_19_39on29_01_24.xz").read_bytes())
    run = read_run(run_dir)
    assert len(run) == len(seg) == 26
    assert any("a saved segment of a resubmitted job not read: the segment after it started "
               "from another structure than its last one" in w for w in run.warnings)


def test_saved_segments_run_in_the_order_their_times_say():
    """``date +%H_%M_%Son%d_%m_%y`` (day before month, two-digit year): a segment saved on
    31 Dec 2023 ran before one saved on 1 Jan 2024 and after one saved earlier that day
    (common practice: the date format is the script's own, read as GNU date writes it)."""
    from driftwatch.adapters.vasp import _segments
    names = ["vasprun.xml_09_00_00on01_01_24", "OUTCAR_23_59_59on31_12_23",
             "vasprun.xml_08_00_00on31_12_23.gz", "INCAR_08_00_00on31_12_23", "OUTCAR"]
    assert [w for w, _ in _segments(Path("."), names)] == \
        ["08_00_00on31_12_23", "23_59_59on31_12_23", "09_00_00on01_01_24"]


# ---------------------------------------------------------------- CASTEP and FHI-aims through ASE
def _castep_text(path) -> str:
    return gzip.decompress(Path(path).read_bytes()).decode()


def test_castep_iterations_not_line_minimisation_trials_and_its_step_limit(tmp_path):
    """aiida-castep's Si2 cell optimisation (tests/data/public_more/README.md): the .castep lists
    31 'BFGS: finished iteration' lines (0 to 30) and ends 'Geometry optimization failed to converge
    after 30 steps'. ASE's .castep reader returns 91 configurations, each iteration's two line-
    minimisation trials among them; its .geom reader the 31 iterations. The folder holding both
    (as CASTEP writes them) had been refused as two runs, the .castep read as 91 steps, and the run
    not said unfinished."""
    d = MORE / "castep_geom_limit"
    text = _castep_text(d / "aiida.castep.gz")
    assert len(re.findall(r"BFGS: finished iteration", text)) == 31             # CASTEP's own
    geom = tmp_path / "aiida.geom"
    geom.write_bytes(gzip.decompress((d / "aiida.geom.gz").read_bytes()))
    iterations = ase.io.read(geom, ":", format="castep-geom")                    # ASE's
    assert len(iterations) == 31
    run = read_run(d)
    assert run.source.endswith("aiida.castep.gz") and len(run) == 31
    assert run.steps.tolist() == list(range(31))
    for k, atoms in enumerate(iterations):
        assert np.abs(run.cells[k] - atoms.cell.array).max() < 1e-6
        f = np.linalg.solve(run.cells[k].T, (run.positions[k] - atoms.positions).T).T
        assert np.abs(f - np.round(f)).max() < 1e-6
    assert run.unfinished == ("stopped at its step limit (CASTEP: 'Geometry optimization failed "
                              "to converge after 30 steps')")
    assert any("60 line-minimisation trial configurations of CASTEP's optimiser left out" in w
               for w in run.warnings)


def test_castep_frame_energies_are_those_each_iteration_finished_on():
    """electronic-parsers' Si2_opt.castep: 7 iterations (0-6) and one trial before iteration 1
    (its 'Final energy = -213.8765829573 eV'); each frame's energy is the last 'Final energy'
    line before the iteration's 'finished iteration' line (the file's own lines)."""
    text = _castep_text(MORE / "castep_si2_opt.castep.gz")
    finished = []
    energy = None
    for line in text.splitlines():
        if line.startswith("Final energy"):
            energy = float(line.split()[-2])
        if "BFGS: finished iteration" in line:
            finished.append(energy)
    run = read_run(MORE / "castep_si2_opt.castep.gz")
    assert len(finished) == len(run) == 7
    np.testing.assert_allclose(run.energies, finished, atol=1e-8, rtol=0)
    assert -213.8765829573 not in run.energies.tolist()
    assert run.not_relaxation is None and run.unfinished is None


def test_castep_and_fhi_aims_molecular_dynamics_are_no_relaxation(tmp_path):
    """The header's 'type of calculation : molecular dynamics' (CASTEP) and control.in's
    'MD_run' (FHI-aims) name the steps: no relaxation, as pw.x's calculation = 'md' and VASP's
    IBRION = 0 are; the aims run's 4 Å cubic cell (its lattice_vector lines) is every frame's, where
    ASE's reader gives it to the last of 5 frames only (the run had been refused as 'a molecule or
    cluster': no cell)."""
    castep = read_run(MORE / "castep_si8_md_npt.castep.gz")
    assert castep.not_relaxation == ("molecular dynamics (CASTEP: type of calculation : "
                                     "molecular dynamics)")
    path = tmp_path / "H2O_periodic_MD.out"
    path.write_bytes(gzip.decompress((MORE / "aims_h2o_periodic_md.out.gz").read_bytes()))
    ase_frames = ase.io.read(path, ":", format="aims-output")                     # ASE's
    assert [a.pbc.all() for a in ase_frames] == [False] * 4 + [True]
    aims = read_run(MORE / "aims_h2o_periodic_md.out.gz")
    assert len(aims) == 5
    np.testing.assert_allclose(aims.cells, np.broadcast_to(4.0 * np.eye(3), (5, 3, 3)))
    np.testing.assert_allclose(aims.positions, [a.positions for a in ase_frames], atol=1e-8)
    assert aims.not_relaxation == ("molecular dynamics (FHI-aims: MD_run 0.005 NVT_nose-hoover "
                                   "300 900)")


# ---------------------------------------------------------------- a layer across the cell boundary
def test_a_layer_group_does_not_depend_on_where_the_layer_sits_along_its_normal(tmp_path):
    """spglib's layer test structure (1H MoS2, p-6m2 No. 78; tests/data/public_more/README.md)
    moved along its normal by whole and half slab periods, its atoms wrapped into the cell or not:
    a translation, so the layer group is p-6m2 throughout, as 3D spglib's group of the same cells
    is P-6m2 (187) throughout. spglib 2.8's layer routine, given the wrapped coordinates of the
    layer across z = 0 (atoms at fractional z 0, 0.07, 0.93), answers p3m1 (69): driftwatch had
    passed it on."""
    import spglib
    from driftwatch import symmetry
    atoms = ase.io.read(MORE / "spglib_layer_mos2" / "POSCAR-78")
    cell = atoms.cell.array
    across = atoms.get_positions() + 0.5 * cell[2]        # the layer about z = 0, then wrapped
    frac = np.linalg.solve(cell.T, across.T).T % 1.0
    assert spglib.get_symmetry_layerdataset((cell, frac, atoms.numbers), aperiodic_dir=2,
                                            symprec=1e-3).number == 69      # spglib's own, raw
    for shift in (0.0, 0.5, 1.0, -2.0, 3.5):
        for wrap in (False, True):
            moved = atoms.get_positions() + shift * cell[2]
            if wrap:
                moved = (np.linalg.solve(cell.T, moved.T).T % 1.0) @ cell
            bulk = spglib.get_symmetry_dataset(
                (cell, np.linalg.solve(cell.T, moved.T).T, atoms.numbers), symprec=1e-3)
            assert bulk.number == 187
            got = symmetry.group_at(cell, moved, atoms.numbers, 1e-3, vacuum_axis=2)
            assert (got["group"], got["operations"]) == (78, 12), (shift, wrap)


def test_a_real_layer_written_about_z0_keeps_its_group_when_a_writer_wraps_it(tmp_path):
    """A pw.x relax of an AlSi2 layer written about z = 0 (tests/data/qe/README.md); pw.x finds
    12 symmetry operations (p-6m2's). Read as pw.x wrote it, and with ASE's ``wrap()`` applied to
    every frame, or to the last only (a run continued from a wrapped structure): p-6m2 (78) at
    every step, and no group-lost (the wrapped last frame had read p3m1 (69): a false
    group-lost)."""
    from driftwatch import analyze
    run_dir = Path(__file__).parent / "data" / "qe_trials" / "alsi2_layer_across_z0"
    text = gzip.decompress((run_dir / "pw.out.gz").read_bytes()).decode()
    assert "12 Sym. Ops. (no inversion) found" in text                        # pw.x's own
    pw = tmp_path / "pw.out"
    pw.write_text(text)
    frames = ase.io.read(pw, ":", format="espresso-out")
    assert len(frames) == 5
    for name, wrapped in (("all", range(5)), ("last", [4])):
        images = [a.copy() for a in frames]
        for k in wrapped:
            images[k].wrap()
        path = tmp_path / f"wrapped_{name}.extxyz"
        ase.io.write(path, images, format="extxyz")
        record = analyze(path)
        groups = {(s["group"], s["symbol"]) for s in record["summary"]["verdict"]["structure"]
                  .values() if isinstance(s, dict) and "group" in s}
        assert groups == {(78, "p-6m2")}, (name, record["summary"]["verdict"])
        assert not [f for f in record["flags"] if f["code"].startswith("group-")], name
    assert analyze(run_dir)["summary"]["verdict"]["structure"]["final"]["group"] == 78


def test_a_cif_is_one_structure_with_the_sites_its_operations_make():
    """pymatgen's symmetrised CIF of a 12-atom cell (Pm, 2 operations, 8 sites listed;
    tests/data/public_more/README.md): read as one structure, the sites expanded by the CIF's
    operations as pymatgen's CifParser expands them (12, the same formula), its group at each
    symprec the one pymatgen's SpacegroupAnalyzer gives (spglib underneath); a CIF had been 'unknown
    format'."""
    from pymatgen.core import Structure
    from pymatgen.symmetry.analyzer import SpacegroupAnalyzer
    from driftwatch import symmetry
    from driftwatch.adapters import detect
    path = MORE / "pymatgen_cif" / "H6PbCI3N_mp-977013_symmetrized.cif"
    assert detect(path) == "cif"
    structure = Structure.from_file(path)                                       # pymatgen's
    run = read_run(path)
    assert len(run) == 1 and run.numbers.size == len(structure) == 12
    assert sorted(run.numbers.tolist()) == sorted(s.specie.Z for s in structure)
    assert run.not_relaxation.startswith("a single structure (H6PbCI3N_mp-977013_symmetrized.cif)")
    for symprec in (1e-5, 1e-3, 1e-1):
        ours = symmetry.group_at(run.cells[0], run.positions[0], run.numbers, symprec)
        theirs = SpacegroupAnalyzer(structure, symprec=symprec)
        assert ours["group"] == theirs.get_space_group_number() == 6
        assert ours["operations"] == len(theirs.get_symmetry_operations()) == 2


# ---------------------------------------------------------------- pw.x runs appended to one output
def test_single_points_appended_on_moving_structures_are_said_as_such():
    """Three pw.x runs appended to one output (tests/data/public_more/README.md), each one SCF
    with forces on a structure the run before moved (the '!' energies fall: -2545.19208,
    -2545.19429, -2545.19596 Ry): three frames, no relaxation by pw.x's own steps, said as three
    single points one after another (it had said 'one structure' of a three-frame run)."""
    path = MORE / "qe_appended_scfs.log.gz"
    text = gzip.decompress(path.read_bytes()).decode()
    assert text.count("Program PWSCF") == 3                                     # pw.x's own
    run = read_run(path)
    assert len(run) == 3 and [s["name"] for s in run.stages] == ["run1", "run2", "run3"]
    assert np.abs(np.diff(run.positions, axis=0)).max() > 1e-3                # they moved
    assert run.not_relaxation == ("a single-point calculation (the output: an SCF and no ionic "
                                  "step) 3 times, one after another, each on its own structure: "
                                  "no ionic steps of the code's own")
    assert "one structure, no ionic steps" not in " ".join(run.warnings)


def test_starts_that_stopped_before_a_step_give_no_symmetry_count():
    """phonopy's Si supercell output (tests/data/public_more/README.md): two pw.x starts stop in
    their first SCF ('2 Sym. Ops.' each), the third finishes its SCF ('4 Sym. Ops. (no
    inversion) found'). The run's one frame is the third's: its count is 4 (it had been the first
    start's 2), and the run is a single point."""
    path = MORE / "qe_aborted_starts_then_scf.out.gz"
    text = gzip.decompress(path.read_bytes()).decode()
    counts = re.findall(r"(\d+) Sym\. Ops\.", text)
    assert counts == ["2", "2", "4"] and text.count("End of self-consistent calculation") == 1
    run = read_run(path)
    assert len(run) == 1 and run.code_settings["nsym"] == 4
    assert not [w for w in run.warnings if "symmetry operations in a later run" in w]
    assert run.not_relaxation.startswith("a single-point calculation")
    # the three starts print one structure in their headers (pw.x's own): one job started again,
    # one run, not three of which two failed
    runs, failed = discover([path])
    assert [r.path for r in runs] == [str(path)] and not failed
    assert not [w for w in run.warnings if "do not continue" in w]


# ---------------------------------------------------------------- POSCAR species
def test_a_vasp4_poscar_says_where_its_elements_come_from():
    """spglib's VASP 4 layout test files (no line of element symbols; tests/data/public_more/
    README.md): where ASE's reader takes elements from the title line ('FINDSYM finds R3c' gives
    F, I and N), the run says so; where it finds none ('$cell vectors'), the error says what to
    add instead of ASE's 'Tried files []'."""
    from driftwatch.errors import InputError
    guessed = read_run(MORE / "spglib_vasp4" / "POSCAR-161-1")
    assert sorted(set(guessed.numbers.tolist())) == [7, 9, 53]                 # N, F, I
    assert any("VASP 4 layout (no line of element symbols): the elements F, I, N are ASE's "
               "reading of the title line ('FINDSYM finds R3c')" in w for w in guessed.warnings)
    with pytest.raises(InputError, match="VASP 4 layout .* add the symbols as line 6"):
        read_run(MORE / "spglib_vasp4" / "POSCAR-227")


def test_an_element_given_as_two_atom_types_keeps_them_apart(tmp_path):
    """custodian's genuine Na2FeNiO4 POSCAR (tests/data/public/README.md) with its two Na written as
    two VASP atom types (species line 'Na Na Fe Ni O', counts '1 1 1 1 4'), as an
    antiferromagnetic or DFT+U set-up writes them: spglib given one type per atom type says Cm
    where the merged element says C2/m; driftwatch had merged them (C2/m)."""
    import spglib
    from driftwatch import symmetry
    src = Path(__file__).parent / "data" / "public" / "broken" / "custodian_stopped" / "zpotrf"
    lines = (src / "POSCAR").read_text().splitlines(keepends=True)
    assert lines[5].split() == ["Na", "Fe", "Ni", "O"] and lines[6].split() == ["2", "1", "1", "4"]
    lines[5], lines[6] = "Na Na Fe Ni O\n", "1 1 1 1 4\n"
    poscar = tmp_path / "POSCAR"
    poscar.write_text("".join(lines))
    atoms = ase.io.read(poscar, format="vasp")
    types = np.array([1, 2, 3, 4, 5, 5, 5, 5])
    cell = (atoms.cell.array, atoms.get_scaled_positions(), types)
    assert spglib.get_symmetry_dataset(cell, symprec=1e-3).international == "Cm"   # spglib's
    assert spglib.get_symmetry_dataset((cell[0], cell[1], atoms.numbers),
                                       symprec=1e-3).international == "C2/m"
    run = read_run(poscar)
    assert run.species[:2] == ("Na1", "Na2")
    assert any("the file gives Na as 2 atom types" in w for w in run.warnings)
    got = symmetry.group_at(run.cells[0], run.positions[0], run.symmetry_types, 1e-3)
    assert got["symbol"] == "Cm"


def test_a_vasprun_atominfo_of_two_types_of_one_element_keeps_them_apart(tmp_path):
    """vasprun.xml's atominfo gives each atom its element and atom type (VASP writes the type
    index beside the symbol); two types of Fe on the two sites of a bcc cell are the CsCl-type
    arrangement: spglib given one type per atom type says Pm-3m (221), the merged element Im-3m
    (229). The file here is the tests' own vasprun writer's, its second atom's type set to 2."""
    import spglib
    import vasp_gen
    from driftwatch import symmetry
    cell = np.eye(3) * 2.87
    frac = np.array([[[0, 0, 0], [0.5, 0.5, 0.5]]] * 2, float)
    traj = vasp_gen.Trajectory(["Fe", "Fe"], np.array([cell, cell]), frac, np.array([-16.0, -16.1]),
                               np.zeros((2, 2, 3)), np.zeros((2, 3, 3)))
    path = vasp_gen.write_vasprun(tmp_path / "vasprun.xml", traj)
    text = path.read_text()
    one = "<rc><c>Fe</c><c>   1</c></rc>"
    assert text.count(one) == 2
    path.write_text(text.replace(one, "<rc><c>Fe</c><c>   2</c></rc>").replace(
        "<rc><c>Fe</c><c>   2</c></rc>", one, 1))
    assert spglib.get_symmetry_dataset((cell, frac[0], [1, 2]), symprec=1e-3).number == 221
    assert spglib.get_symmetry_dataset((cell, frac[0], [26, 26]), symprec=1e-3).number == 229
    run = read_run(path)
    assert run.species == ("Fe1", "Fe2")
    assert symmetry.group_at(run.cells[-1], run.positions[-1], run.symmetry_types,
                             1e-3)["group"] == 221
    xdatcar = vasp_gen.write_xdatcar(tmp_path / "XDATCAR", traj)       # and an XDATCAR's blocks
    lines = xdatcar.read_text().splitlines(keepends=True)
    assert lines[5].split() == ["Fe"] and lines[6].split() == ["2"]
    lines[5], lines[6] = "   Fe Fe\n", "   1 1\n"
    xdatcar.write_text("".join(lines))
    assert read_run(xdatcar).species == ("Fe1", "Fe2")


def test_stage_suffixes_of_a_number_and_a_word_are_stages():
    """dfttk keeps a calculation's files as OUTCAR.3static, CONTCAR.3static beside
    INCAR.1relax, INCAR.2relax, INCAR.3static (tests/data/public_more/README.md): one static
    calculation, read from its OUTCAR (NSW = 0, IBRION = -1, as it and INCAR.3static say: a
    single point); the folder had been refused as 'ambiguous: 2 runs' (the OUTCAR and the
    CONTCAR)."""
    d = MORE / "dfttk_suffixed_stage"
    run = read_run(d)
    assert run.source.endswith("OUTCAR.3static.gz") and len(run) == 1
    assert run.code_settings["NSW"] == 0
    assert run.not_relaxation.startswith("a single-point calculation (NSW = 0, IBRION = -1)")


def test_files_of_no_ionic_steps_are_named_for_what_they_are():
    """GPAW's restart files (its newer and older layouts, by their first bytes) and an output of
    Quantum ESPRESSO's dos.x ('Program DOS v.7.3'; tests/data/public_more/README.md) had been an
    'unknown format' beside the list of formats; each is named for what it is."""
    from driftwatch.errors import UnknownFormatError
    d = MORE / "not_runs"
    for name, said in (("Si_pw.first256bytes.gpw2", "a GPAW restart file"),
                       ("H2.first256bytes.gpw", "a GPAW restart file"),
                       ("dos.out", "an output of a Quantum ESPRESSO post-processing program")):
        with pytest.raises(UnknownFormatError, match=f"{said} .*not a file of ionic steps"):
            read_run(d / name)
    assert "Program DOS v.7.3" in (d / "dos.out").read_text()


def test_a_poscars_selective_dynamics_is_said():
    """atomate's genuine Li1Mn8O16 POSCAR (tests/data/public/README.md) holds 2 of its 25 atoms
    with 'F F F' under Selective dynamics (the file's own lines): read alone, the run counts them
    as a trajectory's constraints are counted (code_settings.constrained_atoms, and a warning)."""
    path = Path(__file__).parent / "data" / "public" / "atomate_static_stages" / "inputs" / "POSCAR"
    lines = path.read_text().splitlines()
    assert lines[7] == "Selective dynamics"
    assert sum(ln.split()[3:6] == ["F", "F", "F"] for ln in lines[9:34]) == 2
    run = read_run(path, format="vasp-poscar")
    assert run.code_settings["constrained_atoms"] == 2
    assert any("2 of 25 atoms are held" in w for w in run.warnings)


# ---------------------------------------------------------------- nineteenth session's OUTCARs
def _file_lines(path):
    return gzip.open(path, "rt").read().splitlines()


def test_an_outcar_cell_component_of_100_angstrom_or_more_is_read():
    """surfaxe's genuine Y2Ti2S2O5 (001) slab OUTCAR (VASP 5.4.4): c = 113.517567 A, printed in
    VASP's fixed-width fields as '0.000000000113.517567000'. ASE's reader raises ValueError on it
    (as driftwatch did); the cell now equals the file's numbers and its own 'volume of cell'."""
    path = MORE / "surfaxe_slab_c113" / "OUTCAR.gz"
    lines = _file_lines(path)
    assert any("0.000000000113.517567000" in ln for ln in lines)
    with pytest.raises(ValueError):                                    # ASE 3.29's reader
        ase.io.read(path, format="vasp-out")
    run = read_run(path)
    assert len(run) == 1 and run.unfinished is None
    np.testing.assert_allclose(run.cells[0], np.diag([3.770023, 3.770023, 113.517567]), atol=0)
    volume = float(next(ln for ln in lines if "volume of cell" in ln).split()[-1])   # 1613.43
    assert abs(abs(np.linalg.det(run.cells[0])) - volume) < 0.005


def test_a_vasp6_outcar_of_force_field_steps_reads_every_ionic_step():
    """dpdata's genuine VASP 6.3.0 on-the-fly ML_LMLFF OUTCAR (NSW = 10): every ionic step prints
    a '(ML)' POSITION block and 'free  energy ML TOTEN'; steps 1, 2, 3 and 6 also their
    first-principles block after the SCF. All 10 steps are read (one frame each, the
    first-principles energy where VASP computed one, else the force field's), none 'damaged'.
    driftwatch had read 1 frame; ASE 3.29's reader fails on the file."""
    path = MORE / "dpdata_vasp63_ml" / "OUTCAR.ch4.ml.gz"
    lines = _file_lines(path)
    ml_blocks = [i for i, ln in enumerate(lines) if "POSITION" in ln and "(ML)" in ln]
    assert len(ml_blocks) == 10 and any(ln.split() == ["NSW", "=", "10"] for ln in lines)
    energies, ml = [], []                    # the file's own energy line of each ionic step
    for ln in lines:
        if "free  energy ML TOTEN" in ln:
            energies.append(float(ln.split("=")[1].split()[0]))
            ml.append(True)
        elif "free  energy   TOTEN" in ln:
            energies[-1], ml[-1] = float(ln.split("=")[1].split()[0]), False
    assert len(energies) == 10 and ml.count(True) == 6
    with pytest.raises(ValueError):                                    # ASE 3.29's reader
        ase.io.read(path, ":", format="vasp-out")
    run = read_run(path)
    assert len(run) == 10 and run.steps.tolist() == list(range(10)) and run.unfinished is None
    np.testing.assert_allclose(run.energies, energies, rtol=0, atol=1e-8)
    assert any("6 of 10 ionic steps were computed by VASP's machine-learned force field" in w
               for w in run.warnings)
    first = np.array([ln.split()[:3] for ln in lines[ml_blocks[-1] + 2:ml_blocks[-1] + 7]], float)
    np.testing.assert_allclose(run.positions[-1], first, atol=0)       # the last (ML) step


def test_an_outcar_of_nwrite_0_reads_the_two_structures_it_prints():
    """dpdata's genuine NWRITE = 0 MD (IBRION = 0, NSW = 10): the OUTCAR prints the structure at
    the first and last ionic step only. Those two are read as steps 0 and 9, equal to the
    vasprun.xml beside it (pymatgen's Vasprun), and the 8 unprinted steps are said, not called
    damaged. driftwatch had read 1 frame and called the run 'damaged'."""
    from pymatgen.io.vasp.outputs import Vasprun
    folder = MORE / "dpdata_nwrite0"
    run = read_run(folder / "OUTCAR.gz")
    assert run.steps.tolist() == [0, 9] and run.unfinished is None
    ref = Vasprun(str(folder / "vasprun.xml.gz"), parse_dos=False, parse_eigen=False)
    assert len(ref.ionic_steps) == 10
    for k, i in enumerate((0, 9)):
        st = ref.ionic_steps[i]["structure"]
        np.testing.assert_allclose(run.positions[k], st.cart_coords, atol=1e-5)  # f13.5 printed
        np.testing.assert_allclose(run.cells[k], st.lattice.matrix, atol=1e-6)
        assert abs(run.energies[k] - ref.ionic_steps[i]["e_fr_energy"]) < 1e-6
    assert any("NWRITE = 0" in w and "8 of 10 steps are not seen" in w for w in run.warnings)
    assert len(read_run(folder)) == 10                      # the folder reads the vasprun.xml


def test_an_outcar_of_one_element_as_two_potcar_types_keeps_them_apart():
    """dpdata's genuine VASP 6.3.0 single point with types Ti, O, Ti ('ions per type = 3 2 3'):
    the OUTCAR now tells the two Ti types apart as the vasprun.xml beside it does, so both give
    spglib's group of the structure VASP computed (Pm where merged Ti gives Pmc2_1)."""
    import spglib
    from driftwatch import symmetry
    folder = MORE / "dpdata_two_ti_types"
    out, xml = read_run(folder / "OUTCAR.gz"), read_run(folder / "vasprun.xml.gz")
    assert out.species == xml.species == ("Ti1",) * 3 + ("O",) * 2 + ("Ti2",) * 3
    cell = (out.cells[0], np.linalg.solve(out.cells[0].T, out.positions[0].T).T)
    assert spglib.get_symmetry_dataset((*cell, [1, 1, 1, 2, 2, 3, 3, 3]),
                                       symprec=1e-3).number == 6                    # spglib's
    assert spglib.get_symmetry_dataset((*cell, out.numbers), symprec=1e-3).number == 26
    for run in (out, xml):
        assert symmetry.group_at(run.cells[0], run.positions[0], run.symmetry_types,
                                 1e-3)["group"] == 6


def test_an_outcar_with_vdw_columns_is_read():
    """dpdata's VASP 5.4.4 OUTCAR with a vdW correction ('w/o vdW' energies, a 9-column POSITION
    block): the energy is the file's 'free  energy   TOTEN' and the positions and forces its
    first six columns; ASE 3.29 fails on it ('vdW')."""
    path = MORE / "dpdata_vdw_columns" / "OUTCAR.Ge.vdw.gz"
    lines = _file_lines(path)
    with pytest.raises(ValueError):                                    # ASE 3.29's reader
        ase.io.read(path, format="vasp-out")
    run = read_run(path)
    toten = next(ln for ln in lines if "free  energy   TOTEN" in ln)
    assert run.energies[0] == float(toten.split("=")[1].split()[0]) and "w/o vdW" in toten
    at = next(i for i, ln in enumerate(lines) if ln.startswith(" POSITION"))
    rows = np.array([ln.split()[:6] for ln in lines[at + 2:at + 2 + len(run.numbers)]], float)
    np.testing.assert_allclose(run.positions[0], rows[:, :3], atol=0)
    np.testing.assert_array_equal(run.forces[0], rows[:, 3:])


def test_a_castep_optimisation_its_code_says_converged_is_not_asked_whether_it_blew_up():
    """nomad's CASTEP 16.1 Si2 optimisation (Apache-2.0): its energy ends 3.4 eV (1.7 eV/atom)
    above its first, under cell constraints and a large starting pressure, and CASTEP says
    'Geometry optimization completed successfully'. The run had been asked whether it blew up; the
    code's own word is now recorded and the question not asked."""
    path = MORE / "castep_nomad_si2_opt" / "Si2_opt.castep.gz"
    text = gzip.open(path, "rt").read()
    assert "Geometry optimization completed successfully" in text                  # CASTEP's
    rec = driftwatch.analyze(path)
    e = [f["energy"] for f in rec["frames"]]
    assert (e[-1] - min(e[:-1])) / rec["run"]["n_atoms"] > 1.0
    assert rec["run"]["code_settings"]["converged"] == (
        "CASTEP: 'Geometry optimization completed successfully'")
    assert not any("blew up" in w for w in rec["run"]["warnings"])


def test_a_fixed_cell_relaxation_whose_energy_keeps_rising_is_said_to_have_diverged():
    """The rule (common practice: in a fixed cell a relaxation only lowers its energy). The bundled
    L09 (a real EMT relaxation of atoms in a fixed square cell) is quiet; the same frames with
    energies rising at each of the last 4 steps by 0.1 eV/atom in all, as a run whose forces went
    wrong (a field trial's GPAW slab rose 23.5 eV over 9 steps at 0.37 eV/atom, below the 1 eV/atom
    a single jump needs), are said to have diverged; a variable-cell run's rising energy is not
    (under a target pressure it is the enthalpy that falls)."""
    import dataclasses
    from driftwatch import track
    run = read_run(Path(__file__).parent.parent / "example_runs" / "L09_emt_fixed_square.traj")
    assert track._energy_jumps(run) == []
    e = run.energies.copy()
    e[-5:] = e[-5] + np.linspace(0.0, 0.1 * run.natoms, 5)
    said = track._energy_jumps(dataclasses.replace(run, energies=e))
    assert len(said) == 1 and said[0].startswith("the energy rose at each of the last 4 steps")
    assert "a relaxation that diverged" in said[0]
    cells = run.cells.copy()
    cells[-1] *= 1.01
    assert track._energy_jumps(dataclasses.replace(run, energies=e, cells=cells)) == []


def test_a_relaxation_read_as_one_frame_is_marked_in_the_audit_table(tmp_path):
    """nomad's CASTEP damped-MD optimisation of rutile TiO2 (Apache-2.0): the file lists 23
    iterations; ASE's reader (called directly) returns one structure, the last. Nothing is
    compared, so its 'kept' had stood unmarked in the audit table beside real verdicts; it is now
    marked '=' and footnoted, and its warning says how many steps were not seen."""
    src = MORE / "castep_nomad_tio2_dmd" / "TiO2-geom.castep.gz"
    text = gzip.open(src, "rt").read()
    assert len(re.findall(r"DMD: finished iteration", text)) == 23                  # CASTEP's
    assert len(ase.io.read(gzip.open(src, "rt"), ":", format="castep-castep")) == 1  # ASE's
    camp = tmp_path / "camp"
    camp.mkdir()
    (camp / "TiO2-geom.castep").write_text(text)
    r = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                        str(tmp_path / "out"), "--progress", "off"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    row = next(ln for ln in r.stdout.splitlines() if "TiO2-geom.castep" in ln)
    assert " kept= " in row
    assert "= one frame read (column n_frames; its warnings say why)" in r.stdout
    index = (tmp_path / "out" / "report" / "index.html").read_text(encoding="utf-8")
    assert "one frame: nothing compared" in index                 # the same fact, one name


def test_a_castep_file_whose_appended_run_is_cut_says_asees_reason():
    """castep_outputs' test.castep (BSD-3-Clause): two CASTEP 24.1 runs in one file, the second cut
    before its 'Finalisation time'. ASE given the path raises 'No regular end found'; driftwatch,
    handing ASE the text, had failed with ASE's own AttributeError ('_io.StringIO' object has no
    attribute 'name'), which told the user nothing. ASE's reason is now the one line."""
    from ase.io import ParseError
    src = MORE / "castep_second_run_cut" / "test.castep.gz"
    text = gzip.open(src, "rt").read()
    starts = [i for i in range(len(text)) if text.startswith("Welcome to Academic Release CASTEP",
                                                             i)]
    assert len(starts) == 2 and "Finalisation time" not in text[starts[1]:]      # CASTEP's
    with pytest.raises(InputError) as e:
        read_run(src)
    msg = str(e.value)
    assert "\n" not in msg and "No regular end found" in msg and "AttributeError" not in msg
    with pytest.raises(ParseError, match="No regular end found"):                       # ASE's
        ase.io.read(gzip.open(src, "rt"), ":", format="castep-castep")


def test_the_blow_up_rule_counts_atoms_held_in_part_as_moving(tmp_path):
    """A real ASE EMT relaxation of a 4-atom Cu cell with FixAtoms on one atom and FixCartesian
    (z held) on two: ASE's own constraints say one atom is fixed and three move. A regression
    review found atoms held in one direction counted as fixed, dividing a rise by the wrong number
    of atoms; the rule now divides by the atoms not held in every direction
    (code_settings.fixed_atoms). The rule's trigger is set here by raising the last energies."""
    import dataclasses
    from ase.build import bulk
    from ase.calculators.emt import EMT
    from ase.constraints import FixAtoms, FixCartesian
    from ase.optimize import BFGS
    from driftwatch import track
    atoms = bulk("Cu", "fcc", a=3.6, cubic=True)
    atoms.rattle(0.05, seed=4)
    atoms.set_constraint([FixAtoms([0]), FixCartesian([1, 2], mask=(False, False, True))])
    atoms.calc = EMT()
    BFGS(atoms, trajectory=str(tmp_path / "relax.traj"), logfile=None).run(fmax=1e-3, steps=8)
    frames = ase.io.read(tmp_path / "relax.traj", ":")
    forces = frames[-1].get_forces()
    assert np.all(forces[0] == 0) and np.all(forces[1:3, 2] == 0)              # ASE's own
    run = read_run(tmp_path / "relax.traj")
    assert run.code_settings["constrained_atoms"] == 3 and run.code_settings["fixed_atoms"] == 1
    e = run.energies.copy()
    e[-4:] = e[-4] + np.array([0.0, 0.1, 0.2, 0.3])
    said = track._energy_jumps(dataclasses.replace(run, energies=e))
    assert said and "(0.1 eV/moving atom)" in said[0]


def test_an_unfinished_run_read_as_one_frame_keeps_both_marks_explained(tmp_path):
    """pymatgen's genuine XDATCAR whose line 17 runs two numbers together: one frame is read and
    the run is unfinished ('unreadable after step 0'), marked '*='. A regression review found the
    '*' footnote dropped (it looked for rows ending in '*') and the summary counting 'unreadable
    after step 0' as its own kind; both now read right."""
    src = MORE / "xdatcar_fused" / "XDATCAR.gz"
    camp = tmp_path / "camp" / "job"
    camp.mkdir(parents=True)
    (camp / "XDATCAR.gz").write_bytes(src.read_bytes())
    r = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp.parent), "-o",
                        str(tmp_path / "out"), "--progress", "off"], capture_output=True, text=True)
    row = next(ln for ln in r.stdout.splitlines() if "job" in ln)
    assert " kept*= " in row, r.stdout
    assert "* unfinished: cut short, damaged or unreadable after a step" in r.stdout
    assert "= one frame read" in r.stdout
    assert "(unreadable 1; column unfinished of campaign.csv)" in r.stdout
