"""pw.x output as batch jobs leave it: the job's log with its site's prologue, several pw.x runs
of a job script's loop in one log, a restart appended to it, pw.x driven over a socket
(tests/data/qe_logs, README there: real pw.x 6.7 runs under mpirun, made here). Checked against
pw.x's own lines, ASE's espresso-out reader and spglib."""
from __future__ import annotations

import gzip
import json
import re
import shutil
from pathlib import Path

import ase.io
import numpy as np
import pytest
import spglib

from driftwatch.adapters import read_run
from driftwatch.adapters.espresso import _units
from driftwatch.adapters.registry import detect
from driftwatch.campaign import discover
from driftwatch.errors import NoIonicStepError

DATA = Path(__file__).parent / "data" / "qe_logs"
BANNER = re.compile(r"^[ \t]*Program PWSCF\s+v\.", re.M)


def _log(case: str) -> Path:
    (path,) = (DATA / case).glob("slurm-*.out.gz")
    return path


def _energies_per_run(path: Path) -> list[list[float]]:
    """pw.x's own '!    total energy' lines (Ry), split at its banners."""
    text = gzip.open(path, "rt").read()
    starts = [m.start() for m in BANNER.finditer(text)] + [len(text)]
    return [[float(ln.split()[-2]) for ln in text[a:b].splitlines()
             if ln.startswith("!    total energy")] for a, b in zip(starts, starts[1:])]


def _group(frame) -> int:
    cell = (frame.cell[:], frame.get_scaled_positions(), frame.numbers)
    return spglib.get_symmetry_dataset(cell, symprec=1e-3).number


@pytest.mark.parametrize("case", ["C_ecut", "L_loop2", "L_loop3"])
def test_a_log_of_a_loop_holds_one_run_per_pw_x_run(case):
    """A job script's loop writes several pw.x runs into one log: the same relaxation at two
    cutoffs (C_ecut), two structures (L_loop2: Si2 then a one-atom Al layer; L_loop3: other
    elements). They were joined into one trajectory (C_ecut: 'gained from step 6', though the
    frames went back to the input structure at step 4) or failed whole (atoms change at step 4).
    Each is now a run of its own, FILE::run1 and FILE::run2: its frames are pw.x's '!' lines of
    that run, equal to ASE's frames of the log cut at the same place."""
    log = _log(case)
    runs, failed = discover([DATA / case])
    assert not failed
    assert sorted(r.id for r in runs) == [f"{case}/{log.name}::run1", f"{case}/{log.name}::run2"]
    energies = _energies_per_run(log)                                           # pw.x's lines
    _, Ry = _units()
    ase_frames = ase.io.read(log, index=":", format="espresso-out") if case != "L_loop2" else None
    start = 0
    for k, ry in enumerate(energies):
        run = read_run(f"{log}::run{k + 1}")
        assert len(run) == len(ry) and run.steps.tolist() == list(range(len(ry)))
        np.testing.assert_allclose(run.energies, np.array(ry) * Ry, atol=1e-9)
        if ase_frames is not None:                                            # ASE
            mine = ase_frames[start:start + len(ry)]
            np.testing.assert_allclose(run.positions, [a.positions for a in mine], atol=1e-6)
            np.testing.assert_allclose(run.cells, [a.cell[:] for a in mine], atol=1e-6)
        start += len(ry)
        assert run.structure_key == {"key": "pw.x run", "value": f"run{k + 1}"}
    if case == "C_ecut":      # each relaxation gained C2/m at its own step 2 (spglib, 1e-3 Å)
        assert [_group(a) for a in ase_frames] == [2, 2, 12, 12, 2, 2, 12, 12]
        for k in (1, 2):
            run = read_run(f"{log}::run{k}")
            np.testing.assert_allclose(run.positions[0], ase_frames[0].positions, atol=1e-6)
    whole = read_run(log)                                # read whole: the last run, said so
    assert len(whole) == len(energies[-1])
    assert any("holds 2 pw.x runs that do not continue one another (run1, run2): read here is "
               "the last, run2" in w for w in whole.warnings)


def test_an_scf_then_a_relax_and_a_vc_relax_from_its_end_are_two_runs():
    """scf, relax, then vc-relax from the relaxed positions in one log: the scf is a run of its
    own (two calculations on one structure are two runs: the rule for outputs side by side); the
    vc-relax continues the relax (its header is where the relax ended: pw.x's own lines), so they
    are one run of two stages. The relax's input is the first run's, said so."""
    log = _log("B_chain")
    energies = _energies_per_run(log)
    assert [len(e) for e in energies] == [1, 4, 9]                            # pw.x's lines
    scf = read_run(f"{log}::run1")
    assert len(scf) == 1 and scf.not_relaxation.startswith("a single-point calculation")
    chain = read_run(f"{log}::run2")
    assert len(chain) == 13 and [(s["name"], s["n_frames"]) for s in chain.stages] == [
        ("run2", 4), ("run3", 9)]
    assert any("the pw.x input relax.in of its first pw.x run does not hold for the runs after "
               "it" in w for w in chain.warnings)


def test_a_restart_appended_to_a_killed_run_stays_one_run():
    """A relaxation cut by its walltime and rerun into the same log with restart_mode='restart'
    (the restart's first BFGS step > 0): one run, as before, every '!' line a frame."""
    log = _log("K_resubmit")
    runs, _ = discover([DATA / "K_resubmit"])
    assert [r.id for r in runs] == ["K_resubmit"]
    run = read_run(log)
    assert len(run) == sum(map(len, _energies_per_run(log))) == 7
    assert [s["name"] for s in run.stages] == ["run1", "run2"]
    assert not any("do not continue" in w for w in run.warnings)


def test_a_log_whose_prologue_is_longer_than_the_first_peek(tmp_path):
    """A site prologue (a module listing, an environment dump) of 51 kB before pw.x's banner: the
    log was 'unknown format' and its folder 'a pw.x input and no pw.x output'. ASE reads its four
    frames, and so does driftwatch; the folder is the run, as with a short prologue (A_pad4100,
    whose run was listed by its file because its banner is past byte 4000)."""
    log = _log("A_pad51000")
    text = gzip.open(log, "rt").read()
    assert BANNER.search(text).start() > 50_000
    assert detect(log) == "espresso-out"
    frames = ase.io.read(log, index=":", format="espresso-out")                   # ASE
    run = read_run(DATA / "A_pad51000")
    assert Path(run.source) == log and len(run) == len(frames) == 4
    np.testing.assert_allclose(run.positions, [a.positions for a in frames], atol=1e-6)
    for case in ("A_pad51000", "A_pad4100"):
        runs, failed = discover([DATA / case])
        assert [r.id for r in runs] == [case] and not failed


def test_pw_x_driven_over_a_socket_is_no_killed_single_point():
    """pw.x run by ASE's socket calculator (i-PI driver mode) computes each structure the
    optimiser sends and prints none of them: it was read as one frame, 'truncated: job killed'
    and 'single-point'. Alone it is skipped, saying why; its folder is the optimiser's
    trajectory, whose energies are the output's '!' lines (ASE's espresso units)."""
    folder = DATA / "H_ipi"
    with pytest.raises(NoIonicStepError, match="i-PI driver mode"):
        read_run(folder / "espresso.pwo.gz")
    run = read_run(folder)
    assert Path(run.source).name == "relax.traj"
    assert any("pw.x in i-PI driver mode beside relax.traj" in w and "prints none of the "
               "structures" in w for w in run.warnings)
    text = gzip.open(folder / "espresso.pwo.gz", "rt").read()
    ry = [float(ln.split()[-2]) for ln in text.splitlines() if ln.startswith("!    total")]
    _, Ry = _units()
    traj = ase.io.read(folder / "relax.traj", index=":")                                # ASE
    np.testing.assert_allclose([a.get_potential_energy() for a in traj], np.array(ry) * Ry,
                               atol=1e-6)
    np.testing.assert_allclose(run.energies, np.array(ry) * Ry, atol=1e-6)


def test_a_second_run_of_a_log_is_listed_when_it_starts(tmp_path):
    """A log that grows: while it holds one pw.x run it is that run (its folder); once a new run
    that does not continue it starts, the log holds two runs."""
    src = gzip.open(_log("C_ecut"), "rb").read()
    second = [m.start() for m in re.finditer(rb"^[ \t]*Program PWSCF", src, re.M)][1]
    job = tmp_path / "job"
    shutil.copytree(DATA / "C_ecut", job)
    (job / "slurm-2002.out.gz").unlink()
    (job / "slurm-2002.out").write_bytes(src[:second])
    runs, _ = discover([job])
    assert [r.id for r in runs] == ["job"] and len(read_run(job)) == 4
    (job / "slurm-2002.out").write_bytes(src)
    runs, _ = discover([job])
    assert [r.id for r in runs] == ["job/slurm-2002.out::run1", "job/slurm-2002.out::run2"]


def test_a_ph_x_output_beside_its_pw_x_run_is_named_in_the_run_not_a_row():
    """ph.x beside the pw.x scf it follows (ph.x reads that run's save directory: the same prefix
    and outdir in both inputs) computes the phonons of that structure: it is named in the run's
    notes, not listed as another run (the rule for other codes' outputs beside a run)."""
    folder = DATA / "P6_scf_plus_phx"
    ph = gzip.open(folder / "ph.out.gz", "rt").read()
    assert re.search(r"^\s*Program PHONON v\.", ph, re.M)                          # ph.x's own
    prefix = re.compile(r"prefix\s*=\s*'([^']+)'")
    assert prefix.search((folder / "ph.in").read_text()).group(1) == \
        prefix.search((folder / "scf.in").read_text()).group(1)
    runs, failed = discover([folder])
    assert [r.id for r in runs] == ["P6_scf_plus_phx"] and not failed
    assert any("ph.out.gz beside it is an output of Quantum ESPRESSO's ph.x, the phonons of this "
               "run's structure: no run of its own" in w for w in read_run(folder).warnings)


def test_a_re_audit_does_not_parse_a_log_of_several_runs_again(tmp_path):
    """Finding the runs of an output of several pw.x runs parses it whole; what was found is kept
    with the output folder's cache (keyed on the file's stamp), so a re-audit with every record
    cached reads no pw.x output at all. The saved answers are those of the reader itself."""
    from driftwatch.adapters import espresso
    from driftwatch.campaign import audit
    out = tmp_path / "out"
    roots = [str(DATA / "C_ecut"), str(DATA / "K_resubmit")]
    audit(roots, str(out), progress="off", quiet=True, report=False)
    saved = json.loads((out / ".cache" / "discovery.index").read_text())["modules"]["espresso"]
    c_ecut = str(_log("C_ecut").resolve())
    assert [name for name, _, _ in saved[c_ecut][1]] == ["run1", "run2"]
    assert saved[str(_log("K_resubmit").resolve())][1] is None            # one run (a restart)
    espresso._RUNS.clear()
    calls = []
    real = espresso._read_pw

    def counted(*args, **kw):
        calls.append(args[0])
        return real(*args, **kw)
    espresso._read_pw = counted
    try:
        audit(roots, str(out), progress="off", quiet=True, report=False)
    finally:
        espresso._read_pw = real
    assert calls == []
    assert espresso.pw_runs(_log("C_ecut")) == [tuple(r) for r in saved[c_ecut][1]]


@pytest.mark.parametrize("stamp", [5, None, "x", [1, 2]])
def test_a_damaged_discovery_index_is_a_miss(tmp_path, stamp):
    """An entry of the index that is not what an audit writes (a number, null, text, a short list
    where the file's stamp belongs) is ignored: the audit asks the file again and gives the
    answer of a cold audit, and writes the index anew."""
    from driftwatch.adapters import espresso
    from driftwatch.campaign import audit
    out = tmp_path / "out"
    audit([str(DATA / "C_ecut")], str(out), progress="off", quiet=True, report=False)
    index = out / ".cache" / "discovery.index"
    data = json.loads(index.read_text())
    for entry in data["modules"]["espresso"].values():
        entry[0] = stamp
    index.write_text(json.dumps(data))
    espresso._RUNS.clear()
    audit([str(DATA / "C_ecut")], str(out), progress="off", quiet=True, report=False)
    again = json.loads(index.read_text())["modules"]["espresso"]
    assert [name for name, _, _ in again[str(_log("C_ecut").resolve())][1]] == ["run1", "run2"]


def test_a_killed_relaxation_rerun_from_scratch_into_the_same_log_is_two_runs(tmp_path):
    """A relaxation killed by its walltime, then the same input run again from the start into the
    same log (no restart: its first BFGS step is 0, its header the input structure again): two
    runs, as two outputs side by side are: the first cut short (no JOB DONE before the second
    banner; its second SCF has its '!' line and no forces, so one step completed, as the same
    output cut there alone reads), the second whole."""
    log = DATA / "P3_rerun_scratch" / "job.log.gz"
    energies = _energies_per_run(log)                                           # pw.x's lines
    assert len(energies) == 2 and len(energies[0]) == 2
    first, second = read_run(f"{log}::run1"), read_run(f"{log}::run2")
    text = gzip.open(log, "rt").read()
    alone = tmp_path / "cut.out"
    alone.write_text(text[:[m.start() for m in BANNER.finditer(text)][1]])
    assert len(first) == len(read_run(alone)) == 1 and len(second) == len(energies[1])
    assert first.unfinished.startswith("cut short")
    assert second.unfinished is None
    np.testing.assert_allclose(first.positions[0], second.positions[0], atol=1e-9)  # one start
