"""Campaign audit: discovery, bad runs, cache, interruption, ase.db output, executors.

Everything is real: real pw.x outputs (tests/data/qe, produced by Debian's Quantum ESPRESSO through
scripts/make_runs.py), ASE trajectories written here with ase.io, real SQLite through ase.db and
ASE's own ``ase db`` command line, a real ProcessPoolExecutor and a real Dask LocalCluster.
"""

from __future__ import annotations

import csv
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import ase
import ase.db
import ase.io
import numpy as np
import pytest
from ase import Atoms

from driftwatch import records
from driftwatch.campaign import MARKER, RunSpec, _inside, _record_names, audit, discover
from driftwatch.errors import OutputError

REPO = Path(__file__).resolve().parent.parent
QE = REPO / "tests" / "data" / "qe"


# ----------------------------------------------------------------------------- helpers
def write_layer(path: Path, g0=100.0, b0=3.2, g1=120.0, b1=3.0, n=6, a=3.0):
    """A one-atom layer (16 Å cell along z, atom in the middle: a vacuum gap > 6 Å) whose in-plane
    cell moves linearly from (a, b0, gamma0) to (a, b1, gamma1). With b1 = a and gamma1 = 120 deg the
    last frame is exactly hexagonal (International Tables: hp lattice, a = b, gamma = 120 deg)."""
    frames = []
    for t in np.linspace(0.0, 1.0, n):
        g, b = np.radians(g0 + t * (g1 - g0)), b0 + t * (b1 - b0)
        cell = [[a, 0, 0], [b * np.cos(g), b * np.sin(g), 0], [0, 0, 16.0]]
        frames.append(Atoms("C", positions=[[0, 0, 8.0]], cell=cell, pbc=True))
    path.parent.mkdir(parents=True, exist_ok=True)
    ase.io.write(path, frames)
    return path


def make_campaign(root: Path, qe: bool = True, n_extra: int = 0) -> Path:
    camp = root / "camp"
    write_layer(camp / "layers" / "L-hex.traj")                          # snaps to hexagonal
    write_layer(camp / "layers" / "L-obl.traj", g1=101.0, b1=3.21)      # stays oblique
    for i in range(n_extra):
        write_layer(camp / "more" / f"M-{i:02d}.traj", g0=95.0 + i, g1=101.0 + i)
    if qe:
        for name in ("layer_oblique_to_hex", "relax_atoms_to_sites"):
            shutil.copytree(QE / name, camp / "qe" / name)
    (camp / "bad").mkdir(parents=True)
    (camp / "bad" / "empty.traj").write_bytes(b"")
    (camp / "bad" / "garbage.traj").write_bytes(b"this is not an ASE trajectory\n" * 20)
    write_layer(camp / ".hidden" / "L-secret.traj")
    (camp / "notes.txt").write_text("campaign notes, not a run\n")
    return camp


def record_bytes(out: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted((out / "records").glob("*.json"))}


def run_audit(roots, out, **kw):
    kw.setdefault("workers", 1)
    kw.setdefault("report", False)
    kw.setdefault("progress", "off")
    return audit(roots, out, **kw)


# ----------------------------------------------------------------------------- discovery
def test_discovery_counts_run_folders_once_and_skips_hidden_and_unknown(tmp_path):
    camp = make_campaign(tmp_path)
    runs, failed = discover([camp])
    ids = {r.id: r.kind for r in runs}
    # pw.x run folders are one run each; their pw.out / pw.in are not counted again
    assert ids == {"camp/bad/empty.traj": "file", "camp/bad/garbage.traj": "file",
                   "camp/layers/L-hex.traj": "file", "camp/layers/L-obl.traj": "file",
                   "camp/qe/layer_oblique_to_hex": "folder",
                   "camp/qe/relax_atoms_to_sites": "folder"}
    assert failed == []
    # an overlapping second root adds nothing (no double counting)
    runs2, _ = discover([camp, camp / "layers", camp / "layers" / "L-hex.traj"])
    assert sorted(r.id for r in runs2) == sorted(ids)
    # include / exclude are fnmatch globs on the run id and the path
    inc, _ = discover([camp], include=["*L-*"])
    assert [r.id for r in inc] == ["camp/layers/L-hex.traj", "camp/layers/L-obl.traj"]
    exc, _ = discover([camp], exclude=["*/bad/*", str(camp / "qe" / "relax*")])
    assert sorted(r.id for r in exc) == ["camp/layers/L-hex.traj", "camp/layers/L-obl.traj",
                                         "camp/qe/layer_oblique_to_hex"]


def test_vasp_run_folder_counts_once(tmp_path):
    """Genuine VASP outputs shipped with ASE (ase/test/testdata/vasp) in a run folder."""
    vasp = Path(ase.__file__).parent / "test" / "testdata" / "vasp"
    if not (vasp / "OUTCAR_example_1").is_file():
        pytest.skip("ASE's VASP test data is not installed")
    run = tmp_path / "camp" / "Si-run"
    run.mkdir(parents=True)
    shutil.copy(vasp / "OUTCAR_example_1", run / "OUTCAR")
    shutil.copy(vasp / "vasprun_pstress.xml", run / "vasprun.xml")
    write_layer(tmp_path / "camp" / "L.traj")
    runs, failed = discover([tmp_path / "camp"])
    assert [(r.id, r.kind) for r in runs] == [("camp/L.traj", "file"), ("camp/Si-run", "folder")]
    s = run_audit([tmp_path / "camp"], tmp_path / "out")
    assert s["failed"] == [] and s["runs"] == 2


def test_discovery_follows_symlinks_once_and_ends_on_loops(tmp_path):
    camp = make_campaign(tmp_path, qe=False)
    (camp / "layers" / "back").symlink_to(camp, target_is_directory=True)   # a loop
    (camp / "alias").symlink_to(camp / "layers", target_is_directory=True)  # a second path
    (camp / "L-link.traj").symlink_to(camp / "layers" / "L-hex.traj")
    runs, failed = discover([camp])
    assert failed == []
    # each run once, under its real path (links are taken after the real paths)
    assert [r.id for r in runs] == ["camp/bad/empty.traj", "camp/bad/garbage.traj",
                                    "camp/layers/L-hex.traj", "camp/layers/L-obl.traj"]
    assert len({os.path.realpath(r.path) for r in runs}) == len(runs) == 4


def _discover_as(uid, root, conn):
    os.setgid(uid)
    os.setuid(uid)
    try:
        runs, failed = discover([root])
        conn.send(([r.id for r in runs], failed))
    except BaseException as exc:  # pragma: no cover - reported to the parent
        conn.send(exc)


def test_unreadable_folder_is_a_failed_entry_not_a_crash(tmp_path):
    import multiprocessing as mp
    import tempfile
    base = Path(tempfile.mkdtemp(dir="/tmp", prefix="dw-perm-"))
    try:
        camp = make_campaign(base, qe=False)
        for p in [base, *base.rglob("*")]:
            p.chmod(0o755 if p.is_dir() else 0o644)
        locked = camp / "locked"
        write_layer(locked / "L-hidden-by-perms.traj")
        locked.chmod(0o000)
        if os.geteuid() != 0:
            runs, failed = discover([camp])
            ids = [r.id for r in runs]
        else:   # root reads everything: search as 'nobody' in a forked child (modules loaded)
            import driftwatch.adapters.espresso  # noqa: F401
            import driftwatch.adapters.vasp  # noqa: F401
            parent, child = mp.get_context("fork").Pipe()
            proc = mp.get_context("fork").Process(target=_discover_as, args=(65534, camp, child))
            proc.start()
            got = parent.recv()
            proc.join(30)
            assert not isinstance(got, BaseException), got
            ids, failed = got
        assert "camp/layers/L-hex.traj" in ids and "camp/locked/L-hidden-by-perms.traj" not in ids
        assert len(failed) == 1 and failed[0]["run"] == "camp/locked"
        assert "cannot list folder" in failed[0]["error"] and str(locked) in failed[0]["error"]
    finally:
        (base / "camp" / "locked").chmod(0o755)
        shutil.rmtree(base)


# ----------------------------------------------------------------------------- one audit
@pytest.fixture(scope="module")
def audited(tmp_path_factory):
    base = tmp_path_factory.mktemp("audit")
    camp = make_campaign(base)
    out = base / "out"
    summary = run_audit([camp], out, reject_on=["lattice-gained"], report=True)
    return camp, out, summary


def test_report_is_built_from_the_records(audited):
    _, out, s = audited
    index = Path(s["report"])
    assert index == out / "report" / "index.html" and index.is_file()
    html = index.read_text(encoding="utf-8")
    assert "garbage.traj" in html            # failed runs are shown with the campaign summary


def test_bad_runs_are_listed_and_do_not_stop_the_audit(audited):
    camp, out, s = audited
    assert s["schema"] == "driftwatch/campaign-1" and s["runs"] == 6
    assert s["analysed"] == 6 and s["cached"] == 0
    failed = {f["run"]: f for f in s["failed"]}
    assert set(failed) == {"camp/bad/empty.traj", "camp/bad/garbage.traj"}
    assert "empty" in failed["camp/bad/empty.traj"]["error"]
    for f in failed.values():
        assert f["source"] in f["error"] and "\n" not in f["error"]
    assert sorted(p.name for p in (out / "records").glob("*.json")) == [
        "camp_layers_L-hex.traj.json", "camp_layers_L-obl.traj.json",
        "camp_qe_layer_oblique_to_hex.json", "camp_qe_relax_atoms_to_sites.json"]
    assert json.loads((out / "campaign.json").read_text()) == json.loads(records.dumps(s))
    assert json.loads((out / MARKER).read_text())["roots"] == [str(camp.resolve())]


def test_verdicts_and_gating_of_the_campaign(audited):
    _, out, s = audited
    recs = {rid: records.read_json(out / f) for rid, f in s["records"].items()}
    # L-hex ends exactly hexagonal (a = b, gamma = 120 deg: International Tables hp lattice);
    # the pw.x layer relaxation drifts from oblique to hexagonal (see tests/data/qe and test_track)
    direction = {rid: r["summary"]["verdict"]["direction"] for rid, r in recs.items()}
    assert direction["camp/layers/L-hex.traj"] == "gained"
    assert recs["camp/layers/L-hex.traj"]["summary"]["final"]["type"] == "hp"
    assert direction["camp/qe/layer_oblique_to_hex"] == "gained"
    assert direction["camp/layers/L-obl.traj"] == "kept"
    # fixed cell: the lattice keeps its type by construction, the atoms gain symmetry (spglib's
    # group at 1e-3 Å rises to Fd-3m, checked in test_track against spglib directly)
    sites = recs["camp/qe/relax_atoms_to_sites"]["summary"]["verdict"]
    assert direction["camp/qe/relax_atoms_to_sites"] == "gained"
    assert sites["lattice"]["direction"] == "kept" and sites["lattice"]["fixed_cell"]
    assert sites["structure"]["direction"] == "gained"
    assert s["verdict_counts"] == {"failed": 2, "gained": 3, "kept": 1}
    assert s["flag_counts"]["lattice-gained"] == 2
    assert {g["run"] for g in s["rejected"]} == {"camp/layers/L-hex.traj",
                                                 "camp/qe/layer_oblique_to_hex"}
    assert all("timing" not in r for r in recs.values())      # records are timing-free
    tol = s["tolerance"]
    assert tol["symprecs"] == [1e-5, 1e-3, 1e-2, 0.1] and tol["runs_considered"] == 4
    assert 1e-4 <= tol["recommended_symprec"] <= 0.2 and 0 < tol["safe_runs"] <= 4
    # the count of verdict changes between 1e-5 and 1e-3 Å, read straight from the records
    direct = sum(1 for r in recs.values()
                 if r["summary"]["tolerance"]["at"]["1e-05"][0]
                 != r["summary"]["tolerance"]["at"]["0.001"][0])
    assert tol["changes"][0]["runs"] == direct


def test_campaign_csv_has_one_row_per_run(audited):
    _, out, _ = audited
    with open(out / "campaign.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert tuple(rows[0]) == records.CSV_COLUMNS
    assert [r["run"] for r in rows] == sorted(r["run"] for r in rows) and len(rows) == 6
    bad = [r for r in rows if r["verdict"] == "failed"]
    assert len(bad) == 2 and all(r["error"] for r in bad)


def test_ase_db_rows_queryable_with_ase_tools(audited):
    camp, out, _ = audited
    db = ase.db.connect(out / "runs.db")
    assert db.count() == 6
    gained = {row.run_id for row in db.select("lattice_verdict=gained")}
    assert gained == {"camp/layers/L-hex.traj", "camp/qe/layer_oblique_to_hex"}
    # the drift numbers are the deformation to the type gained: below 'within' at the end
    assert {row.run_id for row in db.select("drift_final<0.001,lattice_verdict=gained")} == gained
    # one key scheme, no tool prefix; reserved ase.db names are not used
    assert not [k for k in db.get(run_id="camp/layers/L-hex.traj").key_value_pairs
                if k.startswith("dw_")]
    row = db.get(run_id="camp/layers/L-hex.traj")
    final = ase.io.read(camp / "layers" / "L-hex.traj", index=-1)
    assert np.allclose(row.cell, final.cell) and np.allclose(row.positions, final.positions)
    assert list(row.numbers) == [6] and row.lattice_final == "hp" and row.flag_lattice_gained
    # spglib on the stored final structure agrees it is hexagonal (P6/mmm, 191) (reference: spglib)
    import spglib
    ds = spglib.get_symmetry_dataset((row.cell, row.positions @ np.linalg.inv(row.cell),
                                      row.numbers), symprec=1e-3)
    assert ds.number == 191
    # ASE's own command line (python -m ase db) reads the same rows
    cli = subprocess.run([sys.executable, "-m", "ase", "db", str(out / "runs.db"), "lattice_verdict=gained",
                          "-c", "+run_id"], capture_output=True, text=True, timeout=120, check=False)
    assert cli.returncode == 0, cli.stderr
    assert "camp/layers/L-hex.traj" in cli.stdout and "camp/qe/layer_oblique_to_hex" in cli.stdout
    assert "L-obl" not in cli.stdout


# ----------------------------------------------------------------------------- cache
def test_reaudit_uses_cache_then_only_new_and_changed_runs(tmp_path):
    camp = make_campaign(tmp_path, qe=False)
    out = tmp_path / "out"
    s1 = run_audit([camp], out)
    first = record_bytes(out)
    assert (s1["analysed"], s1["cached"], len(s1["failed"])) == (4, 0, 2)
    s2 = run_audit([camp], out)                      # nothing changed: all from the cache,
    assert (s2["analysed"], s2["cached"]) == (0, 4)  # failed runs included
    assert record_bytes(out) == first and len(s2["failed"]) == 2
    assert ase.db.connect(out / "runs.db").count() == 4       # rows replaced, not duplicated
    write_layer(camp / "layers" / "L-new.traj", g0=92.0)       # the campaign grows by one run
    s3 = run_audit([camp], out)
    assert (s3["analysed"], s3["cached"], s3["runs"]) == (1, 4, 5)
    write_layer(camp / "layers" / "L-obl.traj", g1=104.0, b1=3.21)   # a run changes
    s4 = run_audit([camp], out)
    assert (s4["analysed"], s4["cached"]) == (1, 4)
    # a corrupt cache entry is ignored and recomputed, giving the same record bytes
    before = record_bytes(out)
    entries = [p for p in (out / ".cache").glob("*.json") if p.name != "digests.json"]
    assert len(entries) == 5          # one per run (2 failed); the changed L-obl replaced its own
    for p in entries:
        p.write_text("{ torn")
    s5 = run_audit([camp], out)
    assert (s5["analysed"], s5["cached"]) == (5, 0) and record_bytes(out) == before
    # use_cache=False analyses everything again and still gives the same bytes
    s6 = run_audit([camp], out, use_cache=False)
    assert s6["analysed"] == 5 and record_bytes(out) == before
    assert ase.db.connect(out / "runs.db").count() == 5


def test_records_of_removed_runs_move_to_stale(tmp_path):
    camp = make_campaign(tmp_path, qe=False)
    out = tmp_path / "out"
    run_audit([camp], out)
    user_file = out / "records" / "my-notes.json"
    user_file.write_text("{}")
    rows = {r.run_id: r.id for r in ase.db.connect(out / "runs.db").select()}
    gone = camp / "layers" / "L-obl.traj"
    kept_bytes = gone.read_bytes()
    gone.unlink()
    s = run_audit([camp], out)
    assert not (out / "records" / "camp_layers_L-obl.traj.json").exists()
    assert (out / "records" / "stale" / "camp_layers_L-obl.traj.json").is_file()
    assert s["stale_records"] == ["records/stale/camp_layers_L-obl.traj.json"]
    assert user_file.read_text() == "{}"          # never touched: driftwatch did not write it
    # runs.db holds the current campaign too: the gone run's row is deleted, the others keep theirs
    now = {r.run_id: r.id for r in ase.db.connect(out / "runs.db").select()}
    assert len(now) == s["runs"] == len(rows) - 1 and "camp/layers/L-obl.traj" in rows
    assert all(rows[k] == v for k, v in now.items())
    gone.write_bytes(kept_bytes)                  # back again: one row again, no stale copy
    s = run_audit([camp], out)
    assert sorted(r.run_id for r in ase.db.connect(out / "runs.db").select()) == sorted(rows)
    assert not (out / "records" / "stale" / "camp_layers_L-obl.traj.json").exists()
    assert (out / "records" / "camp_layers_L-obl.traj.json").is_file()
    # a database shared with another output folder keeps that folder's rows: only the run ids this
    # folder's previous audit wrote are deleted
    other = tmp_path / "other"
    (other / "x").mkdir(parents=True)
    shutil.copy(gone, other / "x" / "A.traj")
    run_audit([other], tmp_path / "out2", db=str(out / "runs.db"))
    (camp / "layers" / "L-obl.traj").unlink()
    run_audit([camp], out)
    assert "other/x/A.traj" in {r.run_id for r in ase.db.connect(out / "runs.db").select()}


def test_interrupted_audit_rerun_gives_identical_records(tmp_path, killable_env):
    camp = make_campaign(tmp_path, qe=True, n_extra=6)
    ref, out = tmp_path / "ref", tmp_path / "out"
    total = 12                        # runs, of which 2 fail (no record)
    code = (f"from driftwatch.campaign import audit\n"
            f"audit([{str(camp)!r}], {str(out)!r}, workers=1, report=False, progress='off')\n")
    proc = subprocess.Popen([sys.executable, "-c", code], cwd=REPO, env=killable_env)
    n = 0
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and proc.poll() is None:
        n = len(list((out / "records").glob("*.json"))) if (out / "records").is_dir() else 0
        if n >= 2:
            proc.send_signal(signal.SIGKILL)
            break
        time.sleep(0.005)
    proc.wait(30)
    assert proc.returncode == -signal.SIGKILL, "the audit finished before it could be killed"
    assert 2 <= n < total - 2
    resumed = run_audit([camp], out)
    assert resumed["cached"] >= n and resumed["analysed"] + resumed["cached"] == total
    run_audit([camp], ref)
    assert record_bytes(out) == record_bytes(ref) and len(record_bytes(ref)) == total - 2
    assert (out / "campaign.csv").read_bytes() == (ref / "campaign.csv").read_bytes()
    assert not list((out / "records").glob(".*.tmp"))       # no torn temporary files left behind


# ----------------------------------------------------------------------------- output safety
def test_stale_database_lock_fails_fast_with_a_message(tmp_path):
    camp = make_campaign(tmp_path, qe=False)
    db = tmp_path / "shared.db"
    lock = Path(str(db) + ".lock")
    lock.write_text("")                       # what a job killed inside ase.db leaves behind
    t0 = time.monotonic()
    cli = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp / "layers"), "-o",
                          str(tmp_path / "out"), "--db", str(db), "--no-report", "--progress", "off"],
                         capture_output=True, text=True, timeout=60, cwd=REPO,
                         check=False)
    assert time.monotonic() - t0 < 30
    assert cli.returncode == 1 and str(lock) in cli.stderr and "delete it" in cli.stderr
    assert len(cli.stderr.strip().splitlines()) == 1
    from driftwatch.store import write_rows
    with pytest.raises(OutputError, match="lock"):
        write_rows(str(db), [])


def test_a_lock_left_in_the_audit_folders_own_database_is_removed_and_said(tmp_path):
    """runs.db in the output folder is written only by audits of that folder, one at a time (the
    audit lock): a runs.db.lock there was left by a killed audit, so the next audit removes it and
    says so (it was refused until the user deleted it by hand). A shared --db stays refused."""
    camp = make_campaign(tmp_path, qe=False)
    out = tmp_path / "out"
    run_audit([camp / "layers"], out)
    (out / "runs.db.lock").write_text("")            # as a SIGKILL inside ase.db's write leaves it
    cli = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp / "layers"), "-o",
                          str(out), "--no-report", "--progress", "off"],
                         capture_output=True, text=True, timeout=120, cwd=REPO, check=False)
    assert cli.returncode == 0, cli.stderr
    assert f"driftwatch: removed {out / 'runs.db.lock'}" in cli.stderr
    assert not (out / "runs.db.lock").exists()


def test_output_folder_safety(tmp_path):
    camp = make_campaign(tmp_path, qe=False)
    other = tmp_path / "other"
    write_layer(other / "L-x.traj")
    foreign = tmp_path / "mine"
    foreign.mkdir()
    (foreign / "thesis.tex").write_text("do not touch")
    with pytest.raises(OutputError, match="not empty"):
        run_audit([camp], foreign)
    out = tmp_path / "out"
    run_audit([camp], out)
    run_audit([camp], out)                                  # same campaign: accepted
    with pytest.raises(OutputError, match="other roots"):
        run_audit([other], out)
    s = run_audit([camp], foreign, overwrite=True)          # asked for: written, nothing deleted
    assert s["runs"] == 4 and (foreign / "thesis.tex").read_text() == "do not touch"
    # a folder of the user's own files named as an audit's (its campaign.csv, a report/ and an
    # ase.db runs.db of its own): refused even with --overwrite, each named, nothing replaced
    # (they had been replaced, and the audit's rows added to the user's database)
    own = tmp_path / "own"
    (own / "report").mkdir(parents=True)
    for name, text in (("campaign.csv", "mine"), ("report/index.html", "mine"),
                       ("notes.txt", "mine")):
        (own / name).write_text(text)
    from ase import Atoms
    from ase.db import connect
    with connect(own / "runs.db") as db:
        db.write(Atoms("Cu"), note="mine")
    before = {p: p.read_bytes() for p in own.rglob("*") if p.is_file()}
    for flag in (False, True):
        with pytest.raises(OutputError) as e:
            run_audit([camp], own, overwrite=flag)
        if flag:
            assert "holds campaign.csv, report/, runs.db, which no driftwatch audit" in str(e.value)
    assert {p: p.read_bytes() for p in own.rglob("*") if p.is_file()} == before
    (tmp_path / "afile").write_text("x")
    with pytest.raises(OutputError, match="not a folder"):
        run_audit([camp], tmp_path / "afile")


def test_run_ids_with_dotdot_map_inside_the_output(tmp_path):
    runs = [RunSpec(i, "x", "file") for i in
            ("camp/../../etc/passwd", "../escape", "..", "a/b", "a_b", "camp/.. /x")]
    names = _record_names(runs)
    assert len(set(names.values())) == len(runs)
    rec_dir = tmp_path / "records"
    rec_dir.mkdir()
    for name in names.values():
        assert "/" not in name and ".." not in name and not name.startswith(".")
        assert _inside(rec_dir, rec_dir / name).parent == rec_dir.resolve()
    with pytest.raises(OutputError):
        _inside(rec_dir, rec_dir / ".." / "x.json")
    # end to end: a run whose name holds '..' is written inside OUTPUT/records
    camp = tmp_path / "camp"
    write_layer(camp / "a..b" / "..x..traj".lstrip("."))
    s = run_audit([camp], tmp_path / "out")
    (rid, rel), = s["records"].items()
    assert rid == "camp/a..b/x..traj"
    assert (tmp_path / "out" / rel).resolve().parent == (tmp_path / "out" / "records").resolve()


# ----------------------------------------------------------------------------- executors
def test_process_pool_and_dask_cluster_give_the_same_records(tmp_path):
    from distributed import LocalCluster
    camp = make_campaign(tmp_path, qe=False, n_extra=2)
    serial = run_audit([camp], tmp_path / "serial")
    pool = run_audit([camp], tmp_path / "pool", workers=2)
    assert pool["executor"] == "2 local processes"
    # a real Dask cluster in this process (ecosystem.md B.6), reached by its scheduler address
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                      dashboard_address=None) as cluster:
        dask = run_audit([camp], tmp_path / "dask", scheduler=cluster.scheduler_address)
    assert dask["executor"].startswith("dask ")
    from concurrent.futures import ProcessPoolExecutor      # any Executor object, passed in
    with ProcessPoolExecutor(max_workers=2) as ex:
        given = run_audit([camp], tmp_path / "given", executor=ex)
    assert given["executor"] == "ProcessPoolExecutor"
    assert record_bytes(tmp_path / "given") == record_bytes(tmp_path / "serial")
    ref = record_bytes(tmp_path / "serial")
    assert len(ref) == 4
    assert record_bytes(tmp_path / "pool") == ref and record_bytes(tmp_path / "dask") == ref
    for s in (pool, dask):
        assert s["failed"] == serial["failed"] and s["verdict_counts"] == serial["verdict_counts"]


def test_a_dask_audit_reuses_what_a_local_audit_of_the_same_folder_found(tmp_path, monkeypatch):
    """A campaign given by a relative path: the Dask workers get absolute paths, but the cache is
    keyed on the paths as given, so a Dask audit after a local one reads nothing again (it read
    every run again and said so)."""
    from distributed import LocalCluster
    make_campaign(tmp_path, qe=False, n_extra=1)
    monkeypatch.chdir(tmp_path)
    first = run_audit(["camp"], "out", workers=1)
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                      dashboard_address=None) as cluster:
        again = run_audit(["camp"], "out", scheduler=cluster.scheduler_address)
    assert first["analysed"] > 0 and again["analysed"] == 0
    assert again["cached"] == first["analysed"] and again["since_last"]["read_again"] == []


def test_progress_and_summary_table(tmp_path, capsys):
    camp = make_campaign(tmp_path, qe=False)
    run_audit([camp / "layers"], tmp_path / "out", progress="on")
    got = capsys.readouterr()
    assert "driftwatch audit: 2/2 runs (100 %)" in got.err      # progress on stderr (dated lines)
    assert got.out == ""                    # the Python API prints no table unless asked (quiet)
    run_audit([camp / "layers"], tmp_path / "out", quiet=False)
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].split()[:2] == ["run", "dim"]
    assert any(ln.startswith("layers/L-hex.traj") and " gained " in ln and "mp -> hp" in ln
               for ln in lines)
    assert any(ln.startswith("2 runs: 2 with a verdict, 0 failed (0 read now, 2 from the cache)")
               for ln in lines)
    run_audit([camp / "layers"], tmp_path / "out", progress="off", quiet=False)
    got = capsys.readouterr()
    assert got.out.startswith("run ") and got.err == ""      # progress off: the table still shown


def _progress_into_buffer(monkeypatch):
    """The audit's real progress line written into a buffer at no minimum interval; the buffer."""
    import io
    from driftwatch import campaign, tasks
    buf = io.StringIO()

    class Now(tasks.Progress):
        def __init__(self, *a, **k):
            super().__init__(*a, **dict(k, stream=buf))
            self.interval = 0.0

    monkeypatch.setattr(campaign, "Progress", Now)
    return buf


def test_a_long_run_checked_frame_by_frame_shows_its_progress(tmp_path, monkeypatch):
    """An every-frame audit of one long run (a genuine 101-frame relaxation, tests/data/public
    fairchem_slab_relax) prints how many of its frames spglib has checked while it runs, not only
    when the run ends; the real progress line at no minimum interval."""
    from driftwatch import track
    buf = _progress_into_buffer(monkeypatch)
    src = REPO / "tests" / "data" / "public" / "fairchem_slab_relax"
    run_audit([src], tmp_path / "out", progress="on", config={"selection": {"all_frames": True}})
    lines = buf.getvalue().splitlines()
    inside = [ln for ln in lines if "frames checked" in ln]
    assert "0/1 runs (0 %)" in inside[0] and \
        inside[0].endswith("this run: 1/101 frames checked")
    assert inside[-1].endswith("this run: 101/101 frames checked") and len(inside) == 101
    assert lines[-1].split("driftwatch audit: ")[1].startswith("1/1 runs (100 %)")
    assert track.frame_progress is None                  # the hook is the audit's only


def test_spglib_calls_and_busy_workers_are_said_while_a_run_is_analysed(tmp_path, monkeypatch):
    """A run of a large cell can keep spglib busy for many minutes (a field trial: a 2048-atom
    LAMMPS relaxation, 20 min without a line in a batch log): the progress line says, at its own
    pace, how many spglib calls the run has made and the time they took; with worker processes,
    that runs are still being analysed. The real progress line at no minimum interval, on a
    genuine relaxation (tests/data/public fairchem_slab_relax) and two example runs."""
    import re
    from driftwatch import campaign, symmetry
    buf = _progress_into_buffer(monkeypatch)
    src = REPO / "tests" / "data" / "public" / "fairchem_slab_relax"
    symmetry.clear_cache()                 # spglib's answers memoised by an earlier test: asked
    run_audit([src], tmp_path / "one", progress="on", workers=1, use_cache=False)
    said = [re.search(r"this run: (\d+) spglib calls?, [0-9.]+ s in spglib \(the last, at symprec "
                      r"[0-9.e+-]+ Å, \d\.\d s\)$", ln) for ln in buf.getvalue().splitlines()]
    counts = [int(m.group(1)) for m in said if m]
    assert counts[:3] == [1, 2, 3] and counts == sorted(counts) and counts[-1] >= 30
    assert symmetry.after_call is None                   # the hook is the audit's only
    # a slow call names the large preset, unless the audit already asks as few questions
    monkeypatch.setattr(campaign, "SLOW_CALL", 0.0)
    for preset, named in (("default", True), ("large", False)):
        buf.seek(0)
        buf.truncate()
        symmetry.clear_cache()
        run_audit([src], tmp_path / preset, progress="on", config=preset, use_cache=False)
        assert ("`-c large` asks fewer" in buf.getvalue()) is named
    buf.seek(0)
    buf.truncate()
    monkeypatch.setattr(campaign, "HEARTBEAT", 0.01)
    run_audit([src, REPO / "example_runs" / "B06_emt_bain.traj"], tmp_path / "two",
              progress="on", workers=2, use_cache=False)
    assert "2 local processes: runs still being analysed" in buf.getvalue()


def _boom(path):
    os._exit(3)        # a worker process dying, as on a crash in a native library or an OOM kill
    yield              # pragma: no cover


def test_a_worker_process_that_dies_fails_only_its_run(tmp_path, monkeypatch, capsys):
    """A run whose reader kills its worker process (as a native crash or the out-of-memory killer
    does): the others are analysed again in a fresh pool, then one at a time, and stderr says so;
    only that run fails."""
    import multiprocessing as mp

    from driftwatch import campaign
    from driftwatch.adapters import registry
    camp = make_campaign(tmp_path, qe=False, n_extra=3)
    (camp / "more" / "boom.crash").write_text("x")
    monkeypatch.setattr(campaign, "mp_context", lambda: mp.get_context("fork"))  # inherit it
    registry.register("test-crash", _boom, globs=("*.crash",), replace=True)
    try:
        s = run_audit([camp], tmp_path / "out", workers=2)
    finally:
        registry._formats.pop("test-crash", None)
    failed = {f["run"]: f["error"] for f in s["failed"]}
    assert set(failed) == {"camp/bad/empty.traj", "camp/bad/garbage.traj", "camp/more/boom.crash"}
    assert "worker process died" in failed["camp/more/boom.crash"]
    assert len(record_bytes(tmp_path / "out")) == 5 and s["runs"] == 8
    err = capsys.readouterr().err
    assert "driftwatch: a worker process died (a crash in a native library or out of memory); " \
           "analysing the" in err and "go one at a time" in err


def test_summary_states_the_campaign_symprec_when_there_is_no_single_value(tmp_path):
    """The audit's summary always has a "campaign symprec" line: a value, "any" when every run keeps
    one verdict at every symprec searched, or "none" with the reason. The bundled B06 run ends on an
    fcc cell (spglib, checked here: Fm-3m (225) from 1e-5 to 0.3 Å); the broken public files give
    no spectrum at all."""
    import spglib
    final = ase.io.read(REPO / "example_runs" / "B06_emt_bain.traj", index=-1)
    cell = (final.cell[:], final.get_scaled_positions(), final.numbers)
    assert {spglib.get_symmetry_dataset(cell, symprec=s).number for s in (1e-5, 1e-3, 0.3)} == {225}
    for src, said in ((REPO / "example_runs" / "B06_emt_bain.traj",
                       "campaign symprec: any in the range searched (1 of 1 runs keep one spglib "
                       "verdict on the final structure at every symprec searched (1e-05-0.3 Å)"),
                      (REPO / "tests" / "data" / "public" / "broken",
                       "campaign symprec: none to recommend (no run has a symmetry spectrum of its "
                       "final frame)")):
        proc = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(src), "-o",
                               str(tmp_path / src.name), "--no-report"],
                              capture_output=True, text=True, timeout=300)
        assert said in proc.stdout, proc.stdout[-1500:]
        tol = json.loads((tmp_path / src.name / "campaign.json").read_text())["tolerance"]
        assert tol["recommended_symprec"] is None


def test_each_audit_says_what_changed_since_the_last_one(tmp_path):
    """A campaign audited every evening: the summary, campaign.json and the report's index say
    which runs are new, which were read again (a file changed) and which are gone since the last
    audit into the same folder; the first audit has nothing to compare with."""
    camp = make_campaign(tmp_path, qe=False)
    out = tmp_path / "out"
    first = run_audit([camp], out)
    assert first["since_last"] is None
    assert run_audit([camp], out)["since_last"] == {"new": [], "gone": [], "read_again": []}
    shutil.copy(camp / "layers" / "L-obl.traj", camp / "layers" / "L-new.traj")
    (camp / "layers" / "L-obl.traj").unlink()
    touched = sorted(camp.rglob("*.traj"))[0]
    touched.write_bytes(touched.read_bytes())          # same bytes: not read again
    s = run_audit([camp], out, report=True)
    assert s["since_last"] == {"new": ["camp/layers/L-new.traj"],
                               "gone": ["camp/layers/L-obl.traj"], "read_again": []}
    index = (out / "report" / "index.html").read_text(encoding="utf-8")
    assert "since the last audit</th><td>1 new (camp/layers/L-new.traj), 0 read again, 1 gone " \
           "(camp/layers/L-obl.traj)" in index


def test_a_deleted_or_unused_cache_reads_nothing_again_that_did_not_change(tmp_path):
    """`.cache/` is safe to delete: the audit after it (or one with use_cache=False) analyses every
    run anew, but a run read from the same bytes as the last audit's is not "read again" (a field
    trial: all 16 example runs had been said read again, as if their files had changed). A run
    whose file did change still is, with or without the cache."""
    camp = make_campaign(tmp_path, qe=False)
    out = tmp_path / "out"
    first = run_audit([camp], out)
    shutil.rmtree(out / ".cache")
    again = run_audit([camp], out)
    assert again["analysed"] == first["runs"] and again["cached"] == 0
    assert again["since_last"] == {"new": [], "gone": [], "read_again": []}
    import ase.io
    changed = camp / "layers" / "L-obl.traj"
    frames = ase.io.read(changed, ":")
    frames[-1].positions[0] += 0.01                   # the last frame's first atom, 0.01 A
    ase.io.write(changed, frames)
    rid = str(changed.relative_to(tmp_path))
    third = run_audit([camp], out, use_cache=False)
    assert third["cached"] == 0 and third["since_last"]["read_again"] == [rid]
    assert run_audit([camp], out, use_cache=False)["since_last"]["read_again"] == []


def test_a_run_folder_keeps_its_id_while_a_rerun_has_emptied_its_output(tmp_path):
    """A resubmitted pw.x job empties its output (`pw.x < pw.in > pw.out` just started): the run
    is still the folder, failing as an empty file, not a new run named by the file (which left
    two rows in runs.db, one for a failure that no longer exists). The real pw.x 6.7 run of
    tests/data/qe/relax_atoms_to_sites."""
    src = Path(__file__).parent / "data" / "qe" / "relax_atoms_to_sites"
    camp = tmp_path / "camp"
    shutil.copytree(src, camp / "job")
    out = tmp_path / "out"
    run_audit([camp], out)
    (camp / "job" / "pw.out").write_text("")
    s = run_audit([camp], out)
    assert [f["run"] for f in s["failed"]] == ["camp/job"]
    assert "empty file (a job that has not written yet" in s["failed"][0]["error"]
    shutil.copy(src / "pw.out", camp / "job" / "pw.out")
    s = run_audit([camp], out)
    assert not s["failed"] and [r.run_id for r in ase.db.connect(out / "runs.db").select()] == \
        ["camp/job"]
    # an empty log of a script beside a template input above the run is no run (named as no
    # output of that input: pw.in's would be pw.out)
    shutil.copy(src / "pw.in", camp / "pw.in")
    (camp / "run.log").write_text("")
    s = run_audit([camp], out)
    assert not s["failed"] and s["runs"] == 1


def test_runs_db_update_is_one_transaction(tmp_path):
    """Rows of gone runs are deleted inside the update's transaction: when a later write fails
    (here a real SQLite trigger aborts one insert, as a full disk would), the database keeps its old
    rows. ase.db's own delete() commits and VACUUMs at once, which left it neither old nor new."""
    import sqlite3

    import ase.db
    from driftwatch.errors import OutputError
    from driftwatch.store import write_rows
    db = tmp_path / "runs.db"
    cell = {"numbers": [14], "positions": [[0, 0, 0]], "cell": np.eye(3) * 3, "pbc": [1, 1, 1]}
    write_rows(str(db), [("a", cell, {"verdict": "kept"}), ("b", cell, {"verdict": "kept"})])
    con = sqlite3.connect(db)
    con.execute("CREATE TRIGGER poison BEFORE INSERT ON systems "
                "WHEN NEW.key_value_pairs LIKE '%poison%' "
                "BEGIN SELECT RAISE(ABORT, 'write refused'); END")
    con.commit()
    con.close()
    with pytest.raises(OutputError, match="cannot write the results database"):
        write_rows(str(db), [("a", cell, {"verdict": "kept"}),
                             ("c", cell, {"verdict": "poison"})], remove=["b"])
    with ase.db.connect(db) as con:
        assert sorted(r.run_id for r in con.select()) == ["a", "b"]          # the old rows
    write_rows(str(db), [("a", cell, {"verdict": "kept"})], remove=["b"])
    with ase.db.connect(db) as con:
        assert [r.run_id for r in con.select()] == ["a"]


def test_an_earlier_audit_folder_inside_the_campaign_is_no_run(tmp_path):
    """An audit output kept inside the campaign tree (driftwatch-audit-old/, with its runs.db of
    many structures) is not audited as a run: its marker file says what it is."""
    root = tmp_path / "camp"
    root.mkdir()
    shutil.copy(REPO / "example_runs" / "L09_emt_fixed_square.traj", root / "L09.traj")
    first = audit([root], root / "driftwatch-audit-old", report=False, progress="off", workers=1)
    assert first["runs"] == 1
    again = audit([root], tmp_path / "new", report=False, progress="off", workers=1)
    assert again["runs"] == 1 and again["failed"] == []


def test_db_of_another_application_is_refused_unchanged(tmp_path):
    """--db naming another application's SQLite file: refused in one line, its bytes unchanged
    (ase.db would add its seven tables to it)."""
    import sqlite3
    from driftwatch.errors import OutputError
    from driftwatch.store import write_rows
    lab = tmp_path / "lab.db"
    con = sqlite3.connect(lab)
    con.execute("CREATE TABLE results (sample TEXT, value REAL)")
    con.execute("INSERT INTO results VALUES ('x', 1.0)")
    con.commit()
    con.close()
    before = lab.read_bytes()
    with pytest.raises(OutputError, match=r"a SQLite database that is not an ase.db \(tables: "
                                          r"results\)"):
        write_rows(str(lab), [("a", None, {"verdict": "failed"})])
    assert lab.read_bytes() == before


def test_a_failed_database_write_leaves_the_tables_of_the_last_audit(tmp_path):
    """runs.db is written before campaign.csv, campaign.json and the stale records: when it fails
    (a real SQLite trigger refuses the new run's row, as a locked or full disk would), those stay
    the last audit's, and the one-line error says the outputs are not all updated."""
    import sqlite3
    from driftwatch.errors import OutputError
    root = tmp_path / "camp"
    root.mkdir()
    shutil.copy(REPO / "example_runs" / "L09_emt_fixed_square.traj", root / "a.traj")
    out = tmp_path / "out"
    audit([root], out, report=False, progress="off", workers=1)
    before = {n: (out / n).read_bytes() for n in ("campaign.csv", "campaign.json")}
    con = sqlite3.connect(out / "runs.db")
    con.execute("CREATE TRIGGER refuse BEFORE INSERT ON systems BEGIN "
                "SELECT RAISE(ABORT, 'write refused'); END")
    con.commit()
    con.close()
    shutil.copy(REPO / "example_runs" / "L06_emt_bfgs.traj", root / "b.traj")
    with pytest.raises(OutputError, match=r"cannot write the results database .*the audit's "
                                          r"outputs in .* are not all updated; re-run"):
        audit([root], out, report=False, progress="off", workers=1)
    assert {n: (out / n).read_bytes() for n in before} == before


def test_failed_and_skipped_runs_are_rows_of_every_table(tmp_path):
    """One run read, one that failed (a real pw.x job stopped by an EXIT file before its first
    step) and one skipped (ASE's genuine GPAW output of an H2 molecule: no cell): campaign.csv,
    runs.db and ``tables.runs_table`` of the audit folder each have the three rows (runs.db had
    no row for the skipped run, and runs_table none for the failed one)."""
    import csv

    from ase.db import connect

    from driftwatch import tables
    data = Path(__file__).parent / "data"
    camp = tmp_path / "camp"
    shutil.copytree(data / "qe" / "bulk_tetragonal_to_cubic", camp / "ok")
    shutil.copytree(data / "qe_trials" / "si2_exit_at_start", camp / "failed")
    (camp / "molecule").mkdir()
    shutil.copy(data / "public" / "ase_generic" / "gpaw_h2.txt", camp / "molecule")
    out = tmp_path / "out"
    s = run_audit([camp], out)
    assert [f["run"] for f in s["failed"]] == ["camp/failed"]
    assert [k["run"] for k in s["skipped"]] == ["camp/molecule/gpaw_h2.txt"]
    with open(out / "campaign.csv", newline="") as fh:
        csv_rows = {r["run"]: r["verdict"] for r in csv.DictReader(fh)}
    with connect(out / "runs.db") as db:
        db_rows = {r.run_id: r.verdict for r in db.select()}
    table = tables.runs_table(out)
    assert csv_rows == db_rows == dict(zip(table["run"], table["verdict"])) == {
        "camp/failed": "failed", "camp/molecule/gpaw_h2.txt": "skipped",
        "camp/ok": csv_rows["camp/ok"]}


def test_a_selection_is_not_audited_into_a_folder_whose_audit_holds_runs_it_leaves_out(tmp_path):
    """`--include` into the folder of a whole-campaign audit had retired every other run's row of
    runs.db and record as gone (exit 0): refused, the rows and records untouched; the same
    selection again, its own folder, or --overwrite are fine."""
    camp = tmp_path / "camp"
    for name in ("bulk_tetragonal_to_cubic", "layer_oblique_to_hex", "relax_atoms_to_sites"):
        shutil.copytree(QE / name, camp / name)
    out = tmp_path / "out"
    audit([camp], out, report=False, progress="off", workers=1)
    rows = {r.run_id: r.id for r in ase.db.connect(out / "runs.db").select()}
    assert len(rows) == 3
    with pytest.raises(OutputError, match=r"its last audit holds 2 runs this selection "
                                          r"\(--include/--exclude\) leaves out"):
        audit([camp], out, include=["bulk*"], report=False, progress="off", workers=1)
    assert {r.run_id: r.id for r in ase.db.connect(out / "runs.db").select()} == rows
    assert len(list((out / "records").glob("*.json"))) == 3
    assert not (out / "records" / "stale").exists()
    audit([camp], out, exclude=["nothing*"], report=False, progress="off", workers=1)  # keeps all
    sel = tmp_path / "sel"
    audit([camp], sel, include=["bulk*"], report=False, progress="off", workers=1)
    audit([camp], sel, include=["bulk*"], report=False, progress="off", workers=1)     # again
    s = audit([camp], out, include=["bulk*"], report=False, progress="off", workers=1,
              overwrite=True)
    assert s["runs"] == 1 and len(ase.db.connect(out / "runs.db")) == 1


def _audit_after_an_interrupted_one(camp, out, monkeypatch):
    """The summary of an audit after one interrupted where the tables are written (the state a
    real SIGINT there leaves)."""
    import driftwatch.campaign as campaign

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt
    with monkeypatch.context() as m:
        m.setattr(campaign, "_write_tables", interrupted)
        with pytest.raises(KeyboardInterrupt):
            run_audit([camp], out)
    return run_audit([camp], out)


def test_runs_read_by_an_interrupted_audit_are_said_read_again_by_the_next(tmp_path, monkeypatch):
    """An audit interrupted after its runs were analysed (Ctrl-C, a batch system's SIGTERM while
    the tables are written) leaves their records and cache entries, and the marker of the last
    complete audit. The next audit reads them from the cache; it had said "0 read again" of a run
    whose file and answer changed since the last summary the user saw. The interruption is
    raised where the tables are written (the state a real SIGINT there leaves)."""
    camp = make_campaign(tmp_path, qe=False)
    out = tmp_path / "out"
    run_audit([camp], out)
    changed = camp / "layers" / "L-obl.traj"
    other = next(p for p in sorted(camp.rglob("*.traj")) if p != changed)
    changed.write_bytes(other.read_bytes())             # the run re-relaxed in place, say

    again = _audit_after_an_interrupted_one(camp, out, monkeypatch)
    assert again["cached"] == again["runs"]                # every run from the cache
    assert again["since_last"] == {"new": [], "gone": [], "read_again": ["camp/layers/L-obl.traj"]}
    assert run_audit([camp], out)["since_last"]["read_again"] == []


def test_a_run_whose_file_changed_but_not_its_answer_is_read_again_after_an_interruption(
        tmp_path, monkeypatch):
    """The same, for a change of the file's bytes that leaves the answer as it was (an ase.db row
    given a new key-value pair, a field trial's case): the run read by the interrupted audit comes
    from the cache next time, and is still said read again, by its inputs (real SQLite through
    ase.db, the batch of real EMT relaxations)."""
    import ase.db
    camp = tmp_path / "camp"
    camp.mkdir()
    shutil.copy(Path(__file__).parent / "data" / "batch" / "relaxations.db", camp)
    out = tmp_path / "out"
    run_audit([camp], out)
    with ase.db.connect(str(camp / "relaxations.db")) as db:
        last = max(db.select(relax_id="Al-fco-02"), key=lambda r: r.step)
        db.update(last.id, checked=1)

    again = _audit_after_an_interrupted_one(camp, out, monkeypatch)
    assert again["cached"] == again["runs"] == 6
    assert again["since_last"]["read_again"] == ["camp/relaxations.db::Al-fco-02"]
    assert run_audit([camp], out)["since_last"]["read_again"] == []


def test_a_large_campaign_table_leaves_out_kept_runs_flagged_only_for_the_tolerance():
    """Beyond campaign.TABLE_LIMIT runs the table lists the notable ones: a run that kept its
    symmetry with only tolerance flags (symprec-dependent, loose-symprec: about which symprec to
    choose, docs/flags.md) is not; one with a lattice, structure or code flag, or another verdict,
    is. (On a 3,444-run campaign 79 % of the runs carried symprec-dependent, and 3,074 rows were
    printed.)"""
    import driftwatch.campaign as campaign
    rows = [["a/kept-tol", "3D", "kept", "cF", "cF 0->0", "Fm-3m (225)", "symprec-dependent"],
            ["a/kept-two", "3D", "kept~", "cF", "cF 0->0", "Fm-3m (225)",
             "loose-symprec,symprec-dependent"],
            ["a/kept-none", "3D", "kept", "cF", "cF 0->0", "Fm-3m (225)", "-"],
            ["a/kept-code", "3D", "kept", "cF", "cF 0->0", "Fm-3m (225)", "held-by-code"],
            ["a/lost", "3D", "lost", "cI -> aP", "cI 0->0.1", "Im-3m (229) -> P-1 (2)",
             "symprec-dependent"]] * (campaign.TABLE_LIMIT // 5 + 1)
    shown = {r[0] for r in campaign._notable(rows)}
    assert shown == {"a/kept-code", "a/lost"}
    assert campaign._notable(rows[:5]) == rows[:5]          # a small campaign: every run


def test_a_digest_of_a_file_changed_just_before_it_was_hashed_is_not_kept(tmp_path, monkeypatch):
    """git's "racy clean" case: file timestamps advance in ticks of milliseconds, so a same-size
    rewrite just after a file was hashed can keep its size, mtime and ctime (a field trial's
    point). A digest taken within RACY_NS of the file's last change (its ctime, which no tool sets
    back) is used in that audit but not saved for the next; an older file's is (RACY_NS set to
    0.3 s here, 2 s by default)."""
    import json
    from driftwatch import cache
    from driftwatch.cache import FileDigests
    monkeypatch.setattr(cache, "RACY_NS", 300_000_000)
    new, old = tmp_path / "new.txt", tmp_path / "old.txt"
    old.write_text("b" * 100)
    time.sleep(0.4)
    new.write_text("a" * 100)
    d = FileDigests(tmp_path / "digests.json")
    assert d.digest(new) and d.digest(old)
    d.save()
    saved = json.loads((tmp_path / "digests.json").read_text())["files"]
    assert os.path.realpath(old) in saved and os.path.realpath(new) not in saved


def test_the_slowest_runs_are_named(tmp_path, monkeypatch, capsys):
    """campaign.json lists the runs analysed now that took longest (a field trial's 2048-atom run
    took minutes beside seconds for the rest, and only the cache kept each run's time); the summary
    names those over campaign.SLOW_RUN seconds (here 0, so every listed one), slowest first; a
    re-audit served from the cache analyses none and names none."""
    import json
    from driftwatch import campaign
    monkeypatch.setattr(campaign, "SLOW_RUN", 0.0)
    demo = REPO / "example_runs"
    roots = [demo / n for n in ("B06_emt_bain.traj", "L01_qe_vcrelax", "B02_qe_vcrelax_sym",
                                "L09_emt_fixed_square.traj", "B05_emt_bfgs.extxyz", "L04_qe_relax")]
    s = run_audit(roots, tmp_path / "out", quiet=False)
    slow = s["slowest"]
    assert len(slow) == campaign.SLOWEST and all(x["analysis_s"] > 0 for x in slow)
    assert [x["analysis_s"] for x in slow] == sorted((x["analysis_s"] for x in slow), reverse=True)
    line = next(ln for ln in capsys.readouterr().out.splitlines()
                if ln.startswith("slowest to analyse: "))
    assert [x["run"] for x in slow] == [part.split(" (")[0] for part in
                                        line.removeprefix("slowest to analyse: ").split(", ")][:5]
    assert json.loads((tmp_path / "out" / "campaign.json").read_text())["slowest"] == slow
    s = run_audit(roots, tmp_path / "out", quiet=False)
    assert s["slowest"] == [] and "slowest to analyse" not in capsys.readouterr().out
