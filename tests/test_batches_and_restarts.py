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
