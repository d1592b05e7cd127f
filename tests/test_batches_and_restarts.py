"""Inputs as they lie on disk, continued: many relaxations in one file (extended XYZ, ase.db), files of
initial/final pairs, multi-stage pw.x runs (numbered restarts, stage folders, restart_mode='restart'),
and VASP OUTCARs that print the energy block before the positions (VASP 4.6 / 5.2.2).

External references (named beside each check):
* a genuine VASP 5.2.2 OUTCAR (pyiron_atomistics test data; source and licence in
  tests/data/public/README.md) against pymatgen's Outcar reading of the same file;
* real ASE EMT relaxations made here (tests/data/batch, scripts/make_runs.py --only batch) against
  ASE's own extxyz and ase.db readers and spglib on the frames ASE reads;
* real pw.x 6.7 runs made here (tests/data/qe/restart_*), against ASE's espresso-out reader and a
  from-scratch pw.x scf of the structure a restart continues from.
"""
from __future__ import annotations

import gzip
import io
import shutil
import warnings
from pathlib import Path

import numpy as np
import pytest

import ase.io

from driftwatch.adapters import read_run
from driftwatch.errors import InputError

REPO = Path(__file__).resolve().parent.parent
PUB = REPO / "tests" / "data" / "public"
OLD_OUTCAR = PUB / "vasp522_energy_first" / "OUTCAR.gz"


# ---------------------------------------------------------------- VASP 5.2.2: energy before positions
def _pymatgen_outcar(path, tmp_path):
    from pymatgen.io.vasp.outputs import Outcar
    plain = tmp_path / "OUTCAR"
    plain.write_bytes(gzip.decompress(path.read_bytes()))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return Outcar(str(plain)), plain


def test_vasp_522_outcar_with_the_energy_first_equals_pymatgen(tmp_path):
    """VASP 5.2.2 prints FREE ENERGIE before the stress, cell and POSITION blocks of a step: ASE's
    reader fails on it; driftwatch reads it, equal to pymatgen's Outcar reading of the same file."""
    out, plain = _pymatgen_outcar(OLD_OUTCAR, tmp_path)
    text = plain.read_text()
    assert text.index("FREE ENERGIE OF THE ION-ELECTRON") < text.index("POSITION          ")
    with pytest.raises(Exception, match="positions"):                       # ASE cannot read it
        ase.io.read(plain, ":", format="vasp-out")
    run = read_run(OLD_OUTCAR)
    assert len(run) == 1 and run.warnings == ()
    assert run.energies[0] == pytest.approx(out.final_fr_energy, abs=1e-9)  # pymatgen: TOTEN
    table = out.read_table_pattern(                                          # pymatgen's table reader
        header_pattern=r"\sPOSITION\s+TOTAL-FORCE \(eV/Angst\)\n\s-+",
        row_pattern=r"\s+([+-]?\d+\.\d+)\s+([+-]?\d+\.\d+)\s+([+-]?\d+\.\d+)\s+([+-]?\d+\.\d+)"
                    r"\s+([+-]?\d+\.\d+)\s+([+-]?\d+\.\d+)",
        footer_pattern=r"\s--+", postprocess=float, last_one_only=True)
    table = np.array(table)
    np.testing.assert_array_equal(run.positions[0], table[:, :3])            # pymatgen
    np.testing.assert_array_equal(run.forces[0], table[:, 3:])
    cell = out.read_table_pattern(header_pattern=r"\s+direct lattice vectors\s+reciprocal "
                                                 r"lattice vectors\n",
                                  row_pattern=r"\s+([-\d.]+)\s+([-\d.]+)\s+([-\d.]+)\s+[-\d.]+"
                                              r"\s+[-\d.]+\s+[-\d.]+",
                                  footer_pattern=r"\n", postprocess=float, last_one_only=True)
    np.testing.assert_array_equal(run.cells[0], cell)                        # pymatgen, the step's
    # the header: H + 32 Ag (POTCAR lines, 'ions per type = 1 32'); 48 operations (DYNSYM line)
    assert run.numbers.tolist() == [1] + [47] * 32
    assert run.code_settings["nsym"] == 48 and run.code_settings["ISYM"] == 1
    assert run.position_precision == pytest.approx(np.sqrt(3) * 0.5e-5)     # f13.5 positions


def test_vasp_522_outcar_cut_anywhere_gives_no_wrong_step(tmp_path):
    """The energy-first layout is complete only after its POSITION block: a file cut anywhere before
    the end of that block gives no step (a one-line error), after it the step (ase: common practice
    of the streaming readers, see test_adapters)."""
    data = gzip.decompress(OLD_OUTCAR.read_bytes())
    end_of_block = data.index(b"total drift")
    full = read_run(OLD_OUTCAR)
    for off in np.unique(np.linspace(data.index(b"Iteration"), len(data) - 1, 30).astype(int)):
        p = tmp_path / f"OUTCAR.{off}"
        p.write_bytes(data[:off])
        try:
            run = read_run(p)
        except InputError as exc:
            assert off < end_of_block and "\n" not in str(exc)
            continue
        assert off >= end_of_block and len(run) == 1
        np.testing.assert_array_equal(run.positions, full.positions)
        ended = off > data.index(b"General timing and accounting") + 40
        assert ended or any("truncated" in w for w in run.warnings)


# ---------------------------------------------------------------- multi-stage pw.x runs
QE = REPO / "tests" / "data" / "qe"
NUMBERED = QE / "restart_numbered"
STAGED = QE / "restart_stage_folders"
needs_pwx = pytest.mark.skipif(shutil.which("pw.x") is None, reason="pw.x not on PATH")


def _text(path):
    data = path.read_bytes()
    return (gzip.decompress(data) if path.suffix == ".gz" else data).decode()


def _ase_pw(path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return ase.io.read(io.StringIO(_text(path)), ":", format="espresso-out")   # ASE


def _last_printed(text):
    """The last CELL_PARAMETERS card (Å) a vc-relax output printed, read by ASE's card parser."""
    from ase.io.espresso import get_cell_parameters
    block = text.rsplit("CELL_PARAMETERS", 1)[1].splitlines()[:4]
    cell, _ = get_cell_parameters(["CELL_PARAMETERS" + block[0] + "\n"] + [b + "\n" for b in block[1:]])
    return np.array(cell)


def test_a_restart_appended_to_its_output_numbers_steps_as_pwx_counts_them():
    """The run above with its restart appended to the same output (`>> pw.out`; real pw.x 6.7,
    scripts/make_runs.py restart_appended): the same 24 frames, and each step is pw.x's own SCF
    count minus one ("number of scf cycles = k" closes step k - 1; the converged BFGS says its
    last count, the final scf adds one). It once skipped a step at the restart (0, 1, 2, 4, ...):
    the restart's first SCF, on the structure the first run printed last, took a number of its
    own."""
    import re
    path = QE / "restart_appended" / "pw.out.gz"
    run = read_run(path)
    text = _text(path)
    counts = [int(k) for k in re.findall(r"number of scf cycles\s+=\s+(\d+)", text)]
    (last,) = re.findall(r"bfgs converged in\s+(\d+) scf cycles", text)
    assert text.count("Program PWSCF") == 2 and "restart_mode = 'restart'" in (
        QE / "restart_appended" / "pw.in").read_text()
    assert run.steps.tolist() == [k - 1 for k in counts] + [int(last) - 1, int(last)]
    assert [(s["name"], s["n_frames"]) for s in run.stages] == [("run1", 3), ("run2", 21)]
    numbered = read_run(NUMBERED)                     # the same job written to two files
    np.testing.assert_allclose(run.energies, numbered.energies, rtol=1e-12)
    assert run.steps.tolist() == numbered.steps.tolist() == list(range(24))


def test_numbered_pwx_restart_is_one_run_in_the_order_it_ran():
    """pw.out.1 (stopped at nstep = 3) and pw.out.gz (restart_mode='restart'), real pw.x 6.7: one
    trajectory, ordered by the start time pw.x prints (not by name), steps numbered on as pw.x's
    BFGS counter goes on; every frame equal to ASE's reader of its file, except the restart's first,
    which ASE pairs with the header (the input structure) and driftwatch with the structure the
    first output printed last (the one pw.x restored)."""
    run = read_run(NUMBERED)
    assert [(s["name"], s["n_frames"]) for s in run.stages] == [("pw.out.1", 3), ("pw.out.gz", 21)]
    assert run.steps.tolist() == list(range(24)) and run.warnings == ()
    first, second = _ase_pw(NUMBERED / "pw.out.1"), _ase_pw(NUMBERED / "pw.out.gz")
    np.testing.assert_allclose(run.cells[:3], [a.cell.array for a in first], atol=1e-12)    # ASE
    np.testing.assert_allclose(run.cells[4:], [a.cell.array for a in second[1:]], atol=1e-12)
    np.testing.assert_allclose(run.energies[3:], [a.get_potential_energy() for a in second])
    last_printed = _last_printed(_text(NUMBERED / "pw.out.1"))
    np.testing.assert_allclose(run.cells[3], last_printed, atol=1e-12)
    header = second[0].cell.array                      # what the restart's header shows: the input
    assert np.abs(header - run.cells[0]).max() < 1e-6 and np.abs(header - run.cells[3]).max() > 0.05
    text = _text(NUMBERED / "pw.out.gz")
    assert "number of bfgs steps    =   3" in text.split("ATOMIC_POSITIONS", 1)[0]          # pw.x
    # read alone, the restart leaves out the step whose structure it does not print, and says so
    alone = read_run(NUMBERED / "pw.out.gz")
    assert len(alone) == 20 and alone.steps[0] == 1
    assert any("restart" in w and "left out" in w for w in alone.warnings)
    one = read_run(f"{NUMBERED}@pw.out.1")                                    # one stage on request
    assert len(one) == 3 and one.stages == ()


@pytest.mark.pwx
@needs_pwx
def test_the_restarts_first_energy_belongs_to_the_carried_structure(tmp_path):
    """Real pw.x: an scf of the structure driftwatch gives the restart's first step reproduces that
    step's energy within 1e-4 Ry (measured 1.3e-5 Ry: a vc-relax keeps the plane-wave set of its
    starting cell, a fresh scf builds its own, which is why pw.x ends a vc-relax with a final scf);
    an scf of the header's structure is off by far more (measured 3.7e-3 Ry)."""
    run = read_run(NUMBERED)
    pw_in = (NUMBERED / "pw.in").read_text()
    pw_in = (pw_in.replace("'vc-relax'", "'scf'").replace("restart_mode = 'restart'", "")
             .replace("pseudo_dir = '../pseudo'", f"pseudo_dir = '{QE / 'pseudo'}'"))

    def scf(cell):
        d = tmp_path / f"scf{len(list(tmp_path.iterdir()))}"
        d.mkdir()
        head, tail = pw_in.split("CELL_PARAMETERS angstrom\n")
        rows = "".join("  " + " ".join(f"{x:.10f}" for x in r) + "\n" for r in cell)
        (d / "pw.in").write_text(head + "CELL_PARAMETERS angstrom\n" + rows +
                                 tail.split("\n", 3)[3])
        import subprocess
        with open(d / "pw.out", "w") as out:
            subprocess.run(["pw.x", "-in", "pw.in"], cwd=d, stdout=out, stderr=subprocess.STDOUT,
                           env={**__import__("os").environ, "OMP_NUM_THREADS": "1"}, check=True,
                           timeout=300)
        e = read_run(d / "pw.out").energies[-1]
        print(f"scf energy {e:.6f} eV; restart's first step {run.energies[3]:.6f} eV")
        return e
    ry = 13.605693122994                                                      # eV (CODATA 2018)
    carried, header = scf(run.cells[3]), scf(run.cells[0])
    assert abs(carried - run.energies[3]) < 1e-4 * ry
    assert abs(header - run.energies[3]) > 10 * abs(carried - run.energies[3])


def test_stage_folders_of_pwx_runs_are_one_run(tmp_path):
    """relax1/ (stopped by driftwatch's soft stop, pw.EXIT) and relax2/ (a new run from relax1's
    last printed structure), real pw.x: one run with two stages; discovery lists one run."""
    from driftwatch.campaign import discover
    run = read_run(STAGED)
    names = [s["name"] for s in run.stages]
    assert names == ["relax1", "relax2"] and run.warnings == ()
    n1 = run.stages[0]["n_frames"]
    ref1, ref2 = _ase_pw(STAGED / "relax1" / "pw.out"), _ase_pw(STAGED / "relax2" / "pw.out")
    assert "Program stopped by user request" in _text(STAGED / "relax1" / "pw.out")     # pw.x
    np.testing.assert_allclose(run.positions[:n1], [a.positions for a in ref1], atol=1e-12)  # ASE
    np.testing.assert_allclose(run.positions[n1:], [a.positions for a in ref2], atol=1e-12)
    # relax2 starts from relax1's last printed cell (its header prints it in alat with 6 decimals)
    np.testing.assert_allclose(run.cells[n1], _last_printed(_text(STAGED / "relax1" / "pw.out")),
                               atol=1e-5)
    runs, failed = discover([STAGED])
    assert [r.kind for r in runs] == ["folder"] and not failed
    camp = tmp_path / "camp"
    shutil.copytree(STAGED, camp / "Si2_strained")
    shutil.copytree(NUMBERED, camp / "Al_bct")
    runs, failed = discover([camp])
    assert sorted(r.id for r in runs) == ["camp/Al_bct", "camp/Si2_strained"] and not failed


def test_unrelated_pwx_outputs_in_one_folder_stay_separate_runs(tmp_path):
    """Two pw.x outputs of different relaxations (neither a restart, not numbered copies) in one
    folder are two runs, as before; runs appended to one output are stages of that file."""
    from driftwatch.campaign import discover
    d = tmp_path / "two"
    d.mkdir()
    shutil.copy(QE / "bulk_tetragonal_to_cubic" / "pw.out", d / "al.out")
    shutil.copy(QE / "relax_atoms_to_sites" / "pw.out", d / "si.out")
    runs, failed = discover([d])
    assert len(runs) == 2 and not failed
    with pytest.raises(InputError, match="holds 2 runs"):
        read_run(d)
    # appended: the first run and its restart in one file ('pw.x ... >> pw.out')
    cat = tmp_path / "appended.out"
    cat.write_text(_text(NUMBERED / "pw.out.1") + _text(NUMBERED / "pw.out.gz"))
    joined, staged = read_run(cat), read_run(NUMBERED)
    assert [(s["name"], s["n_frames"]) for s in joined.stages] == [("run1", 3), ("run2", 21)]
    np.testing.assert_array_equal(joined.cells, staged.cells)
    np.testing.assert_array_equal(joined.energies, staged.energies)


def test_multistage_pwx_verdict_against_spglib():
    """The Al restart: the bct start (c/a 1.08) reaches the cubic lattice in the restarted stage;
    spglib on the first and last frames: I4/mmm (139) -> Fm-3m (225)."""
    import spglib
    from driftwatch.track import analyze
    run = read_run(NUMBERED)
    rec = analyze(run)
    v = rec["summary"]["verdict"]
    cells = lambda i: (run.cells[i], run.positions[i] @ np.linalg.inv(run.cells[i]), run.numbers)
    assert spglib.get_symmetry_dataset(cells(0), symprec=1e-3).number == 139           # spglib
    assert spglib.get_symmetry_dataset(cells(-1), symprec=1e-3).number == 225
    assert v["direction"] == "gained" and v["lattice"]["final"] == "cF"
    assert v["lattice"]["from_step"] >= run.stages[1]["step_offset"]
    assert [s["name"] for s in rec["run"]["stages"]] == ["pw.out.1", "pw.out.gz"]


# ---------------------------------------------------------------- many structures in one file
BATCH = REPO / "tests" / "data" / "batch"
NAMES = ["Cu-bct-07", "Al-fco-02", "Ni-rhombo-03", "CuNi-tP-04", "Cu-layer-05", "Al-layer-06"]


def _ase_extxyz(path):
    with gzip.open(path, "rt") as fh:
        return ase.io.read(fh, ":", format="extxyz")                         # ASE


def _by(frames, key, name):
    return [a for a in frames if str(a.info.get(key)) == name]


def _same(run, images, atol=0.0):
    assert len(run) == len(images)
    np.testing.assert_allclose(run.cells, [a.cell.array for a in images], atol=atol, rtol=0)
    np.testing.assert_allclose(run.positions, [a.positions for a in images], atol=atol, rtol=0)
    np.testing.assert_allclose(run.energies, [a.get_potential_energy() for a in images], rtol=1e-12)


def test_one_run_per_structure_equal_to_ases_readers():
    """Six real EMT relaxations (FrechetCellFilter + BFGS) in one extended XYZ (structure_id, step;
    one after the other) and one ase.db (relax_id, step; rows interleaved as a batched optimizer
    writes them): each structure read as its own run equals ASE's readers filtered by the key."""
    import ase.db
    images = _ase_extxyz(BATCH / "relaxations.extxyz.gz")
    assert sorted({a.info["structure_id"] for a in images}) == sorted(NAMES)
    with ase.db.connect(BATCH / "relaxations.db") as db:                      # ASE's ase.db
        rows = list(db.select(sort="id"))
    ids = [r.relax_id for r in rows]
    assert ids[:len(NAMES)] == NAMES                                          # interleaved rows
    for name in NAMES:
        xyz = read_run(f"{BATCH / 'relaxations.extxyz.gz'}::{name}")
        _same(xyz, _by(images, "structure_id", name))
        assert xyz.steps.tolist() == [a.info["step"] for a in _by(images, "structure_id", name)]
        assert xyz.structure_key == {"key": "structure_id", "value": name}
        mine = sorted((r for r in rows if r.relax_id == name), key=lambda r: r.step)
        db_run = read_run(f"{BATCH / 'relaxations.db'}::{name}")
        _same(db_run, [r.toatoms() for r in mine])
        assert db_run.steps.tolist() == [r.step for r in mine] and db_run.kind == "trajectory"
        # the two files hold the same deterministic relaxations; extxyz prints 8 decimals
        np.testing.assert_allclose(xyz.positions, db_run.positions, atol=1e-8, rtol=0)


def test_discovery_lists_each_structure_and_reading_the_file_whole_names_them(tmp_path):
    """An audit and inspect see FILE::NAME for each structure; FILE alone is a one-line error naming
    the structures (exit 1 from the command line)."""
    import subprocess
    import sys
    from driftwatch.campaign import discover
    runs, failed = discover([BATCH])
    assert not failed and len(runs) == 24
    assert {r.id.split("::")[1] for r in runs} == set(NAMES)
    assert all(r.path.endswith(r.id.split("::")[1]) for r in runs)
    for f in ("relaxations.extxyz.gz", "relaxations.db", "pairs.extxyz.gz", "pairs.db"):
        with pytest.raises(InputError, match=r"holds 6 structures named by .*Cu-bct-07.*::"):
            read_run(BATCH / f)
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", str(BATCH / "pairs.db")],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 1 and proc.stderr.count("\n") == 1
    assert "holds 6 structures named by 'system_name'" in proc.stderr
    with pytest.raises(InputError, match="no structure 'Fe-bcc-99'"):
        read_run(f"{BATCH / 'relaxations.db'}::Fe-bcc-99")
    # a file given as the root of an audit is split the same way
    runs, _ = discover([BATCH / "relaxations.db"])
    assert [r.id for r in runs] == sorted(f"relaxations.db::{n}" for n in NAMES)


def test_verdicts_of_the_batch_against_spglib():
    """spglib (symprec 1e-3 Å) on the first and last frames ASE reads of each relaxation: the same
    groups as the record's verdict, for the extxyz, the ase.db and both files of pairs."""
    import spglib
    from driftwatch.track import analyze
    images = _ase_extxyz(BATCH / "relaxations.extxyz.gz")
    for name in NAMES:
        mine = _by(images, "structure_id", name)
        recs = [analyze(f"{BATCH / f}::{name}", "screen") for f in      # first and last frames
                ("relaxations.extxyz.gz", "relaxations.db", "pairs.extxyz.gz", "pairs.db")]
        for k, a in ((0, mine[0]), (-1, mine[-1])):
            if recs[0]["geometry"]["dimension"] == 3:                        # spglib space group
                want = spglib.get_symmetry_dataset((a.cell.array, a.get_scaled_positions(),
                                                    a.numbers), symprec=1e-3).number
                for rec in recs:
                    got = rec["summary"]["verdict"]["structure"]["initial" if k == 0 else "final"]
                    assert got["group"] == want, (name, k)
        texts = {r["summary"]["verdict"]["text"].split(":", 1)[1] for r in recs[2:]}
        assert len(texts) == 1                                                 # both pair files


def test_initial_final_pairs_are_end_point_runs():
    """Files of initial/final pairs (real EMT first and last frames): state=initial/final in an
    extended XYZ, relaxed=False/True in an ase.db whose relaxed row comes first. Two-frame runs,
    initial first, reported "initial -> final" with no step numbers; the frames are ASE's first and
    last frames of the full relaxation."""
    from driftwatch.track import analyze
    images = _ase_extxyz(BATCH / "relaxations.extxyz.gz")
    for f in ("pairs.extxyz.gz", "pairs.db"):
        for name in NAMES:
            run = read_run(f"{BATCH / f}::{name}")
            mine = _by(images, "structure_id", name)
            assert run.kind == "end-points" and run.steps.tolist() == [0, 1]
            np.testing.assert_allclose(run.positions, [mine[0].positions, mine[-1].positions],
                                       atol=1e-8, rtol=0)                      # ASE
    rec = analyze(f"{BATCH / 'pairs.db'}::Cu-bct-07")
    assert rec["run"]["kind"] == "end-points" and rec["run"]["n_frames"] == 2
    assert [f["label"] for f in rec["frames"]] == ["initial", "final"]
    v = rec["summary"]["verdict"]
    assert v["text"].startswith("gained (initial -> final structure; no ionic steps between them)")
    assert "tI -> cF" in v["text"] and "step" not in v["text"].replace("ionic steps", "")
    assert rec["flags"] and all("at the final structure" in fl["message"] and
                                " step " not in fl["message"] for fl in rec["flags"])
    traj = analyze(f"{BATCH / 'relaxations.db'}::Cu-bct-07")
    assert traj["run"]["kind"] == "trajectory" and "from step" in traj["summary"]["verdict"]["text"]
    assert "label" not in traj["frames"][0]


def test_structure_keys_are_configurable_and_bad_batches_are_one_line_errors(tmp_path):
    """inputs.structure_keys decides what names a structure; a frame without the key, or two frames
    of one step under one name, is a one-line error naming the file and the frame."""
    from driftwatch import config
    from driftwatch.adapters import batch
    from driftwatch.campaign import discover
    assert tuple(config.load()["inputs"]["structure_keys"]) == batch.STRUCTURE_KEYS
    runs, _ = discover([BATCH / "relaxations.db"], structure_keys=["structure_id"])
    assert [r.id for r in runs] == ["relaxations.db"]                 # relax_id not tried: one run
    text = gzip.decompress((BATCH / "relaxations.extxyz.gz").read_bytes()).decode()
    lines = text.splitlines(keepends=True)
    # frame 3 loses its structure_id
    n = int(lines[0])
    k = 3 * (n + 2) + 1                          # comment line of frame 3 (all frames: 1 atom)
    assert "structure_id=Cu-bct-07" in lines[k]
    bad = tmp_path / "bad.extxyz"
    bad.write_text("".join(lines[:k] + [lines[k].replace("structure_id=Cu-bct-07", "")] +
                           lines[k + 1:]))
    with pytest.raises(InputError, match=r"bad.extxyz: frame 3 has no 'structure_id'") as exc:
        read_run(f"{bad}::Cu-bct-07")
    assert "\n" not in str(exc.value)
    dup = tmp_path / "dup.extxyz"
    dup.write_text("".join(lines[:k] + [lines[k].replace("step=3", "step=2")] + lines[k + 1:]))
    with pytest.raises(InputError, match=r"two frames of step 2 \(frames 2 and 3\)"):
        read_run(f"{dup}::Cu-bct-07")
    # the whole file named by a key that is not one of inputs.structure_keys: the error says
    # which setting reads it as its relaxations
    other = tmp_path / "other.extxyz"
    other.write_text(text.replace("structure_id=", "label="))
    with pytest.raises(InputError, match=r"add it to the config's inputs.structure_keys") as exc:
        read_run(other)
    assert "keys whose value changes between frames: label (6 values)" in str(exc.value)
    with pytest.raises(InputError, match=r"holds \d+ structures named by 'label'"):
        read_run(other, structure_keys=["label"])
    # a file naming no structures is one run, as before; asking it for a name says so
    with pytest.raises(InputError, match="names no structures"):
        read_run(f"{REPO / 'example_runs' / 'B05_emt_bfgs.extxyz'}::x")
    with pytest.raises(InputError, match="pw.x output holds one run"):
        read_run(f"{QE / 'layer_oblique_to_hex' / 'pw.out'}::x")


def _records(folder):
    """Record files of an audit output -> their content without what differs between audits."""
    out = {}
    for p in (Path(folder) / "records").glob("*.json"):
        rec = json_load(p)
        rec.pop("timing", None)
        out[p.name] = rec
    return out


def test_cache_keys_each_structure_on_its_own_frames(tmp_path):
    """One cache entry per structure; a re-audit serves all from the cache. A relaxation appended
    to the file (real frames under a new name) is the only new work, and a structure whose own
    frames changed is read again, alone; every result served equals a fresh audit's."""
    from driftwatch.campaign import audit
    camp = tmp_path / "camp"
    camp.mkdir()
    shutil.copy(BATCH / "relaxations.extxyz.gz", camp)
    kw = dict(workers=1, report=False, progress="off")
    first = audit([camp], tmp_path / "out", **kw)
    assert first["runs"] == 6 and not first["failed"]
    entries = [p for p in (tmp_path / "out" / ".cache").glob("*.json") if p.name != "digests.json"]
    assert len(entries) == 6
    again = audit([camp], tmp_path / "out", **kw)
    assert again["cached"] == 6 and again["analysed"] == 0
    text = gzip.decompress((camp / "relaxations.extxyz.gz").read_bytes()).decode()
    extra = "".join(ln.replace("structure_id=Cu-bct-07", "structure_id=Cu-bct-08")
                    for ln in _frames_of(text, "Cu-bct-07"))
    (camp / "relaxations.extxyz.gz").write_bytes(gzip.compress((text + extra).encode()))
    third = audit([camp], tmp_path / "out", **kw)
    assert third["runs"] == 7 and third["cached"] == 6 and third["analysed"] == 1
    assert not third["failed"]
    recs = _records(tmp_path / "out")
    a = recs["camp_relaxations.extxyz.gz__Cu-bct-07.json"]
    b = recs["camp_relaxations.extxyz.gz__Cu-bct-08.json"]
    assert a["summary"]["verdict"] == b["summary"]["verdict"]               # the same frames
    # one atom of the last frame of Al-fco-02 moved by 0.05 A: that structure alone is read again
    lines = (text + extra).splitlines(keepends=True)
    last = max(i for i, ln in enumerate(lines) if "structure_id=Al-fco-02" in ln)
    f = lines[last + 1].split()
    f[1] = f"{float(f[1]) + 0.05:.8f}"
    lines[last + 1] = " ".join(f) + "\n"
    (camp / "relaxations.extxyz.gz").write_bytes(gzip.compress("".join(lines).encode()))
    fourth = audit([camp], tmp_path / "out", **kw)
    assert fourth["cached"] == 6 and fourth["analysed"] == 1 and not fourth["failed"]
    served = _records(tmp_path / "out")
    assert served["camp_relaxations.extxyz.gz__Al-fco-02.json"] != recs[
        "camp_relaxations.extxyz.gz__Al-fco-02.json"]
    fresh = audit([camp], tmp_path / "fresh", use_cache=False, **kw)
    assert fresh["analysed"] == 7
    assert served == _records(tmp_path / "fresh")


def test_cache_keys_each_structure_of_an_ase_db_on_its_own_rows(tmp_path):
    """The same for an ase.db (SQLite, rows interleaved as a batched optimizer writes them): rows
    of a new relaxation written through ase.db leave the other structures cached; a row rewritten
    with moved atoms (``db.update(id, atoms=...)``) re-reads its structure alone; results served
    from the cache equal a fresh audit's (real SQLite through ase.db, real EMT frames)."""
    import ase.db
    from driftwatch.campaign import audit
    camp = tmp_path / "camp"
    camp.mkdir()
    db_path = camp / "relaxations.db"
    shutil.copy(BATCH / "relaxations.db", db_path)
    kw = dict(workers=1, report=False, progress="off")
    assert audit([camp], tmp_path / "out", **kw)["runs"] == 6
    with ase.db.connect(str(db_path)) as db:
        rows = sorted(db.select(relax_id="Ni-rhombo-03"), key=lambda r: r.step)
        for r in rows:                                   # the same relaxation under a new name
            db.write(r.toatoms(), relax_id="Ni-rhombo-09", step=r.step)
    again = audit([camp], tmp_path / "out", **kw)
    assert again["runs"] == 7 and again["cached"] == 6 and again["analysed"] == 1
    before = _records(tmp_path / "out")
    with ase.db.connect(str(db_path)) as db:
        last = max(db.select(relax_id="CuNi-tP-04"), key=lambda r: r.step)
        atoms = last.toatoms()
        atoms.positions[0] += [0.05, 0.0, 0.0]
        db.update(last.id, atoms=atoms)
    third = audit([camp], tmp_path / "out", **kw)
    assert third["cached"] == 6 and third["analysed"] == 1 and not third["failed"]
    fresh = audit([camp], tmp_path / "fresh", use_cache=False, **kw)
    assert fresh["analysed"] == 7 and _records(tmp_path / "out") == _records(tmp_path / "fresh")
    after = _records(tmp_path / "out")
    changed = {k for k in after if after[k] != before[k]}
    assert changed == {"camp_relaxations.db__CuNi-tP-04.json"}


def _frames_of(text, name):
    lines, out, i = text.splitlines(keepends=True), [], 0
    while i < len(lines):
        n = int(lines[i])
        block = lines[i:i + n + 2]
        if f"structure_id={name}" in block[1]:
            out.extend(block)
        i += n + 2
    return out


def json_load(path):
    import json
    return json.loads(Path(path).read_text())


def test_a_mixed_campaign_of_all_inputs_audits_with_no_failed_run(tmp_path):
    """Every genuine public output, the real pw.x runs (single and multi-stage), the EMT batch files
    and pairs, audited through the command line as a user would: no failed run; the non-periodic
    systems and the band-structure run skipped with what would include them; exit 0."""
    import json
    import subprocess
    import sys
    camp = tmp_path / "mixed"
    shutil.copytree(PUB, camp / "public", ignore=shutil.ignore_patterns("README.md", "SHA256SUMS",
                                                                       "broken"))
    for d in ("layer_oblique_to_hex", "restart_numbered", "restart_stage_folders"):
        shutil.copytree(QE / d, camp / "qe" / d)
    shutil.copytree(QE / "pseudo", camp / "qe" / "pseudo")
    shutil.copytree(BATCH, camp / "ml_batch")
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                           str(tmp_path / "out"), "-j", "2", "--no-report"],
                          capture_output=True, text=True, timeout=900)
    assert proc.returncode == 0, proc.stderr[-3000:]
    summary = json.loads((tmp_path / "out" / "campaign.json").read_text())
    assert summary["failed"] == []
    assert sorted(k["run"] for k in summary["skipped"]) == [
        "mixed/public/ase_generic/gpaw_h2.txt", "mixed/public/foreign_outputs/cp2k/relax.out.gz",
        "mixed/public/foreign_outputs/qe_neb/H2+H.out.gz", "mixed/public/qe_example_h2o_mt",
        "mixed/public/qe_example_si_bands"]
    runs = {p.stem for p in (tmp_path / "out" / "records").glob("*.json")}
    assert "mixed_qe_restart_numbered" in runs and "mixed_qe_restart_stage_folders" in runs
    assert "mixed_public_vasp522_energy_first" in runs
    assert sum("ml_batch" in r for r in runs) == 24
    assert summary["runs"] == len(runs) + 5
    rec = json_load(tmp_path / "out" / "records" / "mixed_ml_batch_pairs.db__Ni-rhombo-03.json")
    assert rec["run"]["kind"] == "end-points" and rec["summary"]["verdict"]["direction"] == "gained"


def test_numbered_outputs_and_folders_that_do_not_continue_are_separate_runs(tmp_path):
    """Stages must continue each other: a rerun from the input beside the first output (numbered
    copies), run1/ run2/ folders of unrelated pw.x relaxations, and relax1/ relax2/ folders of two
    different VASP structures (genuine pymatgen-db files) are separate runs, never one run and
    never a failed one."""
    from driftwatch.campaign import discover
    rerun = tmp_path / "rerun"
    rerun.mkdir()
    shutil.copy(NUMBERED / "pw.out.1", rerun / "pw.out.1")
    shutil.copy(NUMBERED / "pw.out.1", rerun / "pw.out")      # started again from the input
    runs, failed = discover([rerun])
    assert sorted(r.id for r in runs) == ["rerun/pw.out", "rerun/pw.out.1"] and not failed
    camp = tmp_path / "camp"
    shutil.copytree(QE / "bulk_tetragonal_to_cubic", camp / "run1")
    shutil.copytree(QE / "relax_atoms_to_sites", camp / "run2")
    runs, failed = discover([camp])
    assert sorted(r.id for r in runs) == ["camp/run1", "camp/run2"] and not failed
    vasp = tmp_path / "vasp"
    shutil.copytree(PUB / "stage_folders" / "relax1", vasp / "relax1")
    (vasp / "relax2").mkdir()
    for f in ("vasprun.xml.relax2.gz", "INCAR.relax2.gz"):
        shutil.copy(PUB / "custodian_double_relax" / f, vasp / "relax2" / f.replace(".relax2", ""))
    runs, failed = discover([vasp])
    assert sorted(r.id for r in runs) == ["vasp/relax1", "vasp/relax2"] and not failed
    assert read_run(vasp / "relax2").natoms != read_run(vasp / "relax1").natoms


# ---------------------------------------------------------------- an ASE NEB band in one trajectory
def _ase_neb(path: Path, optimise: bool = True) -> int:
    """A real ASE NEB (EMT, FIRE): an invented Pd adatom hopping between two hollow sites of a
    2x2x3 Ag(100) slab, 3 moving images; the optimiser writes every image of the band, end points
    included, at each step (ASE's Trajectory.write -> iterimages). Returns the frames per step."""
    from ase.build import add_adsorbate, fcc100
    from ase.calculators.emt import EMT
    from ase.constraints import FixAtoms
    from ase.mep import NEB
    from ase.optimize import BFGS, FIRE
    slab = fcc100("Ag", size=(2, 2, 3), vacuum=6.0)
    add_adsorbate(slab, "Pd", 1.6, "hollow")
    slab.set_constraint(FixAtoms(mask=[a.tag > 1 for a in slab]))
    slab.calc = EMT()
    BFGS(slab, logfile=None).run(fmax=0.05)
    final = slab.copy()
    final.positions[-1, 0] += slab.cell[0, 0] / 2
    final.calc = EMT()
    BFGS(final, logfile=None).run(fmax=0.05)
    images = [slab] + [slab.copy() for _ in range(3)] + [final]
    for im in images[1:-1]:
        im.calc = EMT()
    neb = NEB(images, method="improvedtangent")
    neb.interpolate()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        FIRE(neb, trajectory=str(path), logfile=None).run(fmax=0.1, steps=20 if optimise else 0)
    return len(images)


def test_a_band_of_images_written_whole_is_no_relaxation(tmp_path):
    """A band written once as a list of images (as fairchem's CatTSunami tutorial ships its
    sample_traj.traj): the end points carry no energy, the images between them do. Made here by a
    real ASE NEB (EMT), its optimised images written with ase.io.write, the end points as plain
    copies: one run, marked a band of images (the band's own optimiser trajectory reads as its
    moving images, below)."""
    from ase.io.trajectory import Trajectory
    _ase_neb(tmp_path / "opt.traj")
    with Trajectory(str(tmp_path / "opt.traj")) as t:
        band = [t[i] for i in range(len(t) - 5, len(t))]          # the last step's five images
    ase.io.write(tmp_path / "band.traj", [band[0].copy()] + band[1:-1] + [band[-1].copy()])
    with Trajectory(str(tmp_path / "band.traj")) as t:                    # ASE's own reader
        has = [a.calc is not None for a in t]
    assert has == [False, True, True, True, False]
    run = read_run(tmp_path / "band.traj")
    assert len(run) == 5 and run.not_relaxation.startswith(
        "a band of images (its end points carry no energy, the images between them do")
    assert read_run(tmp_path / "opt.traj::image01").not_relaxation.startswith(
        "a nudged-elastic-band image")


def test_an_ase_neb_trajectory_is_read_as_its_moving_images(tmp_path):
    """A band's trajectory read as one run was a trajectory jumping between images every frame (a
    'group-lost' verdict between the two end points). Each moving image is now a run of its own,
    ``FILE::image01`` ..., its frames those ASE reads as ``neb.traj@k::5`` (every 5th frame from
    the image's place: how ASE's NEB documentation reads a band back; from memory), steps numbered
    by optimiser step, with the not-a-relaxation note; the file alone is refused naming them."""
    from driftwatch.adapters.registry import structures
    from driftwatch.campaign import discover
    from driftwatch.errors import NotARunError
    path = tmp_path / "camp" / "hop" / "neb.traj"
    path.parent.mkdir(parents=True)
    per_step = _ase_neb(path)
    frames = ase.io.read(path, index=":")                                                 # ASE
    assert per_step == 5 and len(frames) % 5 == 0 and len(frames) >= 10
    assert structures(path) == ["image01", "image02", "image03"]
    runs, failed = discover([tmp_path / "camp"])
    assert [r.id for r in runs] == [f"camp/hop/neb.traj::image0{k}" for k in (1, 2, 3)]
    for k in (1, 2, 3):
        run = read_run(f"{path}::image0{k}")
        ref = ase.io.read(path, index=f"{k}::5")
        assert len(run) == len(ref) == len(frames) // 5
        np.testing.assert_array_equal(run.positions, [a.positions for a in ref])
        assert run.steps.tolist() == list(range(len(ref)))
        assert run.not_relaxation == (f"a nudged-elastic-band image (image0{k} of 3 in an ASE NEB "
                                      f"trajectory): it moves along a path between two end points")
        assert any("not a relaxation" in w for w in run.warnings)
    with pytest.raises(NotARunError) as err:
        read_run(path)
    assert "holds 3 moving images of a nudged-elastic-band calculation" in str(err.value)
    assert f"'{path}::image01'" in str(err.value) and "\n" not in str(err.value)
    with pytest.raises(InputError, match="no structure 'image04'"):      # an end point is no run
        read_run(f"{path}::image04")
    raw = path.read_bytes()                 # cut while writing: the frames it still has, a warning
    cut = tmp_path / "cut.traj"
    cut.write_bytes(raw[:int(len(raw) * 0.7)])
    assert structures(cut) == ["image01", "image02", "image03"]
    run = read_run(f"{cut}::image02")
    assert 0 < len(run) < len(frames) // 5 and any("unreadable after step" in w for w in run.warnings)


def test_trajectories_that_are_no_band_stay_one_run(tmp_path):
    """A relaxation trajectory (ASE BFGS of the same slab), a band optimised for no step (one frame
    per image: too short to tell), and a trajectory whose frames never move are one run each."""
    from ase.build import add_adsorbate, fcc100
    from ase.calculators.emt import EMT
    from ase.io.trajectory import Trajectory
    from ase.optimize import BFGS
    from driftwatch.adapters.registry import structures
    slab = fcc100("Ag", size=(2, 2, 3), vacuum=6.0)
    add_adsorbate(slab, "Pd", 1.6, "bridge")
    slab.rattle(0.05, seed=3)
    slab.calc = EMT()
    BFGS(slab, trajectory=str(tmp_path / "relax.traj"), logfile=None).run(fmax=0.01, steps=40)
    assert len(ase.io.read(tmp_path / "relax.traj", index=":")) > 12
    assert structures(tmp_path / "relax.traj") == []
    _ase_neb(tmp_path / "short.traj", optimise=False)
    assert structures(tmp_path / "short.traj") == []
    assert len(read_run(tmp_path / "short.traj")) == 5
    with Trajectory(str(tmp_path / "still.traj"), "w") as t:
        for _ in range(12):
            t.write(slab)
    assert structures(tmp_path / "still.traj") == [] and len(read_run(tmp_path / "still.traj")) == 12


def test_an_ase_molecular_dynamics_trajectory_says_it_is_no_relaxation(tmp_path):
    """ASE's dynamics write what they are into the trajectory's description (ASE's Dynamics /
    MolecularDynamics ``todict``: ``type`` 'optimization' or 'molecular-dynamics' with
    ``md-type``, read back through ASE's own Trajectory): a real VelocityVerlet and a Langevin run
    (EMT, an invented 32-atom Cu cell) are marked molecular dynamics; a BFGS relaxation is not."""
    from ase.build import bulk
    from ase.calculators.emt import EMT
    from ase.io.trajectory import Trajectory
    from ase.md.langevin import Langevin
    from ase.md.verlet import VelocityVerlet
    from ase.optimize import BFGS
    from ase import units
    atoms = bulk("Cu", cubic=True).repeat(2)
    atoms.rattle(0.05, seed=11)
    atoms.calc = EMT()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        VelocityVerlet(atoms, 2 * units.fs, trajectory=str(tmp_path / "nve.traj")).run(4)
        Langevin(atoms, 2 * units.fs, temperature_K=300, friction=0.01, rng=np.random.default_rng(2),
                 trajectory=str(tmp_path / "nvt.traj")).run(4)
        BFGS(atoms, trajectory=str(tmp_path / "relax.traj"), logfile=None).run(fmax=0.05, steps=5)
    for name, md in (("nve", "VelocityVerlet"), ("nvt", "Langevin")):
        path = tmp_path / f"{name}.traj"
        with Trajectory(str(path)) as t:                                       # ASE's own reader
            assert t.description["type"] == "molecular-dynamics" and t.description["md-type"] == md
        run = read_run(path)
        assert len(run) == 5 and run.not_relaxation == f"molecular dynamics (ASE's {md})"
        assert any("not a relaxation" in w for w in run.warnings)
    relax = read_run(tmp_path / "relax.traj")
    assert relax.code_settings["optimizer"] == "BFGS" and relax.not_relaxation is None
    from driftwatch.live import SymmetryWatch         # the observer attached to MD says it too
    dyn = VelocityVerlet(atoms, 2 * units.fs)
    watch = SymmetryWatch(atoms, optimizer=dyn)
    dyn.attach(watch, interval=1)
    dyn.run(3)
    assert watch.record["run"]["not_relaxation"] == "molecular dynamics (ASE's VelocityVerlet)"
    opt = BFGS(atoms, logfile=None)
    watch = SymmetryWatch(atoms, optimizer=opt)
    opt.attach(watch, interval=1)
    opt.run(fmax=0.05, steps=2)
    assert watch.record["run"]["not_relaxation"] is None


def test_md_frames_written_without_a_description_are_told_by_their_momenta(tmp_path):
    """A trajectory written frame by frame by another tool (as libAtoms' workflow writes its MD
    snapshots: no description, atoms with momenta) holds a real VelocityVerlet EMT run here: its
    momenta change from frame to frame, so it is molecular dynamics. A FIRE relaxation of atoms
    that carry stale momenta (set before, left alone by the optimiser, as ASE's FIRE keeps its
    velocities to itself) and a BFGS one written the same way stay relaxations."""
    from ase.build import bulk
    from ase.calculators.emt import EMT
    from ase.io.trajectory import Trajectory
    from ase.md.velocitydistribution import MaxwellBoltzmannDistribution
    from ase.md.verlet import VelocityVerlet
    from ase.optimize import BFGS, FIRE
    from ase import units
    atoms = bulk("Cu", cubic=True).repeat(2)
    atoms.rattle(0.05, seed=5)
    atoms.calc = EMT()
    MaxwellBoltzmannDistribution(atoms, temperature_K=300, rng=np.random.default_rng(1))
    for name, dyn in (("md", VelocityVerlet(atoms, 2 * units.fs)),
                      ("fire", FIRE(atoms, logfile=None)), ("bfgs", BFGS(atoms, logfile=None))):
        with Trajectory(str(tmp_path / f"{name}.traj"), "w") as t:    # no description written
            def snap():
                t.write(atoms.copy())
            dyn.attach(snap, interval=1)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                dyn.run(4) if name == "md" else dyn.run(fmax=1e-4, steps=4)
        with Trajectory(str(tmp_path / f"{name}.traj")) as t:             # ASE's own reader
            assert not t.description and len(t) == 5
            p = [a.get_momenta() for a in t]
        assert np.abs(p[0]).max() > 0 and (np.any(p[0] != p[1]) == (name == "md"))
        run = read_run(tmp_path / f"{name}.traj")
        assert run.not_relaxation == ("molecular dynamics (no class named; the frames' atomic "
                                      "momenta change)" if name == "md" else None), name


def test_a_new_run_appended_to_one_output_is_numbered_as_the_same_run_in_two_folders(tmp_path):
    """A run started again from scratch with `pw.x < pw.in >> pw.out` (the real pw.x 6.7 outputs of
    tests/data/qe/restart_stage_folders written into one file, byte for byte as the shell appends
    them). The first run's last printed structure was never evaluated; the appended run must not
    leave a gap for it: its steps are those of the same two runs read as stage folders (and ASE's
    frames of the joined file, one per step)."""
    base = QE / "restart_stage_folders"
    joined = tmp_path / "job" / "pw.out"
    joined.parent.mkdir()
    joined.write_text("".join((base / s / "pw.out").read_text() for s in ("relax1", "relax2")))
    appended, staged = read_run(joined), read_run(base)
    assert [int(s) for s in appended.steps] == [int(s) for s in staged.steps] == \
        list(range(len(staged)))
    assert len(ase.io.read(joined, ":", format="espresso-out")) == len(appended)
    assert np.allclose(appended.positions, staged.positions)


def test_an_ase_db_in_wal_mode_is_read_again_when_its_log_holds_new_rows(tmp_path):
    """An ase.db in SQLite's WAL mode, written while another connection stays open (a running
    batch job's): the new rows are in ``batch.db-wal``, the file's own bytes and stat unchanged
    (SQLite's write-ahead log). The cache had served the old answer of the structure whose row was
    rewritten (a field trial); the structure is now read again, alone, and equals a fresh audit's
    (real SQLite through ase.db and sqlite3, real EMT frames)."""
    import sqlite3
    import ase.db
    from driftwatch.campaign import audit
    camp = tmp_path / "camp"
    camp.mkdir()
    db_path = camp / "relaxations.db"
    shutil.copy(BATCH / "relaxations.db", db_path)
    con = sqlite3.connect(db_path)
    assert con.execute("PRAGMA journal_mode=WAL").fetchone() == ("wal",)          # SQLite's
    con.close()
    kw = dict(workers=1, report=False, progress="off")
    assert audit([camp], tmp_path / "out", **kw)["runs"] == 6
    # (reading a WAL-mode file may touch it, SQLite checkpointing on a last close: a result whose
    # file changed while it was read is not cached, so the cache settles over a few audits)
    assert any(audit([camp], tmp_path / "out", **kw)["analysed"] == 0 for _ in range(4))
    keep = sqlite3.connect(db_path)                    # the job's own open connection
    keep.execute("select count(*) from systems").fetchone()
    stat = db_path.stat()
    with ase.db.connect(str(db_path)) as db:
        last = max(db.select(relax_id="CuNi-tP-04"), key=lambda r: r.step)
        atoms = last.toatoms()
        atoms.positions[0] += [0.05, 0.0, 0.0]
        db.update(last.id, atoms=atoms)
    assert (db_path.stat().st_size, db_path.stat().st_mtime_ns) == (stat.st_size, stat.st_mtime_ns)
    assert Path(f"{db_path}-wal").stat().st_size > 0
    again = audit([camp], tmp_path / "out", **kw)
    fresh = audit([camp], tmp_path / "fresh", use_cache=False, **kw)
    still = audit([camp], tmp_path / "out", **kw)     # the log still there, nothing changed:
    keep.close()                                      # all from the cache (a regression review:
    assert still["cached"] == 6 and still["since_last"]["read_again"] == []    # never cached)
    assert again["cached"] == 5 and again["analysed"] == 1 and fresh["analysed"] == 6
    assert _records(tmp_path / "out") == _records(tmp_path / "fresh")
    assert again["since_last"]["read_again"] == ["camp/relaxations.db::CuNi-tP-04"]


def _batch_text():
    return gzip.decompress((BATCH / "relaxations.extxyz.gz").read_bytes()).decode()


def test_a_batch_file_cut_inside_another_structures_frame_leaves_the_others_whole(tmp_path):
    """A batch writer still writing: the real EMT batch, then half of a new structure's first frame
    whose comment line names it (Cu-bct-08). The six complete structures had all been marked cut
    short (and their cache entries dropped each time a writer was mid-frame: a field trial); they
    are read whole and kept in the cache now. A cut frame whose comment is itself cut names no
    structure, and every structure is still said to be possibly cut (ASE refuses both files)."""
    from driftwatch.campaign import audit
    text = _batch_text()
    frame = _frames_of(text, "Cu-bct-07")
    n = int(frame[0])
    new = [ln.replace("structure_id=Cu-bct-07", "structure_id=Cu-bct-08") for ln in frame[:n + 2]]
    camp = tmp_path / "camp"
    camp.mkdir()
    (camp / "batch.extxyz").write_text(text + "".join(new[:2 + n // 2]))
    with pytest.raises(Exception):                                                   # ASE's
        ase.io.read(camp / "batch.extxyz", ":")
    kw = dict(workers=1, report=False, progress="off")
    first = audit([camp], tmp_path / "out", **kw)
    assert first["runs"] == 6 and not first["failed"]
    recs = _records(tmp_path / "out")
    assert all(r["run"]["unfinished"] is None for r in recs.values())
    (camp / "batch.extxyz").write_text(text + "".join(new))         # the frame finished
    again = audit([camp], tmp_path / "out", **kw)
    assert again["runs"] == 7 and again["cached"] == 6 and again["analysed"] == 1
    (camp / "batch.extxyz").write_text(text + new[0] + new[1][:40])    # its comment line cut
    third = audit([camp], tmp_path / "third", **kw)
    assert all(r["run"]["unfinished"] == "cut short: job killed or still running"
               for r in _records(tmp_path / "third").values())
    assert third["runs"] == 6


def test_a_damaged_header_mid_batch_file_is_said_for_every_structure(tmp_path):
    """The real EMT batch with one frame's atom count damaged ('2x') mid-file: ASE's reader refuses
    the file there; driftwatch had read every structure's frames before it and said nothing (exit
    0). Each structure now says the damage and is marked damaged, the frames before it read."""
    from driftwatch.campaign import audit
    lines = _batch_text().splitlines(keepends=True)
    heads = [i for i, ln in enumerate(lines) if ln.strip().isdigit()]
    k = heads[len(heads) // 2]
    lines[k] = lines[k].strip() + "x\n"
    camp = tmp_path / "camp"
    camp.mkdir()
    (camp / "batch.extxyz").write_text("".join(lines))
    with pytest.raises(Exception, match="header"):                                    # ASE's
        ase.io.read(camp / "batch.extxyz", ":")
    s = audit([camp], tmp_path / "out", workers=1, report=False, progress="off")
    recs = _records(tmp_path / "out")
    assert s["runs"] == len(recs) >= 1
    for r in recs.values():
        assert r["run"]["unfinished"].startswith("damaged: not an XYZ frame header at line "
                                                 f"{k + 1}")
        assert any("the frames after it are not read, of any structure" in w
                   for w in r["run"]["warnings"])


def test_a_structures_cache_entry_keys_on_where_its_frames_are(tmp_path):
    """A structure's frames moved in the file (another structure before it removed) re-read it:
    its failure's message quotes file frame numbers (a field trial: a cached 'frames 5 and 9'
    where the file now has them at 1 and 5). Frames appended after it move nothing."""
    from driftwatch.adapters import batch
    text = _batch_text()
    path = tmp_path / "b.extxyz"
    path.write_text(text)
    keys = batch.STRUCTURE_KEYS
    before = batch.member_digest(path, "extxyz", keys, "Ni-rhombo-03")
    path.write_text(text + "".join(ln.replace("Cu-bct-07", "Cu-bct-09")
                                   for ln in _frames_of(text, "Cu-bct-07")))
    assert batch.member_digest(path, "extxyz", keys, "Ni-rhombo-03") == before
    path.write_text("".join(ln for ln in text.splitlines(keepends=True))
                    .replace("".join(_frames_of(text, "Cu-bct-07")), ""))
    assert batch.member_digest(path, "extxyz", keys, "Ni-rhombo-03") != before
