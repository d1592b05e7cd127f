"""Genuine outputs of public repositories' test data (tests/data/public_more/README.md: repository,
commit, path and licence of each), checked against the files' own text, ASE's readers and spglib."""
from __future__ import annotations

import gzip
import re
from pathlib import Path

import ase.data
import ase.io
import numpy as np
import pytest

import driftwatch
from driftwatch.adapters import read_run
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
