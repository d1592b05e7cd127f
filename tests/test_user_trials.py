"""A new user's own runs (tests/data/user_trials, README there): what the campaign says of them.

External facts used (source beside each check):
* ASE 3.29's readers (``ase.io.read``: the trajectory, the extended XYZ, pw.x's output) and its
  Bravais classification ``Cell.get_bravais_lattice(eps=...)`` of a cell;
* the files' own content: the start structure a script wrote beside its optimiser's trajectory
  is that trajectory's first frame (compared here with ASE, to the digits written).
"""

from __future__ import annotations

import csv
import shutil
from pathlib import Path

import numpy as np
from ase.io import read, write

from driftwatch.campaign import audit, discover
from driftwatch.track import analyze

DATA = Path(__file__).parent / "data" / "user_trials"
ASE_RUNS = ("FH1_CuAu_layer_emt", "FH2_Cu4_rattled_emt", "FH5_Ni2Pd_fixedcell_emt")


def test_a_start_structure_beside_its_trajectory_is_part_of_that_run(tmp_path):
    """start.xyz beside relax.traj holds the trajectory's first frame (ASE reads both): the folder
    is one run that names it, not two runs of which one is a 'single structure' whose flags count
    among the relaxations' (3 runs and 3 single structures before). A POSCAR of the last frame
    (final.vasp) written beside it is named the same way; a structure of its own beside it stays a
    run."""
    for name in ASE_RUNS:
        start, first = read(DATA / name / "start.xyz"), read(DATA / name / "relax.traj", 0)
        assert np.allclose(start.positions, first.positions, atol=1e-6)      # ASE: the same
    runs, failed = discover([DATA])
    assert not failed
    ids = sorted(r.id for r in runs)
    assert ids == sorted([f"user_trials/{n}" for n in ASE_RUNS]
                         + ["user_trials/si2_vcrelax_excursion", "user_trials/ag1_strain_bfgs.traj"])
    rec = analyze(DATA / "FH2_Cu4_rattled_emt")
    assert rec["run"]["n_frames"] == len(read(DATA / "FH2_Cu4_rattled_emt" / "relax.traj", ":"))
    assert any("start.xyz beside it holds the trajectory's first frame (its start), not a run of "
               "its own" in w for w in rec["run"]["warnings"])
    # a copy of the last frame (ASE writes a POSCAR) and another structure beside the trajectory
    run = tmp_path / "FH2"
    shutil.copytree(DATA / "FH2_Cu4_rattled_emt", run)
    last = read(run / "relax.traj", -1)
    write(run / "final.vasp", last, format="vasp", direct=True)
    other = last.copy()
    other.positions[0] += 0.1
    write(run / "guess.xyz", other, format="extxyz")
    runs, failed = discover([run])
    assert not failed and sorted(r.id for r in runs) == ["FH2", "FH2/guess.xyz"]
    rec = analyze(run)
    said = " ".join(rec["run"]["warnings"])
    assert "final.vasp beside it holds the trajectory's last frame" in said
    assert "guess.xyz beside it is another run (read on its own)" in said
    # (a regression review) another structure under a name no format's pattern matches is still
    # a run of its own; the last frame with another calculator's energy is a single point of its
    # own (ASE's SinglePointCalculator, as a script saves one); a copy replaced by another
    # structure is no longer called a copy at the next audit (the cache knows the file)
    from ase.calculators.singlepoint import SinglePointCalculator
    shutil.copy(run / "guess.xyz", run / "ideal.xyz.orig")
    (run / "guess.xyz").unlink()
    sp = last.copy()
    sp.calc = SinglePointCalculator(sp, energy=last.get_potential_energy() - 1.0)
    write(run / "sp_other.xyz", sp, format="extxyz")
    runs, failed = discover([run])
    assert not failed and sorted(r.id for r in runs) == ["FH2", "FH2/ideal.xyz.orig",
                                                         "FH2/sp_other.xyz"]
    # a trajectory with no energies (written without its calculator) cannot tell a copy's energy
    # from another's: the structure decides, as before the energy rule (a second review)
    bare = tmp_path / "bare"
    bare.mkdir()
    frames = read(run / "relax.traj", ":")
    for a in frames:
        a.calc = None
    write(bare / "relax.traj", frames)
    write(bare / "final.xyz", sp, format="extxyz")
    assert [r.id for r in discover([bare])[0]] == ["bare"]
    out = tmp_path / "audit"
    audit([run], out, workers=1, progress="off", quiet=True, report=False)
    first = read(run / "relax.traj", 0)
    first.positions[0] += 0.2
    write(run / "start.xyz", first, format="extxyz")
    s = audit([run], out, workers=1, progress="off", quiet=True, report=False)
    assert "FH2/start.xyz" in {r["run"] for r in csv.DictReader(open(out / "campaign.csv"))}
    said = " ".join(analyze(run)["run"]["warnings"])
    rec = next(p for p in (out / "records").glob("FH2.json"))
    assert "start.xyz beside it holds" not in rec.read_text() and "start.xyz beside it is " \
        "another run" in said and s["analysed"] >= 2


def test_a_lattice_that_leaves_its_type_and_comes_back_is_said_with_how_far(tmp_path):
    """A real pw.x vc-relax of Si2 (displaced atom, cF cell): ASE's classification calls the first
    and last cells FCC and the cell at step 1 not (eps 1e-3 Å), the run keeps cF end to end;
    the drift says how far it went on the way (a new user saw 'cF 0 Å -> 0.000621 Å' only)."""
    run = DATA / "si2_vcrelax_excursion"
    frames = read(run / "pw.out", ":", format="espresso-out")
    kinds = [a.cell.get_bravais_lattice(eps=1e-3).name for a in frames]
    assert kinds[0] == kinds[-1] == "FCC" and kinds[1] != "FCC"
    rec = analyze(run)
    d = rec["summary"]["drift"]
    series = [f["deformation"]["cF"] for f in rec["frames"]]
    assert d["type"] == "cF" and rec["summary"]["verdict"]["lattice"]["direction"] == "kept"
    assert d["peak"] == max(series) and d["peak_step"] == 1 and 0.09 < d["peak"] < 0.1
    assert d["initial"] <= 1e-3 and d["final"] <= 1e-3
    out = tmp_path / "audit"
    audit([run], out, workers=1, progress="off", quiet=True, report=False)
    row = next(csv.DictReader(open(out / "campaign.csv", encoding="utf-8")))
    assert float(row["drift_peak_A"]) == float(f"{d['peak']:.6g}") and row["drift_peak_step"] == "1"
    # a run whose type was never held at either end has no excursion to name
    quiet = analyze(Path(__file__).parent.parent / "example_runs" / "L07_emt_fire.traj")
    assert quiet["summary"]["drift"]["peak"] is None
    # nor a type held at one end only: a relaxation that moved away from the type it then gained
    # (an ase.db relaxation of tests/data/batch: cF reached at the end, 1.07 Å from it on the way,
    # farther than at its start) is a gain, not an excursion (the second review)
    gain = analyze(Path(__file__).parent / "data" / "batch" / "relaxations.db::Cu-bct-07")
    d = gain["summary"]["drift"]
    way = max(f["deformation"]["cF"] for f in gain["frames"])
    assert d["type"] == "cF" and d["final"] <= 1e-3 < d["initial"] + 2e-3 < way
    assert d["peak"] is None
