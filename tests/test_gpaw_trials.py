"""GPAW's text log and ASE trajectories of real GPAW relaxations made here (tests/data/gpaw_trials,
README there): checked against the files' own lines, ASE's readers, the ASE optimiser's own log
and spglib."""
from __future__ import annotations

import gzip
import re
import shutil
from pathlib import Path

import ase.io
import numpy as np
import pytest
import spglib

from driftwatch import live
from driftwatch.adapters import read_run
from driftwatch.adapters.registry import symmetry_setting
from driftwatch.config import load as load_config
from driftwatch.track import record_from_run

DATA = Path(__file__).parent / "data" / "gpaw_trials"


def _text(path: Path) -> str:
    return gzip.open(path, "rt").read()


def _flags(path: Path) -> dict:
    rec = record_from_run(read_run(str(path)), load_config(None))
    return {f["code"]: f for f in rec["flags"]}


def test_a_killed_gpaw_log_is_cut_short_at_its_last_finished_configuration():
    """kill -9 during the 16th configuration's SCF: 16 "Positions:" blocks, 15 "Free energy:" lines
    in the file; ASE's reader returns the 15 finished. The run is unfinished (it was not)."""
    path = DATA / "killed_layer" / "gpaw.txt.gz"
    text = _text(path)
    assert len(re.findall(r"^Positions:$", text, re.M)) == 16
    assert len(re.findall(r"^Free energy:", text, re.M)) == 15
    run = read_run(str(path))
    assert len(run.cells) == len(ase.io.read(path, ":", format="gpaw-out")) == 15
    assert run.unfinished == "cut short: job killed or still running"
    assert any("truncated after step 14 (15 completed steps): GPAW's log ends inside the "
               "calculation of configuration 16" in w for w in run.warnings)


def test_a_finished_gpaw_log_is_finished_and_says_its_frames_are_gpaws_configurations():
    run = read_run(str(DATA / "layer_finished" / "gpaw.txt.gz"))
    assert run.unfinished is None
    assert any("one structure per configuration GPAW calculated" in w for w in run.warnings)


def test_gpaw_log_energies_are_the_free_energy_the_optimiser_used():
    """GPAW prints "Free energy:" and "Extrapolated:" (to zero smearing); the forces belong to the
    free energy, which ASE's optimisers use ("Force-consistent energies used" in opt.log) and
    which the trajectory stores as free_energy. ASE's GPAW-log reader gives the extrapolated one."""
    path = DATA / "al_lbfgs" / "gpaw.txt.gz"
    free = [float(x) for x in re.findall(r"^Free energy: +(\S+)", _text(path), re.M)]
    extrapolated = [float(x) for x in re.findall(r"^Extrapolated: +(\S+)", _text(path), re.M)]
    run = read_run(str(path))
    assert np.allclose(run.energies, free, atol=1e-6)
    assert abs(free[0] - extrapolated[0]) > 6e-3          # 6.25 meV: Fermi-Dirac 0.1 eV
    traj = ase.io.read(DATA / "al_lbfgs" / "relax.traj", ":")
    assert len(traj) == len(free)                         # LBFGS: one configuration per step
    assert np.allclose(run.energies, [a.calc.results["free_energy"] for a in traj], atol=1e-6)
    opt = (DATA / "al_line_search" / "opt.log").read_text()
    line_search = read_run(str(DATA / "al_line_search" / "gpaw.txt.gz"))
    assert "Force-consistent energies used" in opt
    assert f"{line_search.energies[0]:.6f}*" in opt       # opt.log step 0: -3.719146*


def test_a_line_search_log_holds_more_configurations_than_the_optimiser_made_steps():
    """BFGSLineSearch: opt.log's force calls 0, 3, 6, 8 -> 4 steps in the trajectory, 9
    configurations in GPAW's log; the log's run says what its frames are."""
    log = read_run(str(DATA / "al_line_search" / "gpaw.txt.gz"))
    traj = read_run(str(DATA / "al_line_search" / "relax.traj"))
    assert (len(log.cells), len(traj.cells)) == (9, 4)
    assert np.allclose(traj.cells, log.cells[[0, 3, 6, 8]], atol=1e-5)
    assert any("line-search optimiser's trial configurations are among them" in w
               for w in log.warnings)


def test_gpaws_own_symmetry_is_held_by_code_from_its_log_and_from_the_trajectory():
    """GPAW symmetrises forces and stress with the operations it found (24: Fd-3m's operations
    without a fractional translation; spglib gives Fd-3m 48 operations for the structure)."""
    log = DATA / "si2_gpaw_symmetry" / "gpaw.txt.gz"
    assert re.findall(r"^Symmetries present \(total\): *(\d+)", _text(log), re.M)[-1] == "24"
    atoms = ase.io.read(DATA / "si2_gpaw_symmetry" / "relax.traj", -1)
    ds = spglib.get_symmetry_dataset((atoms.cell[:], atoms.get_scaled_positions(), atoms.numbers),
                                     symprec=1e-3)
    assert (ds.number, len(ds.rotations)) == (227, 48)
    by_log = _flags(log)["held-by-code"]
    assert "GPAW symmetrised forces and stress with 24 symmetry operations" in by_log["message"]
    assert "of which the code held 24" in by_log["message"]
    by_traj = _flags(DATA / "si2_gpaw_symmetry" / "relax.traj")["held-by-code"]
    assert "GPAW symmetrised forces and stress with the symmetry operations it found" in \
        by_traj["message"]
    run = read_run(str(DATA / "si2_gpaw_symmetry" / "relax.traj"))
    assert run.code_settings["calculator"] == "gpaw"


@pytest.mark.parametrize("setting", ["off", {"point_group": False}])
def test_gpaw_with_its_symmetry_off_holds_nothing(setting):
    assert symmetry_setting({"code": "ase", "calculator": "gpaw", "symmetry": setting}) is None
    assert symmetry_setting({"code": "ase", "calculator": "gpaw"})["operations"] is None


def test_follow_sees_gpaws_closing_timing_table():
    """A finished log ends with GPAW's timing table; the killed one does not."""
    done = DATA / "layer_finished" / "gpaw.txt.gz"
    assert re.search(r"^Total: +[0-9.]+ +100\.0%", _text(done), re.M)
    assert live._end_marker(str(done), "gpaw-out") == "GPAW's closing timing table"
    assert live._end_marker(str(DATA / "killed_layer" / "gpaw.txt.gz"), "gpaw-out") is None


def test_fix_symmetry_without_a_recorded_symprec_says_so():
    """ASE before 3.23 kept no symprec on its FixSymmetry (the constraint's default, 0.01 Å, is
    not 0)."""
    got = symmetry_setting({"fix_symmetry": {"operations": 48, "symprec": None}})
    assert "its symprec not recorded" in got["how"]
    assert "its symprec 0.01 Å" in symmetry_setting(
        {"fix_symmetry": {"operations": 48, "symprec": 0.01}})["how"]


def test_a_gpaw_log_beside_its_relaxations_trajectory_is_no_run_of_its_own():
    """An ASE optimiser driving GPAW leaves the optimiser's trajectory and GPAW's log of the same
    relaxation side by side (their first structures equal to the log's 6 printed decimals): one
    run, the trajectory, which names the log. Five relaxations, five runs (eight before: each log
    was a run too)."""
    from driftwatch.campaign import discover
    runs, failed = discover([DATA])
    assert not failed
    assert sorted(r.id for r in runs) == [
        "gpaw_trials/al_lbfgs", "gpaw_trials/al_line_search", "gpaw_trials/killed_layer",
        "gpaw_trials/killed_layer/steps.extxyz", "gpaw_trials/layer_finished",
        "gpaw_trials/si2_gpaw_symmetry"]
    for case in ("al_lbfgs", "al_line_search", "layer_finished", "si2_gpaw_symmetry"):
        run = read_run(str(DATA / case))
        ref = ase.io.read(DATA / case / "relax.traj", ":")                   # ASE's reader
        assert Path(run.source).name == "relax.traj" and len(run.cells) == len(ref)
        assert np.array_equal(run.cells, [a.cell[:] for a in ref])
        assert any("gpaw.txt.gz beside it is this relaxation's GPAW log" in w for w in
                   run.warnings)
        assert run.unfinished is None
    # the line search: the trajectory's 4 steps, not the log's 9 configurations
    assert len(read_run(str(DATA / "al_line_search")).cells) == 4


def test_a_killed_relaxation_read_from_its_trajectory_is_unfinished_as_its_gpaw_log_says():
    """kill -9 during the 16th configuration: the trajectory holds the 15 steps FIRE completed
    and nothing says the job died; the log beside it does (16 "Positions:" blocks, 15 finished).
    The extended XYZ written beside them is named as another run."""
    run = read_run(str(DATA / "killed_layer"))
    ref = ase.io.read(DATA / "killed_layer" / "relax.traj", ":")
    assert Path(run.source).name == "relax.traj" and len(run.cells) == len(ref) == 15
    assert run.unfinished == "cut short: job killed or still running"
    assert any("gpaw.txt.gz beside it, this relaxation's GPAW log, ends inside the calculation of "
               "configuration 16 (job killed or still running)" in w for w in run.warnings)
    assert any("steps.extxyz beside it is another run" in w for w in run.warnings)


def test_the_operations_gpaw_found_come_from_the_log_beside_the_trajectory():
    flags = _flags(DATA / "si2_gpaw_symmetry")
    assert "GPAW symmetrised forces and stress with 24 symmetry operations" in \
        flags["held-by-code"]["message"]


def test_a_log_of_another_run_is_not_taken_as_the_trajectorys(tmp_path):
    """Two real runs of one input: the finished one's trajectory (20 steps) beside the killed
    one's log (15 configurations, the same first 15 structures to 5e-7 Å): the log does not hold
    the trajectory's last step, so it is no log of that relaxation and each file is a run of its
    own (a log of a rerun with other settings ends elsewhere and has a verdict of its own). A log
    beside a trajectory of another start (Si2 beside Al) is a run of its own too."""
    from driftwatch.adapters.registry import scan_folder
    mixed = tmp_path / "mixed"
    mixed.mkdir()
    shutil.copy(DATA / "layer_finished" / "relax.traj", mixed / "relax.traj")
    shutil.copy(DATA / "killed_layer" / "gpaw.txt.gz", mixed / "gpaw.txt.gz")
    assert scan_folder(mixed) == ("files", ["gpaw.txt.gz", "relax.traj"])
    assert len(read_run(str(mixed / "relax.traj")).cells) == 20
    assert len(read_run(str(mixed / "gpaw.txt.gz")).cells) == 15
    other = tmp_path / "other"
    other.mkdir()
    shutil.copy(DATA / "si2_gpaw_symmetry" / "relax.traj", other / "relax.traj")
    shutil.copy(DATA / "al_lbfgs" / "gpaw.txt.gz", other / "gpaw.txt.gz")
    assert scan_folder(other) == ("files", ["gpaw.txt.gz", "relax.traj"])
