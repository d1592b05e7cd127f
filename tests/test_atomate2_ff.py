"""Relaxations with a pretrained ML potential (CHGNet) run through atomate2's force-field jobs
under jobflow, files as they left them (tests/data/atomate2_ff, README there): the task
documents in every form a user saves them, a jobflow store with its blob store, a pymatgen
Trajectory, atomate2's final-structure file. Checked against the documents' own fields read
with pymatgen, ASE's readers of the trajectories written beside them, and spglib."""
from __future__ import annotations

import csv
import gzip
import json
from pathlib import Path

import ase.io
import numpy as np
import pytest
import spglib
from pymatgen.core import Structure
from pymatgen.core.trajectory import Trajectory

from driftwatch.adapters import read_run
from driftwatch.adapters.pymatgen_json import task_doc_names
from driftwatch.adapters.registry import detect
from driftwatch.campaign import audit, discover
from driftwatch.config import load as load_config
from driftwatch.errors import NoIonicStepError, UnknownFormatError
from driftwatch.track import record_from_run

DATA = Path(__file__).parent / "data" / "atomate2_ff"
FORMS = ("task_doc.json", "task_doc_model_dump.json", "task_doc.json.gz")


def _json(path: Path):
    opener = gzip.open if path.suffix == ".gz" else open
    with opener(path, "rt") as fh:
        return json.load(fh)


def _steps(doc: dict) -> list[Structure]:
    """The document's ionic steps as pymatgen builds them (pymatgen's own from_dict)."""
    return [Structure.from_dict(s["mol_or_struct"]) for s in doc["output"]["ionic_steps"]]


def _same_frames(run, structures, energies, wrapped=False):
    """Equal frames; ``wrapped``: pymatgen put the atoms back into the cell (equal modulo the
    lattice, as the same structure)."""
    assert len(run) == len(structures)
    for k, st in enumerate(structures):
        np.testing.assert_allclose(run.cells[k], st.lattice.matrix, atol=1e-10)
        if wrapped:
            d = np.linalg.solve(st.lattice.matrix.T, (run.positions[k] - st.cart_coords).T).T
            np.testing.assert_allclose(d, np.rint(d), atol=1e-9)
        else:
            np.testing.assert_allclose(run.positions[k], st.cart_coords, atol=1e-9)
        assert list(run.numbers) == list(st.atomic_numbers)
    np.testing.assert_allclose(run.energies, energies, atol=1e-9)


@pytest.mark.parametrize("form", FORMS)
def test_a_force_field_task_document_reads_its_ionic_steps_in_every_saved_form(form):
    """atomate2's ForceFieldTaskDocument has no calcs_reversed: its steps are output.ionic_steps
    (each a Structure under mol_or_struct). Every saved form (monty's dumpfn, jsanitize of
    model_dump, gzipped) was refused before (a dumpfn'd one as a malformed Structure list).
    Frames equal pymatgen's build of the document's own steps, and ASE's read of the relax.traj
    atomate2 wrote for the same job: cells, positions modulo the lattice, energies, forces, and
    the stress (the document's kBar with VASP's sign, against ASE's get_stress in eV/Å^3)."""
    folder = DATA / "ff_docs_c01"
    doc = _json(folder / "task_doc.json.gz")
    assert detect(folder / form) == "task-doc"
    run = read_run(folder / form)
    _same_frames(run, _steps(doc), [s["energy"] for s in doc["output"]["ionic_steps"]])
    traj = ase.io.read(folder / "relax.traj", index=":")                              # ASE
    assert len(traj) == len(run) == doc["output"]["n_steps"] == 9
    for k, atoms in enumerate(traj):
        np.testing.assert_allclose(run.cells[k], atoms.cell[:], atol=1e-6)
        d = np.linalg.solve(atoms.cell[:].T, (run.positions[k] - atoms.positions).T).T
        np.testing.assert_allclose(d, np.rint(d), atol=1e-5)        # equal modulo the lattice
        assert run.energies[k] == pytest.approx(atoms.get_potential_energy(), abs=1e-6)
        np.testing.assert_allclose(run.forces[k], atoms.get_forces(), atol=1e-5)
        np.testing.assert_allclose(run.stress[k], atoms.get_stress(), atol=1e-8)
    assert run.code_settings["code"] == "atomate2"
    assert run.code_settings["calculator"] == doc["forcefield_name"] == "MLFF.CHGNet"
    assert run.unfinished is None and run.not_relaxation is None
    assert run.title == "Cu"


def test_the_documents_own_state_says_a_run_stopped_at_its_step_limit():
    """A relax job with steps=4 whose optimiser ran out of steps: the document says state
    'failed' (atomate2: the ASE optimiser's run returned False) and holds steps + 2 frames (the
    observer's first call, four steps, the final call). Its relax.traj records no optimiser
    settings, so only the document tells; its is_force_converged is true (a one-atom cell has no
    atomic force) although the cell was still moving: the state is what is read."""
    folder = DATA / "ff_steplimit_c09"
    doc = _json(folder / "task_doc.json.gz")
    assert doc["state"] == "failed" and doc["is_force_converged"] is True
    assert doc["input"]["steps"] == 4 and doc["output"]["n_steps"] == 6
    run = read_run(folder / "task_doc.json.gz")
    assert run.unfinished == ("stopped at its step limit (atomate2's task document: state "
                              "'failed', the ASE optimiser's steps = 4)")
    assert read_run(folder / "relax.traj").unfinished is None      # the file cannot tell
    done = read_run(DATA / "ff_docs_c01" / "task_doc.json.gz")
    assert _json(DATA / "ff_docs_c01" / "task_doc.json.gz")["state"] == "successful"
    assert done.unfinished is None


def test_a_jobflow_store_reads_each_jobs_document_with_its_steps_from_the_blob_store():
    """jobflow's JobStore on maggma JSONStores: docs.json holds one entry per job (the task
    document under 'output'; a batch job's a list of them) whose ionic steps are blob references
    into the 'data' store beside it (data.json). Each document is a run named by its job; its
    frames equal the same document saved whole. The blob store alone is no run and says so."""
    store = DATA / "ff_store"
    names = task_doc_names(store / "docs.json.gz")
    entries = _json(store / "docs.json.gz")
    jobs = [e["name"] for e in entries if isinstance(e["output"], dict)]
    assert names[:len(jobs)] == jobs
    assert names[len(jobs):] == ["Force field relax-1", "Force field relax-2",
                                 "Force field relax-3"]          # the batch job's three
    assert all(e["output"]["output"]["ionic_steps"]["store"] == "data"
               for e in entries if isinstance(e["output"], dict))
    run = read_run(f"{store / 'docs.json.gz'}::c01_cu_fcc_tetragonal")
    doc = _json(DATA / "ff_docs_c01" / "task_doc.json.gz")
    _same_frames(run, _steps(doc), [s["energy"] for s in doc["output"]["ionic_steps"]])
    assert ("file", str(store / "data.json.gz")) in {i[:2] for i in run.inputs}   # cache key
    with pytest.raises(UnknownFormatError, match="a jobflow store of large job outputs"):
        detect(store / "data.json.gz")
    batch = _json(DATA / "ff_batch" / "batch_docs.json.gz")
    mine = read_run(f"{store / 'docs.json.gz'}::Force field relax-2")
    _same_frames(mine, _steps(batch[1]), [s["energy"] for s in batch[1]["output"]["ionic_steps"]])


def test_a_static_a_fixed_cell_and_fix_symmetry_are_said_from_the_document():
    """The document's input: a static (ForceFieldStaticMaker, steps = 1) is a single point;
    relax_cell False keeps the cell (the frames' cells equal: a fixed-cell record); fix_symmetry
    True holds the symmetry (held-by-code, at the document's symprec)."""
    cfg = load_config(None)
    store = DATA / "ff_store" / "docs.json.gz"
    static = read_run(f"{store}::c08_cu_static")
    assert len(static) == 1 and static.not_relaxation == (
        "a single-point calculation (atomate2: input.steps = 1): one structure, no ionic steps")
    fixed = read_run(DATA / "ff_traj_checks" / "c03_al_fcc_fixedcell" / "task_doc.json.gz")
    assert fixed.code_settings["relax_cell"] is False
    assert np.ptp(fixed.cells, axis=0).max() == 0
    assert record_from_run(fixed, cfg)["run"]["fixed_cell"] is True
    held = read_run(DATA / "ff_traj_checks" / "c10_cu_fcc_fixsym" / "task_doc.json.gz")
    assert held.code_settings["fix_symmetry"] == {"operations": None, "symprec": 0.01}
    rec = record_from_run(held, cfg)
    (flag,) = [f for f in rec["flags"] if f["code"] == "held-by-code"]
    assert "FixSymmetry constraint held the symmetry operations of the first structure (its " \
           "symprec 0.01 Å)" in flag["message"]
    cell = (held.cells[-1], held.positions[-1] @ np.linalg.inv(held.cells[-1]), held.numbers)
    assert spglib.get_symmetry_dataset(cell, symprec=1e-3).number == 139 == \
        rec["summary"]["verdict"]["structure"]["final"]["group"]                      # spglib


def test_atomate2s_final_structures_of_several_jobs_are_no_relaxation():
    """Jobs run with jobflow's default (no job folders) append their final structures to one
    final_atoms_object.xyz: three separate Cu relaxations were read as one three-step relaxation
    'kept'. It is a skipped run now. ASE reads the three frames; each equals the last ionic
    step of its own job's document (the batch job)."""
    frames = ase.io.read(DATA / "ff_batch" / "final_atoms_object.xyz", index=":")     # ASE
    docs = _json(DATA / "ff_batch" / "batch_docs.json.gz")
    assert len(frames) == len(docs) == 3
    for atoms, doc in zip(frames, docs):
        last = _steps(doc)[-1]
        np.testing.assert_allclose(atoms.cell[:], last.lattice.matrix, atol=1e-6)
    for case in ("ff_batch", "ff_samecomp_xyz"):
        with pytest.raises(NoIonicStepError, match="atomate2's final_atoms_object.xyz of several"):
            read_run(DATA / case / "final_atoms_object.xyz")
    one = read_run(DATA / "ff_docs_c01" / "final_atoms_object.xyz")     # one job's: a structure
    assert len(one) == 1 and one.not_relaxation.startswith("a single structure")


def test_a_pymatgen_trajectory_is_read():
    """atomate2's traj_file_fmt='pmg' writes a pymatgen Trajectory (monty's dumpfn): it was
    left out of an audit unsaid. Its frames equal pymatgen's own reading of the file (loadfn ->
    Trajectory, one Structure per frame) and the job's document."""
    from monty.serialization import loadfn
    path = DATA / "ff_pmg_traj_c05" / "trajectory.json.gz"
    assert detect(path) == "pymatgen-trajectory"
    traj = loadfn(path)                                                        # pymatgen
    assert isinstance(traj, Trajectory)
    run = read_run(path)
    structures = [traj.get_structure(i) for i in range(len(traj))]
    _same_frames(run, structures, [p["energy"] for p in traj.frame_properties], wrapped=True)
    doc = _json(DATA / "ff_pmg_traj_c05" / "task_doc.json.gz")
    np.testing.assert_allclose(run.energies, [s["energy"] for s in doc["output"]["ionic_steps"]],
                               atol=1e-6)


def test_a_job_folder_with_its_trajectory_and_final_structure_is_one_run(tmp_path):
    """A job folder as atomate2 leaves it with traj_file set: relax.traj and the one-frame
    final_atoms_object.xyz of its last frame are one run, read from the trajectory; a final
    structure of another relaxation beside it keeps both runs."""
    job = tmp_path / "job_1"
    job.mkdir()
    for n in ("relax.traj", "final_atoms_object.xyz"):
        (job / n).write_bytes((DATA / "ff_docs_c01" / n).read_bytes())
    runs, failed = discover([job])
    assert [r.path for r in runs] == [str(job)] and not failed
    run = read_run(job)
    assert Path(run.source).name == "relax.traj"
    (note,) = [w for w in run.warnings
               if "final_atoms_object.xyz beside it is atomate2's copy" in w]
    assert "records no optimiser settings" in note          # atomate2's trajectory: none (ASE)
    assert not ase.io.Trajectory(str(job / "relax.traj")).description
    other = tmp_path / "job_2"
    other.mkdir()
    (other / "relax.traj").write_bytes((DATA / "ff_steplimit_c09" / "relax.traj").read_bytes())
    (other / "final_atoms_object.xyz").write_bytes(
        (DATA / "ff_docs_c01" / "final_atoms_object.xyz").read_bytes())
    runs, _ = discover([other])
    assert sorted(Path(r.path).name for r in runs) == ["final_atoms_object.xyz", "relax.traj"]


def test_the_whole_campaign_audits_with_no_failure(tmp_path):
    """Every file the jobs and the user left: 41 of 72 runs failed before. Now none fails; the
    two final-structure files of several jobs are skipped with their reason; the step-limited
    job's documents are unfinished; the three saved forms of one document are named as copies."""
    out = tmp_path / "out"
    audit([str(DATA)], str(out), progress="off", quiet=True, report=False)
    with open(out / "campaign.csv", newline="") as fh:
        by_id = {r["run"]: r for r in csv.DictReader(fh)}
    assert not [i for i, r in by_id.items() if r["verdict"] == "failed"]
    assert sorted(i for i, r in by_id.items() if r["verdict"] == "skipped") == [
        "atomate2_ff/ff_batch/final_atoms_object.xyz",
        "atomate2_ff/ff_samecomp_xyz/final_atoms_object.xyz"]
    for form in FORMS:
        assert by_id[f"atomate2_ff/ff_steplimit_c09/{form}"]["unfinished"].startswith(
            "stopped at its step limit")
    copies = json.loads((out / "campaign.json").read_text())["copies"]
    assert any({f"atomate2_ff/ff_docs_c01/{f}" for f in FORMS} <= set(group) for group in copies)


def test_an_ase_json_database_whose_rows_name_a_force_field_stays_a_database():
    """An ASE JSON database (ASE 3.29's own writer) whose rows carry a key-value pair named as
    atomate2 names its force field: the wider task-document detection took it for a task
    document, which then failed. It is ASE's database, read as ASE reads it."""
    from ase.db import connect
    path = DATA / "ase_json_db_ffkey" / "ffrows.json"
    rows = list(connect(path).select())                                               # ASE
    assert rows and all(r.key_value_pairs.get("forcefield_name") == "EMT" for r in rows)
    assert detect(path) == "ase-json-db"
    run = read_run(path)
    np.testing.assert_allclose(run.positions, [r.toatoms().positions for r in rows], atol=1e-12)
