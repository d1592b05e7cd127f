"""The atoms' displacement to the groups spglib finds, on real relaxations of invented cells
(tests/data/atoms_trials/README.md), checked against ASE's own symmetrisation
(``ase.spacegroup.symmetrize.refine_symmetry``), spglib's datasets and hand arithmetic."""
from __future__ import annotations

import gzip
from pathlib import Path

import ase.io
import numpy as np
import pytest
import spglib

import driftwatch
from driftwatch import cli, symmetry
from driftwatch.errors import SymmetryError

DATA = Path(__file__).parent / "data" / "atoms_trials"


def _ase_refined(atoms, symprec: float) -> tuple[float, float]:
    """(rms, max) Å of the move ASE's refine_symmetry makes, in the input lattice, minimum image,
    the mean shift removed (a uniform shift is an origin choice)."""
    from ase.spacegroup.symmetrize import refine_symmetry
    b = atoms.copy()
    refine_symmetry(b, symprec=symprec, verbose=False)
    d = b.get_scaled_positions(wrap=False) - atoms.get_scaled_positions(wrap=False)
    d = (d - np.round(d)) @ atoms.cell.array
    d -= d.mean(axis=0)
    n = np.linalg.norm(d, axis=1)
    return float(np.sqrt((n ** 2).mean())), float(n.max())


def _ops(atoms, symprec: float) -> int:
    return len(spglib.get_symmetry_dataset((atoms.cell[:], atoms.get_scaled_positions(),
                                            atoms.numbers), symprec=symprec).rotations)


def test_a_gained_pure_translation_is_its_own_group_in_the_atoms_line(tmp_path):
    """P4/mmm with 16 and with 32 operations (a c/2 translation gained as the chain's spacing
    equalised) are two configurations: the atoms line measures the one with more operations,
    not "0 Å" to the one the atoms had all along."""
    traj = ase.io.read(DATA / "Q12_LJ_chain_equalise" / "relax.traj", ":")
    rec = driftwatch.analyze(DATA / "Q12_LJ_chain_equalise" / "relax.traj")
    at = rec["summary"]["atoms"]
    assert (at["group"], at["operations"]) == (123, _ops(traj[-1], 0.01)) == (123, 32)  # spglib
    rms, peak = _ase_refined(traj[-1], 0.01)                                             # ASE
    assert at["end"]["rms"] == pytest.approx(rms, rel=1e-3) and rms > 1e-4
    assert at["end"]["max"] == pytest.approx(peak, rel=1e-3)
    # the start: spacings 1.0 / 1.2 sigma made equal moves each atom 0.05 (hand arithmetic)
    assert at["start"]["rms"] == pytest.approx(0.05, rel=1e-9)
    keys = {(d["group"], d["operations"]) for d in rec["frames"][-1]["symmetry"]["displacement"]
            .values()}
    assert {(123, 16), (123, 32)} <= keys
    assert cli.main(["tolerance", str(DATA / "Q12_LJ_chain_equalise" / "relax.traj")]) == 0


def test_tolerance_names_each_instance_by_its_operations(capsys):
    cli.main(["tolerance", str(DATA / "Q12_LJ_chain_equalise" / "relax.traj")])
    out = capsys.readouterr().out
    assert "to P4/mmm (123, 16 operations): atoms move rms 0 Å" in out
    assert "to P4/mmm (123, 32 operations): atoms move rms 0.000444 Å" in out


def test_the_most_symmetric_group_of_a_supercell_counts_its_pure_translations():
    """A 32-atom fcc cell whose 12 neighbours of one atom breathed out 0.08 Å: Pm-3m (48
    operations) and Fm-3m (48 x 32 = 1536, spglib) share a point group; the atoms line measures
    Fm-3m, where the run went: rms 0.08 x sqrt(12/32) Å at the start (hand arithmetic)."""
    traj = ase.io.read(DATA / "Q14_Cu_breathing_exact" / "relax.traj", ":")
    at = driftwatch.analyze(DATA / "Q14_Cu_breathing_exact" / "relax.traj")["summary"]["atoms"]
    assert (at["group"], at["operations"]) == (225, _ops(traj[-1], 0.01)) == (225, 1536)
    assert at["start"]["rms"] == pytest.approx(0.08 * np.sqrt(12 / 32), rel=1e-6)
    assert at["start"]["max"] == pytest.approx(0.08, rel=1e-6)
    rms, peak = _ase_refined(traj[-1], 0.01)
    assert at["end"]["rms"] == pytest.approx(rms, rel=1e-3) and at["end"]["max"] == \
        pytest.approx(peak, rel=1e-3)
    assert not at["cell_moved"] and "own cell" not in driftwatch.records.atoms_text(at)


def test_a_real_pw_vc_relax_measures_the_body_centred_group_and_says_the_cell_moved(tmp_path):
    out = tmp_path / "pw.out"
    out.write_bytes(gzip.decompress((DATA / "P3_Al2_bct_vcrelax" / "pw.out.gz").read_bytes()))
    final = ase.io.read(out, -1, format="espresso-out")
    at = driftwatch.analyze(out)["summary"]["atoms"]
    assert (at["symbol"], at["group"], at["operations"]) == ("I4/mmm", 139, _ops(final, 0.01))
    assert at["end"]["rms"] == pytest.approx(_ase_refined(final, 0.01)[0], rel=1e-3)
    assert at["cell_moved"]
    assert "the atoms alone, each frame in its own cell" in driftwatch.records.atoms_text(at)


def test_an_inconsistent_spglib_dataset_gives_no_displacement():
    """At symprec 0.3 Å spglib names frame 1 of a real EMT relaxation R-3m but its operations hold
    4 distinct rotations, where the point group -3m has 12 (International Tables): the projection
    is no symmetric configuration, and is refused rather than reported."""
    a = ase.io.read(DATA / "Q13_Cu_breathing" / "relax.traj", 1)
    ds = spglib.get_symmetry_dataset((a.cell[:], a.get_scaled_positions(), a.numbers), symprec=0.3)
    assert ds.international == "R-3m" and len({r.tobytes() for r in ds.rotations}) == 4
    with pytest.raises(SymmetryError, match="do not form a group of this structure"):
        symmetry.displacement_to_group(a.cell[:], a.positions, a.numbers, 0.3)
    # where spglib's dataset is consistent, the symmetric configuration has the group (spglib)
    for fr, s in ((-1, 0.01), (0, 0.1)):
        b = ase.io.read(DATA / "Q13_Cu_breathing" / "relax.traj", fr)
        cell, pos, g = symmetry.symmetrize(b.cell[:], b.positions, b.numbers, s)
        ds2 = spglib.get_symmetry_dataset((cell, np.linalg.solve(cell.T, pos.T).T, b.numbers),
                                          symprec=1e-5)
        assert ds2.number == g


def test_campaign_csv_and_runs_db_carry_the_atoms_line(tmp_path):
    """A fixed-cell run's drift is in its atoms: campaign.csv and runs.db (ase.db) carry the
    atoms line's numbers, equal to the record's."""
    import csv
    import shutil

    import ase.db
    from driftwatch.campaign import audit
    root = tmp_path / "camp"
    shutil.copytree(DATA / "Q14_Cu_breathing_exact", root / "Q14")
    import json
    res = audit([root], tmp_path / "out", report=False, workers=1, progress="off")
    rec = json.loads((tmp_path / "out" / res["records"]["camp/Q14/relax.traj"]).read_text())
    at = rec["summary"]["atoms"]
    row = next(csv.DictReader((tmp_path / "out" / "campaign.csv").open()))
    assert row["atoms_group"] == "Fm-3m (225, 1536 operations)"
    assert float(row["atoms_start_rms_A"]) == pytest.approx(at["start"]["rms"], rel=1e-5)
    assert float(row["atoms_end_rms_A"]) == pytest.approx(at["end"]["rms"], rel=1e-5)
    kv = next(ase.db.connect(tmp_path / "out" / "runs.db").select()).key_value_pairs
    assert kv["atoms_group"] == row["atoms_group"] and kv["atoms_end_rms"] == at["end"]["rms"]
