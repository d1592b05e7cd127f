"""LAMMPS dumps read with their job's script and log: real minimisations made here with Debian's
LAMMPS (tests/data/lammps_trials/README.md), checked against ASE's reader of the dump and the
lines LAMMPS printed in its log."""
from __future__ import annotations

import gzip
import re
import shutil
import warnings
from pathlib import Path

import ase.io
import numpy as np
import pytest

from driftwatch import analyze
from driftwatch.adapters import read_run
from driftwatch.adapters.lammps import printed_step
from driftwatch.campaign import audit
from driftwatch.errors import InputError

LMP = Path(__file__).parent / "data" / "lammps_trials"


def _ase(path: Path, tmp_path: Path, **kw):
    if path.suffix == ".gz":
        plain = tmp_path / path.stem
        plain.write_bytes(gzip.decompress(path.read_bytes()))
        path = plain
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return ase.io.read(path, ":", format="lammps-dump-text", **kw)


def _dump_timesteps(text: str) -> list[int]:
    lines = text.splitlines()
    return [int(lines[i + 1]) for i, ln in enumerate(lines) if ln.startswith("ITEM: TIMESTEP")]


def test_steps_are_lammps_timesteps_and_frames_equal_ases(tmp_path):
    """A dump every 3 steps keeps the minimiser's count (ITEM: TIMESTEP), not the frame index; the
    last frame is the minimiser's last step (47)."""
    path = LMP / "fe16_tri_linesearch" / "relax.dump"
    run = read_run(path)
    ref = _ase(path, tmp_path)                                                     # ASE
    assert len(run) == len(ref) == 17
    assert run.steps.tolist() == _dump_timesteps(path.read_text()) == \
        [a.info["timestep"] for a in ref]
    assert run.steps.tolist()[:3] == [0, 3, 6] and run.steps[-1] == 47
    np.testing.assert_array_equal(run.positions, [a.positions for a in ref])
    np.testing.assert_array_equal(run.cells, [a.cell.array for a in ref])


def test_energies_come_from_the_log_not_ases_placeholder(tmp_path):
    """ASE gives a dump with force columns energy 0.0 on every frame; LAMMPS's log prints the
    energy of every step (thermo 1): the first is -30.4774565808953 eV ("Energy initial")."""
    path = LMP / "si8_forces_thermo" / "relax.dump.gz"
    ref = _ase(path, tmp_path)
    assert {a.get_potential_energy() for a in ref} == {0.0}                        # ASE
    log = (LMP / "si8_forces_thermo" / "log.lammps").read_text()
    initial = float(re.search(r"Energy initial, next-to-last, final = \s*(\S+)", log).group(1))
    run = read_run(path)
    assert run.energies[0] == pytest.approx(initial, abs=1e-5)       # thermo prints 8 digits
    assert run.energies[-1] < run.energies[0] and np.isfinite(run.energies).all()
    np.testing.assert_allclose(run.forces, [a.get_forces() for a in ref], atol=0)
    alone = tmp_path / "alone"
    alone.mkdir()
    shutil.copy(path, alone / path.name)
    assert read_run(alone / path.name).energies is None          # no log: no energy, not 0.0
    rec = analyze(read_run(path))
    assert rec["frames"][0]["energy"] == pytest.approx(initial, abs=1e-5)


def test_a_dump_every_n_steps_has_log_energies_only_where_thermo_printed():
    """The public fixture's log prints thermo every 20 steps and the dump every 4: frames between
    have no energy (None in the record, '-' in the table), never NaN or 0."""
    run = read_run(Path(__file__).parent / "data" / "public" / "lammps_relax" / "relax.dump.gz")
    rec = analyze(run)
    energies = {f["step"]: f["energy"] for f in rec["frames"]}
    assert energies[0] == pytest.approx(-119.211775914374, abs=1e-5)   # log.lammps, step 0
    assert energies[4] is None and energies[20] is not None


def test_step_limit_is_unfinished_and_a_linesearch_stop_is_said():
    """'Stopping criterion = max iterations' (minimize ... 8 10000) is a run at its step limit,
    as VASP's NSW and pw.x's nstep; 'linesearch alpha is zero' met no tolerance: a warning
    quoting the final force max component (log.lammps)."""
    d = LMP / "si16_aniso_max_iterations"
    assert "Stopping criterion = max iterations" in (d / "log.lammps").read_text()
    run = read_run(d / "relax.dump")
    assert run.unfinished == "stopped at its step limit (LAMMPS: 'Stopping criterion = max " \
                             "iterations')"
    assert run.code_settings["box_relax"] == "'fix box/relax aniso'"
    d = LMP / "fe16_tri_linesearch"
    assert "Force max component initial, final = 6.2380933 0.10599059" in \
        " ".join((d / "log.lammps").read_text().split())
    run = read_run(d / "relax.dump")
    assert run.unfinished is None
    (w,) = [w for w in run.warnings if "linesearch alpha is zero" in w]
    assert "force max component 0.106 eV/Å at the end" in w and "may not be relaxed" in w


def test_a_cut_last_frame_is_dropped_and_said(tmp_path):
    """A job killed while writing leaves part of a frame: the whole frames are read (ASE's reader
    returns the cut one as a frame of 10 atoms), the run is unfinished, the warning says so."""
    path = LMP / "si16_cut_frame" / "relax.dump"
    ref = _ase(path, tmp_path)
    assert [len(a) for a in ref] == [16] * 8 + [10]                                # ASE
    run = read_run(path)
    assert len(run) == 8 and run.unfinished.startswith("cut short")
    (w,) = [w for w in run.warnings if "truncated" in w]
    assert "its last frame (timestep 8) holds 10 of its 16 atom lines; 8 whole frames read" in w
    whole = read_run(LMP / "si16_aniso_max_iterations" / "relax.dump")
    np.testing.assert_array_equal(run.positions, whole.positions[:8])


def test_types_named_by_the_data_file_and_by_a_script_named_dot_lammps(tmp_path):
    """No element column and no 'mass' line: the Masses of the read_data file (written by ASE:
    '1 24.304999993747675 # Mg') name type 1; a script named cu.lammps with 'mass 1 63.546'."""
    run = read_run(LMP / "mg16_masses_from_data" / "relax.dump")
    assert set(run.numbers.tolist()) == {12}
    assert run.code_settings["type_map_from"] == "start.data"
    run = read_run(LMP / "cu32_script_named_lammps" / "relax.lammpstrj")
    assert set(run.numbers.tolist()) == {29} and run.code_settings["type_map_from"] == "cu.lammps"
    d = tmp_path / "bare"
    d.mkdir()
    shutil.copy(LMP / "mg16_masses_from_data" / "relax.dump", d / "relax.dump")
    with pytest.raises(InputError, match=r"no LAMMPS input script or log\.lammps naming it"):
        read_run(d / "relax.dump")


def test_reduced_units_are_refused_without_element_names():
    """units lj, mass 1 1.0: the particles are no hydrogen and sigma is no Å."""
    with pytest.raises(InputError, match=r"reduced units \(units lj, log\.lammps\)"):
        read_run(LMP / "lj32_reduced_units" / "relax.dump")


def test_one_frame_dump_is_a_single_structure():
    """write_dump after minimize: one frame (timestep 84), no steps to compare."""
    run = read_run(LMP / "cdte8_final_only" / "final.dump")
    assert len(run) == 1 and run.steps.tolist() == [84]
    assert run.code_settings["single_structure"] == "final.dump, one frame"


def test_printed_rounding_of_lammps_default_format():
    """LAMMPS writes coordinates with %g (6 significant digits) unless told otherwise: the step is
    that of the largest value's magnitude, not the most decimals of a small one. Common practice
    (C's printf); values from the cdte8 dump."""
    assert printed_step(["5.43239", "0.00660101", "12.3456", "0"]) == pytest.approx(1e-4)
    assert printed_step(["5.431000", "0.000000"]) == pytest.approx(1e-6)           # %f
    run = read_run(LMP / "cdte8_final_only" / "final.dump")
    largest = np.abs(run.positions[0]).max()
    assert 1 < largest < 10
    assert run.position_precision == pytest.approx(np.sqrt(3) * 0.5 * 1e-5)


def test_audit_lists_a_lammps_job_without_a_dump(tmp_path):
    """A finished minimisation that wrote no dump is a failed entry that says why, never dropped
    unsaid; the runs beside it are audited."""
    root = tmp_path / "campaign"
    for name in ("si8_no_dump", "fe16_tri_linesearch"):
        shutil.copytree(LMP / name, root / name)
    s = audit([root], tmp_path / "out", report=False, workers=1, progress="off")
    errors = {f["run"]: f["error"] for f in s["failed"]}
    assert "a LAMMPS job (in.relax, log.lammps) that ran and wrote no dump" in \
        errors["campaign/si8_no_dump"]
    assert s["runs"] == 2 and len(s["failed"]) == 1
    assert (tmp_path / "out" / "records").is_dir()


def test_data_file_and_log_named_when_passed_alone():
    with pytest.raises(InputError, match="a LAMMPS log"):
        read_run(LMP / "si8_no_dump" / "log.lammps")
    with pytest.raises(InputError, match="a LAMMPS data file"):
        read_run(LMP / "mg16_masses_from_data" / "start.data")


def test_md_run_is_no_relaxation():
    """A job that ran 'run 50' (NVT) and no minimize: its frames are MD steps."""
    run = read_run(LMP / "cu32_md_run" / "md.dump")
    assert run.steps.tolist() == [0, 10, 20, 30, 40, 50]
    assert run.not_relaxation == "molecular dynamics (LAMMPS 'run')"


def test_default_format_rounding_is_not_taken_from_exact_lattice_sites():
    """A dump in LAMMPS's default %g format whose first frame holds exact lattice sites ('0',
    '1.8075': trailing zeros dropped) still prints 6 significant digits (its later frames show
    them: '1.78831'); the file's precision is that of %g at its largest coordinate, not of the
    fewest digits seen (it read 1e-4 Å and moved the advice)."""
    path = LMP / "cu32_md_run" / "md.dump"
    text = path.read_text()
    assert "\n2 1 1.8075 1.8075 0\n" in text                      # frame 0, exact sites
    run = read_run(path)
    top = np.abs(run.positions).max()
    assert 1 < top < 10
    assert run.position_precision == pytest.approx(np.sqrt(3) * 0.5 * 1e-5)


def test_log_energies_are_potential_energies_under_a_damped_minimiser():
    """min_style fire moves atoms with a fictitious kinetic energy that LAMMPS's TotEng includes;
    the record's energy is the potential energy, E_pair + E_mol of the default thermo (step 6:
    -31.642599 eV in log.lammps, TotEng -30.860019)."""
    run = read_run(LMP / "si8_forces_thermo" / "relax.dump.gz")
    log = (LMP / "si8_forces_thermo" / "log.lammps").read_text()
    row = next(ln.split() for ln in log.splitlines() if ln.split()[:1] == ["6"]
               and len(ln.split()) == 6)
    assert float(row[4]) == pytest.approx(-30.860019) and float(row[2]) == pytest.approx(-31.642599)
    k = run.steps.tolist().index(6)
    assert run.energies[k] == pytest.approx(float(row[2]) + float(row[3]))


# ---------------------------------------------------------------- jobs as users write them
# (real LAMMPS runs of invented Si8 / MgO8 cells from an adversarial review: README of this folder)
def _log_rows(path: Path) -> list[list[str]]:
    """The thermo rows of a log (Step first), in order."""
    out, inside = [], False
    for ln in path.read_text().splitlines():
        f = ln.split()
        if f[:1] == ["Step"]:
            inside, head = True, f
            continue
        if inside and ln.startswith("Loop time"):
            inside = False
        elif inside and len(f) == len(head) and f[0].isdigit():
            out.append(dict(zip(head, f)))
    return out


def test_reset_timestep_drops_the_energies_it_makes_ambiguous_and_counts_steps_on():
    d = LMP / "si8_reset_timestep"
    rows = _log_rows(d / "log.lammps")
    values = {}
    for r in rows:
        values.setdefault(r["Step"], set()).add(r["PotEng"])
    repeated = {k for k, v in values.items() if len(v) > 1}   # one step, two energies
    assert repeated                     # (a step printed again with its energy is no conflict)
    run = read_run(d / "relax.lammpstrj")
    assert (np.diff(run.steps) > 0).all()
    raw = _dump_timesteps((d / "relax.lammpstrj").read_text())
    for t, e in zip(raw, run.energies):
        assert (str(t) in repeated) == np.isnan(e)      # never another minimisation's energy


def test_a_log_of_another_job_is_not_this_dumps(tmp_path):
    """One log.lammps in a folder of two jobs names ge.lammpstrj: si.lammpstrj is read with the
    script that names it (Si, no energies), never with the Ge job's log (its elements, energies and
    stop); without that script it is refused."""
    d = LMP / "two_jobs_one_log"
    assert "ge.lammpstrj" in (d / "log.lammps").read_text()
    assert "si.lammpstrj" not in (d / "log.lammps").read_text()
    si = read_run(d / "si.lammpstrj")
    assert set(si.numbers.tolist()) == {14} and si.energies is None and si.unfinished is None
    assert set(read_run(d / "ge.lammpstrj").numbers.tolist()) == {32}
    for name in ("si.lammpstrj", "log.lammps"):
        shutil.copy(d / name, tmp_path / name)
    with pytest.raises(InputError, match="no LAMMPS input script or log.lammps naming it"):
        read_run(tmp_path / "si.lammpstrj")


def test_types_named_by_the_data_files_comments_and_apart_when_one_mass():
    """Masses rounded in a data file ('24.0 # Mg') are named by their comment (as ASE writes data
    files); two LAMMPS types of one mass (two charged Si sublattices) stay apart for spglib:
    F-43m, not Fd-3m (spglib on the types, here)."""
    import spglib
    run = read_run(LMP / "mgo8_masses_by_comment" / "mgo.lammpstrj")
    assert sorted(set(run.numbers.tolist())) == [8, 12]
    run = read_run(LMP / "si8_two_types_one_mass" / "ordered.lammpstrj")
    assert sorted(set(run.species)) == ["Si1", "Si2"]
    text = (LMP / "si8_two_types_one_mass" / "ordered.lammpstrj").read_text()
    ref = _ase(LMP / "si8_two_types_one_mass" / "ordered.lammpstrj", Path("/nonexistent"),
               specorder=["Si", "Ge"])[-1]                 # types 1, 2 as two kinds
    ds = spglib.get_symmetry_dataset((ref.cell.array, ref.get_scaled_positions(), ref.numbers),
                                     symprec=1e-3)
    assert ds.number == 216 and "ITEM: ATOMS" in text
    rec = analyze(run)
    assert rec["summary"]["verdict"]["structure"]["final"]["group"] == 216


def test_the_stop_that_counts_is_the_last_while_the_dump_was_written():
    """minimize, write, undump, then another minimize that ends at max iterations: the dump's
    run converged ('force tolerance' or 'energy tolerance' while it was written)."""
    d = LMP / "si8_undump_then_minimize"
    stops = re.findall(r"Stopping criterion = (.+)", (d / "log.lammps").read_text())
    assert len(stops) == 2 and stops[-1].strip() == "max iterations"
    assert read_run(d / "relaxed.lammpstrj").unfinished is None


def test_per_atom_thermo_energies_are_cell_energies():
    """thermo_modify norm yes prints energies per atom: the record's are the cell's (x 8)."""
    d = LMP / "si8_norm_yes"
    rows = _log_rows(d / "log.lammps")
    run = read_run(d / "relax.lammpstrj")
    first = next(r for r in rows if r["Step"] == str(run.steps[0]))
    col = "PotEng" if "PotEng" in first else "E_pair"
    assert run.energies[0] == pytest.approx(8 * float(first[col]), rel=1e-6)


def test_minimize_then_md_is_no_relaxation_and_time_units_headers_are_read():
    run = read_run(LMP / "si8_minimize_then_md" / "traj_el.lammpstrj")
    assert run.not_relaxation.startswith("a minimisation followed by molecular dynamics")
    d = LMP / "si8_time_units"
    text = (d / "si.lammpstrj").read_text()
    assert text.startswith("ITEM: UNITS") and "ITEM: TIME\n" in text
    run = read_run(d / "si.lammpstrj")
    assert len(run) == text.count("ITEM: TIMESTEP") == len(_ase(d / "si.lammpstrj", Path("/x")))


def test_mass_type_ranges_as_lammps_reads_them():
    """LAMMPS's type ranges (``mass`` command docs, from memory): ``*`` every type of
    ``create_box N``, ``m*n``, ``*n``, ``n*``; a closed range needs no count."""
    from driftwatch.adapters.lammps import _types
    assert list(_types("*", 2)) == [1, 2] and list(_types("1*3", 0)) == [1, 2, 3]
    assert list(_types("*3", 0)) == [1, 2, 3] and list(_types("2*", 4)) == [2, 3, 4]
    assert list(_types("2", 0)) == [2]


def test_a_dump_of_a_group_says_it_holds_part_of_the_structure():
    d = LMP / "si8_dump_of_a_group"
    assert "with 8 atoms" in (d / "log.lammps").read_text()                       # the log
    run = read_run(d / "sub.lammpstrj")
    assert run.natoms == 4
    assert any("the dump holds 4 of the job's 8 atoms" in w for w in run.warnings)


def test_a_script_alone_is_read_with_its_includes_and_variables():
    """No log: the script's include file sets units metal and the variables that name the dump
    and the mass; it was refused as reduced units and as naming no dump."""
    d = LMP / "si8_script_include_variables"
    assert "include params.inc" in (d / "in.kx14").read_text()
    run = read_run(d / "dump.kx14.lammpstrj")
    assert set(run.numbers.tolist()) == {14} and run.code_settings["units"] == "metal"


def test_a_step_printed_again_by_the_next_minimize_keeps_its_energy():
    """Each `minimize` of a loop prints its first step again with the same energy: no conflict,
    every frame keeps the log's energy (29 of 92 were dropped)."""
    d = LMP / "si8_minimize_in_chunks"
    run = read_run(d / "relax.lammpstrj.gz")
    assert len(run) == 92 and np.isfinite(run.energies).all()
    assert run.code_settings["lammps_job"] == "log.lammps.gz"


def test_a_chain_of_groups_that_flickers_is_swept():
    """Rock-salt MgO relaxed with rounded masses: spglib's group of the final structure alternates
    between P1 and Pm in windows of 2-3 % from 0.097 Å (a review's 500-point scan); a few probes
    between the chain P1 -> Pm -> Fm-3m of one grid interval reveal it, and symprec-dependent names
    Pm below 0.1 Å (spglib called here at the stretch's centre)."""
    import spglib
    run = read_run(LMP / "mgo8_masses_by_comment" / "mgo.lammpstrj")
    rec = analyze(run)
    (dep,) = [f for f in rec["flags"] if f["code"] == "symprec-dependent"]
    assert "P1 (1) -> Pm (6)" in dep["message"]
    pm = [r for r in rec["summary"]["tolerance"]["ranges"] if r[2] == 6 and r[0] < 0.1]
    c, p = run.cells[-1], run.positions[-1]
    cell = (c, np.linalg.solve(c.T, p.T).T, run.numbers)
    lo, hi = pm[0][0], pm[0][1]
    assert spglib.get_symmetry_dataset(cell, symprec=(lo * hi) ** 0.5).number == 6    # spglib


def test_follow_ends_when_the_jobs_log_says_it_ended(tmp_path):
    """A dump has no end marker; its job's log.lammps ends with "Total wall time" (LAMMPS prints it
    last): follow ends there, without waiting out --idle; with that line not written yet, it waits."""
    import io

    from driftwatch.live import follow
    d = LMP / "si16_aniso_max_iterations"
    rec = follow(d / "relax.dump", stream=io.StringIO(), idle=60, poll=0.05)
    assert rec["live"]["ended"] == "end marker: log.lammps: Total wall time"
    for name in ("relax.dump", "in.relax"):
        shutil.copy(d / name, tmp_path / name)
    log = (d / "log.lammps").read_text()
    (tmp_path / "log.lammps").write_text(log[:log.index("Total wall time")])
    rec = follow(tmp_path / "relax.dump", stream=io.StringIO(), idle=0.5, poll=0.05)
    assert rec["live"]["ended"].startswith("idle")


def _series(folder: Path) -> list[Path]:
    """The files of a one-file-per-frame dump in timestep order (LAMMPS writes the timestep where
    the pattern has '*', so the files' own order is lexical, not by step)."""
    return sorted(folder.glob("relax.*.lammpstrj"), key=lambda p: int(p.name.split(".")[1]))


@pytest.mark.parametrize("run_dir, dumps", [("si8_dump_per_frame", ""),
                                            ("si8_dump_per_frame_subfolder", "frames")])
def test_a_dump_written_one_file_per_frame_is_one_run_of_its_folder(tmp_path, run_dir, dumps):
    """`dump ... relax.*.lammpstrj` writes one file per frame; the folder of those files is one run,
    its frames those of ASE's reader on each file in timestep order, its energies the log's (the
    job's log may sit in the folder above the dumps)."""
    d = LMP / run_dir
    files = _series(d / dumps)
    assert len(files) == 27
    run = read_run(d / dumps)
    ref = [_ase(f, tmp_path)[0] for f in files]                                    # ASE
    steps = [int(f.name.split(".")[1]) for f in files]
    assert run.steps.tolist() == steps and steps[:3] == [0, 3, 6]
    np.testing.assert_array_equal(run.positions, [a.positions for a in ref])
    np.testing.assert_array_equal(run.cells, [a.cell.array for a in ref])
    thermo = {int(r["Step"]): float(r["E_pair"]) + float(r["E_mol"])                  # LAMMPS
              for r in _log_rows(d / "log.lammps")}
    np.testing.assert_allclose(run.energies, [thermo[s] for s in run.steps.tolist()], rtol=1e-12)
    assert run.unfinished is None and run.code_settings["box_relax"] == "'fix box/relax aniso'"
    # the final structure: spglib on ASE's last frame gives the run's group
    import spglib
    last = ref[-1]
    group = spglib.get_symmetry_dataset((last.cell[:], last.get_scaled_positions(),
                                         last.numbers), symprec=1e-3).number
    rec = analyze(d / dumps)
    assert rec["summary"]["verdict"]["structure"]["final"]["group"] == group == 227   # Fd-3m
    # an audit lists one run per job, no failed runs (the log above is that run's job)
    res = audit([d], tmp_path / "audit", report=False, workers=1, progress="off")
    assert list(res["records"]) == [f"{run_dir}/{dumps}".rstrip("/")] and not res["failed"]


def test_one_file_of_a_per_frame_dump_is_read_alone_and_a_cut_file_ends_the_series(tmp_path):
    d = LMP / "si8_dump_per_frame"
    files = _series(d)
    one = read_run(files[3])
    assert len(one) == 1 and any("read alone" in w and "all 27 files" in w for w in one.warnings)
    # a file cut short (the job killed while writing it) ends the series there, and is said
    copy = tmp_path / "cut"
    shutil.copytree(d, copy)
    cut = copy / files[10].name
    cut.write_text("".join(cut.read_text().splitlines(keepends=True)[:-3]))
    run = read_run(copy)
    assert len(run) == 10 and run.steps[-1] == 27 and run.unfinished
    assert any(f"{files[10].name} is cut short: the 16 files after it" in w for w in run.warnings)
    # another dump beside the series: no folder run, every file a run of its own
    shutil.copy(LMP / "cdte8_final_only" / "final.dump", copy / "final.dump")
    res = audit([copy], tmp_path / "audit", report=False, workers=1, progress="off")
    ids = list(res["records"]) + [f["run"] for f in res["failed"]]
    assert "cut/final.dump" in ids and f"cut/{files[0].name}" in ids and res["runs"] == 28


@pytest.mark.parametrize("run_dir", ["si8_series_beside_an_extxyz",
                                     "si8_xyz_dump_beside_an_extxyz"])
def test_a_run_beside_a_lammps_job_in_its_folder_is_a_run_of_its_own(tmp_path, run_dir):
    """A LAMMPS job's folder (a one-file-per-frame series, or a dump with the job's xyz dump) also
    holding an unrelated ASE relaxation (extended XYZ, 8 frames by ASE's reader): the audit lists
    both runs; the job's xyz dump is no run."""
    d = LMP / run_dir
    ref = ase.io.read(d / "cu_emt_relax.extxyz", ":")                              # ASE
    res = audit([d], tmp_path / "out", report=False, workers=1, progress="off")
    assert sorted(res["records"]) == [run_dir, f"{run_dir}/cu_emt_relax.extxyz"]
    assert not res["failed"] and not res["skipped"]
    assert len(read_run(d / "cu_emt_relax.extxyz")) == len(ref) == 8
    assert any("cu_emt_relax.extxyz beside it is another run" in w for w in read_run(d).warnings)


def test_a_log_between_two_minimisations_is_a_job_still_going_not_one_at_its_step_limit(tmp_path):
    """A real job run as a loop of capped minimize commands (tests/data/lammps_trials/
    si8_minimize_in_chunks): its log cut right after a minimisation that stopped at "max
    iterations" (a later minimize follows, or the job was killed; LAMMPS prints "Total wall time"
    when a job ends) is cut short, not a run stopped at its step limit, and says nothing of a
    final structure while it runs."""
    d = LMP / "si8_minimize_in_chunks"
    log = gzip.decompress((d / "log.lammps.gz").read_bytes()).decode()
    stops = [m.end() for m in re.finditer(r"Stopping criterion = max iterations\n", log)]
    run_dir = tmp_path / "run"
    run_dir.mkdir()
    shutil.copy(d / "in.slow", run_dir / "in.slow")
    shutil.copy(d / "relax.lammpstrj.gz", run_dir / "relax.lammpstrj.gz")
    (run_dir / "log.lammps").write_text(log[:stops[3]])
    assert "Total wall time" not in (run_dir / "log.lammps").read_text()
    run = read_run(run_dir / "relax.lammpstrj.gz")
    assert run.unfinished == "cut short: LAMMPS's log has no 'Total wall time' (job killed or " \
                             "still running)"
    assert not any("step limit" in w or "not a relaxed one" in w for w in run.warnings)
    whole = read_run(d / "relax.lammpstrj.gz")                     # the whole log: converged
    assert whole.unfinished is None


def test_a_box_flip_is_read_as_the_same_lattice_in_one_basis():
    """LAMMPS writes a flipped box in another basis of the same lattice (xy -> xy + lx, from the
    LAMMPS documentation's triclinic convention, from memory). Real runs: an hcp Mg2 relaxation
    flipped by change_box between two minimizations, and its control with a no-op change_box,
    identical for steps 0-20 (their logs). ASE reads the dump's cells as LAMMPS wrote them: the
    flip is an integer change of basis (determinant 1) of the cell before it. The frames from the
    flip are read in one basis (said in a warning), so the first frame measures against the final
    group as the control's does (it had 'could not be measured': its operations read in the other
    basis); a fixed box flipped twice is a fixed cell."""
    flip, ctrl = LMP / "mg2_relax_flip_between_minimize", LMP / "mg2_relax_noflip_control"
    raw = [a.cell[:] for a in ase.io.read(flip / "relax.lammpstrj", ":", format="lammps-dump-text")]
    steps = _dump_timesteps((flip / "relax.lammpstrj").read_text())
    k = steps.index(21)
    M = np.rint(raw[k - 1] @ np.linalg.inv(raw[k]))
    assert round(abs(np.linalg.det(M))) == 1 and not np.array_equal(M, np.eye(3))
    assert np.abs(M @ raw[k] - raw[k - 1]).max() < 0.1 < np.abs(raw[k] - raw[k - 1]).max()
    run = read_run(flip)
    assert any("the cell's basis jumps without the lattice changing at step 21" in w
               for w in run.warnings)
    assert np.abs(run.cells[k] - run.cells[k - 1]).max() < 0.1
    np.testing.assert_allclose(run.positions, np.array(
        [a.positions for a in ase.io.read(flip / "relax.lammpstrj", ":",
                                          format="lammps-dump-text")]), atol=1e-9)  # untouched
    a_flip = analyze(run)["summary"]["atoms"]
    a_ctrl = analyze(read_run(ctrl))["summary"]["atoms"]
    assert "error" not in a_flip["start"] and (a_flip["group"], a_ctrl["group"]) == (194, 194)
    assert a_flip["start"]["rms"] == pytest.approx(a_ctrl["start"]["rms"], abs=1e-4)
    md = read_run(LMP / "si8_md_change_box_flips")
    assert any("jumps without the lattice changing at steps" in w for w in md.warnings)
    assert analyze(md)["run"]["fixed_cell"] is True


def test_box_relax_couple_names_coupled_dimensions_not_relaxed_ones():
    """`fix box/relax x 0.0 y 0.0 z 0.0 couple xy` (a real LAMMPS job): 'xy' after 'couple' names
    dimensions coupled; the tilt xy is not relaxed (the log's xy/lx stays -0.5). The record had
    said 'fix box/relax x y z xy'."""
    d = LMP / "lj2_hcp_couple_xy"
    assert "box/relax x 0.0 y 0.0 z 0.0 couple xy" in (d / "in.relax").read_text()
    assert read_run(d).code_settings["box_relax"] == "'fix box/relax x y z'"
