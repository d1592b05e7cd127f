"""Relaxations run natively by codes driftwatch has no reader for (CP2K 2023.1, ABINIT 9.6.2,
Elk 8.4.30) beside pw.x runs, as a campaign meets them (tests/data/native_trials, README there:
real runs made here). Each such run is one skipped row that names its code and says when the
job was cut short, never a molecule or a silent gap; checked against the codes' own outputs."""
from __future__ import annotations

import csv
import gzip
import shutil
from pathlib import Path

import ase.io
import numpy as np
import pytest

from driftwatch.adapters import read_run
from driftwatch.campaign import audit, discover
from driftwatch.errors import ForeignOutputError

DATA = Path(__file__).parent / "data" / "native_trials"
NATIVE = {"abinit_fixed": "si_disp.abo.gz", "abinit_inputerror": "si_disp.abo.gz",
          "abinit_killed": "al_bct.abo.gz", "abinit_vc": "al_bct.abo.gz",
          "cp2k_fixed": "si_layer.out.gz", "cp2k_killed": "si_bct.out.gz",
          "cp2k_vc": "si_bct.out.gz", "elk_fixed": "INFO.OUT.gz", "elk_killed": "INFO.OUT.gz",
          "elk_vc": "INFO.OUT.gz"}
CLOSING = {"abinit": "Calculation completed.", "cp2k": "PROGRAM ENDED AT"}


def _ended(case: str) -> bool | None:
    """Whether the code's own output holds its closing line (None: Elk, no such line known)."""
    code = case.split("_")[0]
    if code not in CLOSING:
        return None
    return CLOSING[code] in gzip.open(DATA / case / NATIVE[case], "rt").read()


def test_one_skipped_row_per_native_run_and_none_dropped(tmp_path):
    """13 runs: 10 native runs each one skipped row naming its code (Elk's were dropped unsaid,
    and each CP2K run gave a second row, its positions file, as 'a molecule or cluster'); a job
    whose output lacks the code's closing line is said to be cut short; the pw.x runs read."""
    out = tmp_path / "out"
    audit([str(DATA)], str(out), progress="off", quiet=True, report=False)
    with open(out / "campaign.csv", newline="") as fh:
        rows = {r["run"]: r for r in csv.DictReader(fh)}
    skipped = {rid: r for rid, r in rows.items() if r["verdict"] == "skipped"}
    assert sorted(skipped) == sorted(f"native_trials/{c}/{n}" for c, n in NATIVE.items())
    assert sorted(set(rows) - set(skipped)) == ["native_trials/pw_fixed", "native_trials/pw_layer",
                                                "native_trials/pw_vc"]
    for case, name in NATIVE.items():
        why = skipped[f"native_trials/{case}/{name}"]["error"]
        code = {"abinit": "ABINIT", "cp2k": "CP2K", "elk": "Elk"}[case.split("_")[0]]
        assert f"an output of {code}, which driftwatch has no reader for" in why
        assert ("cut short" in why) == (_ended(case) is False), (case, why)      # its own line
    assert _ended("cp2k_killed") is False and _ended("abinit_killed") is False
    assert _ended("cp2k_vc") and _ended("abinit_vc")
    assert "Elk version 8.4.30 started" in gzip.open(DATA / "elk_vc" / "INFO.OUT.gz", "rt").read()


def test_cp2ks_positions_file_is_said_as_such():
    """CP2K's PROJECT-pos-1.xyz is plain XYZ: ASE reads it with no cell and no periodicity, though
    the run is periodic (its input says PERIODIC XYZ). Alone it is a skipped run that says what
    it is, beside the CP2K output it is that run's (no row of its own)."""
    pos = DATA / "cp2k_vc" / "sibct-pos-1.xyz"
    frames = ase.io.read(pos, index=":")                                               # ASE
    assert not frames[0].pbc.any() and np.allclose(frames[0].cell[:], 0)
    assert "PERIODIC XYZ" in (DATA / "cp2k_vc" / "si_bct.inp").read_text()
    with pytest.raises(ForeignOutputError, match="CP2K's positions file of a run"):
        read_run(pos)
    runs, _ = discover([DATA / "cp2k_vc"])
    assert [r.id for r in runs] == ["cp2k_vc/si_bct.out.gz"]


def test_a_native_output_beside_a_pw_x_run_is_a_row_of_its_own(tmp_path):
    """A folder holding a pw.x run and a CP2K run of the same cell: the CP2K output was named
    nowhere; it is now a skipped row beside the pw.x run, whose warnings name it."""
    both = tmp_path / "both"
    shutil.copytree(DATA / "pw_vc", both)
    for f in (DATA / "cp2k_vc").iterdir():
        shutil.copy(f, both / f.name)
    runs, _ = discover([both])
    assert [r.id for r in runs] == ["both", "both/si_bct.out.gz"]
    run = read_run(both)
    assert any("si_bct.out.gz beside it is another run" in w for w in run.warnings)
    frames = ase.io.read(both / "pw.out.gz", index=":", format="espresso-out")          # ASE
    assert len(run) == len(frames)


@pytest.mark.parametrize("case", ["abinit_killed", "elk_vc", "cp2k_vc"])
def test_inspecting_a_native_runs_folder_names_its_output(case):
    """`inspect FOLDER` of such a run said 'not a run folder: no VASP ... found'; it names the
    code's output and what would include it, as the audit does."""
    with pytest.raises(ForeignOutputError, match="an output of (ABINIT|Elk|CP2K)") as exc:
        read_run(DATA / case)
    assert exc.value.path == str(DATA / case / NATIVE[case])


def test_a_root_named_beside_others_that_holds_no_run_is_said(tmp_path):
    """An audit of two roots, one of which holds nothing driftwatch reads (Elk's geometry files
    without its INFO.OUT): it vanished from the counts, exit 0; it is now a failed entry saying
    so, as the audit of it alone says it (exit 1 there). A root inside another is no entry."""
    geometry = tmp_path / "elk_geometry_only"
    geometry.mkdir()
    for n in ("GEOMETRY.OUT", "GEOMETRY_OPT.OUT", "TOTENERGY_OPT.OUT"):
        shutil.copy(DATA / "elk_vc" / n, geometry / n)
    runs, failed = discover([geometry, DATA / "pw_vc"])
    assert [r.id for r in runs] == ["pw_vc"]
    assert [f["run"] for f in failed] == ["elk_geometry_only"]
    assert "no run found: no file or run folder here is one driftwatch reads" in failed[0]["error"]
    runs, failed = discover([DATA, DATA / "pw_vc"])
    assert not failed and len(runs) == 13
    runs, failed = discover([DATA / "pw_vc", DATA])      # a root holding one before it: none
    assert not failed and len(runs) == 13
    (tmp_path / "empty").mkdir()                         # an empty folder (a job not started)
    runs, failed = discover([tmp_path / "empty", DATA / "pw_vc"])
    assert [r.id for r in runs] == ["pw_vc"] and not failed
