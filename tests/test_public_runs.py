"""Real campaigns as they lie on disk: the code table, stages, compressed folders, task documents,
other codes through ASE, shared discovery, and the cache keyed on the files the readers used.

External references (named beside each check):
* genuine outputs from public repositories in tests/data/public/ (sources and licences in its
  README.md): a custodian double relaxation with VASP 5.2.11 OUTCARs (pymatgen-db), relax1/relax2
  stage folders (pymatgen-db), task documents (pymatgen-db, emmet), FHI-aims / CASTEP / GPAW outputs
  from ASE's test data, a real LAMMPS relaxation made here with Debian's lammps, pw.x 4.1.2 and
  7.2 outputs (pwtools; Quantum ESPRESSO's own test-suite), and, in broken/, pw.x runs that
  stopped early (aiida-quantumespresso) and a damaged vasprun.xml (aiida-vasp), a VASP finite-
  difference run (aiida-vasp), a VASP NpT molecular dynamics run and a hybrid relaxation whose
  SCF never converged (custodian), OUTCAR and vasprun.xml pairs with steps at NELM and a
  relaxation listing NELM twice (aiida-vasp), an extended XYZ slab relaxation with fixed atoms
  (FAIR-Chem);
* pw.x's own print-out in its output (cell volumes, total energies), where ASE cannot read it;
* pymatgen's Vasprun and Structure, ASE's own readers (ase.io.read) as reference readers;
* real pw.x outputs made here (tests/data/qe, pw.x 6.7 from Debian).
"""
from __future__ import annotations

import gzip
import json
import re
import shutil
import subprocess
import sys
import warnings
from collections import Counter
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest

import ase.io

from driftwatch.adapters import read_run
from driftwatch.adapters import registry
from driftwatch.adapters.registry import Code, FolderPick, register_code, symmetry_setting
from driftwatch.campaign import audit, discover
from driftwatch.errors import InputError

REPO = Path(__file__).resolve().parent.parent
PUB = REPO / "tests" / "data" / "public"
QE = REPO / "tests" / "data" / "qe"
DOUBLE = PUB / "custodian_double_relax"


def _vasprun(path):
    from pymatgen.io.vasp.outputs import Vasprun
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return Vasprun(str(path), parse_dos=False, parse_eigen=False, parse_potcar_file=False)


def _same_frames(run, structures, atol=1e-8):
    assert len(run) == len(structures)
    np.testing.assert_allclose(run.cells, [s.lattice.matrix for s in structures], atol=atol, rtol=0)
    np.testing.assert_allclose(run.positions, [s.cart_coords for s in structures], atol=atol,
                               rtol=0)
    assert run.numbers.tolist() == list(structures[0].atomic_numbers)


# ---------------------------------------------------------------- stages
def test_custodian_double_relaxation_reads_as_one_trajectory_with_stages():
    """pymatgen-db's Li2O_aflow folder (custodian .relax1/.relax2, all gzipped, a header-only VASP 4
    XDATCAR.gz, an empty VASP.out): both stages, in order, each equal to pymatgen's Vasprun."""
    run = read_run(DOUBLE)
    v1, v2 = _vasprun(DOUBLE / "vasprun.xml.relax1.gz"), _vasprun(DOUBLE / "vasprun.xml.relax2.gz")
    _same_frames(run, v1.structures + v2.structures)                         # pymatgen Vasprun
    np.testing.assert_allclose(run.energies, [s["e_fr_energy"] for s in v1.ionic_steps + v2.ionic_steps])
    assert [(s["name"], s["first_frame"], s["n_frames"]) for s in run.stages] == \
        [("relax1", 0, 3), ("relax2", 3, 3)]
    assert run.steps.tolist() == [0, 1, 2, 3, 4, 5] and run.stages[1]["step_offset"] == 3
    assert run.source.endswith("vasprun.xml.relax2.gz") and run.run_dir == str(DOUBLE)
    assert any("XDATCAR.gz not read" in w for w in run.warnings)
    # settings as printed: ISYM = 2 in vasprun.xml; 48 operations in OUTCAR.relax2.gz
    # ("MAGSYM returns: Found 48 space group operations", VASP 5.2.11)
    s = run.code_settings
    assert s["ISYM"] == 2 and s["SYMPREC"] == pytest.approx(1e-5) and s["nsym"] == 48
    one = read_run(f"{DOUBLE}@relax1")                                       # one stage on request
    _same_frames(one, v1.structures)
    assert one.stages == () and read_run(f"{DOUBLE}@2").source.endswith("vasprun.xml.relax2.gz")
    with pytest.raises(InputError, match="no stage 'relax7'"):
        read_run(f"{DOUBLE}@relax7")


def test_vasp_52_outcars_equal_vasprun_and_ase():
    """VASP 5.2.11 OUTCARs (genuine, pymatgen-db): the streaming reader gives ASE's frames exactly
    and vasprun.xml's frames within the two files' printed precision."""
    for stage in ("relax1", "relax2"):
        out = read_run(DOUBLE / f"OUTCAR.{stage}.gz")
        xml = read_run(DOUBLE / f"vasprun.xml.{stage}.gz")
        with gzip.open(DOUBLE / f"OUTCAR.{stage}.gz", "rt") as fh:
            ref = ase.io.read(fh, ":", format="vasp-out")                    # ASE
        np.testing.assert_array_equal(out.positions, [a.positions for a in ref])
        tol = out.position_precision + xml.position_precision
        assert np.abs(out.positions - xml.positions).max() <= tol
        np.testing.assert_allclose(out.energies, xml.energies, atol=1e-6)   # OUTCAR prints 6 decimals
        assert out.code_settings["nsym"] == 48 and out.code_settings["ISYM"] == 2


def test_stage_folders_are_one_run():
    """pymatgen-db's success_mp_aflow: relax1/ and relax2/ subfolders (VASP 5.2.11, 60 + 5 steps)."""
    run = read_run(PUB / "stage_folders")
    v1 = _vasprun(PUB / "stage_folders" / "relax1" / "vasprun.xml.gz")
    v2 = _vasprun(PUB / "stage_folders" / "relax2" / "vasprun.xml.gz")
    _same_frames(run, v1.structures + v2.structures)                         # pymatgen Vasprun
    assert [(s["name"], s["n_frames"]) for s in run.stages] == [("relax1", 60), ("relax2", 5)]
    runs, failed = discover([PUB / "stage_folders"])
    assert [r.kind for r in runs] == ["folder"] and not failed               # not three runs


def test_a_campaign_of_numbered_run_folders_is_not_one_staged_run(tmp_path):
    """run-0001/ run-0002/ ... (how campaign scripts name their runs) are separate runs; relax1/
    relax2/ are stages only when numbered 1, 2, ... (at most 20)."""
    camp = tmp_path / "camp"
    for i in range(3):
        shutil.copytree(PUB / "stage_folders" / "relax1", camp / f"run-{i:04d}")
    runs, failed = discover([camp])
    assert [r.id for r in runs] == [f"camp/run-{i:04d}" for i in range(3)] and not failed
    gap = tmp_path / "gap"
    for n in (1, 3):                        # relax1 and relax3: not a sequence of stages
        shutil.copytree(PUB / "stage_folders" / "relax1", gap / f"relax{n}")
    runs, _ = discover([gap])
    assert sorted(r.id for r in runs) == ["gap/relax1", "gap/relax3"]


def test_compressed_and_plain_variants_pick_the_complete_one(tmp_path):
    """A plain copy cut in half beside the complete .gz: the complete one is read."""
    d = tmp_path / "r"
    d.mkdir()
    raw = gzip.decompress((DOUBLE / "vasprun.xml.relax2.gz").read_bytes())
    (d / "vasprun.xml.gz").write_bytes(gzip.compress(raw))
    (d / "vasprun.xml").write_bytes(raw[: len(raw) // 2])
    (d / "INCAR.gz").write_bytes(gzip.compress(b"ISYM = 0\nSYMPREC = 1E-4\n"))
    run = read_run(d)
    assert run.source.endswith("vasprun.xml.gz") and len(run) == 3
    assert any("INCAR.gz sets ISYM = 0" in w for w in run.warnings)          # compressed INCAR read


# ---------------------------------------------------------------- task documents
def test_task_documents_read_with_pymatgen_structures():
    """Task documents (pymatgen-db GaLa: two calculations; emmet mp-2766060: one): frames equal to
    pymatgen's Structure.from_dict of each ionic step, oldest calculation first."""
    from pymatgen.core import Structure
    for name, stages in (("GaLa.task.json.gz", [9, 1]), ("task_doc_mp-2766060.json.gz", [])):
        path = PUB / "task_docs" / name
        doc = json.loads(gzip.decompress(path.read_bytes()))
        steps = [st for c in reversed(doc["calcs_reversed"]) for st in c["output"]["ionic_steps"]]
        run = read_run(path)
        assert run.format == "task-doc"
        _same_frames(run, [Structure.from_dict(st["structure"]) for st in steps])   # pymatgen
        np.testing.assert_allclose(run.energies, [st["e_fr_energy"] for st in steps])
        assert [s["n_frames"] for s in run.stages] == stages
    s = read_run(PUB / "task_docs" / "task_doc_mp-2766060.json.gz").code_settings
    assert s["ISYM"] == 2 and s["code"] == "vasp"                            # input.parameters


def test_a_list_of_task_documents_is_one_run_per_document(tmp_path):
    """A JSON list of task documents (a database export) made of the two genuine documents above:
    an audit finds one run per document, named FILE::task_id, each with the frames of that document
    read alone (themselves equal to pymatgen's, above); the file read whole is a one-line error
    listing the names, and without usable task_ids the documents are named by position."""
    docs = [json.loads(gzip.decompress((PUB / "task_docs" / n).read_bytes()))
            for n in ("GaLa.task.json.gz", "task_doc_mp-2766060.json.gz")]
    export = tmp_path / "campaign" / "tasks.json"
    export.parent.mkdir()
    export.write_text(json.dumps(docs))
    ids = [d["task_id"] for d in docs]
    assert registry.structures(export) == ids
    runs, failed = discover([export.parent])
    assert not failed and sorted(r.id for r in runs) == sorted(f"campaign/tasks.json::{t}" for t in ids)
    for t, name in zip(ids, ("GaLa.task.json.gz", "task_doc_mp-2766060.json.gz")):
        one, alone = read_run(f"{export}::{t}"), read_run(PUB / "task_docs" / name)
        assert one.format == "task-doc" and one.source.endswith(f"::{t}")
        assert one.structure_key == {"key": "task_id", "value": t}
        np.testing.assert_array_equal(one.positions, alone.positions)
        np.testing.assert_array_equal(one.cells, alone.cells)
        np.testing.assert_array_equal(one.energies, alone.energies)
    with pytest.raises(InputError) as e:
        read_run(export)
    msg = str(e.value)
    assert "\n" not in msg and msg.startswith(str(export)) and "holds 2 task documents" in msg
    assert f"'{export}::{ids[0]}'" in msg
    with pytest.raises(InputError, match="no task document named 'mp-0'"):
        read_run(f"{export}::mp-0")
    for d in docs:
        del d["task_id"]
    export.write_text(json.dumps(docs))
    assert registry.structures(export) == ["doc-1", "doc-2"]
    second = read_run(f"{export}::doc-2")
    np.testing.assert_array_equal(second.positions, alone.positions)
    assert second.structure_key == {"key": "position", "value": "doc-2"}
    export.write_text(json.dumps(docs[:1]))                      # a list of one: that document
    assert registry.structures(export) == [] and len(read_run(export)) == 10
    export.write_text(json.dumps([docs[0], 3]))
    with pytest.raises(InputError, match="item 2 of the list is not a task document"):
        read_run(export)


def test_a_task_document_without_ionic_steps_says_what_it_is(tmp_path):
    """Task documents with calculations but no ``output.ionic_steps`` (seen in emmet's test files:
    molecule documents of a quantum-chemistry workflow; a static or response-function document
    looks the same): one line naming the file, the number of calculations and what the document
    probably is. The molecule document here is trimmed to the keys the reader looks at."""
    mol = {"calcs_reversed": [{"initial_molecule": {"sites": []}, "output": {"final_energy": -1.0}}]}
    static = {"calcs_reversed": [{"output": {"energy": -1.0}}, {"output": {"ionic_steps": []}}]}
    for name, doc, kind in (("mol_task.json", mol, "a molecule's task document"),
                            ("static_task.json", static, "a static, response-function")):
        path = tmp_path / name
        path.write_text(json.dumps(doc))
        with pytest.raises(InputError) as e:
            read_run(path)
        msg = str(e.value)
        assert "\n" not in msg and msg.startswith(str(path)) and kind in msg
        n = len(doc["calcs_reversed"])
        assert f"none of its {n} calculations holds output.ionic_steps" in msg


# ---------------------------------------------------------------- other codes through ASE
@pytest.mark.parametrize("name,fmt,ase_format", [
    ("ase_generic/aims_relax.out.gz", "aims-out", "aims-output"),
    ("ase_generic/si8_md.castep.gz", "castep", "castep-castep"),
    ("ase_generic/gpaw_h2.txt", "gpaw-out", "gpaw-out"),
    ("lammps_relax/relax.dump.gz", "lammps-dump", "lammps-dump-text"),
])
def test_other_codes_through_ase(name, fmt, ase_format, tmp_path):
    """Genuine FHI-aims, CASTEP and GPAW outputs (ASE's test data) and a real LAMMPS dump made here:
    detected by content, frames equal to ASE's own reader of that format."""
    path = PUB / name
    run = read_run(path)
    assert run.format == fmt
    plain = tmp_path / "plain"
    plain.write_bytes(gzip.decompress(path.read_bytes()) if name.endswith(".gz")
                      else path.read_bytes())
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = ase.io.read(plain, ":", format=ase_format)                       # ASE
    assert len(run) == len(ref) > 0
    np.testing.assert_allclose(run.positions, [a.positions for a in ref], atol=0, rtol=0)
    np.testing.assert_allclose(run.cells, [a.cell.array for a in ref], atol=0, rtol=0)
    if fmt == "lammps-dump":                 # the type map: 1 = Cu, 2 = Ni (in.relax, our input)
        assert set(run.numbers.tolist()) == {29, 28} and len(run) == 36


def test_lammps_types_from_the_input_scripts_masses(tmp_path):
    """Without an element column the types are named by the 'mass' lines of the LAMMPS input beside
    the dump (Cu 63.546, Ni 58.6934: IUPAC standard atomic weights, as ASE's table has them)."""
    text = gzip.decompress((PUB / "lammps_relax" / "relax.dump.gz").read_bytes()).decode()
    lines = []
    for ln in text.splitlines():
        f = ln.split()
        if ln.startswith("ITEM: ATOMS"):
            ln = "ITEM: ATOMS id type x y z fx fy fz"
        elif len(f) == 9 and f[2] in ("Cu", "Ni"):
            ln = " ".join(f[:2] + f[3:])
        lines.append(ln)
    (tmp_path / "relax.dump").write_text("\n".join(lines) + "\n")     # as in.relax names it
    with pytest.raises(InputError, match="cannot be named"):
        read_run(tmp_path / "relax.dump")
    shutil.copy(PUB / "lammps_relax" / "in.relax", tmp_path / "in.relax")
    run = read_run(tmp_path / "relax.dump")
    ref = read_run(PUB / "lammps_relax" / "relax.dump.gz")
    assert run.numbers.tolist() == ref.numbers.tolist()
    np.testing.assert_allclose(run.positions, ref.positions, atol=0)


# ---------------------------------------------------------------- discovery
def test_inspect_and_audit_share_discovery(tmp_path):
    """A folder of files that are runs by content (custodian keeps vasprun.xml backups under other
    names): the audit lists each; read_run(folder) reads the only one, or names them all."""
    d = tmp_path / "unconverged"
    d.mkdir()
    raw = gzip.decompress((DOUBLE / "vasprun.xml.relax1.gz").read_bytes())
    (d / "vasprun.xml.ionic").write_bytes(raw)
    (d / "notes.json").write_text('{"note": "invented notes", "ok": true}')
    (d / "params.json").write_text('[1, 2, 3]')
    assert read_run(d).source == str(d / "vasprun.xml.ionic")               # inspect FOLDER
    runs, failed = discover([d])
    assert [Path(r.path).name for r in runs] == ["vasprun.xml.ionic"] and not failed
    (d / "vasprun.xml.electronic").write_bytes(raw)
    with pytest.raises(InputError, match="holds 2 runs .*vasprun.xml.electronic, vasprun.xml.ionic"):
        read_run(d)
    runs, _ = discover([d])
    assert len(runs) == 2


def test_our_own_records_and_plain_json_are_not_runs(tmp_path):
    camp = tmp_path / "camp"
    shutil.copytree(QE / "layer_oblique_to_hex", camp / "L")
    out = audit([camp], tmp_path / "a1", workers=1, report=False, progress="off")
    assert out["runs"] == 1 and not out["failed"]
    shutil.copy(tmp_path / "a1" / "records" / "camp_L.json", camp / "camp_L.json")   # our record
    (camp / "params.json").write_text('{"ecut": 40, "kpoints": [4, 4, 1]}')
    (camp / "observer.json").write_text('{"schema": "driftwatch/run-1", "frames": []}')
    out = audit([camp], tmp_path / "a2", workers=1, report=False, progress="off")
    assert out["runs"] == 1 and not out["failed"]


def test_mixed_public_campaign_audits_with_no_failed_run(tmp_path):
    """Every genuine output above plus a real pw.x run, audited through the command line as a user
    would: no failed run, the two non-periodic systems listed as skipped with the setting that
    would include them, exit 0."""
    camp = tmp_path / "mixed"
    shutil.copytree(PUB, camp, ignore=shutil.ignore_patterns("README.md", "SHA256SUMS", "broken"))
    shutil.copytree(QE / "layer_oblique_to_hex", camp / "qe_layer")
    shutil.copy(REPO / "tests" / "data" / "vasp" / "OUTCAR_example_1.gz", camp)  # Ni cluster
    (camp / "params.json").write_text('{"campaign": "invented", "ecut": 40}')
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                           str(tmp_path / "out"), "-j", "2", "--progress", "on", "--no-report"],
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-2000:]
    summary = json.loads((tmp_path / "out" / "campaign.json").read_text())
    assert summary["failed"] == [] and summary["runs"] == 45
    assert sorted(k["run"] for k in summary["skipped"]) == [
        "mixed/OUTCAR_example_1.gz", "mixed/ase_generic/gpaw_h2.txt",
        "mixed/foreign_outputs/cp2k/relax.out.gz", "mixed/foreign_outputs/qe_neb/H2+H.out.gz",
        "mixed/qe_example_h2o_mt", "mixed/qe_example_si_bands"]
    assert all(k["include"] for k in summary["skipped"])
    # the table marks the runs that are no relaxation (a grep for "lost" must not read MD as drift)
    md = next(ln for ln in proc.stdout.splitlines() if ln.startswith("mixed/vasp541_npt_md "))
    assert md.split()[2] == "lost~" and "~ no relaxation (molecular dynamics" in proc.stdout
    assert ("45 runs: 39 with a verdict, 0 failed, 6 skipped (45 read now, 0 from the cache)"
            in proc.stdout)
    # the runs whose steps are no relaxation (their settings, as the files print them) are counted
    assert ("not relaxations: 15 runs (finite differences 1, molecular dynamics 4, "
            "nudged-elastic-band image 3, single-point calculation 7; column not_relaxation of "
            "campaign.csv)") in proc.stdout
    assert {x["run"] for x in summary["not_relaxation"]} == {
        "mixed/atomate_si_static/outputs", "mixed/atomate_static_stages/outputs",   # NSW = 0
        "mixed/qe71_scf_pair/scf.out.gz", "mixed/qe71_scf_pair/bands.out.gz",       # pw.x scf
        "mixed/vasp544_finite_differences", "mixed/vasp541_npt_md", "mixed/vasp544_neb/01",
        "mixed/vasp544_nelm",                     # NSW = -1: one SCF at NELM, a single point
        "mixed/qe_testsuite_lda_u/benchmark.out.git.inp=lda+U.in.gz",              # pw.x scf
        "mixed/qe_testsuite_space_group/benchmark.out.git.inp=lattice-wyckoff-sio2.in.gz",
        "mixed/vasp544_neb/02", "mixed/vasp544_neb/03",
        "mixed/qe_testsuite_md/benchmark.out.git.inp=md.in.args=1.gz",
        "mixed/qe_testsuite_langevin/benchmark.out.git.inp=langevin.in.gz",
        "mixed/ase_generic/si8_md.castep.gz"}   # CASTEP: type of calculation : molecular dynamics
    # which of the flags counted above are theirs, said beside them (a new user read the totals
    # as the relaxations')
    theirs = Counter(c for x in summary["not_relaxation"] for c in x["flags"])
    line = next(ln for ln in proc.stdout.splitlines() if ln.startswith("not relaxations: "))
    assert theirs and line.endswith("; of the flags above, theirs: " + ", ".join(
        f"{k} {v}" for k, v in sorted(theirs.items())))
    flags = dict(x.split(" ") for x in next(ln for ln in proc.stdout.splitlines() if ln.startswith(
        "flags (runs): ")).removeprefix("flags (runs): ").split(", "))
    assert all(int(flags[k]) >= v for k, v in theirs.items())
    # the campaign's tolerance advice is about relaxed structures: those 15 are left out of it
    tol = summary["tolerance"]
    assert tol["left_out"] == 15 and set(tol["run_ids_left_out"]) == {
        x["run"] for x in summary["not_relaxation"]}
    from driftwatch.rules import advice_item, campaign_advice
    recs = [(rid, json.loads((tmp_path / "out" / rel).read_text()))     # named by run id
            for rid, rel in summary["records"].items()]
    alone = campaign_advice([advice_item(n, r) for n, r in recs
                             if not r["run"]["not_relaxation"]], tol["symprecs"])
    assert tol["runs_considered"] == alone["runs_considered"] == len(recs) - 15
    assert tol["recommended_symprec"] == alone["recommended_symprec"]
    assert [c["runs"] for c in tol["changes"]] == [c["runs"] for c in alone["changes"]]
    assert tol["reason"] == alone["reason"] + ". Left out: 15 runs whose steps are no relaxation"
    assert f"campaign symprec: {tol['recommended_symprec']:.3g} Å (" in proc.stdout
    assert "Left out: 15 runs whose steps are no relaxation)" in proc.stdout
    rec = json.loads((tmp_path / "out" / "records" / "mixed_custodian_double_relax.json").read_text())
    assert [s["name"] for s in rec["run"]["stages"]] == ["relax1", "relax2"]
    assert rec["run"]["position_precision"] == pytest.approx(
        read_run(DOUBLE).position_precision)


def test_a_cluster_in_a_box_is_refused_with_the_setting_that_includes_it(tmp_path):
    """ASE's genuine OUTCAR_example_1 (a Ni cluster in a box, tests/data/vasp): `driftwatch
    inspect` refuses it in one line that gives the same geometry.vacuum_gap the audit's skip
    advice gives, and that value, written in a config, does analyse its cell as bulk."""
    import re
    from driftwatch import config
    from driftwatch.campaign import analyse_run
    path = REPO / "tests" / "data" / "vasp" / "OUTCAR_example_1.gz"
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", str(path)],
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 1 and proc.stderr.count("\n") == 1, proc.stderr
    said = re.search(r"a config \(-c\) with geometry\.vacuum_gap: ([\d.]+) Å", proc.stderr)
    assert "a molecule or cluster in a box" in proc.stderr     # the audit's words
    skipped = analyse_run("ni", str(path), config.load())["skipped"]
    assert skipped["include"].startswith(f"a config (-c) with geometry.vacuum_gap: {said.group(1)} Å")
    assert f"{skipped['reason']}: driftwatch analyses layers and bulk crystals; to include it: " \
           f"{skipped['include']}" in proc.stderr                 # one fact, the same words
    assert "along axes [0, 1, 2]" in skipped["reason"]
    cfg = tmp_path / "wide.yaml"
    cfg.write_text(f"geometry:\n  vacuum_gap: {said.group(1)} Å\n")
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", str(path), "-c",
                           str(cfg)], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0 and "bulk" in proc.stdout, proc.stderr


# ---------------------------------------------------------------- other projects' pw.x and VASP files
def _printed(path, pattern):
    import re
    text = gzip.open(path, "rt").read()
    return [float(m.group(1)) for m in re.finditer(pattern, text)], text


def test_a_pwx_41_vc_relax_reads_as_pwx_prints_it(tmp_path):
    """pwtools' genuine QE 4.1.2 vc-relax output (tests/data/public/qe412_vc_relax): pw.x before
    5.0 prints ``positions (a_0 units)`` and ``CELL_PARAMETERS (alat)`` with no value; ASE's
    header parser knows only ``(alat units)``. The reference is pw.x's own print-out in the file:
    each step's cell volume ("new unit-cell volume = ... ( V Ang^3 )", 5 decimals), the header's
    "unit-cell volume" in bohr^3 (CODATA 2018 bohr, as ASE's units), and the "!" total energies
    (Ry, converted with ASE's QE units)."""
    from ase.io.espresso import units
    path = PUB / "qe412_vc_relax" / "pw.vc_relax.out.gz"
    run = read_run(path)
    volumes, text = _printed(path, r"new unit-cell volume =\s*\S+ a\.u\.\^3 \(\s*(\S+) Ang\^3")
    energies, _ = _printed(path, r"!\s+total energy\s+=\s+(\S+) Ry")
    (header,), _ = _printed(path, r"\n\s+unit-cell volume\s+=\s+(\S+) \(a\.u\.\)\^3")
    assert "Program PWSCF     v.4.1.2" in text and "positions (a_0 units)" in text
    assert len(run) == 7 and run.numbers.tolist() == [13, 13, 7, 7]           # Al2N2, as printed
    vol = np.abs(np.linalg.det(run.cells))
    np.testing.assert_allclose(vol[1:], volumes[:6], atol=6e-6, rtol=0)
    assert vol[0] == pytest.approx(header * 0.529177210903 ** 3, abs=1e-4)
    np.testing.assert_allclose(run.energies, np.array(energies[:7]) * units["Ry"], rtol=1e-12)
    # complete: pw.x 4 ends with its closing timing ("PWSCF        :  8m53.21s CPU time") and no
    # JOB DONE, which came later; it was once called truncated, "job killed or still running"
    assert "JOB DONE" not in text and text.count("     PWSCF        :  8m53.21s CPU time") == 1
    assert not [w for w in run.warnings if "truncated" in w], run.warnings
    from driftwatch.live import _end_marker
    cut = tmp_path / "pw.out"
    cut.write_text(text[:text.index("     PWSCF        :")])     # the same job before its end
    assert any("truncated after step" in w for w in read_run(cut).warnings)
    whole = tmp_path / "whole.out"
    whole.write_text(text)
    assert _end_marker(whole, "espresso-out") == "pw.x's closing timing"      # follow stops here


def test_a_pwx_output_named_like_an_input_takes_its_settings_from_the_input(tmp_path):
    """Quantum ESPRESSO's own test-suite (tests/data/public/qe_testsuite_vc_relax1) names a pw.x
    output ``benchmark.out.git.inp=vc-relax1.in`` beside its input ``vc-relax1.in``, which writes
    ``calculation = "vc-relax"`` in double quotes (Fortran namelists take either delimiter:
    common practice, and pw.x ran it as a vc-relax, which the output shows: the cell volume moves
    from step to step). The output is never read as its own input; alone, it has no input."""
    folder = PUB / "qe_testsuite_vc_relax1"
    out = folder / "benchmark.out.git.inp=vc-relax1.in.gz"
    for source in (out, folder):
        s = read_run(source).code_settings
        assert (s["calculation"], s["cell_dofree"], s["settings_from"]) == \
            ("vc-relax", "all", "vc-relax1.in"), s
    vol = np.abs(np.linalg.det(read_run(out).cells))
    assert np.ptp(vol) > 0.1                                  # the cell moved: a vc-relax
    alone = tmp_path / out.name
    shutil.copy(out, alone)
    assert "settings_from" not in read_run(alone).code_settings


def test_a_pwx_input_of_another_calculation_beside_an_output_is_not_used(tmp_path):
    """A folder can hold the input of another calculation beside an output (found in ShakeNBreak's
    test data: a 63-atom espresso.pwi beside a 12-atom output that says "Reading input from
    qe.in"). Its settings (nosym, the calculation) would decide the held-by-code flag and the run's
    kind. References are the files' own lines: the header's "number of atoms/cell" and "number of
    atomic types" against the input's nat and ntyp, and "Reading input from NAME". Real pw.x 6.7
    outputs (tests/data/qe): a 2-atom relax read with the 1-atom vc-relax input of another run."""
    own, other = QE / "relax_atoms_to_sites", QE / "bulk_tetragonal_to_cubic"
    text = (own / "pw.out").read_text()
    assert "Reading input from pw.in" in text and "number of atoms/cell      =            2" in text
    folder = tmp_path / "run"
    folder.mkdir()
    (folder / "run.out").write_text(text)
    shutil.copy(other / "pw.in", folder / "run.in")         # taken by its name before
    run = read_run(folder / "run.out")
    assert "settings_from" not in run.code_settings and "calculation" not in run.code_settings
    assert any("the pw.x input run.in beside it is not this output's (nat = 1, the output 2): its "
               "settings are not used" in w for w in run.warnings), run.warnings
    shutil.copy(own / "pw.in", folder / "pw.in")            # the input the header names wins
    run = read_run(folder / "run.out")
    assert (run.code_settings["settings_from"], run.code_settings["calculation"]) == \
        ("pw.in", "relax")
    assert not [w for w in run.warnings if "is not this output's" in w]
    # an input given by space group counts inequivalent atoms in nat (QE's test-suite: nat = 2,
    # pw.x expands them to 9): it is the run's own input, only ntyp is compared
    sg = PUB / "qe_testsuite_space_group"
    assert "space_group=154" in (sg / "lattice-wyckoff-sio2.in").read_text()
    run = read_run(sg)
    assert run.natoms == 9 and run.code_settings["settings_from"] == "lattice-wyckoff-sio2.in"
    assert not [w for w in run.warnings if "is not this output's" in w]


@pytest.mark.parametrize("case, said", [
    ("failed_out_of_walltime", "Maximum CPU time exceeded"),
    ("relax_failed_electronic", "convergence NOT achieved after   2 iterations: stopping")])
def test_a_pwx_run_that_stopped_itself_says_why(case, said):
    """aiida-quantumespresso's genuine pw.x outputs of a run out of CPU time and of a relaxation
    whose first SCF did not converge (tests/data/public/broken/aiida_pw_stopped): no ionic step
    completed, and the one-line error quotes pw.x's own reason with its line in the file."""
    path = PUB / "broken" / "aiida_pw_stopped" / case / "aiida.out.gz"
    lines = gzip.open(path, "rt").read().splitlines()
    (n,) = [i + 1 for i, ln in enumerate(lines) if said in ln]
    with pytest.raises(InputError) as err:
        read_run(path)
    msg = str(err.value)
    assert "no completed ionic step" in msg and f"'{said}' (line {n})" in msg and "\n" not in msg


def test_a_damaged_vasprun_is_not_reported_as_cut(tmp_path):
    """aiida-vasp's genuine NEB vasprun.xml (tests/data/public/broken/aiida_vasp_neb_damaged) has two
    writes interleaved at line 527 and 3,600 lines after them: the error names the line and column
    Python's XML parser gives for the whole file (ElementTree.parse, the reference) and calls the
    file damaged, not cut. The genuine 60-step relax1 vasprun.xml cut in the middle, or ending in
    NUL bytes (a write its file system did not finish), still reads as cut."""
    import xml.etree.ElementTree as ET
    damaged = _unzip(PUB / "broken" / "aiida_vasp_neb_damaged" / "vasprun.xml.gz", tmp_path / "a")
    with pytest.raises(ET.ParseError) as ref:
        ET.parse(damaged)
    with pytest.raises(InputError) as err:
        read_run(damaged)
    line, col = ref.value.position
    assert f"line {line}, column {col}" in str(err.value)
    assert "damaged there, not cut off" in str(err.value) and "truncated" not in str(err.value)
    raw = gzip.decompress((PUB / "stage_folders" / "relax1" / "vasprun.xml.gz").read_bytes())
    half = raw.find(b"<calculation>", len(raw) // 2)
    for tail, extra in ((b"", ""), (b"\0" * 4096, "ends in NUL bytes")):
        path = tmp_path / ("nul" if tail else "cut") / "vasprun.xml"
        path.parent.mkdir()
        path.write_bytes(raw[:half + 300] + tail)
        run = read_run(path)
        assert 0 < len(run) < 60
        (w,) = [w for w in run.warnings if "XML ends abnormally" in w]
        assert w.split(": ", 1)[1].startswith("truncated after step") and extra in w


@pytest.mark.parametrize("folder, fmt, what", [
    ("vasp544_finite_differences", "vasp-xml", "finite differences (IBRION = 6)"),
    ("vasp541_npt_md", "vasp-out", "molecular dynamics (IBRION = 0)")])
def test_a_run_that_is_no_relaxation_says_so(folder, fmt, what):
    """Genuine VASP runs whose ionic steps are no relaxation (aiida-vasp's IBRION = 6 finite
    differences, custodian's IBRION = 0 NpT molecular dynamics; IBRION as the files print it, its
    meaning from VASP's documentation: common practice): every frame ASE reads, and a warning that
    the verdict compares first and last frames. The genuine relaxation (relax1, IBRION = 2) has
    none."""
    (path,) = (PUB / folder).iterdir()
    run = read_run(path)
    assert run.code_settings["IBRION"] == int(what.split("= ")[1][0])
    assert len(run) == len(ase.io.read(path, index=":", format=fmt))                    # ASE
    (w,) = [w for w in run.warnings if "not a relaxation" in w]
    assert what in w and "compares the first and last frames" in w
    assert run.not_relaxation.startswith(what)
    ctx = registry.ReadContext(path)                 # the live follower's reader says it too
    list(registry.iter_frames(path, context=ctx))
    assert w in ctx.warnings
    relax = read_run(PUB / "stage_folders" / "relax1")
    assert relax.code_settings["IBRION"] == 2
    assert not [w for w in relax.warnings if "not a relaxation" in w]
    assert relax.not_relaxation is None


def test_steps_whose_scf_hit_nelm_are_named_as_pymatgen_finds_them(tmp_path):
    """Every genuine vasprun.xml here: the ionic steps driftwatch calls not converged are those
    pymatgen's Vasprun counts NELM electronic steps for (its ``converged_electronic`` rule: fewer
    than NELM is converged). custodian's hybrid relaxation (all 5 steps at NELM = 100) has them;
    the relaxations that converged have no such warning."""
    import lzma
    files = [PUB / "custodian_nelm_hybrid" / "vasprun.xml.xz",
             PUB / "vasp620_nelm" / "vasprun.xml.gz", PUB / "vasp544_nelm" / "vasprun.xml.gz",
             PUB / "stage_folders" / "relax1" / "vasprun.xml.gz",
             PUB / "stage_folders" / "relax2" / "vasprun.xml.gz",
             DOUBLE / "vasprun.xml.relax1.gz", DOUBLE / "vasprun.xml.relax2.gz",
             REPO / "tests" / "data" / "vasp" / "vasprun_pstress.xml"]
    seen = {}
    for k, path in enumerate(files):
        plain = tmp_path / f"{k}.xml"                       # pymatgen reads it uncompressed
        with {".gz": gzip.open, ".xz": lzma.open}.get(path.suffix, open)(path, "rb") as fh:
            plain.write_bytes(fh.read())
        v = _vasprun(plain)
        nelm = v.parameters["NELM"]
        expected = [i for i, s in enumerate(v.ionic_steps) if len(s["electronic_steps"]) >= nelm]
        (note,) = [w for w in read_run(path).warnings if "NELM" in w] or [None]
        seen[path.parent.name] = expected
        if expected:
            shown = ", ".join(map(str, expected))
            vasp = ", ".join(str(k + 1) for k in expected)              # OUTCAR counts from 1
            assert f"NELM = {nelm} steps without converging in {len(expected)} ionic step(s) " \
                   f"({shown}; VASP's own count {vasp})" in note, note
        else:
            assert note is None, note
    assert seen["custodian_nelm_hybrid"] == [0, 1, 2, 3, 4]
    assert seen["vasp620_nelm"] == [0, 3] and seen["vasp544_nelm"] == [0]


def test_nelm_is_the_runs_not_the_response_codes(tmp_path):
    """aiida-vasp's genuine relaxation vasprun.xml lists NELM = 60 under "electronic convergence"
    and NELM = 1 under "response functions" (pymatgen's Vasprun drops the latter's repeats: its
    _parse_params; it cannot read this file whole, '******' in an int). Every step ran fewer
    than 60 electronic steps (counted with ElementTree): no warning."""
    import xml.etree.ElementTree as ET
    path = PUB / "vasp544_relax_gw_params" / "vasprun.xml.gz"
    root = ET.fromstring(gzip.decompress(path.read_bytes()))
    nelm = [int(i.text) for i in root.find("parameters").iter("i") if i.get("name") == "NELM"]
    counts = [len(c.findall("scstep")) for c in root.findall("calculation")]
    assert nelm == [60, 1] and 1 < max(counts) < 60
    run = read_run(path)
    assert len(run) == len(counts) == 19 and not [w for w in run.warnings if "NELM" in w]


@pytest.mark.parametrize("folder", ["vasp620_nelm", "vasp544_nelm"])
def test_an_outcar_names_the_same_unconverged_steps_as_its_vasprun(folder):
    """aiida-vasp's genuine OUTCAR and vasprun.xml of one run each (VASP 6.2.0: steps 0 and 3 ran
    NELM = 15 electronic steps, and VASP prints "EDIFF was not reached (unconverged)" for step 0;
    VASP 5.4.4: its one step ran NELM = 8): the same frames, and the same warning from either file
    (the last "Iteration  i(  n)" line of each step in OUTCAR, the <scstep> count in vasprun.xml)."""
    out, xml = (read_run(PUB / folder / name) for name in ("OUTCAR.gz", "vasprun.xml.gz"))
    np.testing.assert_allclose(out.positions, xml.positions, atol=1e-4, rtol=0)  # OUTCAR: 5 decimals
    (a,) = [w.split(": ", 1)[1] for w in out.warnings if "NELM" in w]
    (b,) = [w.split(": ", 1)[1] for w in xml.warnings if "NELM" in w]
    assert a == b


def test_a_slab_with_fixed_atoms_reports_the_forces_its_optimiser_saw():
    """FAIR-Chem's genuine extended XYZ relaxation of propane on a Cu slab, its 18 bottom atoms
    fixed by the ``move_mask`` column: forces as ASE's ``atoms.get_forces()`` gives them (ASE's
    reader, the reference), so the record's final fmax is that of the free atoms (0.0132 eV/Å), not
    the raw 0.146 eV/Å on a fixed one."""
    path = PUB / "fairchem_slab_relax" / "toy_c3h8_relax.extxyz.xz"
    ref = ase.io.read(path, index=":")
    run = read_run(path)
    assert len(run) == len(ref) == 101
    np.testing.assert_array_equal(run.forces, [a.get_forces() for a in ref])
    from driftwatch.track import analyze
    fmax = analyze(run)["frames"][-1]["fmax"]
    raw = np.linalg.norm(ref[-1].get_forces(apply_constraint=False), axis=1).max()
    assert fmax == pytest.approx(0.0132, abs=5e-5) and raw == pytest.approx(0.146, abs=5e-4)


def test_a_training_set_category_is_refused_as_one_relaxation_with_what_would_split_it():
    """libAtoms/workflow's genuine boron training set (tests/data/public/broken/
    libatoms_gap_training_set) groups unrelated structures by ``config_type``, one of the default
    structure keys: read whole it lists the three names; one name's frames change their atom
    count, and the one-line error says the key and value are no relaxation and which setting
    would split them; without structure keys, the whole file is called unrelated structures."""
    path = PUB / "broken" / "libatoms_gap_training_set" / "B_DFT_data.xyz.gz"
    with pytest.raises(InputError, match="holds 3 structures named by 'config_type'"):
        read_run(path)
    for source, keys, said in (
            (f"{path}::buildcell", None, "the frames with config_type = 'buildcell' are not one "
                                         "relaxation"),
            (str(path), (), "a file of unrelated structures?")):
        with pytest.raises(InputError) as err:
            read_run(source, structure_keys=keys)
        msg = str(err.value)
        assert "atoms count changes at step 1 (6 -> 8)" in msg and said in msg, msg
        assert "inputs.structure_keys" in msg and "@selection" not in msg and "\n" not in msg
        # the keys that could name the structures instead, counted in the file's comment lines
        text = gzip.open(path, "rt").read()
        rundirs = set(re.findall(r" vasp_rundir=(\S+)", text))
        assert len(rundirs) == 39 and len(re.findall("Lattice=", text)) == 39
        assert "keys whose value changes between frames: vasp_rundir (39 values)" in msg
        assert ("config_type (3 values)" in msg) == (keys == ())   # not the key that failed


def _unzip(gz, folder):
    folder.mkdir(parents=True)
    path = folder / gz.name[:-3]
    path.write_bytes(gzip.decompress(gz.read_bytes()))
    return path


def test_a_file_without_a_cell_is_skipped_with_advice_that_fits_it():
    """ASE's own FHI-aims MD output (ase/test/testdata/aims/md.out in the installed ASE): ASE's
    reader gives no cell (all zero) and pbc False. driftwatch skips it, saying the file gives no
    cell and what would include it (not "write pbc True", which a cell-less file cannot use); a
    cell with pbc False (GPAW's H2 in a box, tests/data/public) keeps the pbc advice."""
    import ase
    from driftwatch import config
    from driftwatch.campaign import analyse_run
    md = Path(ase.__file__).parent / "test" / "testdata" / "aims" / "md.out"
    atoms = ase.io.read(md, index=-1, format="aims-output")
    assert not atoms.pbc.any() and not atoms.cell.array.any()                  # ASE's reading
    cfg = config.load()
    out = analyse_run("md", str(md), cfg)
    assert not out["ok"] and "the file gives no cell" in out["skipped"]["reason"]
    assert "Lattice=" in out["skipped"]["include"]
    box = analyse_run("h2", str(PUB / "ase_generic" / "gpaw_h2.txt"), cfg)
    assert "periodic along 0 axes" in box["skipped"]["reason"]
    assert "pbc True" in box["skipped"]["include"]


# ---------------------------------------------------------------- position precision, settings
def test_position_precision_follows_the_printed_digits(tmp_path):
    """OUTCAR prints cartesian positions with 5 decimals: sqrt(3) x 0.5e-5 Å; vasprun.xml
    fractional with 8: 0.5e-8 x (|a| + |b| + |c|); ASE .traj holds doubles: None."""
    out = read_run(DOUBLE / "OUTCAR.relax1.gz")
    assert out.position_precision == pytest.approx(np.sqrt(3) * 0.5e-5)
    xml = read_run(DOUBLE / "vasprun.xml.relax1.gz")
    lengths = np.linalg.norm(xml.cells, axis=-1).sum(-1).max()
    assert xml.position_precision == pytest.approx(0.5e-8 * lengths)
    ase.io.write(tmp_path / "r.traj", ase.io.read(DOUBLE / "CONTCAR.relax2.gz", format="vasp"))
    assert read_run(tmp_path / "r.traj").position_precision is None


def test_symmetry_setting_of_each_code():
    """VASP (ISYM = 2, 48 operations as OUTCAR prints them), VASP with ISYM = 0 (ASE's
    OUTCAR_example_1), pw.x real outputs (nosym = .false.; 'No symmetry found' = 1 operation)."""
    got = symmetry_setting(read_run(DOUBLE).code_settings, 3)
    assert got["operations"] == 48 and got["undo"] == "ISYM = 0" and "ISYM = 2" in got["how"]
    assert symmetry_setting(read_run(REPO / "tests/data/vasp/OUTCAR_example_1.gz").code_settings,
                            3) is None
    qe = read_run(QE / "bulk_tetragonal_to_cubic").code_settings
    got = symmetry_setting(qe, 3)
    assert got["operations"] == qe["nsym"] and got["undo"] == "nosym=.true."
    assert "nosym=.false." in got["how"]
    assert symmetry_setting(dict(qe, nosym=True), 3) is None
    assert symmetry_setting({}, 3) is None


# ---------------------------------------------------------------- adding a code
def test_adding_a_code_is_one_module_and_one_registration(tmp_path):
    """A toy code whose run folders hold 'toy.log' (an extended XYZ inside): one format row and one
    code row make read_run(folder), discovery and the live end marker see it."""
    import re

    def toy_folder(folder, names, format=None, ctx=None):
        if "toy.log" in names:
            return FolderPick([("", folder / "toy.log", "extxyz")])
        return None

    saved_codes, saved_formats = dict(registry._codes), dict(registry._formats)
    try:
        register_code(Code(name="toy", label="Toy", formats=("extxyz",), folder=toy_folder,
                           end_markers={"extxyz": ((re.compile(rb"TOY DONE"), "TOY DONE"),)}))
        d = tmp_path / "camp" / "t1"
        d.mkdir(parents=True)
        atoms = ase.io.read(DOUBLE / "CONTCAR.relax2.gz", format="vasp")
        ase.io.write(d / "toy.log", [atoms, atoms], format="extxyz")
        assert read_run(d).source == str(d / "toy.log")
        runs, _ = discover([tmp_path / "camp"])
        assert [(r.kind, Path(r.path).name) for r in runs] == [("folder", "t1")]
        assert registry.code_of_format("extxyz").name == "toy"
    finally:
        registry._codes.clear()
        registry._codes.update(saved_codes)
        registry._formats.clear()
        registry._formats.update(saved_formats)


# ---------------------------------------------------------------- the cache
def _quiet_audit(roots, out, **kw):
    return audit(roots, out, report=False, progress="off", **kw)


def _record_of(out: Path, name: str) -> dict:
    recs = [json.loads(p.read_text()) for p in (out / "records").glob("*.json")]
    return next(r for r in recs if r["run"]["source"].endswith(name))


def test_cache_sees_a_changed_log_pwx_output(tmp_path):
    """Issue 16: a pw.x output named *.log changed between two audits was served from the cache
    (the cache's own list of a folder's files had no *.log). Here a folder holds a finished pw.out
    and a newer relax.log; relax.log is then replaced by another real pw.x output."""
    import os
    d = tmp_path / "camp" / "L"
    d.mkdir(parents=True)
    shutil.copy(QE / "layer_oblique_to_hex" / "pw.out", d / "pw.out")
    shutil.copy(QE / "relax_atoms_to_sites" / "pw.out", d / "relax.log")
    os.utime(d / "pw.out", (1e9, 1e9))                                 # relax.log is the newer
    _quiet_audit([tmp_path / "camp"], tmp_path / "out", workers=1)
    before = _record_of(tmp_path / "out", "relax.log")["run"]
    shutil.copy(QE / "bulk_tetragonal_to_cubic" / "pw.out", d / "relax.log")
    second = _quiet_audit([tmp_path / "camp"], tmp_path / "out", workers=1)
    after = _record_of(tmp_path / "out", "relax.log")["run"]
    want = read_run(QE / "bulk_tetragonal_to_cubic" / "pw.out")
    assert (before["n_frames"], before["formula"]) != (after["n_frames"], after["formula"])
    assert after["n_frames"] == len(want) and second["failed"] == []


def test_cache_sees_a_changed_pw_in_beside_two_outputs(tmp_path):
    """Issue 16: a changed pw.in next to two pw.x outputs (two file runs) was served from the cache."""
    d = tmp_path / "camp" / "two"
    d.mkdir(parents=True)
    shutil.copy(QE / "layer_oblique_to_hex" / "pw.out", d / "a.out")
    shutil.copy(QE / "relax_atoms_to_sites" / "pw.out", d / "b.out")
    pin = (QE / "layer_oblique_to_hex" / "pw.in").read_text()
    (d / "pw.in").write_text(pin)
    _quiet_audit([tmp_path / "camp"], tmp_path / "out", workers=1)
    rec = json.loads((tmp_path / "out" / "records" / "camp_two_a.out.json").read_text())
    assert rec["run"]["code_settings"]["nosym"] is False
    assert "nosym" not in pin.lower()
    (d / "pw.in").write_text(pin.replace("&SYSTEM", "&SYSTEM\n  nosym = .true.", 1)
                             .replace("&system", "&system\n  nosym = .true.", 1))
    second = _quiet_audit([tmp_path / "camp"], tmp_path / "out", workers=1)
    rec = json.loads((tmp_path / "out" / "records" / "camp_two_a.out.json").read_text())
    assert rec["run"]["code_settings"]["nosym"] is True and second["analysed"] == 2


class _Meddler(ThreadPoolExecutor):
    """A real executor that, as a user might while an audit runs, empties or deletes a file just
    before the runs are analysed."""

    def __init__(self, victim: Path, how: str):
        super().__init__(max_workers=1)
        self.victim, self.how = victim, how

    def submit(self, fn, *args, **kwargs):
        if self.how == "empty":
            self.victim.write_bytes(b"")
        elif self.victim.exists():
            self.victim.unlink()
        return super().submit(fn, *args, **kwargs)


@pytest.mark.parametrize("how", ["empty", "delete"])
def test_cache_does_not_keep_a_failure_once_the_file_is_back(how, tmp_path):
    """Issue 19: a file emptied or deleted during an audit and restored with the same bytes was
    reported empty/missing by every later audit (the failure was cached under the good bytes)."""
    camp = tmp_path / "camp"
    camp.mkdir()
    src = camp / "relax.pwo"
    good = (QE / "relax_atoms_to_sites" / "pw.out").read_bytes()
    src.write_bytes(good)
    with _Meddler(src, how) as ex:
        first = _quiet_audit([camp], tmp_path / "out", executor=ex)
    assert len(first["failed"]) == 1
    src.write_bytes(good)                                      # restored, the same bytes
    second = _quiet_audit([camp], tmp_path / "out", workers=1)
    assert second["failed"] == [] and second["analysed"] == 1


def test_cache_entry_of_the_right_schema_but_wrong_content_is_a_miss(tmp_path):
    """Issue 19: a cache entry that is valid JSON but wrong crashed every later audit."""
    camp = tmp_path / "camp"
    shutil.copytree(QE / "relax_atoms_to_sites", camp / "R")
    first = _quiet_audit([camp], tmp_path / "out", workers=1)
    before = (tmp_path / "out" / "records" / "camp_R.json").read_text()
    entries = [p for p in (tmp_path / "out" / ".cache").glob("*.json") if p.name != "digests.json"]
    assert len(entries) == 1
    data = json.loads(entries[0].read_text())
    data["result"]["record_text"] = '{"schema": "driftwatch/run-1"}'
    entries[0].write_text(json.dumps(data))
    second = _quiet_audit([camp], tmp_path / "out", workers=1)
    assert first["failed"] == second["failed"] == [] and second["analysed"] == 1
    assert (tmp_path / "out" / "records" / "camp_R.json").read_text() == before
    data["result"] = {"ok": True, "record_text": before, "structure": {"cell": 5}}
    entries[0].write_text(json.dumps(data))
    third = _quiet_audit([camp], tmp_path / "out", workers=1)
    assert third["analysed"] == 1 and third["failed"] == []
    fourth = _quiet_audit([camp], tmp_path / "out", workers=1)               # a good entry: a hit
    assert fourth["cached"] == 1 and fourth["analysed"] == 0


# ---------------------------------------------------------------- job folders without a trajectory
RELAX1 = PUB / "stage_folders" / "relax1"        # genuine VASP 5.2.11 inputs and outputs


def _job(folder: Path, *names, src=RELAX1):
    folder.mkdir(parents=True)
    for n in names:
        shutil.copy(src / n, folder / n)
    return folder


def test_job_folders_with_inputs_and_no_output_are_failed_entries_not_kept_runs(tmp_path):
    """A campaign as a scheduler leaves it: jobs that never ran (genuine VASP inputs INCAR, KPOINTS,
    POSCAR of pymatgen-db's relax1; a real pw.x input of example_runs), one that died before its
    first ionic step (VASP leaves CONTCAR empty: common practice), and template inputs at the
    campaign's root above its run folders. The unrun jobs are listed as failed with a one-line
    reason (they were analysed as a one-structure run 'kept', or not listed at all); the
    template is not a run."""
    camp = tmp_path / "camp"
    _job(camp, "INCAR", "KPOINTS")                                     # template at the root
    shutil.copytree(QE / "relax_atoms_to_sites", camp / "done")
    _job(camp / "vasp_queued", "INCAR", "KPOINTS", "POSCAR")
    (_job(camp / "vasp_died", "INCAR", "POSCAR") / "CONTCAR").write_bytes(b"")
    _job(camp / "qe_queued", "pw.in", src=REPO / "example_runs" / "B01_qe_vcrelax")
    runs, failed = discover([camp])
    assert [r.id for r in runs] == ["camp/done"]
    errors = {f["run"]: f["error"] for f in failed}
    assert sorted(errors) == ["camp/qe_queued", "camp/vasp_died", "camp/vasp_queued"]
    for rid, err in errors.items():
        assert err.startswith(f"{tmp_path / rid}: ") and "\n" not in err
        assert "a job not run yet, or one that stopped before writing an ionic step" in err
        with pytest.raises(InputError) as exc:                   # inspect says the same
            read_run(tmp_path / rid)
        assert str(exc.value) == err
    assert "a pw.x input (pw.in) and no pw.x output" in errors["camp/qe_queued"]
    assert "VASP inputs (INCAR, KPOINTS, POSCAR) and no VASP output" in errors["camp/vasp_queued"]
    assert errors["camp/vasp_died"].endswith(f"pass {tmp_path / 'camp/vasp_died/POSCAR'} to read "
                                             f"that structure alone")
    assert len(read_run(camp / "vasp_queued" / "POSCAR")) == 1      # the file itself still reads
    assert len(read_run(camp / "vasp_queued", format="vasp-poscar")) == 1
    result = _quiet_audit([camp], tmp_path / "out", workers=1)
    assert result["analysed"] == 1 and len(result["failed"]) == 3
    import csv
    with open(tmp_path / "out" / "campaign.csv", newline="") as fh:
        (row,) = [r for r in csv.DictReader(fh) if r["run"] == "camp/vasp_queued"]
    assert row["verdict"] == "failed" and "VASP inputs" in row["error"]


def test_poscar_and_contcar_without_a_trajectory_are_the_runs_end_points(tmp_path):
    """A VASP folder whose trajectory was cleaned away (genuine relax1 of pymatgen-db without its
    vasprun.xml): POSCAR and CONTCAR are read as the initial and final structures (an end-points
    run), equal to the first and last structure pymatgen's Vasprun reads from the deleted
    vasprun.xml, and spglib's groups of both (spglib called directly) are the verdict's."""
    import spglib
    d = _job(tmp_path / "cleaned", "INCAR", "KPOINTS", "POSCAR", "CONTCAR", "OSZICAR")
    run = read_run(d)
    assert run.kind == "end-points" and len(run) == 2
    assert [s["name"] for s in run.stages] == ["POSCAR", "CONTCAR"]
    v = _vasprun(RELAX1 / "vasprun.xml.gz")
    _same_frames(run, [v.initial_structure, v.final_structure], atol=1e-5)     # pymatgen
    (w,) = [w for w in run.warnings if "no VASP trajectory" in w]
    assert "the steps between are not seen" in w
    assert not [w for w in run.warnings if "single structure" in w]
    import driftwatch
    rec = driftwatch.analyze(d)
    got = rec["summary"]["verdict"]["structure"]
    want = [spglib.get_symmetry_dataset((s.lattice.matrix, s.frac_coords, s.atomic_numbers),
                                        symprec=got["symprec"]).number
            for s in (v.initial_structure, v.final_structure)]
    assert [got["initial"]["group"], got["final"]["group"]] == want                 # spglib
    from driftwatch.records import END_POINTS
    audit([d], tmp_path / "out", progress="off")        # the run page names the two structures
    (page,) = (tmp_path / "out" / "report" / "runs").glob("*.html")
    html = page.read_text()
    assert END_POINTS in html and "ionic steps</td>" not in html
    assert ("'step' 1 is the final structure" in html) == bool(rec["flags"])
    alone = _job(tmp_path / "contcar_only", "CONTCAR")            # CONTCAR alone: one structure
    assert len(read_run(alone)) == 1
    assert any("single structure" in w for w in read_run(alone).warnings)


def _ase_pwx_relaxation(folder: Path):
    """A real BFGS relaxation driven by ASE's Espresso calculator (pw.x 6.7 called once per step,
    calculation 'scf', as ASE does): an invented rattled Si2 cell."""
    from ase.build import bulk
    from ase.calculators.espresso import Espresso, EspressoProfile
    from ase.optimize import BFGS
    folder.mkdir()
    shutil.copy(QE / "pseudo" / "Si.pz-vbc.UPF", folder)
    atoms = bulk("Si", "diamond", a=5.43)
    atoms.positions[1] += [0.06, 0.02, -0.03]
    atoms.calc = Espresso(profile=EspressoProfile(command="pw.x", pseudo_dir="."),
                          pseudopotentials={"Si": "Si.pz-vbc.UPF"}, directory=str(folder),
                          input_data={"control": {"tprnfor": True, "disk_io": "none",
                                                  "outdir": "./scratch"},
                                      "system": {"ecutwfc": 16}}, kpts=(3, 3, 3))
    BFGS(atoms, trajectory=str(folder / "relax.traj"), logfile=None).run(fmax=0.02, steps=8)
    shutil.rmtree(folder / "scratch", ignore_errors=True)


@pytest.mark.skipif(shutil.which("pw.x") is None, reason="pw.x not on PATH")
def test_a_relaxation_driven_by_ase_is_read_from_its_trajectory_not_the_last_scf(tmp_path):
    """ASE's calculators run the code once per step and overwrite its output: the folder's
    espresso.pwo holds the last step's scf only (it was analysed as a one-frame run 'kept'). The
    trajectory beside it is the relaxation: read, equal to ASE's own read of it frame by frame,
    its last frame the structure of the pw.x output (ASE's espresso-out reader)."""
    d = tmp_path / "ase_qe"
    _ase_pwx_relaxation(d)
    traj = ase.io.read(d / "relax.traj", index=":")
    assert len(traj) >= 3
    run = read_run(d)
    assert Path(run.source).name == "relax.traj" and len(run) == len(traj)
    np.testing.assert_array_equal(run.positions, [a.positions for a in traj])        # ASE
    last_scf = ase.io.read(d / "espresso.pwo", format="espresso-out")                # ASE
    np.testing.assert_allclose(run.positions[-1], last_scf.positions, atol=1e-6)
    (w,) = [w for w in run.warnings if "single-point calculation" in w]
    assert "calculation = 'scf'" in w and "espresso.pwo" in w
    runs, failed = discover([d])
    assert [r.path for r in runs] == [str(d)] and not failed                      # one run
    assert run.not_relaxation is None                      # the optimiser's trajectory relaxes
    alone = read_run(d / "espresso.pwo")                   # the last scf alone: a single point
    assert alone.not_relaxation == ("a single-point calculation (calculation = 'scf'): one "
                                    "structure, no ionic steps")
    (d / "espresso.pwi").write_text((d / "espresso.pwi").read_text().replace(
        "&CONTROL", "&CONTROL\n   calculation = 'relax'"))        # a pw.x relaxation: its output
    assert Path(read_run(d).source).name == "espresso.pwo"


def test_a_vasp_single_point_beside_a_trajectory(tmp_path):
    """The same rule for VASP (ASE's Vasp calculator writes INCAR without NSW): a genuine one-step
    vasprun.xml (ASE's test data) with INCAR of NSW unset, beside a trajectory, gives the
    trajectory; with NSW = 40 and IBRION = 2 in INCAR the vasprun.xml is the run."""
    d = tmp_path / "ase_vasp"
    d.mkdir()
    shutil.copy(REPO / "tests" / "data" / "vasp" / "vasprun_pstress.xml", d / "vasprun.xml")
    (d / "INCAR").write_text("ENCUT = 400\nISMEAR = 0\n")
    ase.io.write(d / "opt.traj", [ase.io.read(d / "vasprun.xml")] * 2)
    run = read_run(d)
    assert Path(run.source).name == "opt.traj" and len(run) == 2
    assert any("single-point calculation (NSW unset)" in w for w in run.warnings)
    (d / "INCAR").write_text("NSW = 40\nIBRION = 2\n")
    assert Path(read_run(d).source).name == "vasprun.xml"


@pytest.mark.parametrize("path, calculation", [
    (PUB / "qe_testsuite_md" / "benchmark.out.git.inp=md.in.args=1.gz", "md"),
    (PUB / "qe_testsuite_langevin" / "benchmark.out.git.inp=langevin.in.gz", "md"),
    (QE.parent / "qe_dynamics" / "vc_md" / "pw.out", "vc-md"),
    (QE.parent / "qe_dynamics" / "vc_relax_damped" / "pw.out", "vc-relax")])
def test_pwx_dynamics_without_its_input_is_told_from_the_output(tmp_path, path, calculation):
    """A pw.x output read without its input says what it ran in the lines pw.x prints (QE's
    PW/src/dynamics_module.f90 and vcsmd.f90): QE's own test-suite outputs of a Verlet and a
    Langevin molecular dynamics run, and real pw.x 6.7 runs made here of vc-md and of a vc-relax
    by damped cell dynamics (both print "Entering Dynamics;" every step; only the relaxation
    prints "... Damped Cell Dynamics Minimization:" first). The dynamics get the "not a
    relaxation" warning; the damped relaxation does not. Frames: as many as ASE's reader gives."""
    alone = tmp_path / path.name
    shutil.copy(path, alone)
    run = read_run(alone)
    assert run.code_settings["calculation"] == calculation
    assert len(run) == len(ase.io.read(alone, index=":", format="espresso-out"))     # ASE
    warned = [w for w in run.warnings if "not a relaxation" in w]
    assert bool(warned) == (calculation != "vc-relax")
    if path.parent.parent.name == "qe_dynamics":       # with its input: the input's calculation
        assert read_run(path).code_settings["settings_from"] == "pw.in"
        assert read_run(path).code_settings["calculation"] == calculation


NEB = PUB / "vasp544_neb"        # genuine VASP 5.4.4 (VTST) nudged-elastic-band folders, IMAGES = 3


def _neb_campaign(tmp_path) -> Path:
    """aiida-vasp's NEB folders as VASP leaves them: the band's own (damaged) vasprun.xml beside the
    parent INCAR, the end points 00/ and 04/ with POSCAR alone, the images 01/-03/ with output."""
    camp = tmp_path / "camp"
    shutil.copytree(NEB, camp / "neb")
    _unzip(PUB / "broken" / "aiida_vasp_neb_damaged" / "vasprun.xml.gz", tmp_path / "xml")
    shutil.copy(tmp_path / "xml" / "vasprun.xml", camp / "neb")
    return camp


def test_a_neb_band_is_read_as_its_images_not_as_relaxations(tmp_path):
    """A nudged-elastic-band calculation as VASP lays it out (INCAR with IMAGES = 3 in the parent,
    images 01-03 and fixed end points 00, 04: VASP's IMAGES tag, common practice; the genuine
    aiida-vasp folders of tests/data/public). Before: the parent was a failed run (its vasprun.xml,
    written by the images together, is damaged), the end points two one-structure runs 'kept',
    and the images three relaxations. Now: the images are the runs, each with every ionic step
    ASE's OUTCAR reader gives and the warning that it is no relaxation (its own OUTCAR says it
    ran the NEB: VTST's "CHAIN: Running the NEB"); the parent and the end points are no runs, and
    inspecting the parent says why in one line."""
    camp = _neb_campaign(tmp_path)
    runs, failed = discover([camp])
    assert [r.id for r in runs] == ["camp/neb/01", "camp/neb/02", "camp/neb/03"] and failed == []
    for i in ("01", "02", "03"):
        run = read_run(camp / "neb" / i)
        out = _unzip(NEB / i / "OUTCAR.gz", tmp_path / f"o{i}")
        ref = ase.io.read(out, index=":", format="vasp-out")                             # ASE
        assert len(run) == len(ref) == 23
        np.testing.assert_allclose(run.positions, [a.positions for a in ref], atol=1e-8, rtol=0)
        assert "CHAIN: Running the NEB" in out.read_text()       # VTST: the file says it is NEB
        assert run.code_settings["IMAGES"] == 3
        assert run.code_settings["neb_image"] == f"folder {i} of IMAGES = 3"
        assert run.code_settings["IBRION"] == 3                  # from the OUTCAR itself
        (w,) = [w for w in run.warnings if "not a relaxation" in w]
        assert f"a nudged-elastic-band image (folder {i} of IMAGES = 3)" in w
        assert "compares the first and last frames" in w
    with pytest.raises(InputError) as err:
        read_run(camp / "neb")
    msg = str(err.value)
    assert "parent folder of a nudged-elastic-band calculation (INCAR: IMAGES = 3)" in msg
    assert "images 01 to 03 are runs of their own" in msg and "vasprun.xml" in msg
    assert "\n" not in msg
    assert len(read_run(camp / "neb" / "00")) == 1           # an end point asked for: its POSCAR
    import time
    from driftwatch.errors import NotARunError
    from driftwatch.live import follow
    t0 = time.monotonic()
    with pytest.raises(NotARunError) as err:   # following the parent stops at once, saying why
        follow(camp / "neb", idle=60, poll=0.1, quiet=True)
    assert time.monotonic() - t0 < 30 and "nudged-elastic-band" in str(err.value)
    rec = follow(camp / "neb" / "03", idle=60, poll=0.1, quiet=True)      # an image: to its end
    assert rec["live"]["ended"].startswith("end marker") and rec["run"]["n_frames"] == 23
    assert rec["run"]["not_relaxation"].startswith("a nudged-elastic-band image (folder 03")
    result = _quiet_audit([camp], tmp_path / "out", workers=1)
    assert result["analysed"] == 3 and result["failed"] == []
    assert [x["run"] for x in result["not_relaxation"]] == ["camp/neb/01", "camp/neb/02",
                                                            "camp/neb/03"]
    import csv
    with open(tmp_path / "out" / "campaign.csv", newline="") as fh:
        col = {r["run"]: r["not_relaxation"] for r in csv.DictReader(fh)}
    from ase.db import connect
    with connect(tmp_path / "out" / "runs.db") as db:
        kv = {row.run_id: row.get("not_relaxation") for row in db.select()}
    assert col == kv and col["camp/neb/03"].startswith("a nudged-elastic-band image (folder 03")
    rec = _record_of(tmp_path / "out", "neb/02/OUTCAR.gz")
    assert any("nudged-elastic-band image (folder 02" in w for w in rec["run"]["warnings"])
    assert rec["run"]["not_relaxation"].startswith("a nudged-elastic-band image (folder 02")
    (camp / "neb" / "INCAR").write_text((camp / "neb" / "INCAR").read_text() + "# edited\n")
    again = _quiet_audit([camp], tmp_path / "out", workers=1)   # the images read the parent INCAR
    assert again["analysed"] == 3 and again["cached"] == 0
    audit([camp], tmp_path / "out", progress="off")                 # the report marks them
    index = (tmp_path / "out" / "report" / "index.html").read_text()
    assert index.count(">not a relaxation</span>") == 3 and "<th>not relaxations</th>" in index
    assert ("(0 of 0 relaxations have a tolerance spectrum; 3 runs that are no relaxation are "
            "left out).") in index
    page = (tmp_path / "out" / "report" / "runs" / "camp_neb_01.html").read_text()
    assert "a nudged-elastic-band image (folder 01 of IMAGES = 3)" in page


def test_neb_images_not_run_and_end_points_that_ran(tmp_path):
    """An image folder with its POSCAR and no output (a band not run yet) is a failed entry saying
    so, not a one-structure run; an end point that holds a relaxation of its own (here the genuine
    relax1 vasprun.xml of pymatgen-db, as a user may relax an end point in place) is a run. A
    folder laid out like a band whose INCAR sets no IMAGES is no band: its folders are read as
    before, each image still marked by its own OUTCAR (VTST prints "CHAIN: Running the NEB")."""
    camp = _neb_campaign(tmp_path)
    for f in ("OUTCAR.gz", "CONTCAR"):
        (camp / "neb" / "02" / f).unlink()
    shutil.copy(RELAX1 / "vasprun.xml.gz", camp / "neb" / "04")
    runs, failed = discover([camp])
    assert [r.id for r in runs] == ["camp/neb/01", "camp/neb/03", "camp/neb/04"]
    (entry,) = failed
    assert entry["run"] == "camp/neb/02"
    assert "image 02 of a nudged-elastic-band calculation (../INCAR: IMAGES = 3) with POSCAR" in \
        entry["error"] and "a job not run yet" in entry["error"]
    with pytest.raises(InputError) as err:
        read_run(camp / "neb" / "02")
    assert str(err.value) == entry["error"]
    end = read_run(camp / "neb" / "04")          # read as its own files say (IBRION = 2)
    assert end.code_settings["IBRION"] == 2 and "neb_image" not in end.code_settings
    assert not [w for w in end.warnings if "not a relaxation" in w]
    (camp / "neb" / "INCAR").write_text("IBRION = 3\nNSW = 50\n")          # no IMAGES: no band
    runs, failed = discover([camp])
    assert "camp/neb/00" in [r.id for r in runs]
    # ... but VTST's OUTCAR says it runs the NEB, as images copied away from their band show
    assert read_run(camp / "neb" / "01").not_relaxation.startswith(
        "a nudged-elastic-band image (VTST's NEB, as its OUTCAR says)")
    retrieved = tmp_path / "retrieved" / "01"                # a workflow's retrieved outputs
    retrieved.mkdir(parents=True)
    shutil.copy(NEB / "01" / "OUTCAR.gz", retrieved)
    assert read_run(retrieved).not_relaxation.startswith("a nudged-elastic-band image (VTST's")
    relax = read_run(PUB / "vasp620_nelm")                    # a relaxation's OUTCAR: no mark
    assert relax.not_relaxation is None


def _custodian_job(tmp_path: Path, *, continued: bool, cut: bool = False) -> Path:
    """A VASP job as custodian leaves it after one correction: the genuine first attempt
    (pymatgen-db's relax1, 60 ionic steps) archived by custodian's own ``backup`` into
    error.1.tar.gz (custodian.utils.backup with custodian's VASP_BACKUP_FILES), then the rerun's
    outputs (the genuine relax2, 5 steps, whose POSCAR is relax1's CONTCAR, byte for byte).
    ``continued``: the correction copied CONTCAR to POSCAR (custodian's handlers for ionic
    errors); else the rerun started again from the job's input POSCAR. ``cut``: the archived
    vasprun.xml ends mid-run, as a killed attempt leaves it."""
    from custodian.utils import backup
    from custodian.vasp.handlers import VASP_BACKUP_FILES
    job = tmp_path / "job"
    job.mkdir(parents=True)
    for f in RELAX1.iterdir():
        data = f.read_bytes()
        name = f.name[:-3] if f.name.endswith(".gz") else f.name
        (job / name).write_bytes(gzip.decompress(data) if f.name.endswith(".gz") else data)
    if cut:
        raw = (job / "vasprun.xml").read_bytes()
        (job / "vasprun.xml").write_bytes(raw[:raw.find(b"<calculation>", len(raw) // 2) + 500])
    backup(VASP_BACKUP_FILES, directory=str(job))
    if continued:
        shutil.copy(job / "CONTCAR", job / "POSCAR")
    relax2 = PUB / "stage_folders" / "relax2"
    for f in relax2.iterdir():
        if f.name != "POSCAR" or continued:
            data = f.read_bytes()
            name = f.name[:-3] if f.name.endswith(".gz") else f.name
            (job / name).write_bytes(gzip.decompress(data) if f.name.endswith(".gz") else data)
    return job


def test_custodian_archives_of_earlier_attempts_are_the_runs_first_stages(tmp_path):
    """custodian archives a failed attempt (error.N.tar.gz) and reruns, often from the attempt's
    CONTCAR. Before, only the rerun's 5 steps were read: a symmetry change during the first 60
    was invisible. Now the archive is the run's first stage: 65 frames equal to pymatgen's
    Vasprun of relax1 then relax2 (the archived file and the rerun's), steps numbered on, the
    stages named; ``job@error.1`` reads the attempt alone; the cache keys on the archive."""
    job = _custodian_job(tmp_path / "a", continued=True)
    run = read_run(job)
    assert [(s["name"], s["n_frames"]) for s in run.stages] == [("error.1", 60), ("final", 5)]
    v1, v2 = _vasprun(RELAX1 / "vasprun.xml.gz"), _vasprun(job / "vasprun.xml")     # pymatgen
    _same_frames(run, v1.structures + v2.structures, atol=1e-8)
    assert run.steps.tolist() == list(range(65)) and not run.warnings
    assert len(read_run(f"{job}@error.1")) == 60
    files = [p for kind, p, _ in run.inputs if kind == "file"]
    assert str(job / "error.1.tar.gz") in files and all(p.startswith(str(job)) for p in files)
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", str(job)],
                          capture_output=True, text=True, timeout=300)
    said = "stages: error.1 (steps 0-59), final (steps 60-64)"
    assert proc.returncode == 0 and said in proc.stdout                 # inspect and the report
    audit([job], tmp_path / "out", progress="off")
    (page,) = (tmp_path / "out" / "report" / "runs").glob("*.html")
    assert f"<th>stages</th><td>{said.split(': ', 1)[1]}</td>" in page.read_text()


def test_custodian_archives_that_are_no_stage(tmp_path):
    """An attempt the rerun started again from the job's input POSCAR (custodian changed only the
    electronic settings) is not part of the trajectory: the rerun's steps alone, and a warning
    naming the archive. A killed attempt (its archived vasprun.xml cut mid-run) gives the steps
    it completed, with the truncation named in the archive."""
    job = _custodian_job(tmp_path / "b", continued=False)
    run = read_run(job)
    assert len(run) == 5 and run.stages == ()
    (w,) = [w for w in run.warnings if "error.1.tar.gz" in w]
    assert "an earlier attempt of this job (custodian's archive) not read" in w
    assert "started from another structure than its CONTCAR" in w
    assert len(read_run(f"{job}@error.1")) == 60          # asked for alone: the attempt's steps
    run = read_run(_custodian_job(tmp_path / "c", continued=True, cut=True))
    first = run.stages[0]
    assert first["name"] == "error.1" and 0 < first["n_frames"] < 60
    assert any("error.1.tar.gz" in w and "truncated" in w for w in run.warnings)
    job = _custodian_job(tmp_path / "d", continued=True)      # a damaged archive costs its steps
    raw = (job / "error.1.tar.gz").read_bytes()
    for damaged in (raw[:len(raw) // 2], b"not an archive"):
        (job / "error.1.tar.gz").write_bytes(damaged)
        run = read_run(job)
        assert len(run) == 5
        (w,) = [w for w in run.warnings if "error.1.tar.gz" in w]
        assert "not read: damaged" in w and "\n" not in w


def test_single_point_calculations_are_no_relaxation_but_a_static_stage_keeps_one(tmp_path):
    """A single point (VASP NSW <= 0 or IBRION = -1, VASP's documentation; pw.x calculation 'scf':
    common practice) has one structure and no ionic step: its 'kept' is no verdict on a
    relaxation, and it is marked so (the genuine ASE-test-data vasprun_pstress.xml, NSW = 0; a
    phonopy-style displaced copy would otherwise read as a run with flags). A relaxation whose
    folder ends with a static stage (tests/vasp_gen.py, modelled on genuine vasprun.xml files:
    relax1 IBRION = 2, then a one-frame IBRION = -1 vasprun.xml) stays a relaxation."""
    import vasp_gen
    run = read_run(REPO / "tests" / "data" / "vasp" / "vasprun_pstress.xml")
    assert len(run) == 1 and run.code_settings["NSW"] == 0
    assert run.not_relaxation == ("a single-point calculation (NSW = 0, IBRION = -1): one "
                                  "structure, no ionic steps")
    t = vasp_gen.drifting_layer(6)
    job = tmp_path / "job"
    job.mkdir()
    vasp_gen.write_vasprun(job / "vasprun.xml.relax1", t, ibrion=2)
    last = vasp_gen.Trajectory(t.symbols, t.cells[-1:], t.frac[-1:], t.energies[-1:],
                               t.forces[-1:], t.stress_kb[-1:])
    vasp_gen.write_vasprun(job / "vasprun.xml", last, ibrion=-1)
    run = read_run(job)
    assert len(run) == 7 and [s["name"] for s in run.stages] == ["relax1", ""]
    assert run.not_relaxation is None and not [w for w in run.warnings if "not a relax" in w]
    alone = read_run(job / "vasprun.xml")
    assert alone.not_relaxation.startswith("a single-point calculation (IBRION = -1)")


# ---------------------------------------------------------------- atomate's inputs/ outputs/ layout
ATOMATE = ("atomate_si_static", "atomate_double_relax", "atomate_static_stages",
           "atomate_conventional_si")


def _atomate_campaign(tmp_path) -> Path:
    camp = tmp_path / "camp"
    for name in ATOMATE:
        shutil.copytree(PUB / name, camp / name)
    return camp


def test_inputs_beside_outputs_are_the_runs_inputs_not_runs(tmp_path):
    """atomate's genuine job folders keep the job's inputs in `inputs/` beside its `outputs/`.
    Before: every `inputs/` (INCAR, POSCAR, KPOINTS) was a failed run "not run yet" and a POSCAR
    alone in `inputs/` a one-frame run "kept" that moved the campaign symprec. Now the runs are the
    four `outputs/`, each with every ionic step pymatgen and ASE read; an `inputs/` beside an
    `outputs/` that holds no run stays a job not run."""
    from driftwatch.errors import NotARunError
    camp = _atomate_campaign(tmp_path)
    runs, failed = discover([camp])
    assert failed == [] and sorted(r.id for r in runs) == [f"camp/{n}/outputs" for n in sorted(ATOMATE)]
    s = audit([camp], tmp_path / "out", workers=1, progress="off")
    assert s["runs"] == 4 and s["failed"] == [] and s["skipped"] == []
    pages = tmp_path / "out" / "report" / "runs"
    page = (pages / "camp_atomate_double_relax_outputs.html").read_text()
    assert "<b>Cell unchanged</b>: every frame has the same cell. The cell did not move although " \
           "ISIF = 3 let it" in page and "Lattice (constant in every frame)" in page
    page = (pages / "camp_atomate_conventional_si_outputs.html").read_text()
    assert "<b>Supercell</b>: The cell is a supercell" in page
    static = read_run(camp / "atomate_si_static" / "outputs")
    _same_frames(static, _vasprun(camp / "atomate_si_static" / "outputs" / "vasprun.xml.gz").structures)
    double = read_run(camp / "atomate_double_relax" / "outputs")                 # OUTCARs only
    ase_frames = [a for st in ("relax1", "relax2") for a in ase.io.read(
        camp / "atomate_double_relax" / "outputs" / f"OUTCAR.{st}.gz", index=":", format="vasp-out")]
    assert len(double) == len(ase_frames) == 2
    np.testing.assert_allclose(double.cells, [a.cell.array for a in ase_frames], atol=1e-8)
    with pytest.raises(NotARunError) as err:
        read_run(camp / "atomate_si_static" / "inputs")
    assert "outputs are in outputs/ beside it" in str(err.value)
    assert str(camp / "atomate_si_static" / "outputs") in str(err.value)
    with pytest.raises(NotARunError):
        read_run(camp / "atomate_static_stages" / "inputs")                      # a POSCAR alone
    with pytest.raises(InputError) as err:                   # the job folder names its run folder
        read_run(camp / "atomate_si_static")
    assert "run folders in it: outputs/" in str(err.value)
    # an outputs/ holding no run: its inputs/ are a job not run yet, as before
    for f in (camp / "atomate_si_static" / "outputs").iterdir():
        f.unlink()
    runs, failed = discover([camp / "atomate_si_static"])
    assert runs == [] and [f["run"] for f in failed] == ["atomate_si_static/inputs"]
    assert "a job not run yet" in failed[0]["error"]


def test_atomate_runs_read_right_settings_notes_and_flags(tmp_path):
    """What the genuine atomate runs say, each checked against the files as pymatgen/ASE read them:
    * the double relaxation (ISIF = 3, IBRION = 2 in its OUTCARs) kept its cell over 1 + 1 steps:
      the note says the cell did not move although ISIF = 3 let it (was: "the lattice cannot
      drift"), and its OUTCARs (VASP built with profiling: 33.7 kB after "General timing and
      accounting", ending "Profiling took ... seconds") are complete, not "incomplete";
    * the static runs (NSW = 0) are no relaxation, get no held-by-code flag (rerunning a single
      point with ISYM = 0 tests nothing) and no warning that the INCAR's IBRION = 1 became -1
      (VASP sets IBRION = -1 when NSW = 0, as the genuine OUTCAR prints);
    * eight-atom diamond Si in its cubic cell (ISIF = 3): the cell's lattice is cP, spglib's
      translations make it cF (Fd-3m, International Tables): a supercell note says so."""
    from driftwatch import analyze
    from driftwatch.live import _end_marker
    camp = _atomate_campaign(tmp_path)
    double = read_run(camp / "atomate_double_relax" / "outputs")
    head = gzip.open(camp / "atomate_double_relax" / "outputs" / "OUTCAR.relax1.gz", "rt").read()
    assert "ISIF   =      3" in head and "Profiling took" in head[-200:]
    assert not [w for w in double.warnings if "incomplete" in w], double.warnings
    plain = tmp_path / "OUTCAR"                    # a live job's OUTCAR is plain text
    plain.write_text(head)
    assert _end_marker(plain, "vasp-out") == "Profiling took ... seconds"
    rec = analyze(double)
    assert rec["run"]["fixed_cell"] and rec["run"]["code_settings"]["ISIF"] == 3
    assert rec["summary"]["lattice_note"].startswith("the cell did not move although ISIF = 3 let it")
    assert "held-by-code" in {f["code"] for f in rec["flags"]}        # a relaxation under ISYM = 2

    static = read_run(camp / "atomate_si_static" / "outputs")
    rec = analyze(static)
    assert rec["run"]["not_relaxation"].startswith("a single-point calculation (NSW = 0")
    assert rec["summary"]["lattice_note"] == "one frame: nothing to compare it with, no drift can be seen"
    assert "held-by-code" not in {f["code"] for f in rec["flags"]}
    stages = read_run(camp / "atomate_static_stages" / "outputs")
    head = gzip.open(camp / "atomate_static_stages" / "outputs" / "OUTCAR.relax1.gz", "rt").read()
    assert "IBRION =     -1" in head and "IBRION = 1" in (
        camp / "atomate_static_stages" / "outputs" / "INCAR.relax1").read_text()
    assert not [w for w in stages.warnings if "sets IBRION" in w], stages.warnings

    import spglib
    si8 = read_run(camp / "atomate_conventional_si" / "outputs")
    cell = (si8.cells[-1], np.linalg.solve(si8.cells[-1].T, si8.positions[-1].T).T, si8.numbers)
    ds = spglib.get_symmetry_dataset(cell, symprec=1e-3)
    assert ds.number == 227 and len(si8.numbers) == 8                  # spglib: Fd-3m, 8 atoms
    rec = analyze(si8)
    sc = rec["summary"]["supercell"]
    assert (sc["type"], sc["cell_type"]) == ("cF", "cP") and rec["summary"]["final"]["type"] == "cP"
    assert sc["multiplicity"] == 4 == len(si8.numbers) // len(           # spglib's primitive cell
        spglib.find_primitive(cell, symprec=1e-3)[2])
    assert "the structure's lattice is cF (face-centred cubic), the cell's cP" in sc["text"]
    assert analyze(static)["summary"]["supercell"] is None               # the primitive Si2 cell
    # the primitive Si2 cell sheared by 1e-4: cF within the lattice column's 1e-3 Å, not within
    # the 1e-4 Å the translation lattice is judged at; no pure translation, so no supercell note
    # (it once said "the structure's lattice is aP, the cell's cF")
    from ase import Atoms
    shear = np.eye(3) + 1e-4 * np.eye(3)[:, [1, 2, 0]].T * np.eye(3)[0][:, None]
    sheared = Atoms(numbers=static.numbers, positions=static.positions[-1] @ shear.T,
                    cell=static.cells[-1] @ shear.T, pbc=True)
    ase.io.write(tmp_path / "sheared.traj", [sheared, sheared])
    rec = analyze(tmp_path / "sheared.traj")
    prim = rec["frames"][-1]["symmetry"]["primitive"]
    assert rec["summary"]["final"]["type"] == "cF" and prim["type"] == "aP"
    assert prim["multiplicity"] == 1 and rec["summary"]["supercell"] is None
    # the note's type is judged as the lattice columns judge a type (rules.lattice.within): the
    # bundled B05 (an EMT relaxation of an invented 4-atom fcc cell) ends 2.7e-4 Å from cF in its
    # primitive cell, tI within the atoms-break-lattice rule's 1e-4 Å; the note once said "tI"
    from driftwatch import lattice3d
    b05 = analyze(REPO / "example_runs" / "B05_emt_bfgs.extxyz")
    last = read_run(REPO / "example_runs" / "B05_emt_bfgs.extxyz")
    c, p = last.cells[-1], last.positions[-1]
    lat, _, _ = spglib.standardize_cell((c, np.linalg.solve(c.T, p.T).T, last.numbers),
                                        to_primitive=True, no_idealize=True, symprec=1e-3)
    dfm = lattice3d.deformation(lat)
    assert 1e-4 < dfm["cF"] < 1e-3 and b05["frames"][-1]["symmetry"]["primitive"]["type"] == "tI"
    assert b05["summary"]["supercell"]["type"] == "cF"
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "inspect",
                           str(camp / "atomate_conventional_si" / "outputs")],
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0 and "note: the cell is a supercell" in proc.stdout


def test_a_structure_alone_is_no_relaxation_and_left_out_of_the_advice(tmp_path):
    """A folder with a POSCAR and nothing else (atomate's genuine inputs/POSCAR, moved alone) is read
    as one structure, marked as such, and left out of the campaign's tolerance advice."""
    camp = tmp_path / "camp"
    (camp / "structure").mkdir(parents=True)
    shutil.copy(PUB / "atomate_static_stages" / "inputs" / "POSCAR", camp / "structure")
    shutil.copytree(PUB / "atomate_double_relax" / "outputs", camp / "relax")
    run = read_run(camp / "structure")
    assert len(run) == 1 and run.not_relaxation == ("a single structure (POSCAR): an input or a "
                                                    "result, no ionic steps")
    assert [w.split(": ", 1)[1] for w in run.warnings if "not a relaxation" in w] == [
        f"not a relaxation: {run.not_relaxation}; one frame: no drift can be measured from it alone"]
    s = _quiet_audit([camp], tmp_path / "out", workers=1)
    assert [x["run"] for x in s["not_relaxation"]] == ["camp/structure"]
    assert s["tolerance"]["left_out"] == 1 and s["tolerance"]["runs_considered"] == 1


def test_copies_of_a_run_folder_are_named(tmp_path):
    """A run folder copied beside itself (a backup, as atomate's test data keeps `outputs_bk/`) is
    read twice; the audit names the copies (same steps, energies, forces, settings and final
    structure), also from the cache, and a different run is none of them."""
    camp = tmp_path / "camp"
    shutil.copytree(DOUBLE, camp / "run")
    shutil.copytree(DOUBLE, camp / "run_bk")
    shutil.copytree(PUB / "atomate_double_relax" / "outputs", camp / "other")
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                           str(tmp_path / "out")], capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    summary = json.loads((tmp_path / "out" / "campaign.json").read_text())
    assert summary["copies"] == [["camp/run", "camp/run_bk"]]
    assert ("copies: 1 group of runs that read the same frames (camp/run = camp/run_bk; all in "
            "campaign.json copies): a folder kept twice, a rerun, two files of one run, one-frame "
            "runs of one start; each is counted above once per copy") in proc.stdout
    index = (tmp_path / "out" / "report" / "index.html").read_text()
    assert "copies (runs that read the same frames)" in index and "camp/run = camp/run_bk" in index
    said = "3 runs: 3 with a verdict, 0 failed (3 read now, 0 from the cache)"   # one line, twice
    assert f"\n{said} in " in proc.stdout and f"audit summary</th><td>{said}</td>" in index
    again = _quiet_audit([camp], tmp_path / "out", workers=1)
    assert again["cached"] == 3 and again["copies"] == summary["copies"]
    for k in range(2, 6):                    # many copies: the line names three of a group
        shutil.copytree(DOUBLE, camp / f"run_bk{k}")
    many = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                           str(tmp_path / "many"), "--no-report"], capture_output=True, text=True,
                          timeout=600).stdout
    line = next(ln for ln in many.splitlines() if ln.startswith("copies: "))
    assert "(camp/run = camp/run_bk = camp/run_bk2 (and 3 more); all in campaign.json copies)" \
        in line and len(line) < 250


def test_a_pwx_crash_is_a_failed_run_that_quotes_the_crash_file(tmp_path):
    """aiida-quantumespresso's genuine crashed pw.x runs (an empty output beside pw.x's CRASH file)
    were no run at all: not listed, not failed, gone from the audit. Now each is a failed run that
    quotes pw.x's own error; an output cut short beside a CRASH file quotes it too (a real pw.x
    output of tests/data/qe cut after some steps)."""
    crashed = PUB / "broken" / "aiida_pw_crashed"
    s = _quiet_audit([crashed], tmp_path / "out", workers=1)
    errors = {f["run"]: f["error"] for f in s["failed"]}
    assert sorted(errors) == ["aiida_pw_crashed/vcrelax_failed_fft_significant_volume_contraction",
                              "aiida_pw_crashed/vcrelax_failed_symmetry_not_orthogonal"]
    assert errors["aiida_pw_crashed/vcrelax_failed_symmetry_not_orthogonal"].endswith(
        "pw.x crashed (CRASH says 'Error in routine checkallsym (2): not orthogonal operation') "
        "and left no pw.x output with an ionic step")
    assert ("from scale_h : error # 1 Not enough space allocated for radial FFT" in
            errors["aiida_pw_crashed/vcrelax_failed_fft_significant_volume_contraction"])
    with pytest.raises(InputError, match="pw.x crashed"):
        read_run(crashed / "vcrelax_failed_symmetry_not_orthogonal")
    cut = tmp_path / "cut"
    cut.mkdir()
    text = (QE / "layer_oblique_to_hex" / "pw.out").read_text()
    (cut / "pw.out").write_text(text[:len(text) // 2])
    shutil.copy(crashed / "vcrelax_failed_symmetry_not_orthogonal" / "CRASH", cut)
    (w,) = [w for w in read_run(cut).warnings if "truncated" in w]
    assert w.endswith("pw.x's CRASH file beside it says 'Error in routine checkallsym (2): not "
                      "orthogonal operation'")


def test_two_calculations_on_one_structure_are_two_runs(tmp_path):
    """pymatgen-io-espresso's genuine BAs pair (QE 7.1): an scf run and a second scf run on a dense
    k-path, side by side. The second starts where the first ended, as a stage would, but the first
    moved nothing: they are two single points, not one run of two stages (they were: 'kept', with
    stages scf.out and bands.out). Each reads as ASE reads it; a relaxation continued by a static
    run stays one run (the restart fixtures above)."""
    folder = PUB / "qe71_scf_pair"
    runs, failed = discover([folder])
    assert failed == [] and sorted(r.id for r in runs) == ["qe71_scf_pair/bands.out.gz",
                                                            "qe71_scf_pair/scf.out.gz"]
    for name in ("scf.out.gz", "bands.out.gz"):
        run = read_run(folder / name)
        with gzip.open(folder / name, "rt") as fh:
            ref = ase.io.read(fh, index=":", format="espresso-out")                     # ASE
        assert len(run) == len(ref) == 1 and run.stages == ()
        assert run.energies[0] == pytest.approx(ref[0].get_potential_energy(), rel=1e-12)
        assert run.not_relaxation.startswith("a single-point calculation")
    with pytest.raises(InputError, match="ambiguous run folder: it holds 2 runs"):
        read_run(folder)


def test_a_gain_of_pure_translations_is_said_as_such():
    """Quantum ESPRESSO's test-suite vc-relax5 (As2, genuine pw.x output): the group stays R-3m
    while spglib's operations double from step 9 (the primitive cell halves: 2 atoms -> 1, spglib
    checked here). The verdict gives both operation counts and the flag says pure translations were
    gained (it said "R-3m (166) -> R-3m (166) ... R-3m contains R-3m"); the loose-symprec flag
    names what spglib judged: the cell's lattice alone."""
    import spglib
    from driftwatch import analyze
    run = read_run(PUB / "qe_testsuite_vc_relax5")
    cells = [(c, np.linalg.solve(c.T, p.T).T, run.numbers) for c, p in zip(run.cells, run.positions)]
    ops = [len(spglib.get_symmetry_dataset(c, symprec=1e-3).rotations) for c in cells]
    prim = [len(spglib.find_primitive(c, symprec=1e-3)[2]) for c in cells]
    assert {spglib.get_symmetry_dataset(c, symprec=1e-3).number for c in cells} == {166}
    assert ops.index(24) == 9 and set(ops[:9]) == {12} and prim[8:10] == [2, 1]     # spglib
    rec = analyze(run)
    assert rec["summary"]["verdict"]["text"].endswith(        # (spglib holds 24 after it, and
        "group gained R-3m (166, 12 operations) -> R-3m (166, 24 operations) at symprec 0.001 Å "
        "from step 9")            # the default asked every later step: 8 or fewer remained)
    (gain,) = [f for f in rec["flags"] if f["code"] == "group-gained"]
    assert gain["message"].endswith("the same space-group type with more operations: pure "
                                    "translations gained (a smaller primitive cell)")
    from driftwatch import records
    v = records.verdict_fields(rec)          # the CSV, runs.db, tables and report read these
    assert (v["group_initial"], v["group_final"]) == ("R-3m (166, 12 operations)",
                                                      "R-3m (166, 24 operations)")
    loose = [f["message"] for f in rec["flags"] if f["code"] == "loose-symprec"]
    assert all("calls the cell's lattice (one atom per cell)" in m for m in loose)


def test_campaign_counts_a_change_of_operations_as_a_change(tmp_path):
    """The campaign's "verdict changes between symprec a and b" compares the group and its
    operation count, as each run's verdict does: vc-relax5's final structure is R-3m with 12
    operations at 1e-5 Å and with 24 at 1e-3 Å (spglib), one change."""
    import spglib
    run = read_run(PUB / "qe_testsuite_vc_relax5")
    c, p = run.cells[-1], run.positions[-1]
    cell = (c, np.linalg.solve(c.T, p.T).T, run.numbers)
    got = [spglib.get_symmetry_dataset(cell, symprec=x) for x in (1e-5, 1e-3)]
    assert [(d.number, len(d.rotations)) for d in got] == [(166, 12), (166, 24)]    # spglib
    s = audit([PUB / "qe_testsuite_vc_relax5"], tmp_path / "out", workers=1, progress="off")
    camp = json.loads((tmp_path / "out" / "campaign.json").read_text())
    first = camp["tolerance"]["changes"][0]
    assert (first["low"], first["high"], first["runs"]) == (1e-5, 1e-3, 1) and s["runs"] == 1
    # `tolerance` names the change with its counts, as the run page does (it printed R-3m (166)
    # -> R-3m (166))
    tol = subprocess.run([sys.executable, "-m", "driftwatch", "tolerance",
                          str(PUB / "qe_testsuite_vc_relax5")], capture_output=True, text=True,
                         check=True).stdout
    assert "breakpoint (group): R-3m (166, 12 operations) -> R-3m (166, 24 operations) " in tol
    # the report's index counts the same change (it had compared the group numbers only: 0)
    index = (tmp_path / "out" / "report" / "index.html").read_text(encoding="utf-8")
    table = index[index.index("Runs whose spglib group changes between common choices"):]
    row = re.search(r'<td class="num">1e-05 Å</td><td class="num">0\.001 Å</td>'
                    r'<td class="num">(\d+)</td>', table)
    assert row and row.group(1) == "1"


def test_atoms_line_names_the_most_symmetric_group_even_when_the_start_cannot_be_measured():
    """The bundled L09 (a fixed-cell EMT layer) gains cm2m (35) from p11m (4); its first frame's
    atoms cannot be paired by cm2m's operations. The atoms line names cm2m and says the start was
    not measured, instead of falling back to p11m with 'rms 0 Å at the start, 0 Å at the end'."""
    from driftwatch import analyze, records
    rec = analyze(read_run(Path(__file__).parents[1] / "example_runs" /
                           "L09_emt_fixed_square.traj"))
    at = rec["summary"]["atoms"]
    assert (at["group"], at["symbol"]) == (35, "cm2m") and "error" in at["start"]
    assert "the first frame could not be measured against it" in records.atoms_text(at)


def test_runs_that_ended_before_the_code_finished_are_unfinished(tmp_path):
    """A relaxation that stopped at its step limit or was cut short has a final structure that is
    no relaxed one: the record, campaign.csv, runs.db, the summary and the table say so (they looked
    like any other verdict). References are the files' own lines: aiida-vasp's genuine NSW = 5
    relaxation ran 5 steps and its OUTCAR never prints "reached required accuracy"; custodian's
    relax1 does; pw.x prints "The maximum number of steps has been reached." at nstep, and an MD run
    ends that way too without being unfinished."""
    import csv
    nelm = PUB / "vasp620_nelm"
    text = gzip.open(nelm / "OUTCAR.gz", "rt").read()
    assert "reached required accuracy" not in text and "NSW    =      5" in text
    for path in (nelm / "OUTCAR.gz", nelm / "vasprun.xml.gz", nelm):
        run = read_run(path)
        assert len(run) == 5 and run.unfinished == (
            "stopped at its step limit (VASP ran all NSW = 5 ionic steps and its OUTCAR does not "
            "say 'reached required accuracy')"), path
        assert any(w.endswith("; the final structure is not a relaxed one") for w in run.warnings)
    assert "reached required accuracy" in gzip.open(DOUBLE / "OUTCAR.relax1.gz", "rt").read()
    assert read_run(DOUBLE).unfinished is None
    first = QE / "restart_numbered" / "pw.out.1"
    assert "The maximum number of steps has been reached." in first.read_text()
    assert read_run(first).unfinished.startswith("stopped at its step limit (pw.x:")
    whole = read_run(QE / "restart_numbered")                          # the restart finished it
    assert whole.unfinished is None and not [w for w in whole.warnings if "unfinished" in w]
    # damped Wentzcovitch cell dynamics says it otherwise (QE's own test-suite, pw.x 7.2: the
    # vc-relax ran its nstep = 50 steps; QE's PW/src/move_ions.f90 prints this line at nstep)
    dampw = PUB / "qe_testsuite_vc_relax_scf"
    assert "cell_dynamics = 'damp-w'" in (dampw / "vc-relax-scf-1.in").read_text()
    assert "Maximum number of iterations reached, stopping" in gzip.open(
        next(dampw.glob("benchmark*")), "rt").read()
    run = read_run(dampw)
    assert len(run) == 50 and run.unfinished == (
        "stopped at its step limit (pw.x: 'Maximum number of iterations reached, stopping')")
    md = PUB / "qe_testsuite_md"
    assert "The maximum number of steps has been reached." in gzip.open(
        next(md.iterdir()), "rt").read() and read_run(md).unfinished is None
    camp = tmp_path / "camp"
    shutil.copytree(nelm, camp / "nelm")
    shutil.copytree(QE / "layer_oblique_to_hex", camp / "cut")
    whole = (camp / "cut" / "pw.out").read_text()
    (camp / "cut" / "pw.out").write_text(whole[:len(whole) // 2])
    shutil.copytree(QE / "layer_oblique_to_hex", camp / "done")
    shutil.copytree(QE / "restart_stage_folders" / "relax1", camp / "stopped")  # soft stop
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                           str(tmp_path / "out"), "--no-report"], capture_output=True, text=True,
                          timeout=600)
    assert proc.returncode == 0, proc.stderr
    summary = json.loads((tmp_path / "out" / "campaign.json").read_text())
    assert summary["unfinished"] == [
        {"run": "camp/cut", "why": "cut short: job killed or still running"},
        {"run": "camp/nelm", "why": "stopped at its step limit (VASP ran all NSW = 5 ionic steps "
                                    "and its OUTCAR does not say 'reached required accuracy')"},
        {"run": "camp/stopped", "why": "stopped on request (pw.x: 'Program stopped by user "
                                       "request': its <prefix>.EXIT stop file, written by a user "
                                       "or by driftwatch's soft stop)"}]
    assert ("unfinished: 3 runs (cut short 1, stopped at its step limit 1, stopped on request 1; "
            "column unfinished of campaign.csv): their final structures are not relaxed ones"
            ) in proc.stdout
    assert "* unfinished: cut short, damaged or unreadable after a step, or stopped at its " \
        "step or time limit, on request, on a code error or without converging;" in proc.stdout
    rows = {ln.split()[0]: ln.split()[2] for ln in proc.stdout.splitlines() if ln.startswith("camp/")}
    assert rows["camp/cut"].endswith("*") and rows["camp/nelm"].endswith("*")
    assert not rows["camp/done"].endswith("*") and "* unfinished:" in proc.stdout
    with open(tmp_path / "out" / "campaign.csv", newline="") as fh:
        col = {r["run"]: r["unfinished"] for r in csv.DictReader(fh)}
    from ase.db import connect
    with connect(tmp_path / "out" / "runs.db") as db:
        kv = {row.run_id: row.get("unfinished", "") for row in db.select()}
    assert col == kv and col["camp/done"] == ""
    one = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp / "nelm"), "-o",
                          str(tmp_path / "one"), "--no-report"], capture_output=True, text=True,
                         timeout=600)
    assert "\nunfinished: 1 run (stopped at its step limit 1;" in one.stdout, one.stdout[-800:]


@pytest.mark.parametrize("path, said", [
    (PUB / "qe_testsuite_vc_relax1" / "vc-relax1.in", "a pw.x input (pass its output, or the run "
                                                     "folder)"),
    (PUB / "atomate_si_static" / "inputs" / "INCAR", "a VASP INCAR (pass the run folder)"),
    (PUB / "broken" / "quacc_ph" / "run1.txt.gz", "an output of Quantum ESPRESSO's ph.x, which "
                                                  "driftwatch has no reader for; to include it: "
                                                  "nothing: phonons of one structure")])
def test_a_file_of_the_trade_that_holds_no_steps_is_named(path, said):
    """Genuine files users pass by mistake (QE's test-suite pw.x input, atomate's INCAR, quacc's
    ph.x output, as their first lines show) are named in the one-line error, not only "unknown
    format", and no format is advised (none would read them)."""
    head = (gzip.open(path, "rt") if path.suffix == ".gz" else open(path)).read(3000)
    assert any(m in head for m in ("&control", "&CONTROL", "ENCUT", "ISIF", "Program PHONON"))
    with pytest.raises(InputError) as err:
        read_run(path)
    assert said in str(err.value) and "--format" not in str(err.value)
    assert "\n" not in str(err.value)


def test_a_cell_that_only_shrinks_nears_no_type():
    """custodian's genuine nonconv folder: POSCAR and CONTCAR of one fcc Si cell, the second the
    first scaled by 0.4994 (same shape; spglib: Fd-3m at both ends). Every deformation halves with
    the cell, which once read as 'lattice-nearing hP (50 % of the way)'; measured against the
    lattice's size nothing is neared. A layer that really nears a type still flags it (the bundled
    L02 run: a real pw.x vc-relax of an invented layer, its cell nearly constant in size)."""
    import spglib
    from driftwatch import analyze
    folder = PUB / "custodian_nonconv"
    run = read_run(folder)
    assert run.kind == "end-points" and len(run) == 2
    ratio = run.cells[1] / np.where(run.cells[0] == 0, np.nan, run.cells[0])
    assert np.nanmax(np.abs(ratio - 0.49935)) < 1e-4                       # the same shape
    for c, p in zip(run.cells, run.positions):
        cell = (c, np.linalg.solve(c.T, p.T).T, run.numbers)
        assert spglib.get_symmetry_dataset(cell, symprec=1e-3).number == 227    # spglib
    rec = analyze(run)
    assert rec["flags"] == [] and rec["summary"]["verdict"]["direction"] == "kept"
    assert rec["summary"]["verdict"]["lattice"]["nearing"] is None
    near = analyze(REPO / "example_runs" / "L02_qe_vcrelax")
    assert near["summary"]["verdict"]["lattice"]["nearing"] == "oc"
    assert "lattice-nearing" in {f["code"] for f in near["flags"]}


def test_held_by_code_says_when_the_code_held_only_a_subgroup():
    """aiida-vasp's genuine spin-polarised Co4 (hcp) OUTCAR: VASP found 8 space group operations
    (the moments lower what it holds), spglib gives P6_3/mmc with 24 on the atoms alone. The flag
    said the code 'could not have lowered' the group; it held 8 of the 24, so 'kept' tests the
    other 16, and the flag now says so."""
    import spglib
    from driftwatch import analyze
    path = PUB / "vasp_magnetization" / "OUTCAR.gz"
    text = gzip.open(path, "rt").read()
    assert "Found  8 space group operations" in text
    run = read_run(path)
    c, p = run.cells[-1], run.positions[-1]
    ds = spglib.get_symmetry_dataset((c, np.linalg.solve(c.T, p.T).T, run.numbers), symprec=1e-3)
    assert ds.number == 194 and len(ds.rotations) == 24                               # spglib
    (flag,) = [f for f in analyze(run)["flags"] if f["code"] == "held-by-code"]
    assert len(run) == 1 and flag["value"] == 8                  # the OUTCAR holds one ionic step
    assert ("the one structure read has P6_3/mmc (194, 24 operations); with one frame nothing was "
            "tested") in flag["message"]
    two = read_run(path)                    # the same structure twice: a run that kept the group
    from driftwatch.adapters.run import Frame, ReadContext, collect
    fr = [Frame(cell=two.cells[0], positions=two.positions[0], numbers=two.numbers, pbc=two.pbc,
                step=k) for k in (0, 1)]
    ctx = ReadContext(str(path))
    ctx.settings.update(run.code_settings)
    (flag,) = [f for f in analyze(collect(fr, path=str(path), fmt=run.format, ctx=ctx))["flags"]
               if f["code"] == "held-by-code"]
    assert ("the run kept P6_3/mmc (194, 24 operations), of which the code held 8: it could not "
            "have lowered the group below those, so 'kept' tests only the other 16") in flag["message"]


def test_a_vasp_job_that_ran_but_left_no_structures_says_what_it_left(tmp_path):
    """custodian's genuine positive_energy and zpotrf folders: VASP ran (an OSZICAR with a
    completed step 'F=', or its standard output ending 'LAPACK: Routine ZPOTRF failed!') but left
    no vasprun.xml, OUTCAR or XDATCAR. The failed run says what the folder shows instead of 'a job
    not run yet'."""
    stopped = PUB / "broken" / "custodian_stopped"
    assert " F= " in (stopped / "positive_energy" / "OSZICAR").read_text()
    assert (stopped / "zpotrf" / "vasp.out").read_text().rstrip().endswith(
        "LAPACK: Routine ZPOTRF failed!")
    s = _quiet_audit([stopped], tmp_path / "out", workers=1)
    errors = {f["run"]: f["error"] for f in s["failed"]}
    pos = errors["custodian_stopped/positive_energy"]
    assert "its OSZICAR holds 1 ionic step (energies, not structures)" in pos
    assert "not run yet" not in pos and "\n" not in pos
    assert "vasp.out ends with 'LAPACK: Routine ZPOTRF failed!'" in errors["custodian_stopped/zpotrf"]
    with pytest.raises(InputError, match="its OSZICAR holds 1 ionic step"):
        read_run(stopped / "positive_energy")


def test_other_copies_of_an_output_beside_the_run_are_said_not_read(tmp_path):
    """A folder that keeps other copies of an output under names no VASP stage uses (as
    aiida-vasp's test data keeps OUTCAR.converged, OUTCAR.not-converged, ... beside OUTCAR) reads
    OUTCAR and says the others are not read; passed alone, one is read (genuine OUTCAR of
    tests/data/public/vasp620_nelm in both roles)."""
    src = PUB / "vasp620_nelm" / "OUTCAR.gz"
    (tmp_path / "run").mkdir()
    shutil.copy(src, tmp_path / "run" / "OUTCAR.gz")
    shutil.copy(src, tmp_path / "run" / "OUTCAR.converged.gz")
    run = read_run(tmp_path / "run")
    assert run.source.endswith("/OUTCAR.gz") and len(run) == 5
    assert any("OUTCAR.converged.gz not read (other copies beside the run's outputs" in w and
               "pass one to read it" in w for w in run.warnings)
    assert len(read_run(tmp_path / "run" / "OUTCAR.converged.gz")) == 5


# ----------------------------------------------------------------------------------------------
# point defects in a fixed host cell: a genuine vacancy campaign's start and end structures
# ----------------------------------------------------------------------------------------------
VACANCY = PUB / "shakenbreak_vacancy"   # ShakeNBreak's CdTe Cd-vacancy POSCAR/CONTCAR pairs (MIT)


def test_tolerance_stretches_keep_a_group_met_only_between_grid_points():
    """The relaxed vacancy (-10 % bond distortion) is P1 at the grid's 0.0158 Å and P-42m at
    0.0329 Å; bisection meets P2 (3) between them. The stretches of one group must include P2's,
    and each stretch's group must be spglib's at its geometric centre (spglib called directly)."""
    import math
    import spglib
    from driftwatch import rules, symmetry
    atoms = ase.io.read(VACANCY / "m10" / "CONTCAR")
    spec = symmetry.spectrum(atoms.cell.array, atoms.positions, atoms.numbers)
    ranges = rules.advice(spec)["ranges"]
    assert [r[2] for r in ranges] == [1, 3, 111, 215]
    cell = (atoms.cell.array, atoms.get_scaled_positions(), atoms.numbers)
    for lo, hi, group, symbol, ops in ranges:
        assert lo < hi
        ds = spglib.get_symmetry_dataset(cell, symprec=math.sqrt(lo * hi), angle_tolerance=-1)
        assert (ds.number, ds.international, len(ds.rotations)) == (group, symbol, ops)
    for (_, hi, *_), (lo, *_) in zip(ranges, ranges[1:]):   # consecutive, a bracket apart
        assert 1 < lo / hi <= 1.02 + 1e-9
    # its advice is P1's plateau, which starts where the grid starts: the suggestion says so
    assert rules.advice(spec)["reason"].endswith(
        "; it starts at the bottom of the searched range, so its width and centre depend on "
        "where the range starts")
    # the flag that lists the final structure's groups across the common symprecs lists P2 too
    record = __import__("driftwatch").analyze(VACANCY / "m10")
    flag = next(f for f in record["flags"] if f["code"] == "symprec-dependent")
    assert "P1 (1) -> P2 (3) -> P-42m (111) -> P-43m (215)" in flag["message"]


CASTEP_SNB = PUB / "shakenbreak_castep"  # ShakeNBreak's genuine CASTEP outputs (MIT)


def test_castep_steps_that_ases_reader_leaves_out_are_said():
    """A CASTEP damped-MD geometry optimisation (rutile TiO2, "DMD: finished iteration 0 ... 22",
    "Geometry optimization completed successfully") of which ASE 3.29's reader returns only the
    last structure: the run says it read 1 of the 23 steps instead of passing as one structure.
    A BFGS cell optimisation whose structures ASE returns (10 for 7 'finished iteration' lines:
    line-search trials included) is read as its 7 iterations, with no such warning."""
    dmd = CASTEP_SNB / "geom.castep.gz"
    text = gzip.open(dmd, "rt").read()
    assert text.count("DMD: finished iteration") == 23
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert len(ase.io.read(dmd, ":", format="castep-castep")) == 1
    run = read_run(dmd)
    assert len(run) == 1 and any(
        "ASE's CASTEP reader returned 1 structure of the 23 ionic steps the file lists" in w
        for w in run.warnings), run.warnings
    assert run.steps.tolist() == [22]           # the last iteration's number, not the start's 0
    bfgs = read_run(CASTEP_SNB / "Si2-cellopt-aniso.castep.gz")
    assert len(bfgs) == 7 and not [w for w in bfgs.warnings if "ASE's CASTEP reader" in w]


def test_the_lattice_a_cell_nears_is_the_most_specific_of_types_at_one_distance():
    """CASTEP's Si2 cell optimisation (ShakeNBreak, MIT) takes a rhombohedral primitive cell from
    alpha = 66 to 61.58 degrees (ASE's cell parameters), toward 60 degrees: the primitive cell of
    face-centred cubic (International Tables). Its deformations to oI, oF, tI and cF are one
    distance computed along four paths (equal to 1e-7 Å); the flag names cF, not the first of them
    rounding happens to make smallest."""
    from driftwatch import analyze
    path = CASTEP_SNB / "Si2-cellopt-aniso.castep.gz"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        images = ase.io.read(path, ":", format="castep-castep")
    a0, a1 = images[0].cell.cellpar()[3], images[-1].cell.cellpar()[3]
    assert a0 == pytest.approx(66.0) and 60 < a1 < 62
    record = analyze(path)
    flag = next(f for f in record["flags"] if f["code"] == "lattice-nearing")
    assert flag["message"].startswith("the lattice moved toward cF (face-centred cubic)"), flag
    assert record["summary"]["drift"]["type"] == "cF"


def test_a_defect_that_settled_onto_a_symmetric_configuration_at_a_looser_symprec_is_said():
    """The rattled Cd vacancy (-30 % bond distortion) starts P1 at every symprec up to 0.1 Å and
    relaxes, in its fixed cell, to a structure spglib calls Cmm2 (35) at 0.1 Å but P1 at 1e-3 Å
    (spglib called directly). The verdict at 1e-3 Å stays "kept P1" and adds what 0.1 Å says;
    judged at 0.1 Å (the user's config), the run gained Cmm2 and raises group-gained."""
    import spglib
    from driftwatch import analyze, config
    case = VACANCY / "m30"
    groups = {}
    for name in ("POSCAR", "CONTCAR"):
        a = ase.io.read(case / name)
        cell = (a.cell.array, a.get_scaled_positions(), a.numbers)
        groups[name] = [spglib.get_symmetry_dataset(cell, symprec=s).number for s in (1e-3, 0.1)]
    assert groups == {"POSCAR": [1, 1], "CONTCAR": [1, 35]}
    v = analyze(case)["summary"]["verdict"]
    assert v["direction"] == "kept" and v["text"].endswith(
        "group kept P1 (1) at symprec 0.001 Å; at symprec 0.1 Å: group gained P1 (1) -> Cmm2 (35)")
    flags = {f["code"]: f["message"] for f in analyze(case)["flags"]}   # the host cell, given
    assert flags["atoms-break-lattice"].endswith("the cell never moved, so this is the lattice "
                                                 "the run was given (expected when the atoms are "
                                                 "meant to break it, as around a defect in a host "
                                                 "cell)")
    loose = analyze(case, config.load(overrides={"rules.structure.symprec": "0.1 Å"}))
    assert loose["summary"]["verdict"]["direction"] == "gained"
    assert "group-gained" in {f["code"] for f in loose["flags"]}


def test_pwx_runs_with_nothing_to_judge_are_skipped_not_failed(tmp_path):
    """Two genuine pw.x outputs of Quantum ESPRESSO's examples: a water molecule computed as an
    isolated system (pw.x 6.2 prints "Assuming isolated system, Martyna-Tuckerman method"; in its
    6.35 Å box no empty gap exceeds 6 Å, so the gap rule alone reads it as a cubic crystal), and a
    band-structure run of Si ("Band Structure Calculation": no SCF energy, no ionic step). Both are
    skipped with their reason (they were a 'bulk cP' verdict and a failed run), the audit exits 0."""
    from driftwatch import geometry
    from driftwatch.errors import NoIonicStepError, NotPeriodicError
    h2o = PUB / "qe_example_h2o_mt" / "h2o.out.gz"
    a = ase.io.read(h2o, format="espresso-out")
    assert geometry.classify(a.cell.array[None], a.pbc, a.positions[None]).dimension == 3
    with pytest.raises(NotPeriodicError, match="pw.x computed it as an isolated system"):
        read_run(h2o)
    bands = PUB / "qe_example_si_bands" / "si.band.david.out.gz"
    with pytest.raises(NoIonicStepError, match="a non-self-consistent run"):
        read_run(bands)
    camp = tmp_path / "camp"
    for src in (h2o.parent, bands.parent):
        shutil.copytree(src, camp / src.name)
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                           str(tmp_path / "out"), "--no-report", "--progress", "off"],
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    summary = json.loads((tmp_path / "out" / "campaign.json").read_text())
    assert summary["failed"] == [] and [k["run"] for k in summary["skipped"]] == [
        "camp/qe_example_h2o_mt", "camp/qe_example_si_bands"]
    assert "2 runs: 0 with a verdict, 0 failed, 2 skipped" in proc.stdout


def test_a_pwx_input_edited_after_the_run_does_not_hide_the_codes_symmetry(tmp_path):
    """A user adds nosym = .true. to pw.in to prepare a rerun; the output that was run still says
    pw.x held its symmetry ("48 Sym. Ops." in the bundled B02, a real pw.x 6.7 run), so the
    held-by-code flag must stay, with a warning that the input is not the one the run read. A run
    made with nosym (B03) prints "No symmetry found" and gets no such warning."""
    from driftwatch import analyze
    case = tmp_path / "B02"
    shutil.copytree(REPO / "example_runs" / "B02_qe_vcrelax_sym", case)
    assert "held-by-code" in {f["code"] for f in analyze(case)["flags"]}
    text = (case / "pw.in").read_text()
    (case / "pw.in").write_text(text.replace("&system", "&system\n  nosym = .true.", 1))
    assert "nosym = .true." in (case / "pw.in").read_text()
    record = analyze(case)
    assert "held-by-code" in {f["code"] for f in record["flags"]}
    assert any("says nosym = .true., but this output found 48 symmetry operations" in w
               for w in record["run"]["warnings"]), record["run"]["warnings"]
    b03 = REPO / "example_runs" / "B03_qe_vcrelax_nosym"
    assert "No symmetry found" in (b03 / "pw.out").read_text()
    assert not [w for w in read_run(b03).warnings if "says nosym" in w]


def test_the_campaign_symprec_counts_a_run_safe_only_in_the_plateau_its_own_advice_recommends():
    """Before, a run was 'safe' in any plateau: the rattled-and-relaxed vacancy whose own advice is
    Cmm2 from 0.018 Å (P1 below it) counted as safe at 1e-4 Å in P1, so the campaign symprec sank to
    the bottom of the grid where every structure is judged by its smallest deviations. Genuine
    vacancy relaxations (ShakeNBreak) and the bundled B05 (a real EMT relaxation to Fm-3m)."""
    from driftwatch import analyze
    from driftwatch.rules import advice_item, campaign_advice
    recs = {name: analyze(path) for name, path in (
        ("m10", VACANCY / "m10"), ("m30", VACANCY / "m30"),
        ("B05", REPO / "example_runs" / "B05_emt_bfgs.extxyz"))}
    own = {n: r["summary"]["tolerance"]["plateau"] for n, r in recs.items()}
    assert (own["m30"]["symbol"], own["m10"]["symbol"]) == ("Cmm2", "P1")
    tol = campaign_advice([advice_item(n, r) for n, r in recs.items()], [1e-5, 1e-3, 1e-2, 0.1])
    s = tol["recommended_symprec"]
    safe = set(recs) - set(tol.get("unsafe_run_ids", []))
    assert tol["safe_runs"] == len(safe) >= 1
    for name in safe:                      # each safe run is inside its own recommended plateau
        assert own[name]["low"] <= s <= own[name]["high"], (name, s, own[name])
    assert not ("m10" in safe and "m30" in safe)   # their plateaus do not overlap
    unsafe = tol["unsafe_run_ids"]                 # the advice names the runs to check first
    assert unsafe and tol["reason"].endswith(
        (f"above all the {len(unsafe)} runs that do not: " if len(unsafe) > 1 else
         "above all the one run that does not: ") + ", ".join(unsafe))
    # a campaign of 60 copies of each: the ids listed are every run counted (one fact, one number;
    # the list had been cut at 50 while the text said "and N more")
    many = [advice_item(f"{n}-{k:02d}", r) for k in range(60) for n, r in recs.items()]
    big = campaign_advice(many, [1e-5, 1e-3, 1e-2, 0.1])
    n_unsafe = big["runs_considered"] - big["safe_runs"]
    assert n_unsafe > 50 and len(big["unsafe_run_ids"]) == n_unsafe
    assert f"above all the {n_unsafe} runs that do not: " in big["reason"]
    assert f"and {n_unsafe - 3} more (tolerance.unsafe_run_ids in campaign.json)" in big["reason"]


def _orbit_average_rms(frac, cell, numbers, rotations, translations):
    """Brute force, atom by atom: the RMS distance (Å) of a structure to its average over the
    given operations (each atom moved onto the mean of the images that land on it), after removing
    the mean displacement (the origin choice). Independent of driftwatch's vectorised projection."""
    n = len(frac)
    acc = np.zeros((n, 3))
    for W, w in zip(rotations, translations):
        for i in range(n):
            img = W @ frac[i] + w
            best, arg = None, None
            for j in range(n):
                if numbers[j] != numbers[i]:
                    continue
                d = img - frac[j]
                d -= np.round(d)
                dist = np.linalg.norm(d @ cell)
                if best is None or dist < best:
                    best, arg, off = dist, j, d
            acc[arg] += off
    shift = (acc / len(rotations)) @ cell
    shift -= shift.mean(axis=0)
    return float(np.sqrt(np.mean(np.sum(shift ** 2, axis=1))))


def test_how_far_the_atoms_came_to_the_final_structures_group():
    """The relaxed vacancy (-30 %) is Cmm2 at symprec 0.0181 Å; its start (the rattled POSCAR, the
    same fixed cell) is P1 there. The run's summary gives the displacement of both to the final
    structure's instance of Cmm2: checked against a brute-force orbit average over spglib's own
    operations of the final structure (spglib called directly); and the end value is no larger
    than the distance to ASE's refine_symmetry of it (another symmetric configuration, idealised
    from spglib's standardised cell: the projection is the least-squares nearest one)."""
    import spglib
    from ase.spacegroup.symmetrize import refine_symmetry
    from driftwatch import analyze
    rec = analyze(VACANCY / "m30")
    at = rec["summary"]["atoms"]
    assert (at["symbol"], at["group"]) == ("Cmm2", 35)
    start, end = (ase.io.read(VACANCY / "m30" / n) for n in ("POSCAR", "CONTCAR"))
    cell = end.cell.array
    ds = spglib.get_symmetry_dataset((cell, end.get_scaled_positions(), end.numbers),
                                     symprec=at["symprec"])
    assert ds.number == 35
    for atoms, value in ((start, at["start"]["rms"]), (end, at["end"]["rms"])):
        ref = _orbit_average_rms(atoms.get_scaled_positions(), cell, atoms.numbers,
                                 ds.rotations, ds.translations)
        assert value == pytest.approx(ref, rel=1e-6, abs=1e-9)
    assert at["start"]["rms"] > 50 * at["end"]["rms"] > 0     # the atoms settled onto Cmm2
    refined = end.copy()
    refine_symmetry(refined, symprec=at["symprec"])
    d = refined.get_scaled_positions() - end.get_scaled_positions()
    d = (d - np.round(d)) @ cell
    d -= d.mean(axis=0)
    assert at["end"]["rms"] <= np.sqrt(np.mean(np.sum(d ** 2, axis=1))) < 2 * at["end"]["rms"]


def test_species_pwx_tells_apart_are_apart_for_spglib():
    """Quantum ESPRESSO's test-suite lda+U run (pw.x 6.1): antiferromagnetic FeO with species Fe1
    (starting magnetisation +0.5) and Fe2 (-0.5). pw.x finds "12 Sym. Ops." and spglib with Fe1
    and Fe2 as two types gives R-3m (166) with 12 operations (spglib called directly); read as
    plain Fe (as ASE reads it) the structure is Fm-3m in a cell of 2 primitive cells, which is not
    the structure pw.x computed (the record said Fm-3m and "a supercell of 2 primitive cells")."""
    import spglib
    from driftwatch import analyze
    folder = PUB / "qe_testsuite_lda_u"
    out = folder / "benchmark.out.git.inp=lda+U.in.gz"
    assert "12 Sym. Ops., with inversion, found" in gzip.open(out, "rt").read()
    run = read_run(folder)
    assert run.species == ("O1", "O1", "Fe1", "Fe2")
    frac = np.linalg.solve(run.cells[0].T, run.positions[0].T).T
    apart = spglib.get_symmetry_dataset((run.cells[0], frac, [8, 8, 26, 126]), symprec=1e-3)
    merged = spglib.get_symmetry_dataset((run.cells[0], frac, run.numbers), symprec=1e-3)
    assert (apart.number, len(apart.rotations)) == (166, 12) and merged.number == 225
    rec = analyze(folder)
    assert rec["summary"]["verdict"]["structure"]["final"] == {
        "group": 166, "symbol": "R-3m", "operations": 12}
    assert rec["summary"]["verdict"]["structure"]["by_element"] == {
        "group": merged.number, "symbol": merged.international, "operations": 24}
    assert "by element alone, not the code's species labels (O1, Fe1, Fe2), the final structure " \
           "is Fm-3m (225)" in rec["summary"]["verdict"]["text"]
    assert rec["summary"]["supercell"] is None and rec["run"]["species"] == list(run.species)
    assert rec["run"]["formula"] == "Fe2O2"                  # Hill's order, as ase.db's


def test_outputs_of_codes_with_no_reader_are_listed_as_skipped_not_dropped(tmp_path):
    """A CP2K geometry optimisation (ShakeNBreak's genuine relax.out, with its input and a CIF
    beside it) and a Quantum ESPRESSO neb.x output (its examples' reference) vanished from the
    audit: no row, not failed, not skipped, while the index said every run was audited. Each is a
    skipped run naming the code its banner names ("CP2K| version string:", "Program NEB v."), and
    `inspect` refuses it in one line."""
    camp = tmp_path / "camp"
    shutil.copytree(PUB / "foreign_outputs", camp)
    (camp / "cp2k" / "structure.cif").write_text("data_invented\n")
    text = gzip.open(camp / "cp2k" / "relax.out.gz", "rt").read(5000)
    assert " CP2K| version string:" in text
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                           str(tmp_path / "out"), "--no-report", "--progress", "off"],
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    summary = json.loads((tmp_path / "out" / "campaign.json").read_text())
    got = {k["run"]: k["reason"] for k in summary["skipped"]}
    assert got == {"camp/cp2k/relax.out.gz": "an output of CP2K, which driftwatch has no reader for",
                   "camp/qe_neb/H2+H.out.gz": "an output of Quantum ESPRESSO's neb.x, which "
                                              "driftwatch has no reader for"}
    assert "2 runs: 0 with a verdict, 0 failed, 2 skipped" in proc.stdout
    one = subprocess.run([sys.executable, "-m", "driftwatch", "inspect",
                          str(camp / "cp2k" / "relax.out.gz")], capture_output=True, text=True,
                         timeout=300)
    assert one.returncode == 1 and one.stderr.count("\n") == 1 and "an output of CP2K" in one.stderr


def test_the_step_of_a_group_change_says_when_later_steps_were_not_checked(monkeypatch):
    """QE's test-suite vc-relax1 (pw.x 7.2): spglib at 1e-3 Å (called directly on every frame)
    gives P-1 from step 4 to 12, C2/m at step 13 and P-1 again from step 14. The default analysis
    asks spglib at some steps and locates the change between neighbouring checked steps (3 and 4);
    on a two-atom P-1 cell it then asks every later frame (cheap: RECHECK_COST), finds step 13
    and dates the change from step 14, as with every frame asked. Where fewer frames may be asked
    (a larger cell; here the budget narrowed to 8 frames), step 13 is not checked and "from step
    4" says not every later step was checked."""
    import spglib
    from driftwatch import analyze, config, track
    folder = PUB / "qe_testsuite_vc_relax1"
    run = read_run(folder)
    direct = []
    for c, p in zip(run.cells, run.positions):
        ds = spglib.get_symmetry_dataset((c, np.linalg.solve(c.T, p.T).T, run.numbers),
                                         symprec=1e-3)
        direct.append(ds.number)
    assert direct[3:15] == [12] + [2] * 9 + [12, 2] and set(direct[14:]) == {2}
    for rec in (analyze(folder), analyze(folder, config.load(overrides={
            "selection.all_frames": True}))):
        sv = rec["summary"]["verdict"]["structure"]
        assert (sv["from_step"], sv["checked_after"]) == (14, True)
        assert "from step 14;" in rec["summary"]["verdict"]["text"] + ";"
    monkeypatch.setattr(track, "RECHECK_COST", 32)     # 8 frames of two atoms, 2 operations
    rec = analyze(folder)
    sv = rec["summary"]["verdict"]["structure"]
    assert (sv["from_step"], sv["exact"], sv["checked_after"]) == (4, True, False)
    assert "P-1 (2) at symprec 0.001 Å from step 4 (not every later step checked)" in \
        rec["summary"]["verdict"]["text"]
    # campaign.csv and runs.db say it beside the step, as the text does
    from driftwatch import records
    row, kv = records.csv_row(rec, "vc-relax1"), records.db_key_values(rec, "vc-relax1")
    assert (row["group_from_step"], row["group_later_steps_checked"]) == (4, False)
    assert (kv["group_from_step"], kv["group_later_steps_checked"]) == (4, False)
    monkeypatch.undo()
    assert records.csv_row(analyze(folder), "x")["group_later_steps_checked"] is True
