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
