"""Relaxations driven through ASE by a pretrained ML potential (CHGNet 0.4.2 on CPU, made in a
field trial: tests/data/ml_trials/README.md) and by ASE's EMT here: the containers users write them
to, ASE's FixSymmetry constraint, and following a trajectory that has no end marker. Checked
against ASE's readers, the constraint ASE stores, and spglib called directly."""
from __future__ import annotations

import io
from pathlib import Path

import ase.db
import ase.io
import numpy as np
import pytest
import spglib

from driftwatch.adapters import read_run
from driftwatch.live import SymmetryWatch, follow
from driftwatch.track import analyze

ML = Path(__file__).parent / "data" / "ml_trials"


def _group(atoms, symprec=1e-3):
    ds = spglib.get_symmetry_dataset((atoms.cell.array, atoms.get_scaled_positions(),
                                      atoms.numbers), symprec=symprec)
    return int(ds.number)


def test_ase_db_rows_with_a_flattened_stress_are_read():
    """ase.db keeps CHGNet's 3x3 stress as 9 numbers; the run is read (it failed whole) and its
    frames equal the same relaxation's .traj."""
    db = ML / "chgnet_stress9.db"
    with ase.db.connect(db) as con:
        rows = list(con.select(sort="id"))
    assert rows[0].stress.shape == (9,)                                            # ASE
    run = read_run(db)
    traj = ase.io.read(ML / "si8_chgnet_sheared.traj", ":")
    assert len(run) == len(traj) == 9
    np.testing.assert_allclose(run.positions, [a.positions for a in traj], atol=1e-12)
    full = np.asarray(rows[-1].stress, float).reshape(3, 3)
    np.testing.assert_allclose(run.stress[-1], full.reshape(9)[[0, 4, 8, 5, 2, 1]])
    rec = analyze(run)
    v = rec["summary"]["verdict"]["structure"]
    assert (v["initial"]["group"], v["final"]["group"]) == (_group(traj[0]), _group(traj[-1])) \
        == (74, 141)                                                              # spglib


@pytest.mark.parametrize("name", ["al_chgnet_fixsym.traj", "mos2_chgnet_fixsym.traj"])
def test_fix_symmetry_relaxations_are_held_by_the_constraint(name):
    """ASE stores FixSymmetry in the trajectory; the relaxation could not lower the group it holds,
    so 'kept' is no test: held-by-code says so, with the constraint's own operation count."""
    first = ase.io.read(ML / name, 0)
    (c,) = [c for c in first.constraints if type(c).__name__ == "FixSymmetry"]      # ASE
    rec = analyze(read_run(ML / name))
    assert rec["summary"]["verdict"]["structure"]["direction"] == "kept"
    (flag,) = [f for f in rec["flags"] if f["code"] == "held-by-code"]
    assert f"ASE's FixSymmetry constraint held {len(c.rotations)} symmetry operations" in \
        flag["message"]
    assert "the constraint could not have lowered it" in flag["message"]
    assert rec["run"]["code_settings"]["fix_symmetry"]["operations"] == len(c.rotations)


def test_observer_sees_fix_symmetry_on_a_live_relaxation():
    """EMT relaxation of a strained fcc Cu cell under FixSymmetry, the observer attached."""
    from ase.build import bulk
    from ase.calculators.emt import EMT
    from ase.constraints import FixSymmetry
    from ase.filters import FrechetCellFilter
    from ase.optimize import BFGS
    atoms = bulk("Cu", "fcc", a=3.66, cubic=True)
    atoms.set_cell(atoms.cell.array * [1.0, 1.0, 1.02], scale_atoms=True)
    atoms.calc = EMT()
    atoms.set_constraint(FixSymmetry(atoms))
    opt = BFGS(FrechetCellFilter(atoms), logfile=None)
    watch = SymmetryWatch(atoms)
    opt.attach(watch, optimizer=opt)
    opt.run(fmax=0.02, steps=30)
    rec = watch.finish()
    ops = len(atoms.constraints[0].rotations)
    start = bulk("Cu", "fcc", a=3.66, cubic=True)
    start.set_cell(start.cell.array * [1.0, 1.0, 1.02], scale_atoms=True)
    ds = spglib.get_symmetry_dataset((start.cell.array, start.get_scaled_positions(),
                                      start.numbers), symprec=0.01)
    assert ds.number == 139 and len(ds.rotations) == ops == 64       # spglib: I4/mmm, 4-atom cell
    assert rec["run"]["code_settings"]["fix_symmetry"]["operations"] == ops
    assert [f["code"] for f in rec["flags"] if f["code"] == "held-by-code"] == ["held-by-code"]


def test_following_a_finished_trajectory_says_what_is_not_yet_held():
    """An ASE trajectory has no end marker: follow ends on idle and judges a run still going. A
    change seen for fewer than rules.persistence.steps steps is said as such ('kept so far: lattice
    mp -> hp (not yet held for 10 steps)'), never 'lattice kept hp; group kept p11m'; inspect of the
    same file judges it finished (gained)."""
    path = ML / "hbn_chgnet_vacuum_x.traj"
    buf = io.StringIO()
    rec = follow(path, stream=buf, idle=0.3, poll=0.05)
    text = rec["summary"]["verdict"]["text"]
    assert text.startswith("kept so far: lattice mp -> hp (not yet held for 10 steps); "
                           "group p11m (4) -> p-6m2 (78) at symprec 0.001 Å (not yet held")
    assert "judged as a run still going" in buf.getvalue()
    done = analyze(read_run(path))["summary"]["verdict"]["text"]
    assert done.startswith("gained: lattice mp -> hp (gained hp)")


def test_a_layer_overshooting_its_mirror_lattice_is_nearing_not_a_flip():
    """Graphene in its rectangular cell sheared to 92 degrees and relaxed (CHGNet, FIRE, fmax 0.02)
    ends at 89.93 degrees (ASE's cell parameters): past the right angle by 0.07 degrees, 0.0072 Å of
    mirror deformation against 0.209 at the start. Not a handedness reversal between its ends
    ('changed'), but a relaxation onto the rectangular lattice that overshot it."""
    frames = ase.io.read(ML / "graphene_chgnet_overshoot.traj", ":")
    gammas = [a.cell.cellpar()[5] for a in frames]                                 # ASE
    assert abs(gammas[0] - 92.0) < 1e-6 and 89.9 < gammas[-1] < 90.0
    rec = analyze(read_run(ML / "graphene_chgnet_overshoot.traj"))
    assert rec["summary"]["verdict"]["lattice"]["direction"] == "kept"
    codes = {f["code"]: f for f in rec["flags"]}
    assert "handedness-flip" not in codes
    near = codes["lattice-nearing"]
    assert near["type"] == "op" and "an overshoot: under twice min_chiral" in near["message"]
    signs = [f["sign"] for f in rec["frames"]]
    assert signs[0] == -signs[-1] != 0
