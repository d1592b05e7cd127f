"""Live monitoring against real components: ASE's EMT calculator and optimizers, a real pw.x
vc-relax followed while it runs, pw.x's own soft stop, and the STOPCAR convention of VASP.

External facts used (source beside each check):
* ASE optimizer observer semantics (ase/optimize/optimize.py, read in ASE 3.29): observers are
  called with no arguments at step 0 and every ``interval`` steps; the trajectory writer attached in
  ``__init__`` runs first; an exception raised by an observer propagates out of ``run()``.
* ASE's 2D Bravais classification ``Cell.get_bravais_lattice(pbc=...)`` (OBL / HEX2D).
* pw.x 6.7 (Debian package quantum-espresso 6.7-2): stops cleanly when ``<prefix>.EXIT`` appears,
  prints "Program stopped by user request", "JOB DONE.", exits with status 2 and deletes the file
  (measured here; see the report).
* VASP STOPCAR: ``LSTOP = .TRUE.`` stops after the current ionic step; lines starting with ``#`` are
  comments (from memory, the INCAR-style reader; custodian's WalltimeHandler writes the same tag).
  No VASP here: only the file's content and location are checked.
"""

from __future__ import annotations

import io
import json
import os
import re
import shutil
import subprocess
import time
import warnings
from pathlib import Path

import numpy as np
import pytest

from driftwatch import records
from driftwatch.adapters import read_run
from driftwatch.errors import ConfigError, InputError, OutputError
from driftwatch.live import (SymmetryCollapse, SymmetryDriftWarning, SymmetryWatch, Tracker,
                             check_run, follow, qe_stop_settings, request_stop)
from driftwatch.track import analyze

PSEUDO = Path("/usr/share/espresso/pseudo/Al.pz-vbc.UPF")


# ---------------------------------------------------------------- helpers
def content(rec: dict) -> dict:
    """What must agree between a live record and track.analyze: frames, flags, summary, geometry.

    Dropped: timing, the live section, and spglib's per-spectrum call counter (it depends on
    symmetry.py's cache, so it differs even between two analyze() calls).
    """
    rec = json.loads(records.dumps(rec))
    for f in rec["frames"]:
        if "symmetry" in f:
            f["symmetry"].pop("calls", None)
    rec["summary"]["verdict"].pop("complete", None)     # live (going on) or ended: compared apart
    return {k: rec[k] for k in ("frames", "flags", "summary", "geometry", "config")} | {
        "run": {k: rec["run"][k] for k in ("n_frames", "n_atoms", "formula", "fixed_cell")}}


def first_difference(a, b, path=""):
    """Path and values of the first place two JSON trees differ (None when equal)."""
    if isinstance(a, dict) and isinstance(b, dict):
        for k in sorted(set(a) | set(b)):
            if k not in a or k not in b:
                return f"{path}/{k}: only in one", None, None
            d = first_difference(a[k], b[k], f"{path}/{k}")
            if d:
                return d
        return None
    if isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            return f"{path}: lengths {len(a)} != {len(b)}", None, None
        for i, (x, y) in enumerate(zip(a, b)):
            d = first_difference(x, y, f"{path}[{i}]")
            if d:
                return d
        return None
    return None if a == b else (path, a, b)


def same(a: dict, b: dict) -> bool:
    d = first_difference(content(a), content(b))
    assert d is None, d
    return True


def invented_layer():
    """An invented one-atom Cu monolayer in a slab cell: oblique in-plane lattice (a 2.50 Å,
    b 2.62 Å, 64 deg), 14 Å along c, near the close-packed hexagonal layer EMT prefers."""
    from ase import Atoms
    from ase.calculators.emt import EMT
    g = np.radians(64.0)
    atoms = Atoms("Cu", positions=[[0, 0, 7.0]], pbc=True,
                  cell=[[2.50, 0, 0], [2.62 * np.cos(g), 2.62 * np.sin(g), 0], [0, 0, 14.0]])
    atoms.calc = EMT()
    return atoms


#: The invented layer holds hp for its last 3 steps only: with the default persistence (10 steps) a
#: live change would count only when the run ends, so these tests let a change count after 2 steps.
QUICK = {"rules": {"persistence": {"steps": 2}}}


def relax(tmp_path, watch_kw=None, *, interval=1, pass_opt=False, steps=200):
    """A real EMT relaxation of the invented layer, in-plane cell free (FrechetCellFilter)."""
    from ase.filters import FrechetCellFilter
    from ase.optimize import BFGS
    atoms = invented_layer()
    traj = tmp_path / "relax.traj"
    opt = BFGS(FrechetCellFilter(atoms, mask=[1, 1, 0, 0, 0, 1]), trajectory=str(traj), logfile=None)
    watch = SymmetryWatch(atoms, **({"config": QUICK} | (watch_kw or {})))
    if pass_opt:
        opt.attach(watch, interval=interval, optimizer=opt)
    else:
        opt.attach(watch, interval=interval)
    return atoms, opt, watch, traj


# ---------------------------------------------------------------- ASE observer
def test_watch_record_mode_matches_analyze_of_trajectory(tmp_path):
    out = tmp_path / "live.json"
    atoms, opt, watch, traj = relax(tmp_path, {"mode": "record", "output": out})
    with warnings.catch_warnings():
        warnings.simplefilter("error", SymmetryDriftWarning)     # record mode never warns
        assert opt.run(fmax=1e-4, steps=200)
    assert records.read_json(out)["summary"]["verdict"]["complete"] is False   # still going
    watch.finish()                                                 # the optimizer has finished
    written = records.read_json(out)
    assert written["run"]["n_frames"] == opt.nsteps + 1          # step 0 + every step (interval 1)
    assert written["summary"]["verdict"]["complete"] is True
    assert same(written, watch.record)
    # the record equals track.analyze of the trajectory the optimizer wrote
    assert same(written, analyze(traj, QUICK))
    codes = {f["code"] for f in written["flags"]}
    assert "lattice-gained" in codes and written["summary"]["verdict"]["direction"] == "gained"
    snap = next(f for f in written["flags"] if f["code"] == "lattice-gained")
    assert snap["type"] == "hp"
    # external check: ASE's own 2D classification of the first and last in-plane cells
    from ase.io import read
    first, last = read(traj, 0), read(traj, -1)
    assert first.cell.get_bravais_lattice(pbc=[1, 1, 0]).name == "OBL"
    assert last.cell.get_bravais_lattice(pbc=[1, 1, 0], eps=1e-3).name == "HEX2D"
    assert watch.fired and watch.fired[0]["code"] == "lattice-gained"  # recorded, not acted on


def test_watch_names_the_dynamics_as_an_audit_of_its_trajectory_does(tmp_path):
    """The watch given its optimizer records what ASE's dynamics object is, as the trajectory's
    description tells an audit of it: the optimizer's name; for molecular dynamics (a real EMT
    VelocityVerlet run of an invented Cu cell) no relaxation, with the audit's warning."""
    from ase import units
    from ase.build import bulk
    from ase.calculators.emt import EMT
    from ase.md.verlet import VelocityVerlet
    atoms, opt, watch, traj = relax(tmp_path, {"mode": "record"}, pass_opt=True)
    opt.run(fmax=1e-3, steps=30)
    watch.finish()
    assert watch.record["run"]["code_settings"] == analyze(traj, QUICK)["run"]["code_settings"] \
        == {"code": "ase", "optimizer": "BFGS", "calculator": "emt"}
    cu = bulk("Cu", "fcc", a=3.6, cubic=True)
    cu.rattle(0.05, seed=3)
    cu.calc = EMT()
    cu.set_momenta(np.random.default_rng(1).normal(0.0, 0.5, (len(cu), 3)))
    md_traj = tmp_path / "md.traj"
    md = VelocityVerlet(cu, 2 * units.fs, trajectory=str(md_traj), logfile=None)
    md_watch = SymmetryWatch(cu, config=QUICK, optimizer=md)
    md.attach(md_watch, interval=1)
    md.run(6)
    md_watch.finish()
    live, audited = md_watch.record["run"], analyze(md_traj, QUICK)["run"]
    assert live["code_settings"] == audited["code_settings"]
    assert live["not_relaxation"] == audited["not_relaxation"] == \
        "molecular dynamics (ASE's VelocityVerlet)"
    said = [w.split(": ", 1)[1] for w in live["warnings"]]
    assert said == [w.split(": ", 1)[1] for w in audited["warnings"]] and said


def test_watch_warn_mode_warns_once_per_new_flag(tmp_path):
    atoms, opt, watch, traj = relax(tmp_path, {"mode": "warn",
                                               "stop_on": ("lattice-gained", "structure")})
    with pytest.warns(SymmetryDriftWarning) as got:
        opt.run(fmax=1e-4, steps=200)
    ours = [w.message for w in got if isinstance(w.message, SymmetryDriftWarning)]
    keys = [(w.flag["code"], w.flag["type"]) for w in ours]
    assert ("lattice-gained", "hp") in keys
    assert len(keys) == len(set(keys))                       # once per flag, not once per step
    # said while the run goes on: the newest step, not "the end" (a new user's field trial)
    gain = next(w for w in ours if w.flag["code"] == "lattice-gained")
    assert "at the end" not in str(gain) and \
        re.search(r"Å at step \d+ \(the newest\), within", str(gain))
    assert opt.converged(opt.optimizable.get_gradient())      # warn mode lets the relaxation finish


def test_watch_stop_mode_raises_with_record_and_trajectory_has_step(tmp_path):
    from ase.io import Trajectory
    out = tmp_path / "stop.json"
    atoms, opt, watch, traj = relax(tmp_path, {"mode": "stop", "stop_on": ["lattice-gained"],
                                               "output": out}, pass_opt=True)
    with pytest.raises(SymmetryCollapse) as exc:
        opt.run(fmax=1e-4, steps=200)
    err = exc.value
    flag = err.flags[0]
    assert flag["code"] == "lattice-gained" and "step" in str(err)
    assert err.record["summary"]["verdict"]["complete"] is False
    # ASE semantics (ase/optimize/optimize.py): nsteps is the step that fired, the trajectory writer
    # ran before our observer, so the trajectory already holds that step
    assert opt.nsteps == err.record["frames"][-1]["step"]
    with Trajectory(traj) as t:
        assert len(t) == opt.nsteps + 1
        assert np.allclose(t[-1].cell.array, atoms.cell.array)
    assert records.read_json(out)["run"]["n_frames"] == opt.nsteps + 1
    assert same(records.read_json(out), err.record)
    assert same(err.record, analyze(traj, QUICK, complete=False))    # judged as a run going on
    with warnings.catch_warnings():          # finishing after a caught stop never raises again
        warnings.simplefilter("ignore", SymmetryDriftWarning)
        rec = watch.finish()
    assert rec["live"]["observer"]["complete"] is True


def test_stop_record_names_both_groups_of_a_change_pending_at_a_common_symprec(tmp_path):
    """A live stop's verdict quotes a common symprec whose group changed too recently to count
    with both groups and "not yet held", not as "kept" the first frame's group (a new user's field
    trial: a one-atom LJ layer relaxing from oblique under FIRE, stopped on lattice-gained).
    Reference: spglib 2.8's layer dataset of the frame the record ends at, at 0.01 A."""
    import spglib
    from ase.calculators.lj import LennardJones
    from ase.filters import FrechetCellFilter
    from ase.optimize import FIRE
    from ase import Atoms
    b1 = np.array([1.05, 0, 0])
    b2 = 1.15 * np.array([np.cos(np.radians(66)), np.sin(np.radians(66)), 0])
    atoms = Atoms("Ar", cell=[b1, b2, [0, 0, 12.0]], pbc=True, positions=[[0, 0, 6.0]])
    atoms.calc = LennardJones(sigma=1.0, epsilon=1.0, rc=3.0, smooth=True)
    opt = FIRE(FrechetCellFilter(atoms, mask=[1, 1, 0, 0, 0, 1]), logfile=None)
    opt.attach(SymmetryWatch(atoms, mode="stop", stop_on=("lattice-gained",)))
    with pytest.raises(SymmetryCollapse) as exc:
        opt.run(fmax=1e-4, steps=100)
    v = exc.value.record["summary"]["verdict"]
    at = v["structure"]["at"]["0.01"]
    ds = spglib.get_symmetry_layerdataset(
        (atoms.cell[:], atoms.get_scaled_positions(), atoms.numbers), aperiodic_dir=2,
        symprec=0.01)
    assert at["final"][0] == ds.number == 80 and at["initial"][0] == 6    # p112/m -> p6/mmm
    assert at["direction"] == "kept" and at["pending"] == "not yet held for 10 steps"
    assert "at symprec 0.01 Å: group p112/m (6) -> p6/mmm (80) (not yet held for 10 steps)" \
        in v["text"]
    assert "group kept p112/m" not in v["text"]


def test_watch_stop_mode_finish_warns_a_flag_that_held_only_at_the_end(tmp_path):
    """A change that never held rules.persistence.steps steps while the run went on stops nothing;
    at finish() (the run has ended) it holds and is warned, not raised out of the caller's code."""
    atoms, opt, watch, traj = relax(tmp_path, {"mode": "stop", "stop_on": ["lattice-gained"],
                                               "config": {"rules": {"persistence": {"steps": 10**5}}}},
                                    pass_opt=True)
    opt.run(fmax=1e-4, steps=200)                                   # never stopped
    assert not watch.fired
    with pytest.warns(SymmetryDriftWarning, match="after the run ended: no stop"):
        rec = watch.finish()
    assert [f["code"] for f in rec["live"]["fired"]] == ["lattice-gained"]


def test_watch_irun_break_alternative_and_interval(tmp_path):
    atoms, opt, watch, traj = relax(tmp_path, {"mode": "record", "config": {
        "rules": {"persistence": {"steps": 1}}}}, interval=2, pass_opt=True)
    for converged in opt.irun(fmax=1e-4, steps=200):
        if watch.fired:
            break
    assert watch.fired and not converged
    steps = [f["step"] for f in watch.record["frames"]]
    assert steps == list(range(0, steps[-1] + 1, 2))          # ASE: calls at nsteps % 2 == 0
    assert opt.nsteps == steps[-1]                            # stopped right after the firing call


def test_watch_lazy_skips_newest_spectrum_until_finish(tmp_path):
    out = tmp_path / "lazy.json"
    atoms, opt, watch, traj = relax(tmp_path, {"mode": "record", "output": out, "lazy": True})
    opt.run(fmax=1e-4, steps=200)
    n = watch.record["run"]["n_frames"]
    assert watch.record["live"]["observer"]["complete"] is False
    assert "symmetry" not in watch.record["frames"][-1]          # lagging by the newest spectrum
    v = watch.record["summary"]["verdict"]                          # and it says how far
    asked = [f["step"] for f in watch.record["frames"] if f.get("structure")]
    assert asked[-1] < watch.record["frames"][-1]["step"] and v["groups_as_of_step"] == asked[-1]
    assert f"(spglib's groups as of step {asked[-1]}, the newest it was asked about" in v["text"]
    assert watch.fired and watch.fired[0]["code"] == "lattice-gained"  # invariant-only flags fire
    rec = watch.finish()
    assert rec["run"]["n_frames"] == n and "symmetry" in rec["frames"][-1]
    assert same(records.read_json(out), analyze(traj, QUICK))


def test_end_markers_of_genuine_outputs(tmp_path):
    from driftwatch.live import _end_marker
    # genuine VASP OUTCAR shipped with ASE (ase/test/testdata/vasp): the timing block ends it
    import ase
    outcar = Path(ase.__file__).parent / "test" / "testdata" / "vasp" / "OUTCAR_example_1"
    assert _end_marker(outcar, "vasp-out") == "General timing and accounting"
    cut = tmp_path / "OUTCAR"
    text = outcar.read_text()
    cut.write_text(text[:text.index("General timing")])
    assert _end_marker(cut, "vasp-out") is None
    # genuine pw.x output (tests/data/qe): JOB DONE.
    pw = Path(__file__).parent / "data" / "qe" / "relax_atoms_to_sites" / "pw.out"
    assert _end_marker(pw, "espresso-out") == "JOB DONE."


def test_watch_takes_the_filter_and_survives_an_unanalysable_structure():
    from ase import Atoms
    from ase.calculators.emt import EMT
    from ase.filters import FrechetCellFilter
    atoms = invented_layer()
    assert SymmetryWatch(FrechetCellFilter(atoms, mask=[1, 1, 0, 0, 0, 1])).atoms is atoms
    molecule = Atoms("Cu2", positions=[[0, 0, 0], [0, 0, 2.3]], cell=[12, 12, 12], pbc=False)
    molecule.calc = EMT()
    watch = SymmetryWatch(molecule, mode="stop")
    with pytest.warns(RuntimeWarning, match="cannot analyse"):
        watch()                                               # a 0D cell: no layer, no bulk
    assert watch.error is not None and watch.record is None
    with pytest.raises(ConfigError):
        SymmetryWatch(atoms, mode="halt")
    with pytest.raises(ConfigError):
        SymmetryWatch(atoms, stop_on=["collapsed"])
    with pytest.raises(ConfigError, match="snapped is now lattice-gained"):
        SymmetryWatch(atoms, stop_on=["snapped"])


# ---------------------------------------------------------------- soft stop files
def test_stopcar_content_and_location_for_a_vasp_folder(tmp_path):
    # No VASP here: content and location only. LSTOP = .TRUE. (VASP's documented ionic-step stop,
    # from memory; custodian's WalltimeHandler writes the same tag), '#' comment line (from memory).
    info = request_stop(tmp_path, "vasp", reason="flag lattice-gained(cF) raised at ionic step 7")
    assert info["action"] == "wrote" and Path(info["path"]) == (tmp_path / "STOPCAR").resolve()
    text = (tmp_path / "STOPCAR").read_text()
    lines = text.splitlines()
    assert lines[0] == "LSTOP = .TRUE."
    assert lines[1].startswith("#") and "lattice-gained(cF)" in lines[1]
    # an existing stop file is never overwritten
    (tmp_path / "STOPCAR").write_text("LABORT = .TRUE.\n")
    again = request_stop(tmp_path, "vasp", reason="second")
    assert again["action"] == "exists" and (tmp_path / "STOPCAR").read_text() == "LABORT = .TRUE.\n"


def test_dry_run_writes_nothing(tmp_path):
    (tmp_path / "pw.in").write_text("&control\n  prefix = 'L7'\n  outdir = './tmp'\n/\n")
    before = sorted(p.name for p in tmp_path.rglob("*"))
    for code in ("vasp", "espresso"):
        info = request_stop(tmp_path, code, reason="would stop", dry_run=True)
        assert info["action"] == "dry-run" and "would stop" in info["text"]
    assert info["path"] == str((tmp_path / "tmp" / "L7.EXIT").resolve())
    assert sorted(p.name for p in tmp_path.rglob("*")) == before


def test_qe_exit_file_settings_and_refusals(tmp_path):
    # defaults of pw.x's &CONTROL (INPUT_PW, from memory): prefix 'pwscf', outdir './'
    assert qe_stop_settings(tmp_path)["prefix"] == "pwscf"
    assert qe_stop_settings(tmp_path)["outdir"] == "./"
    (tmp_path / "relax.in").write_text("&CONTROL\n  calculation='vc-relax'\n  Prefix = \"X9\"\n"
                                       "  outdir = '/elsewhere/scratch'\n/\n&system\n/\n")
    s = qe_stop_settings(tmp_path)
    assert (s["prefix"], s["outdir"], s["from"]) == ("X9", "/elsewhere/scratch", "relax.in")
    with pytest.raises(OutputError, match="outside the run folder"):
        request_stop(tmp_path, "espresso", reason="x")
    info = request_stop(tmp_path, "qe", reason="collapsed", outdir=".")
    assert Path(info["path"]) == (tmp_path / "X9.EXIT").resolve()
    assert (tmp_path / "X9.EXIT").read_text() == "driftwatch soft stop: collapsed\n"
    with pytest.raises(OutputError, match="outside"):
        request_stop(tmp_path, "espresso", reason="x", prefix="p", outdir="../")
    with pytest.raises(ConfigError):
        request_stop(tmp_path, "castep", reason="x")


def test_follow_finished_output_and_check_run(tmp_path):
    # a real pw.x output shipped with the tests (tests/data/qe): the follower reads it to its
    # JOB DONE marker at once and gives the same record as analyze()
    src = Path(__file__).parent / "data" / "qe" / "bulk_tetragonal_to_cubic"
    shutil.copytree(src, tmp_path / "run")
    buf = io.StringIO()
    rec = follow(tmp_path / "run" / "pw.out", stream=buf, poll=0.05, idle=5,
                 output=tmp_path / "rec.json", stop_on=["lattice-gained"])
    assert rec["live"]["ended"] == "end marker: JOB DONE."
    assert rec["live"]["stop"] is None                     # never a stop file for a finished job
    assert not list((tmp_path / "run").rglob("*.EXIT"))
    ref = analyze(tmp_path / "run" / "pw.out")
    assert same(rec, ref)
    assert same(records.read_json(tmp_path / "rec.json"), ref)
    lines = buf.getvalue().splitlines()
    assert sum(line.startswith("step") for line in lines) == ref["run"]["n_frames"]
    ok, rec2 = check_run(tmp_path / "run", reject_on=("lattice-gained",))
    assert ok is (not any(f["code"] == "lattice-gained" for f in ref["flags"]))
    assert check_run(tmp_path / "run", reject_on=())[0] is True


def test_follow_prints_the_readers_warnings_once_but_not_the_cut_of_a_running_file(tmp_path):
    """aiida-vasp's genuine VASP 6.2.0 vasprun.xml (tests/data/public/vasp620_nelm: steps 0 and 3
    of 5 ran NELM = 15 electronic steps, as pymatgen counts them), written in two parts while
    driftwatch follows it: each new text of the NELM warning is printed once, as the steps come;
    the running file's cut, which every read of it sees, is not printed."""
    import gzip
    import threading
    raw = gzip.decompress((Path(__file__).parent / "data" / "public" / "vasp620_nelm" /
                           "vasprun.xml.gz").read_bytes())
    at = -1
    for _ in range(3):
        at = raw.find(b"<calculation>", at + 1)
    path = tmp_path / "vasprun.xml"
    path.write_bytes(raw[:at + 200])                          # steps 0 and 1 complete

    buf = io.StringIO()

    def grow():                                   # once the first part has been read and said
        end = time.monotonic() + 60
        while "NELM" not in buf.getvalue() and time.monotonic() < end:
            time.sleep(0.05)
        with open(path, "ab") as fh:
            fh.write(raw[at + 200:])
    writer = threading.Thread(target=grow)
    writer.start()
    try:
        rec = follow(path, stream=buf, poll=0.1, idle=30)
    finally:
        writer.join()
    assert rec["live"]["ended"].startswith("end marker") and rec["run"]["n_frames"] == 5
    lines = buf.getvalue().splitlines()
    said = [ln.split("NELM = 15 steps without converging in ", 1)[1].split(":")[0]
            for ln in lines if ln.startswith("  warning:") and "NELM" in ln]
    assert said == ["1 ionic step(s) (0; VASP's own count 1)",
                    "2 ionic step(s) (0, 3; VASP's own count 1, 4)"], lines    # OUTCAR: 1 and 4
    assert not [ln for ln in lines if "truncated" in ln]


def test_follow_gives_up_without_steps_and_refuses_stop_for_traj(tmp_path):
    with pytest.raises(InputError, match="no completed ionic step"):
        follow(tmp_path / "missing.out", idle=0.3, poll=0.1, quiet=True)
    from ase.io import write
    write(tmp_path / "x.traj", invented_layer())
    with pytest.raises(InputError, match="cannot soft-stop"):
        follow(tmp_path / "x.traj", idle=0.2, poll=0.1, quiet=True, stop_on=["lattice-gained"])


def test_tracker_partial_and_rewritten_frames():
    from driftwatch.adapters import iter_frames
    p = Path(__file__).parent / "data" / "qe" / "layer_oblique_to_hex" / "pw.out"
    from driftwatch.adapters import ReadContext
    ctx = ReadContext(p)
    frames = list(iter_frames(p, context=ctx))
    t = Tracker(None, source=str(p), format="espresso-out")
    t.rounding = ctx.rounding                  # the printed precision, as the follower passes it
    for n in range(1, len(frames) + 1):
        assert t.replace(frames[:n]) == n - 1
        t.record(newest=False)
    live = t.record(newest=True)                              # judged as a run still going ...
    full = t.record(newest=True, complete=True)               # ... and as a finished one
    assert content(live) == content(analyze(p, complete=False)) | {"run": content(live)["run"]}
    assert full["timing"]["spglib_frames_computed"] == 0     # earlier spectra were reused     # earlier spectra were reused
    assert content(full) == content(analyze(p)) | {"run": content(full)["run"]}
    assert t.replace(frames[:3]) == 3 and len(t) == 3         # a restarted output drops the rest


# ---------------------------------------------------------------- real pw.x, followed live
ALUMINIUM_VC_RELAX = """&control
  calculation = 'vc-relax'
  prefix = 'al7'
  pseudo_dir = './'
  outdir = './scratch'
  disk_io = 'none'
  tprnfor = .true.
  tstress = .true.
  etot_conv_thr = 1e-06
  forc_conv_thr = 0.0001
  nstep = 40
/
&system
  ibrav = 0
  nat = 1
  ntyp = 1
  ecutwfc = 20.0
  occupations = 'smearing'
  smearing = 'mv'
  degauss = 0.02
  ecfixed = 16.0
  qcutz = 150.0
  q2sigma = 2.0
/
&electrons
  conv_thr = 1e-09
  mixing_beta = 0.5
/
&ions
  ion_dynamics = 'bfgs'
/
&cell
  cell_dynamics = 'bfgs'
  press_conv_thr = 0.05
/
ATOMIC_SPECIES
  Al 26.9815 Al.pz-vbc.UPF
CELL_PARAMETERS angstrom
  0.00 2.00 2.15
  2.00 0.00 2.15
  2.00 2.00 0.00
ATOMIC_POSITIONS crystal
  Al 0.0 0.0 0.0
K_POINTS automatic
  12 12 12 0 0 0
"""
# An invented body-centred tetragonal Al cell (c/a of the face-centred setting 1.075) that pw.x
# relaxes toward the cubic cell (about 12 ionic steps, ~1 s each here).

needs_pwx = pytest.mark.skipif(shutil.which("pw.x") is None, reason="pw.x not on PATH")


def start_pwx(folder: Path) -> subprocess.Popen:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "pw.in").write_text(ALUMINIUM_VC_RELAX)
    shutil.copy(PSEUDO, folder / PSEUDO.name)
    env = dict(os.environ, OMP_NUM_THREADS="1")
    out = open(folder / "pw.out", "w")
    p = subprocess.Popen(["pw.x", "-in", "pw.in"], cwd=folder, stdout=out,
                         stderr=subprocess.STDOUT, env=env)
    out.close()
    return p


@pytest.fixture(scope="module")
def unstopped(tmp_path_factory):
    folder = tmp_path_factory.mktemp("pwx") / "run"
    p = start_pwx(folder)
    buf = io.StringIO()
    t0 = time.monotonic()
    try:
        rec = follow(folder, stream=buf, poll=0.2, idle=60, output=folder / "live.json")
        rc = p.wait(timeout=120)
    finally:
        if p.poll() is None:
            p.kill()
    return {"folder": folder, "record": rec, "rc": rc, "stdout": buf.getvalue(),
            "seconds": time.monotonic() - t0}


@pytest.mark.pwx
@needs_pwx
def test_follow_real_pwx_vc_relax_live(unstopped):
    rec, folder = unstopped["record"], unstopped["folder"]
    assert unstopped["rc"] == 0
    assert rec["live"]["ended"] == "end marker: JOB DONE."
    full = read_run(folder / "pw.out")                     # the whole output, read afterwards
    assert rec["run"]["n_frames"] == len(full.cells) >= 5
    assert same(rec, analyze(folder / "pw.out"))
    assert same(records.read_json(folder / "live.json"), rec)
    steps = [ln for ln in unstopped["stdout"].splitlines() if ln.startswith("step")]
    assert len(steps) == len(full.cells)
    # pw.x relaxes the tetragonal cell toward the cubic one (Al is fcc: handbook fact)
    d = [f["deformation"]["cF"] for f in rec["frames"]]
    assert d[-1] < 0.2 * d[0]


@pytest.mark.pwx
@needs_pwx
def test_soft_stop_makes_real_pwx_stop_early_and_cleanly(tmp_path, unstopped):
    folder = tmp_path / "run"
    p = start_pwx(folder)
    buf = io.StringIO()
    try:
        # 'lattice-nearing' is raised after a few steps, when the deformation to cF has halved
        # and stayed so for 2 steps (the persistence of a change while the job runs: 2 here)
        rec = follow(folder / "pw.out", stream=buf, poll=0.1, idle=60, stop_on=["lattice-nearing"],
                     config={"rules": {"persistence": {"steps": 2}}})
        rc = p.wait(timeout=120)
    finally:
        if p.poll() is None:
            p.kill()
    stop = rec["live"]["stop"]
    assert stop["action"] == "wrote" and stop["code"] == "espresso"
    # the .EXIT file goes in the run's outdir, named after its prefix (from pw.in)
    assert Path(stop["path"]) == (folder / "scratch" / "al7.EXIT").resolve()
    assert "lattice-nearing" in stop["text"]
    text = (folder / "pw.out").read_text()
    # pw.x 6.7 behaviour (measured): it stops by itself, says why, finishes cleanly, exits 2,
    # and deletes the .EXIT file it acted on
    assert "Program stopped by user request" in text
    tail = text.rstrip().splitlines()
    assert "JOB DONE." in tail[-3] and tail[-1] == "STOP 2"   # gfortran's STOP 2 (stderr merged)
    assert rc == 2
    assert not Path(stop["path"]).exists() and stop["left_by_code"] is False
    assert rec["live"]["ended"] == "end marker: JOB DONE."
    assert rec["run"]["n_frames"] == len(read_run(folder / "pw.out").cells)
    assert rec["run"]["n_frames"] < unstopped["record"]["run"]["n_frames"]
    assert "soft stop requested" in buf.getvalue()


@pytest.mark.pwx
@needs_pwx
def test_follow_dry_run_on_real_pwx_writes_nothing(tmp_path, unstopped):
    # re-follow the finished unstopped run as if live, from a copy: dry run never writes
    src = unstopped["folder"]
    folder = tmp_path / "copy"
    folder.mkdir()
    shutil.copy(src / "pw.in", folder)
    text = (src / "pw.out").read_text()
    cut = text.index("     PWSCF        :")       # as if still running (before its closing timing)
    (folder / "pw.out").write_text(text[:cut].rsplit("\n", 1)[0] + "\n")
    buf = io.StringIO()
    rec = follow(folder / "pw.out", stream=buf, poll=0.05, idle=0.5, stop_on=["lattice-nearing"],
                 dry_run=True, config={"rules": {"persistence": {"steps": 2}}})
    assert rec["live"]["stop"]["action"] == "dry-run"
    assert rec["live"]["ended"].startswith("idle")
    assert sorted(p.name for p in folder.rglob("*")) == ["pw.in", "pw.out"]
    assert "dry run: would write" in buf.getvalue()


@pytest.mark.pwx
@needs_pwx
def test_follow_ends_at_pwx_error_banner(tmp_path):
    # a real pw.x failure (missing pseudopotential): pw.x prints its error banner and
    # "stopping ..." (measured with QE 6.7); the follower ends at once instead of waiting
    folder = tmp_path / "bad"
    folder.mkdir()
    (folder / "pw.in").write_text(ALUMINIUM_VC_RELAX.replace("Al.pz-vbc.UPF", "Missing.UPF"))
    with open(folder / "pw.out", "w") as out:
        subprocess.run(["pw.x", "-in", "pw.in"], cwd=folder, stdout=out, stderr=subprocess.STDOUT,
                       env=dict(os.environ, OMP_NUM_THREADS="1"), timeout=60)
    t0 = time.monotonic()
    with pytest.raises(InputError, match="pw.x error banner"):
        follow(folder / "pw.out", idle=30, poll=0.05, quiet=True)
    assert time.monotonic() - t0 < 10


@pytest.mark.parametrize("output", [False, True])
def test_watch_record_mode_asks_spglib_only_where_the_lattice_moved(tmp_path, monkeypatch, output):
    # A real EMT relaxation (the invented layer): in record mode each call computes the new
    # frame's lattice invariants and the flags; spglib is asked on the first frame and where the
    # lattice moved (the frames track.select_frames picks), never at every step, and finish()
    # completes the record (which then equals analyze of the trajectory, as tested above). With
    # an output file the record is built (and written) at every step; without one, and only
    # lattice codes watched, a step asks spglib nothing and the record is built when read.
    from driftwatch import symmetry, track
    calls = []
    orig = symmetry._dataset_uncached
    monkeypatch.setattr(symmetry, "_dataset_uncached", lambda *a: calls.append(1) or orig(*a))
    symmetry.clear_cache()
    kw = {"output": tmp_path / "live.json"} if output else {}
    atoms, opt, watch, traj = relax(tmp_path, {"mode": "record", "stop_on": (), **kw})
    seen = []
    opt.attach(lambda: seen.append(len(calls)), interval=1)      # runs after the watch
    opt.run(fmax=1e-4, steps=200)
    per_call = np.diff([0] + seen)
    rec = watch.record
    seeds = track.select_frames({t: [f["deformation"][t] for f in rec["frames"]]
                                 for t in rec["frames"][0]["deformation"]},
                                rec["config"]["selection"])
    asked = int((per_call > 0).sum())
    assert len(per_call) == rec["run"]["n_frames"] > 10
    if output:
        assert 1 <= asked <= len(seeds) < len(per_call)
    else:
        assert asked == 0 and 0 < len(calls) <= 2 * len(seeds) * len(track.structure_symprecs(
            rec["config"]))                                       # reading the record asked
    assert not any(f.get("symmetry") for f in rec["frames"])     # no spectra until asked
    before = len(calls)
    full = watch.finish()
    assert len(calls) > before and full["frames"][-1].get("symmetry")
    assert same(full, analyze(traj, QUICK))


def relax_bulk(tmp_path, watch_kw):
    """A real EMT relaxation of an invented bulk cell: 4 Cu atoms of an fcc cell (3.6 Å) sheared
    by up to 2 %, rattled, cell free; EMT takes it back toward cubic."""
    from ase.build import bulk
    from ase.calculators.emt import EMT
    from ase.filters import FrechetCellFilter
    from ase.optimize import BFGS
    atoms = bulk("Cu", "fcc", a=3.6, cubic=True)
    atoms.rattle(0.02, seed=5)
    shear = np.eye(3) + np.random.default_rng(5).uniform(-0.02, 0.02, (3, 3))
    atoms.set_cell(atoms.cell.array @ shear, scale_atoms=True)
    atoms.calc = EMT()
    opt = BFGS(FrechetCellFilter(atoms), trajectory=str(tmp_path / "relax.traj"), logfile=None)
    watch = SymmetryWatch(atoms, **({"config": QUICK} | watch_kw))
    opt.attach(watch, interval=1)
    return atoms, opt, watch, tmp_path / "relax.traj"


@pytest.mark.parametrize("cell", ["layer", "bulk"])
def test_lattice_steps_fire_as_the_full_record_does(tmp_path, cell):
    # Only lattice codes watched and no output: a step checks the lattice flags alone (a bulk
    # frame gets only its deformation) and the record is built when read. The flags fired, the
    # step each fired at, the record read mid-run and the finished record equal those of a watch
    # building the full record each step (output written each step).
    got = {}
    for name, kw in (("lattice", {}), ("full", {"output": tmp_path / "full.json"})):
        (tmp_path / name).mkdir()
        atoms, opt, watch, traj = (relax if cell == "layer" else relax_bulk)(
            tmp_path / name, {"mode": "record", "stop_on": ("lattice",), **kw})
        fired, middle = [], []
        opt.attach(lambda: fired.append(len(watch.fired)), interval=1)
        opt.attach(lambda: middle.append(watch.record) if len(fired) == 12 else None, interval=1)
        opt.run(fmax=1e-4, steps=200)
        assert watch._lattice_steps is (name == "lattice")
        got[name] = fired, [dict(f) for f in watch.fired], middle[0], watch.finish()
    (f1, fl1, mid1, end1), (f2, fl2, mid2, end2) = got["lattice"], got["full"]
    assert f1 == f2 and fl1 == fl2 and fl1                        # the same flags, same steps
    assert same(mid1, mid2) and same(end1, end2)


def test_follow_says_when_a_stop_condition_held_only_once_the_job_ended(tmp_path):
    """A real pw.x output (tests/data/qe/bulk_tetragonal_to_cubic: the lattice reaches cF at step 6
    of 9) written while it is followed: its last 3 steps are fewer than the 10 a change must hold
    while the job runs, so no stop is asked for; once the job's end counts the flag holds, and the
    follower says so instead of ending silently."""
    import threading
    src = Path(__file__).parent / "data" / "qe" / "bulk_tetragonal_to_cubic"
    ref = analyze(src / "pw.out")
    assert [(f["code"], f["step"]) for f in ref["flags"] if f["code"] == "lattice-gained"] == \
        [("lattice-gained", 6)] and ref["run"]["n_frames"] == 9
    (tmp_path / "run").mkdir()
    shutil.copy(src / "pw.in", tmp_path / "run")
    text = (src / "pw.out").read_text()
    cut = text.index("     PWSCF        :")
    out = tmp_path / "run" / "pw.out"
    out.write_text(text[:cut])

    def finish():
        with open(out, "a") as fh:
            fh.write(text[cut:])
    timer = threading.Timer(1.0, finish)
    timer.start()
    buf = io.StringIO()
    try:
        rec = follow(out, stream=buf, poll=0.05, idle=30, stop_on=["lattice-gained"], dry_run=True)
    finally:
        timer.join()
    assert rec["live"]["ended"].startswith("end marker") and rec["live"]["stop"] is None
    assert [f["code"] for f in rec["live"]["fired"]] == ["lattice-gained"]
    assert ("driftwatch: lattice-gained (from step 6) holds once the job's end counts, not for the "
            "10 steps a change must hold while it runs (rules.persistence.steps): no stop was "
            "requested") in buf.getvalue()


def test_a_rattled_start_is_not_stopped_on_its_first_frame(tmp_path):
    """Rattling a symmetric start is common practice. A stop on what concerns the structure
    (stop_on=("structure",)) stopped a real EMT relaxation of a rattled fixed-cell Cu32 on its
    first frame: atoms-break-lattice judged the starting structure as if it were the final one.
    While the run goes, flags that judge the final structure wait for its end; a change of group
    stops it once it held for the persistence steps (10 by default)."""
    from ase.build import bulk
    from ase.calculators.emt import EMT
    from ase.optimize import BFGS
    atoms = bulk("Cu", "fcc", a=3.6, cubic=True).repeat(2)
    atoms.rattle(0.03, seed=7)
    atoms.calc = EMT()
    opt = BFGS(atoms, logfile=None)
    opt.attach(SymmetryWatch(atoms, mode="stop", stop_on=("structure",)))
    try:
        opt.run(fmax=1e-3, steps=60)
    except SymmetryCollapse as exc:      # a group change that lasted, not the rattled start
        assert {f["code"] for f in exc.flags} <= {"group-gained", "group-lost", "group-changed"}
        assert opt.nsteps >= 10
    assert opt.nsteps > 0


def test_a_live_approach_to_a_type_counts_once_it_held():
    """lattice-nearing stopped a live pw.x layer on the first step its deformation to oc had
    halved, 14 steps before the layer reached oc (a field trial); while a run goes it counts, like
    a change, once it held for the persistence steps. The bundled L01 (a real pw.x vc-relax)
    judged as if live after each step: with a persistence of 4 steps the flag appears 3 steps
    after it appears with 1, for the same type."""
    import copy
    from driftwatch import config as _config, rules
    rec = analyze(Path(__file__).parent.parent / "example_runs" / "L01_qe_vcrelax")

    def first_seen(steps):
        cfg = _config.load(overrides={"rules.persistence.steps": steps})
        for k in range(1, len(rec["frames"]) + 1):
            part = copy.deepcopy(rec)
            part["frames"] = part["frames"][:k]
            hit = [f for f in rules.judge(part, cfg, complete=False)[0]
                   if f["code"] == "lattice-nearing"]
            if hit:
                return k - 1, hit[0]["type"]
        return None
    one, four = first_seen(1), first_seen(4)
    assert one is not None and four == (one[0] + 3, one[1])


def test_a_live_visit_counts_as_passed_through_once_the_departure_held():
    """The bundled L01 (a real pw.x vc-relax) visits oc at step 13, leaves it for steps 14-17 and
    holds oc from step 18 to its end: finished, it gained oc and passed through nothing. Judged as
    if live after each step, `passed-through` had been raised at step 14, one step after the
    departure, against the persistence of 10 steps that a change must hold while a job runs (a
    field trial: `follow --stop-on passed-through` would have stopped it there). A departure now
    counts once it held for the persistence steps, as a change does."""
    import copy
    from driftwatch import config as _config, rules
    rec = analyze(Path(__file__).parent.parent / "example_runs" / "L01_qe_vcrelax")
    assert rec["summary"]["verdict"]["lattice"]["gained"] == "oc"
    assert not [f for f in rec["flags"] if f["code"] == "passed-through"]

    def passed_at(steps):
        cfg = _config.load(overrides={"rules.persistence.steps": steps})
        out = []
        for k in range(1, len(rec["frames"]) + 1):
            part = copy.deepcopy(rec)
            part["frames"] = part["frames"][:k]
            flags = rules.judge(part, cfg, complete=False)[0]
            if any(f["code"] == "passed-through" for f in flags):
                out.append(k - 1)
        return out
    assert passed_at(10) == []              # the 4 steps away never held for 10
    assert passed_at(4) == [17]             # held for 4 at step 17, gone once oc is back at 18
    assert passed_at(1) == [14, 15, 16, 17]


def _follow_killed_l01(tmp_path, outdir=None):
    """(run folder, record, what follow said) of the bundled L01 (real pw.x) cut before its end,
    as a killed job leaves it, followed with --stop-on lattice-gained until --idle; ``outdir``:
    the pw.x input's outdir written in its place."""
    run = tmp_path / "run"
    run.mkdir()
    src = Path(__file__).parents[1] / "example_runs" / "L01_qe_vcrelax"
    pw_in = (src / "pw.in").read_text()
    (run / "pw.in").write_text(pw_in if outdir is None else pw_in.replace("'./scratch'", outdir))
    text = (src / "pw.out").read_text()
    cut = [i for i in range(len(text)) if text.startswith("ATOMIC_POSITIONS", i)][-2]
    (run / "pw.out").write_text(text[:cut])
    buf = io.StringIO()
    rec = follow(run / "pw.out", stream=buf, poll=0.05, idle=0.5, stop_on=["lattice-gained"],
                 config={"rules": {"persistence": {"steps": 3}}})
    return run, rec, buf.getvalue()


def test_follow_goes_on_when_the_stop_file_cannot_be_written(tmp_path):
    """A stop asked where driftwatch will not write (the pw.x input's outdir lies outside the run
    folder): follow says so in one line and keeps watching the job to its end, instead of ending
    with exit 1 and leaving the job unwatched. The bundled L01 (real pw.x) cut before its end."""
    run, rec, said = _follow_killed_l01(tmp_path, "'/elsewhere/scratch'")
    assert "driftwatch: cannot request a soft stop: " in said and "outside the run folder" in said
    assert "following on (the job keeps running: stop it yourself)" in said
    assert rec["live"]["ended"].startswith("idle") and rec["live"]["stop"]["action"] == "failed"
    assert not list(run.rglob("*.EXIT"))


def test_follow_says_a_stop_file_no_job_acted_on_is_still_there(tmp_path):
    """A killed job (the bundled L01, real pw.x, cut before its end as kill -9 leaves it) followed
    with --stop-on: the stop file is written, the job never acts on it, and following ends on
    --idle. The file stays (the job may only be slow), and the last words say it is there and
    what it does to the next run in the folder: pw.x started beside it stops at once (pw.x's
    'Program stopped by user request' before any step, as in tests/data/qe_trials/
    si2_exit_at_start). It had been left unsaid."""
    _, rec, said = _follow_killed_l01(tmp_path)
    stop = rec["live"]["stop"]
    assert rec["live"]["ended"].startswith("idle") and stop["action"] == "wrote"
    assert Path(stop["path"]).is_file()
    assert f"driftwatch: the stop file {stop['path']} is still there, not yet acted on" in said
    assert "the next run started in this folder stops at once" in said


def test_a_change_counts_as_held_only_where_spglib_saw_it_hold(tmp_path):
    """A real pw.x relax (tests/data/qe_trials/si2_layer_relax_stopped) whose layer group at 1e-3 Å
    is c2/m11 at step 2, p-1 at step 3 and c2/m11 at step 4 (spglib's layer dataset): read as a run
    still going with its steps 0-4 (a poll that brought steps 3 and 4 together), the gain has not
    held 3 steps, so no stop may be asked; step 3 was asked."""
    import gzip

    import spglib
    from driftwatch import config as dwconfig
    from driftwatch.track import record_from_run
    text = gzip.decompress((Path(__file__).parent / "data" / "qe_trials" /
                            "si2_layer_relax_stopped" / "pw.out.gz").read_bytes()).decode()
    live = tmp_path / "pw.out"
    live.write_text(text[:text.index("Program stopped by user request")])   # no end yet
    run = read_run(live)
    assert run.steps.tolist() == [0, 1, 2, 3, 4]

    def layer_group(i):
        c = run.cells[i].copy()
        c[2] = np.cross(c[0], c[1]) / np.linalg.norm(np.cross(c[0], c[1])) * np.linalg.norm(c[2])
        frac = np.linalg.solve(c.T, run.positions[i].T).T
        return spglib.get_symmetry_layerdataset((c, frac, run.numbers), aperiodic_dir=2,
                                                symprec=1e-3).number
    assert [layer_group(i) for i in (2, 3, 4)] == [18, 2, 18]                     # spglib
    cfg = dwconfig.load(None, {"rules.persistence.steps": 3})
    rec = record_from_run(run, cfg, complete=False)
    sv = rec["summary"]["verdict"]["structure"]
    assert sv["direction"] == "kept" and "not yet held for 3 steps" in (sv.get("relation") or "")
    assert 1e-3 in rec["frames"][3]["structure"]["symprec"]
    assert not [f for f in rec["flags"] if f["code"] == "group-gained"]


def test_following_a_finished_run_folder_never_asks_it_to_stop(tmp_path):
    """A real pw.x folder whose job ended (JOB DONE.) and gained a lattice type: followed as a
    folder with --stop-on lattice-gained and a one-step persistence, no stop file is written (a
    stop file left for a finished job stops its restart at once); given the folder, the end was
    looked for only after the stop had been asked."""
    src = Path(__file__).parent / "data" / "qe" / "bulk_tetragonal_to_cubic"
    shutil.copytree(src, tmp_path / "run")
    ref = analyze(tmp_path / "run")
    assert any(f["code"] == "lattice-gained" for f in ref["flags"])
    buf = io.StringIO()
    rec = follow(tmp_path / "run", stream=buf, poll=0.05, idle=5, stop_on=["lattice-gained"],
                 config={"rules": {"persistence": {"steps": 1}}})
    assert rec["live"]["ended"] == "end marker: JOB DONE." and rec["live"]["stop"] is None
    assert not list(tmp_path.rglob("*.EXIT")) and "soft stop requested" not in buf.getvalue()


def test_follow_sees_the_files_of_a_dump_written_one_file_per_frame_as_they_appear(tmp_path):
    """A real LAMMPS minimisation's dump written one file per frame (tests/data/lammps_trials,
    27 files) replayed into a folder file by file while follow watches the folder: it reads every
    frame as its file appears and ends on the log's "Total wall time" (it had watched the first
    file alone for growth and waited out --idle)."""
    import threading
    src = Path(__file__).parent / "data" / "lammps_trials" / "si8_dump_per_frame"
    files = sorted(src.glob("relax.*.lammpstrj"), key=lambda p: int(p.name.split(".")[1]))
    run = tmp_path / "run"
    run.mkdir()
    shutil.copy(src / "in.relax", run / "in.relax")
    for f in files[:3]:
        shutil.copy(f, run / f.name)

    def writer():
        for f in files[3:]:
            time.sleep(0.05)
            shutil.copy(f, run / f.name)
        time.sleep(0.3)
        shutil.copy(src / "log.lammps", run / "log.lammps")

    t = threading.Thread(target=writer)
    t.start()
    buf = io.StringIO()
    try:
        rec = follow(run, stream=buf, poll=0.05, idle=20)
    finally:
        t.join()
    assert rec["live"]["ended"] == "end marker: log.lammps: Total wall time"
    assert rec["run"]["n_frames"] == 27 and rec["frames"][-1]["step"] == 78
    # each frame printed once, although the log (the energies) came after the dumps
    assert sum(line.startswith("step") for line in buf.getvalue().splitlines()) == 27
    assert "rewritten" not in buf.getvalue()
    thermo = {int(r[0]): float(r[2]) + float(r[3]) for r in (
        ln.split() for ln in (src / "log.lammps").read_text().splitlines())
        if len(r) == 7 and r[0].isdigit()}              # Step Temp E_pair E_mol TotEng Press Volume
    assert [f["energy"] for f in rec["frames"]] == pytest.approx(
        [thermo[f["step"]] for f in rec["frames"]], rel=1e-9)


def test_follow_says_once_when_a_job_has_gone_quiet(tmp_path):
    """A real pw.x output cut mid-run (a killed job: no end marker, no growth): follow says once,
    half-way through --idle, that nothing has grown, and ends at --idle."""
    src = Path(__file__).parents[1] / "example_runs" / "L01_qe_vcrelax"
    run = tmp_path / "run"
    run.mkdir()
    text = (src / "pw.out").read_text()
    cut = [i for i in range(len(text)) if text.startswith("ATOMIC_POSITIONS", i)][-2]
    (run / "pw.out").write_text(text[:cut])
    buf = io.StringIO()
    t0 = time.monotonic()
    rec = follow(run / "pw.out", stream=buf, poll=0.2, idle=20)
    assert 20 <= time.monotonic() - t0 < 40 and rec["live"]["ended"] == "idle: no growth for 20 s"
    said = [ln for ln in buf.getvalue().splitlines() if "no growth for" in ln]
    assert len(said) == 2 and said[0].startswith("driftwatch: no growth for 1")   # 10-19 s
    assert "(the job may have been killed); following ends after 20 s without growth" in said[0]


def test_follow_gives_spglib_the_codes_species_labels(tmp_path):
    """A real antiferromagnetic pw.x relaxation (tests/data/qe_trials/fe2_afm_relax: bcc Fe as
    species Fe1 and Fe2 of opposite starting magnetisation; pw.x finds "8 Sym. Ops. (no
    inversion)"): followed, the groups are the labelled structure's, as in analyze(). spglib with
    Fe1 and Fe2 told apart gives P4mm (99, 8 operations) for the last frame at 1e-3 Å; taken as
    one element it gives P4/nmm (16), which follow had reported, with a held-by-code message that
    the code held 8 of 16."""
    import gzip

    import spglib
    from ase.io import read as ase_read
    src = Path(__file__).parent / "data" / "qe_trials" / "fe2_afm_relax"
    text = gzip.open(src / "pw.out.gz", "rt").read()
    assert "8 Sym. Ops. (no inversion) found" in text and "JOB DONE." in text
    shutil.copytree(src, tmp_path / "run")
    rec = follow(tmp_path / "run", stream=io.StringIO(), poll=0.05, idle=5)
    ref = analyze(tmp_path / "run")
    assert same(rec, ref)
    assert rec["run"]["species"] == ["Fe1", "Fe2"]
    last = ase_read(io.StringIO(text), index=-1, format="espresso-out")          # ASE
    cell = (last.cell[:], last.get_scaled_positions(), [1, 2])
    ds = spglib.get_symmetry_dataset(cell, symprec=1e-3)
    assert (ds.number, len(ds.rotations)) == (99, 8)
    final = rec["summary"]["verdict"]["structure"]["final"]
    assert (final["group"], final["operations"]) == (99, 8)
    assert not any("of which the code held" in f["message"] for f in rec["flags"])


def test_follow_does_not_end_on_a_half_written_closing_line(tmp_path):
    """A real pw.x output (tests/data/qe/bulk_tetragonal_to_cubic) whose job's write stops inside
    its closing timing line ("     PWSCF        :     0.94s CPU" without the rest of the line):
    the follower waits for the whole line, so the record of the finished job is not "cut short"
    (it had ended there and recorded the job as killed, while the reader of the complete file
    says it finished)."""
    import threading
    src = Path(__file__).parent / "data" / "qe" / "bulk_tetragonal_to_cubic"
    text = (src / "pw.out").read_text()
    cut = text.index("CPU", text.index("     PWSCF        :")) + len("CPU ")
    (tmp_path / "run").mkdir()
    out = tmp_path / "run" / "pw.out"
    out.write_text(text[:cut])
    assert "\n" not in text[text.rfind("\n", 0, cut):cut][1:]          # cut inside the line

    def finish():
        with open(out, "a") as fh:
            fh.write(text[cut:])
    timer = threading.Timer(1.5, finish)
    timer.start()
    try:
        rec = follow(out, stream=io.StringIO(), poll=0.05, idle=30)
    finally:
        timer.join()
    assert rec["live"]["ended"] == "end marker: JOB DONE." or \
        rec["live"]["ended"] == "end marker: pw.x's closing timing"
    assert rec["run"]["unfinished"] is None and same(rec, analyze(out))


def test_follow_says_an_ended_job_did_not_finish(tmp_path):
    """A real pw.x relaxation stopped by max_seconds ends with JOB DONE (qe_trials); follow's
    closing line says the job ended and that it is unfinished, as the audit's * does (it had led
    with "end marker: JOB DONE." alone)."""
    src = Path(__file__).parent / "data" / "qe_trials" / "fe2_afm_relax_max_seconds"
    shutil.copytree(src, tmp_path / "run")
    buf = io.StringIO()
    rec = follow(tmp_path / "run", stream=buf, poll=0.05, idle=5)
    last = buf.getvalue().strip().splitlines()[-2]
    assert last.startswith("driftwatch: end marker: JOB DONE.; 5 completed steps (unfinished: "
                           "stopped at its time limit (pw.x: 'Maximum CPU time exceeded': "
                           "max_seconds)); ")
    assert rec["run"]["unfinished"].startswith("stopped at its time limit")


def test_the_observer_refuses_an_unwritable_record_at_once_and_never_stops_a_relaxation(tmp_path):
    """A record file in a folder that does not exist is refused when the watch is made, before
    any step is computed; a record that cannot be written mid-run (here a folder appeared where
    the file goes: the write fails as on a full disk) is warned once and tried again at each
    step, and the relaxation runs to its end (it had raised from inside the optimizer: a DFT
    relaxation would have stopped hours in for the monitor's own file)."""
    from ase.optimize import BFGS
    with pytest.raises(OutputError, match="its folder does not exist"):
        SymmetryWatch(invented_layer(), output=tmp_path / "nowhere" / "rec.json")
    atoms = invented_layer()
    out = tmp_path / "rec.json"
    watch = SymmetryWatch(atoms, output=out)
    out.mkdir()                                  # every write fails from here on
    from ase.filters import FrechetCellFilter
    opt = BFGS(FrechetCellFilter(atoms, mask=[1, 1, 0, 0, 0, 1]), logfile=None)
    opt.attach(watch)
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        opt.run(fmax=1e-4, steps=5)
    said = [w for w in seen if "the relaxation goes on" in str(w.message)]
    assert len(said) == 1 and issubclass(said[0].category, RuntimeWarning)
    assert watch.record["run"]["n_frames"] == 6 and out.is_dir()


def _append(path, text):
    """Append ``text`` and close the file, as a job's write ends (its last bytes flushed)."""
    with open(path, "a") as fh:
        fh.write(text)


def _write_later(delay, fn):
    import threading
    timer = threading.Timer(delay, fn)
    timer.start()
    return timer


def test_follow_does_not_end_on_the_job_done_of_the_run_before_an_appended_restart(tmp_path):
    """A real pw.x output with a restart appended to it (tests/data/qe/restart_appended, pw.x's
    own 'JOB DONE.' then a second 'Program PWSCF ... starts'): followed while the restart has
    written only its header, the follower had ended at once on the first run's JOB DONE, still in
    the file's tail, and recorded 3 of its steps as the finished job."""
    import gzip
    text = gzip.decompress((Path(__file__).parent / "data" / "qe" / "restart_appended" /
                            "pw.out.gz").read_bytes()).decode()
    second = text.index("Program PWSCF", text.index("JOB DONE."))
    cut = text.index("\n", second + 2000) + 1          # the restart's header, a few lines of it
    assert "JOB DONE." in text[:cut][-8192:] and "!    total energy" not in text[second:cut]
    out = tmp_path / "run" / "pw.out"
    out.parent.mkdir()
    out.write_text(text[:cut])
    timer = _write_later(1.5, lambda: _append(out, text[cut:]))
    try:
        rec = follow(out, stream=io.StringIO(), poll=0.05, idle=30)
    finally:
        timer.join()
    assert rec["live"]["ended"] == "end marker: JOB DONE."
    assert rec["run"]["n_frames"] == len(read_run(out)) == 24 and same(rec, analyze(out))
    assert [st["name"] for st in rec["run"]["stages"]] == ["run1", "run2"]      # as inspect says


def test_follow_goes_on_with_the_output_a_job_compresses_at_its_end(tmp_path):
    """A job script that gzips pw.x's output when pw.x ends (pw.x ... > pw.out; gzip pw.out):
    the followed file goes and pw.out.gz comes. The follower follows it, says so, and ends on its
    JOB DONE with every step (it had waited out --idle, said the job 'may have been killed' and
    recorded it cut short). A real pw.x output (tests/data/qe/bulk_tetragonal_to_cubic)."""
    import gzip
    text = (Path(__file__).parent / "data" / "qe" / "bulk_tetragonal_to_cubic" /
            "pw.out").read_text()
    cut = text.rindex("!    total energy")               # the last step not yet written
    out = tmp_path / "run" / "pw.out"
    out.parent.mkdir()
    out.write_text(text[:cut])

    def compress():
        (out.parent / "pw.out.gz").write_bytes(gzip.compress(text.encode()))
        out.unlink()
    timer = _write_later(1.5, compress)
    buf = io.StringIO()
    try:
        rec = follow(out, stream=buf, poll=0.05, idle=30)
    finally:
        timer.join()
    assert rec["live"]["ended"] == "end marker: JOB DONE." and rec["run"]["unfinished"] is None
    assert "pw.out was removed and pw.out.gz written beside it" in buf.getvalue()
    assert same(rec, analyze(out.parent / "pw.out.gz"))


def test_follow_ends_when_a_lammps_log_ends_after_the_last_dumped_frame(tmp_path):
    """A real LAMMPS minimisation (tests/data/lammps_trials/fe16_tri_linesearch) whose log prints
    'Total wall time' after the dump's last frame (its write_data comes between): the dump does
    not change again, and the follower had waited out --idle and judged the run as still going."""
    src = Path(__file__).parent / "data" / "lammps_trials" / "fe16_tri_linesearch"
    run = tmp_path / "run"
    shutil.copytree(src, run)
    log = (run / "log.lammps").read_text()
    end = log.rindex("Total wall time")
    (run / "log.lammps").write_text(log[:end])
    timer = _write_later(1.5, lambda: _append(run / "log.lammps", log[end:]))
    t0 = time.monotonic()
    try:
        rec = follow(run, stream=io.StringIO(), poll=0.05, idle=30)
    finally:
        timer.join()
    assert rec["live"]["ended"].startswith("end marker") and time.monotonic() - t0 < 20
    assert same(rec, analyze(run))


def test_follow_waits_for_the_first_step_in_plain_words(tmp_path):
    """A job that has written only its header (a real pw.x output, tests/data/qe/
    bulk_tetragonal_to_cubic, cut before its first '!' energy): follow says it waits for the first
    completed step, without the reader's nested 'truncated ... job killed or still running'."""
    text = (Path(__file__).parent / "data" / "qe" / "bulk_tetragonal_to_cubic" /
            "pw.out").read_text()
    cut = text.index("!    total energy")
    out = tmp_path / "run" / "pw.out"
    out.parent.mkdir()
    out.write_text(text[:cut])
    timer = _write_later(1.0, lambda: _append(out, text[cut:]))
    buf = io.StringIO()
    try:
        follow(out, stream=buf, poll=0.05, idle=30)
    finally:
        timer.join()
    waiting = [ln for ln in buf.getvalue().splitlines() if "waiting" in ln]
    assert waiting == [f"driftwatch: waiting for the first completed ionic step in {out}"], waiting


def test_follow_reads_a_box_flip_in_one_basis_when_it_comes_between_two_polls(tmp_path):
    """A real LAMMPS relaxation whose box LAMMPS wrote in another basis from timestep 21 (tests/
    data/lammps_trials/mg2_relax_flip_between_minimize): followed while the dump holds the frames
    up to timestep 20, then the rest. The live record, stacked poll by poll, reads the frames from
    the flip in one basis as the audit of the whole file does: the same frames, flags and summary
    (the first frame measured against the final group)."""
    src = Path(__file__).parent / "data" / "lammps_trials" / "mg2_relax_flip_between_minimize"
    run = tmp_path / "run"
    shutil.copytree(src, run)
    dump, log = (run / "relax.lammpstrj").read_text(), (run / "log.lammps").read_text()
    cut, end = dump.index("ITEM: TIMESTEP\n21\n"), log.rindex("Total wall time")
    (run / "relax.lammpstrj").write_text(dump[:cut])
    (run / "log.lammps").write_text(log[:end])           # the job goes on

    def rest():
        with open(run / "relax.lammpstrj", "a") as fh:
            fh.write(dump[cut:])
        with open(run / "log.lammps", "a") as fh:
            fh.write(log[end:])
    timer = _write_later(1.5, rest)
    try:
        rec = follow(run, stream=io.StringIO(), poll=0.05, idle=30)
    finally:
        timer.join()
    ref = analyze(run)
    assert rec["live"]["ended"].startswith("end marker") and same(rec, ref)
    assert "error" not in rec["summary"]["atoms"]["start"]
    assert any("basis jumps without the lattice changing at step 21" in w
               for w in rec["run"]["warnings"])


def test_follow_moves_from_a_start_file_to_the_trajectory_the_optimiser_writes(tmp_path):
    """A script writes start.xyz, then runs ASE's BFGS (EMT) writing relax.traj beside it, the
    folder followed as it grows (a regression review: the switch was said as a rewrite and the
    trajectory labelled extxyz; and the moment ASE opened relax.traj, before its first frame, the
    folder held two runs and follow stopped on 'ambiguous run folder'). Reference: ASE's own
    reading of the trajectory at the end."""
    import threading
    from ase.build import bulk
    from ase.calculators.emt import EMT
    from ase.filters import FrechetCellFilter
    from ase.io import read, write
    from ase.optimize import BFGS
    run = tmp_path / "job"
    run.mkdir()
    atoms = bulk("Cu", "fcc", a=3.61, cubic=True)
    atoms.rattle(0.06, seed=1)
    write(run / "start.xyz", atoms, format="extxyz")
    buf, got = io.StringIO(), {}
    watcher = threading.Thread(target=lambda: got.update(rec=follow(
        run, stream=buf, poll=0.05, idle=4.0)))
    watcher.start()
    time.sleep(1.0)                          # follow has read start.xyz
    atoms.calc = EMT()
    opt = BFGS(FrechetCellFilter(atoms), trajectory=str(run / "relax.traj"), logfile=None)
    time.sleep(0.5)                          # the trajectory is open, with no frame yet
    opt.attach(lambda: time.sleep(0.15))
    opt.run(fmax=1e-3, steps=30)
    watcher.join(60)
    said = buf.getvalue()
    assert "rewritten" not in said and "error" not in said, said
    assert re.search(rf"driftwatch: {re.escape(str(run))}'s run is now relax\.traj \(was "
                     r"start\.xyz\), (from its first step|which starts with the 1 step shown): "
                     r"following it", said), said
    assert f"driftwatch: following {run / 'relax.traj'} (traj; bulk, 3D lattice)" in said
    rec = got["rec"]
    assert rec["run"]["format"] == "traj"
    assert rec["run"]["n_frames"] == len(read(run / "relax.traj", ":"))
