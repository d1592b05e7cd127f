"""Relaxations an ASE optimiser drove through real CP2K, ABINIT and NWChem runs, folders as ASE
left them (tests/data/ase_calc_trials, README there), and real EMT relaxations run here: checked
against ASE's readers, the codes' own output lines, the optimisers' own records and spglib."""
from __future__ import annotations

import gzip
import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import ase.io
import numpy as np
import pytest
import spglib
from ase.build import bulk
from ase.calculators.emt import EMT
from ase.constraints import FixAtoms
from ase.filters import FrechetCellFilter
from ase.io.trajectory import Trajectory
from ase.optimize import BFGS
from ase.units import Hartree

from driftwatch.adapters import read_run
from driftwatch.adapters.registry import detect
from driftwatch.campaign import discover
from driftwatch.config import load as load_config
from driftwatch.errors import ForeignOutputError, UnknownFormatError
from driftwatch.track import record_from_run

DATA = Path(__file__).parent / "data" / "ase_calc_trials"
FINISHED = ("abinit_fixed", "abinit_kept_vc", "cp2k_bulk_vc", "cp2k_fixed", "nwchem_fixed")


def _text(path: Path) -> str:
    return gzip.open(path, "rt").read()


def _largest_force(atoms) -> float:
    """As ASE's optimisers see the atoms' part: constraints applied (ASE's get_forces)."""
    return float(np.linalg.norm(atoms.get_forces(), axis=1).max())


def test_one_run_per_relaxation_and_the_calculators_files_are_none():
    """Nine ASE-driven relaxations and one ABINIT relaxation run alone: the calculators' outputs
    (cp2k.out, abinit.abo, nwchem.nwo), CP2K's restart file and NWChem's run-time database are
    no runs of their own (21 listed before, 4 of them skipped and 3 failed); the ABINIT run alone
    is a skipped run that says so; the extended XYZ beside one trajectory stays a run."""
    runs, failed = discover([DATA])
    assert not failed
    assert sorted(r.id for r in runs) == [
        "ase_calc_trials/abinit_fixed", "ase_calc_trials/abinit_kept_vc",
        "ase_calc_trials/abinit_killed", "ase_calc_trials/abinit_native/abinit.abo.gz",
        "ase_calc_trials/cp2k_bulk_vc", "ase_calc_trials/cp2k_bulk_vc/steps.extxyz",
        "ase_calc_trials/cp2k_fixed", "ase_calc_trials/cp2k_killed",
        "ase_calc_trials/nwchem_fixed", "ase_calc_trials/nwchem_killed"]


def test_nwchems_run_time_database_is_no_ase_database():
    """ASE's NWChem calculator keeps NWChem's run-time database as nwchem/nwchem.db; its first
    bytes are NWChem's ("hdbm v1.0"), not SQLite's ("SQLite format 3\\0")."""
    path = DATA / "nwchem_fixed" / "nwchem" / "nwchem.db"
    head = path.read_bytes()[:16]
    assert head.startswith(b"hdbm v") and not head.startswith(b"SQLite format 3\x00")
    with pytest.raises(UnknownFormatError, match="NWChem's run-time database"):
        detect(path)


@pytest.mark.parametrize("name,code", [("abinit_native/abinit.abo.gz", "ABINIT"),
                                       ("nwchem_fixed/nwchem.nwo.gz", "NWChem")])
def test_abinit_and_nwchem_outputs_are_said_as_codes_with_no_reader(name, code):
    """Their banners, as the codes print them: ".Version 9.6.2 of ABINIT", "Northwest
    Computational Chemistry Package (NWChem) 7.0.2"."""
    assert re.search(r"\.Version \S+ of ABINIT|\(NWChem\) \S+", _text(DATA / name))
    with pytest.raises(ForeignOutputError, match=f"an output of {code}, which driftwatch has "
                                                 f"no reader"):
        detect(DATA / name)


def test_cp2ks_output_is_the_same_steps_as_the_trajectory_beside_it():
    """ASE's CP2K calculator keeps one cp2k_shell for the whole relaxation: cp2k.out holds one
    "ENERGY| Total FORCE_EVAL" line per step, the trajectory's energies (Hartree -> eV by ASE's
    units). The folder is one run, read from the trajectory, naming the output."""
    d = DATA / "cp2k_bulk_vc"
    ref = ase.io.read(d / "relax.traj", ":")                                     # ASE's reader
    cp2k = [float(x) * Hartree for x in
            re.findall(r"ENERGY\| Total FORCE_EVAL.*?:\s+(\S+)", _text(d / "cp2k.out.gz"))]
    assert len(cp2k) == len(ref) == 12
    assert np.allclose(cp2k, [a.get_potential_energy() for a in ref], atol=1e-6)
    run = read_run(str(d))
    assert Path(run.source).name == "relax.traj" and len(run.cells) == 12
    assert np.array_equal(run.positions, [a.positions for a in ref])
    assert any("cp2k.out.gz beside it is CP2K's output of this relaxation" in w
               for w in run.warnings)
    assert run.unfinished is None


def test_a_calculators_restart_file_is_no_run_of_its_own():
    """ASE's CP2K calculator with auto_write=True writes cp2k_restart.traj: one frame, the last
    structure it evaluated, the trajectory's last frame (ASE's reader)."""
    d = DATA / "cp2k_fixed"
    restart, last = ase.io.read(d / "cp2k_restart.traj"), ase.io.read(d / "relax.traj", -1)
    assert len(Trajectory(str(d / "cp2k_restart.traj"))) == 1
    assert np.array_equal(restart.positions, last.positions)
    run = read_run(str(d))
    assert Path(run.source).name == "relax.traj"
    assert any("cp2k_restart.traj beside it is a one-frame copy of the trajectory's last frame"
               in w for w in run.warnings)


@pytest.mark.parametrize("case", FINISHED)
def test_finished_relaxations_are_finished(case):
    """Each ended below the fmax its trajectory records (ASE's forces of its last frame) and its
    code's output ends with the code's closing line."""
    d = DATA / case
    desc = Trajectory(str(d / "relax.traj")).description
    assert _largest_force(ase.io.read(d / "relax.traj", -1)) < desc["fmax"]
    assert read_run(str(d)).unfinished is None


def test_a_killed_cp2k_relaxation_is_cut_short_by_its_optimisers_own_record():
    """kill -9 during step 3: the trajectory's last frame has atomic forces of 0.457 eV/Å (ASE's
    forces), the optimiser's trajectory records fmax 0.02 and max_steps 40; CP2K's output has no
    "PROGRAM ENDED AT" (the finished runs' have it)."""
    d = DATA / "cp2k_killed"
    desc = Trajectory(str(d / "relax.traj")).description
    assert (desc["fmax"], desc["max_steps"]) == (0.02, 40)
    assert _largest_force(ase.io.read(d / "relax.traj", -1)) == pytest.approx(0.457, abs=1e-3)
    assert "PROGRAM ENDED AT" not in _text(d / "cp2k.out.gz")
    assert "PROGRAM ENDED AT" in _text(DATA / "cp2k_bulk_vc" / "cp2k.out.gz")
    run = read_run(str(d))
    assert run.unfinished.startswith("stopped without converging (the ASE optimiser: its last "
                                     "step's atomic forces reach 0.457 eV/Å, above the fmax 0.02 "
                                     "eV/Å its trajectory records, after 2 of its max_steps 40")
    assert any("unfinished: stopped without converging" in w for w in run.warnings)
    assert any("ends without CP2K's closing line ('PROGRAM ENDED AT')" in w for w in run.warnings)


@pytest.mark.parametrize("case,code,line", [
    ("abinit_killed", "ABINIT", "Calculation completed."),
    ("nwchem_killed", "NWChem", "Total times")])
def test_a_killed_file_io_calculation_is_cut_short_by_the_codes_output(case, code, line):
    """ASE's ABINIT and NWChem calculators run the code anew for each step: the output of the
    killed step lacks the closing line every finished run's has. The one-atom Al cell has no
    atomic force (ASE's forces: 0), so only the output tells."""
    out = next((DATA / case).glob("*.abo.gz" if code == "ABINIT" else "*.nwo.gz"))
    assert line not in _text(out)
    for done in FINISHED:
        for o in (DATA / done).glob(out.name):
            assert line in _text(o)
    run = read_run(str(DATA / case))
    assert run.unfinished == "cut short: job killed or still running"
    assert any(f"ends without {code}'s closing line" in w for w in run.warnings)


def test_abinits_own_symmetry_is_held_by_code():
    """ABINIT's output says it used 48 operations (nsym 48), spglib's Fd-3m of the final
    structure in its two-atom cell has 48: the run 'kept' a group the code held."""
    d = DATA / "abinit_kept_vc"
    assert re.findall(r"^ +nsym +(\d+) *$", _text(d / "abinit.abo.gz"), re.M)[-1] == "48"
    a = ase.io.read(d / "relax.traj", -1)
    ds = spglib.get_symmetry_dataset((a.cell[:], a.get_scaled_positions(), a.numbers),
                                     symprec=1e-3)
    assert (ds.number, len(ds.rotations)) == (227, 48)
    flags = {f["code"]: f for f in record_from_run(read_run(str(d)), load_config(None))["flags"]}
    assert "ABINIT symmetrised forces and stress with the 48 symmetry operations" in \
        flags["held-by-code"]["message"]


def test_one_relaxation_in_two_files_is_named_as_copies(tmp_path):
    """The trajectory and the extended XYZ written at each step hold the same 12 steps (ASE's
    readers: positions to the 8 decimals extxyz keeps): the summary names them as copies."""
    traj = ase.io.read(DATA / "cp2k_bulk_vc" / "relax.traj", ":")
    xyz = ase.io.read(DATA / "cp2k_bulk_vc" / "steps.extxyz", ":")
    assert len(traj) == len(xyz) == 12
    assert max(np.abs(a.positions - b.positions).max() for a, b in zip(traj, xyz)) < 1e-7
    camp = tmp_path / "camp"
    shutil.copytree(DATA / "cp2k_bulk_vc", camp / "si2_strained")
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                           str(tmp_path / "out")], capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    summary = json.loads((tmp_path / "out" / "campaign.json").read_text())
    assert summary["copies"] == [["camp/si2_strained", "camp/si2_strained/steps.extxyz"]]


def _emt_relaxation(tmp_path, name, steps, fixed=False, cell=False):
    """A real EMT relaxation of a rattled Cu cell by ASE's BFGS (fmax 0.01 eV/Å)."""
    atoms = bulk("Cu", "fcc", a=3.7, cubic=True).repeat((2, 1, 1))
    atoms.rattle(0.05, seed=7)
    if fixed:
        atoms.set_constraint(FixAtoms(indices=[0, 1]))
        atoms.positions[0] += [0.15, 0.0, 0.0]         # a held atom with a large force
    atoms.calc = EMT()
    path = tmp_path / f"{name}.traj"
    opt = BFGS(FrechetCellFilter(atoms) if cell else atoms, trajectory=str(path), logfile=None)
    converged = opt.run(fmax=0.01, steps=steps)
    return path, converged


def test_an_optimiser_at_its_step_limit_is_said_stopped_there(tmp_path):
    path, converged = _emt_relaxation(tmp_path, "short", steps=3)
    assert not converged and len(Trajectory(str(path))) == 4          # the start and 3 steps
    run = read_run(str(path))
    assert run.unfinished.startswith("stopped at its step limit (the ASE optimiser's "
                                     "max_steps = 3;")


@pytest.mark.parametrize("fixed,cell", [(False, False), (True, False), (False, True)])
def test_a_converged_optimiser_is_finished(tmp_path, fixed, cell):
    """Converged runs, FixAtoms holding an atom with a large force among them (ASE's optimiser
    does not see it; nor does the check) and a cell filter."""
    path, converged = _emt_relaxation(tmp_path, "done", steps=300, fixed=fixed, cell=cell)
    assert converged
    raw = ase.io.read(path, -1)
    if fixed:
        assert np.linalg.norm(raw.get_forces(apply_constraint=False), axis=1).max() > 0.05
    assert read_run(str(path)).unfinished is None


def test_follow_holds_back_what_a_running_job_shows_by_nature():
    """While a relaxation runs, its optimiser has not converged and its calculator's output has
    no closing line yet: `follow` prints those warnings of the reader (here the killed CP2K
    run's) once following has ended, not at every poll; the others at once."""
    from types import SimpleNamespace
    from driftwatch import live
    warnings = read_run(str(DATA / "cp2k_killed")).warnings
    waiting = [w for w in warnings if "stopped without converging" in w or "closing line" in w]
    other = [w for w in warnings if w not in waiting]
    assert len(waiting) == 2 and len(other) == 1
    said: list = []
    f = SimpleNamespace(warned=set(), say=said.append)
    live._Follower.say_warnings(f, warnings, final=False)
    assert said == [f"  warning: {w}" for w in other]
    live._Follower.say_warnings(f, warnings, final=True)
    assert said == [f"  warning: {w}" for w in other + waiting]


def test_a_cell_only_relaxation_is_not_judged_by_its_atoms_forces(tmp_path):
    """ASE's StrainFilter relaxes the cell alone: the atoms keep their fractional coordinates and
    their forces (1.4 eV/Å here, ASE's) are not what the optimiser converged on (it says True)."""
    from ase.filters import StrainFilter
    atoms = bulk("Cu", "fcc", a=3.7, cubic=True).repeat((2, 1, 1))
    atoms.rattle(0.08, seed=3)
    atoms.calc = EMT()
    path = tmp_path / "strain.traj"
    assert BFGS(StrainFilter(atoms), trajectory=str(path), logfile=None).run(fmax=0.01,
                                                                              steps=200)
    assert _largest_force(ase.io.read(path, -1)) > 1.0
    assert read_run(str(path)).unfinished is None


def test_what_the_trajectory_cannot_tell_is_not_judged(tmp_path):
    """Real EMT runs whose files hide the optimiser's end: written every 3rd step (loginterval 3:
    the converged step 8 is not in the file, ASE's log says), and a second run() with a looser
    fmax on the same trajectory (ASE keeps the first run's fmax 0.005 and max_steps 3 in the
    description; the second run converged, ASE says True)."""
    atoms = bulk("Cu", "fcc", a=3.7, cubic=True).repeat((2, 1, 1))
    atoms.rattle(0.05, seed=7)
    atoms.calc = EMT()
    every = tmp_path / "every3.traj"
    opt = BFGS(atoms.copy(), trajectory=str(every), logfile=None, loginterval=3)
    opt.atoms.calc = EMT()
    assert opt.run(fmax=0.02, steps=300) and opt.nsteps % 3 != 0
    assert Trajectory(str(every)).description["interval"] == 3
    run = read_run(str(every))
    assert run.unfinished is None
    assert any("wrote every 3th step to its trajectory" in w for w in run.warnings)
    two = tmp_path / "two.traj"
    atoms.calc = EMT()
    opt = BFGS(atoms, trajectory=str(two), logfile=None)
    assert not opt.run(fmax=0.005, steps=3)
    assert opt.run(fmax=0.05, steps=300) and len(Trajectory(str(two))) > 4
    assert Trajectory(str(two)).description["max_steps"] == 3
    assert read_run(str(two)).unfinished is None


def test_atoms_an_ase_filter_hides_are_not_the_optimisers_concern(tmp_path):
    """ASE's Filter(atoms, indices) shows the optimiser the top layer only, with no constraint in
    the file: the other atoms' forces stay large (ASE's), the optimiser converged (True)."""
    from ase.build import fcc111
    from ase.filters import Filter
    slab = fcc111("Pt", size=(2, 2, 3), vacuum=6.0)
    slab.calc = EMT()
    top = [i for i, z in enumerate(slab.positions[:, 2]) if z > slab.positions[:, 2].max() - 0.1]
    path = tmp_path / "top.traj"
    assert BFGS(Filter(slab, indices=top), trajectory=str(path), logfile=None).run(fmax=0.03,
                                                                                  steps=300)
    assert _largest_force(ase.io.read(path, -1)) > 0.1
    assert read_run(str(path)).unfinished is None


def test_a_step_limit_just_above_fmax_is_said(tmp_path):
    """A fixed cell: the stored forces are the ones ASE compared, so a last step at 1.0-1.25 x
    fmax (no margin) is at its step limit too."""
    path, converged = _emt_relaxation(tmp_path, "near", steps=300)
    n = len(Trajectory(str(path)))
    last = _largest_force(ase.io.read(path, -1))
    forces = [_largest_force(a) for a in ase.io.read(path, ":")]
    k = next(i for i, f in enumerate(forces) if 0.01 < f < 0.0125) if any(
        0.01 < f < 0.0125 for f in forces) else None
    assert converged and last < 0.01 and n > 2
    if k is None:
        pytest.skip("no step of this run has forces between fmax and 1.25 fmax")
    cut, _ = _emt_relaxation(tmp_path, "cut", steps=k)
    assert len(Trajectory(str(cut))) == k + 1
    assert 0.01 < _largest_force(ase.io.read(cut, -1)) < 0.0125
    assert read_run(str(cut)).unfinished.startswith("stopped at its step limit")


def test_one_frame_of_another_calculator_is_no_restart_file(tmp_path):
    """A single point of the relaxed structure with another calculator (ASE's LennardJones beside
    an EMT relaxation; their energies differ) is a run of its own, not a restart copy."""
    from ase.calculators.lj import LennardJones
    from driftwatch.adapters.registry import scan_folder
    path, converged = _emt_relaxation(tmp_path, "relax", steps=300)
    check = ase.io.read(path, -1)
    check.calc = LennardJones()
    check.get_potential_energy()
    ase.io.write(tmp_path / "check_lj.traj", check)
    assert scan_folder(tmp_path) == ("files", ["check_lj.traj", "relax.traj"])


def test_two_inputs_that_give_the_same_steps_are_no_copies(tmp_path):
    """Two real pw.x runs whose inputs differ in cell_dofree ('all', 'ibrav': no effect with
    ibrav = 0) give the same energies at every step (pw.x's "!" lines): not copies of one run; a
    folder kept twice is."""
    pair = Path(__file__).parent / "data" / "qe_trials" / "al1_ibrav0_same_steps"
    energies = [re.findall(r"^!\s+total energy\s+=\s+(\S+)", _text(pair / d / "pw.out.gz"), re.M)
                for d in ("dofree_all", "dofree_ibrav")]
    assert energies[0] == energies[1] and len(energies[0]) == 7
    camp = tmp_path / "camp"
    for d in ("dofree_all", "dofree_ibrav"):
        shutil.copytree(pair / d, camp / d)
    shutil.copytree(pair / "dofree_all", camp / "dofree_all_bk")
    proc = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                           str(tmp_path / "out"), "--no-report"], capture_output=True, text=True,
                          timeout=600)
    assert proc.returncode == 0, proc.stderr
    summary = json.loads((tmp_path / "out" / "campaign.json").read_text())
    assert summary["copies"] == [["camp/dofree_all", "camp/dofree_all_bk"]]


def test_a_codes_run_folder_stays_its_run_with_an_ase_trajectory_and_its_copy_beside(tmp_path):
    """A real pw.x run folder that also holds an ASE optimiser's trajectory and a one-frame copy
    of its last frame: the pw.x run is the folder's run, the two trajectories runs of their own
    (not an ambiguous folder that loses the pw.x run)."""
    from driftwatch.adapters.registry import scan_folder
    d = tmp_path / "job"
    shutil.copytree(Path(__file__).parent / "data" / "qe_trials" / "al1_fcc_vc_relax", d)
    path, _ = _emt_relaxation(d, "relax", steps=300)
    ase.io.write(d / "final.traj", ase.io.read(path, -1))
    kind, pick = scan_folder(d)
    assert kind == "run" and pick.stages[0][2] == "espresso-out"
    assert sorted(pick.others) == ["final.traj", "relax.traj"]


def test_follow_ends_when_the_reader_sees_the_step_limit(tmp_path):
    """A real EMT relaxation stopped at its step limit (ASE: 3 steps, not converged): `follow`
    ends at once, judging the run ended, instead of waiting --idle and calling it still going."""
    import io
    from driftwatch import live
    path, converged = _emt_relaxation(tmp_path, "short", steps=3)
    assert not converged
    out = io.StringIO()
    rec = live.follow(path, idle=20, poll=0.2, stream=out)
    assert rec["live"]["ended"].startswith("end marker: the run stopped at its step limit")
    assert "judged as a run still going" not in out.getvalue()
    assert "(unfinished: stopped at its step limit" in out.getvalue()
