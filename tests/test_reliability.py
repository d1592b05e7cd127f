"""Reliability and security under bad input and faults.

The bad-input corpus (``tests/data/bad/README.md``) is generated here from real files, each entry a
failure users meet: empty files, binary garbage under a trusted name, the wrong format for the name,
real outputs cut short, NaN/inf in cells or positions, singular and nearly singular cells, absurd
lengths, unreadable files, symlink loops, non-UTF-8 names, broken YAML configs. Real files used:
ASE's genuine VASP test files (tests/data/vasp), real pw.x outputs (tests/data/qe, Quantum ESPRESSO
from Debian) and the ASE trajectories of example_runs/. Contract checked for every entry (the issue;
common practice for command-line tools): one line on stderr naming the file and the problem, exit
code 1, no traceback unless ``--debug``; a failed run recorded in a campaign; never a number.

Faults: real processes killed with SIGKILL at several points of an audit, then re-run (records
identical to an uninterrupted run, every cache entry parses); an ase.db SQLite file held by another
process's write transaction (real SQLite); headless Chromium (Debian ``chromium``) loading a report
built from input files carrying script payloads; soft-stop and output path containment.
"""
from __future__ import annotations

import gzip
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
import tokenize
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from ase import Atoms
import ase.io

import driftwatch
from driftwatch import cli, config as dwconfig, records
from driftwatch.adapters import read_run
from driftwatch.errors import (ConfigError, DriftwatchError, InputError, OutputError)

REPO = Path(__file__).resolve().parent.parent
DATA = REPO / "tests" / "data"
QE = DATA / "qe"
RUNS = REPO / "example_runs"
CHROMIUM = shutil.which("chromium")
IS_ROOT = hasattr(os, "geteuid") and os.geteuid() == 0
SETPRIV = shutil.which("setpriv")


# ============================================================================ the corpus
@dataclass
class Case:
    name: str
    path: Path
    problem: str          # regular expression the one-line message must match (after the path)


def _layer_frames(cell, pos=((0, 0, 8.0),), pbc=True, n=3, symbol="C"):
    return [Atoms(symbol * len(pos), positions=pos, cell=cell, pbc=pbc) for _ in range(n)]


TRUSTED = ["OUTCAR", "vasprun.xml", "XDATCAR", "POSCAR", "pw.out", "relax.traj", "relax.extxyz",
           "rows.db", "rows.json", "OUTCAR.gz", "relax.traj.gz"]


def build_corpus(root: Path) -> list[Case]:
    """Write the bad-input corpus under ``root`` (one folder per entry) and return it."""
    rng = np.random.default_rng(20261201)
    cases = []

    def put(name, filename, data: bytes, problem):
        p = root / name / filename
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(data)
        cases.append(Case(name, p, problem))

    def put_frames(name, filename, frames, problem):
        p = root / name / filename
        p.parent.mkdir(parents=True, exist_ok=True)
        ase.io.write(p, frames)
        cases.append(Case(name, p, problem))

    for fn in TRUSTED:                     # empty files and binary garbage under trusted names
        tag = fn.replace(".", "_")
        put(f"empty_{tag}", fn, b"", r"empty file")
        put(f"garbage_{tag}", fn, rng.integers(0, 256, 4096, dtype=np.uint8).tobytes(),
            r"cannot be read|no completed ionic step|not an? |corrupt|unknown format|not a |"
            r"not valid")
    put("nul_bytes_extxyz", "relax.extxyz", b"\0" * 2048, r"no completed ionic step|not an XYZ")
    # a damaged atom count (one digit too many, or a bit flip): refused, no endless read
    xyz = (RUNS / "L08_emt_fire_loose.extxyz").read_bytes()
    first = xyz.split(b"\n", 1)
    put("xyz_huge_atom_count", "relax.extxyz", b"9" * 30 + b"\n" + first[1],
        r"gives 9+ atoms \(expected 1\.\.")
    put("xyz_huge_property_count", "relax.extxyz",
        re.sub(rb"forces:R:3", b"forces:R:99999999999999", xyz, count=1),
        r"malformed Properties=")
    put("xdatcar_huge_atom_count", "XDATCAR",
        b"x\n1.0\n3 0 0\n0 3 0\n0 0 16\nC\n99999999999999\nDirect configuration=     1\n"
        b"0 0 0\n", r"out of range")
    # the wrong format for the name, where the content has no signature to go by
    poscar = _poscar_text()
    put("poscar_named_xyz", "relax.xyz", poscar.encode(), r"not an XYZ frame header")
    put("qe_input_named_out", "pw.out", (QE / "relax_atoms_to_sites" / "pw.in").read_bytes(),
        r"no completed ionic step")
    put("json_not_a_database", "rows.json", b'{"runs": [1, 2, 3]}', r"unknown format")
    # real outputs cut inside their header: nothing completed
    pwo = (QE / "relax_atoms_to_sites" / "pw.out").read_bytes()
    put("pwout_cut_in_header", "pw.out", pwo[:pwo.index(b"Self-consistent Calculation") - 200],
        r"no completed ionic step")
    outcar = gzip.decompress((DATA / "vasp" / "OUTCAR_example_1.gz").read_bytes())
    put("outcar_cut_in_header", "OUTCAR", outcar[:outcar.index(b"Iteration") - 100],
        r"no completed ionic step")
    xml = (DATA / "vasp" / "vasprun_pstress.xml").read_bytes()
    put("vasprun_cut_before_first_step", "vasprun.xml", xml[:xml.index(b"<calculation>") - 10],
        r"no completed ionic step")
    gz = gzip.compress(pwo)
    put("pwout_gz_cut_to_20_bytes", "pw.out.gz", gz[:20], r"no completed ionic step|corrupt")
    # NaN / inf in cells and positions (ASE writes them as 'nan'/'inf'; a Fortran code as NaN)
    square = [[3.0, 0, 0], [0, 3.0, 0], [0, 0, 16.0]]
    put_frames("nan_cell_traj", "relax.traj",
               _layer_frames([[np.nan, 0, 0], [0, 3, 0], [0, 0, 16]]), r"non-finite cell")
    put_frames("inf_position_extxyz", "relax.extxyz",
               _layer_frames(square, pos=((np.inf, 0, 8.0),)), r"non-finite positions")
    put("nan_in_poscar", "POSCAR", poscar.replace("3.0000000000", "NaN", 1).encode(),
        r"non-finite cell|cannot be read")
    # singular, degenerate and nearly singular cells
    put_frames("zero_volume_traj", "relax.traj",
               _layer_frames([[3, 0, 0], [6, 0, 0], [0, 0, 16]]), r"singular cell")
    put_frames("zero_vector_traj", "relax.traj",
               _layer_frames([[3, 0, 0], [0, 0, 0], [0, 0, 16]]), r"cell vector 1 is zero")
    put_frames("coplanar_bulk_extxyz", "relax.extxyz",
               _layer_frames([[3, 0, 0], [0, 3, 0], [3, 3, 0]], pos=((0, 0, 0),)), r"singular cell")
    put_frames("collinear_layer_pbc_ttf", "relax.traj",
               _layer_frames([[3, 0, 0], [-6, 0, 0], [0, 0, 0]], pbc=[True, True, False]),
               r"parallel")
    put_frames("nearly_singular_traj", "relax.traj",
               _layer_frames([[3, 0, 0], [3, 1e-11, 0], [0, 0, 16]]), r"singular cell")
    # absurd lengths: a cell in metres (1e-8 of the Å value) or an unit slip to 1e8 Å
    put_frames("cell_1e-8_angstrom", "relax.traj",
               _layer_frames(np.array(square) * 1e-8 / 3, pos=((0, 0, 1e-8),)),
               r"implausible.*wrong length unit")
    put_frames("cell_1e8_angstrom", "relax.extxyz",
               _layer_frames(np.array(square) * 1e8 / 3, pos=((0, 0, 1e8),)),
               r"implausible.*wrong length unit")
    return cases


def _poscar_text():
    return ("invented square layer\n1.0\n"
            "  3.0000000000 0.0000000000 0.0000000000\n"
            "  0.0000000000 3.0000000000 0.0000000000\n"
            "  0.0000000000 0.0000000000 16.000000000\n"
            "C\n1\nDirect\n  0.0 0.0 0.5\n")


def _nan_in_pw_positions(pwo: bytes) -> bytes:
    """A real pw.x output whose second ATOMIC_POSITIONS card has a NaN coordinate."""
    i = pwo.index(b"ATOMIC_POSITIONS", pwo.index(b"ATOMIC_POSITIONS") + 1)
    j = pwo.index(b"\n", i) + 1                       # first atom line of the card
    line_end = pwo.index(b"\n", j)
    parts = pwo[j:line_end].split()
    parts[1] = b"NaN"
    return pwo[:j] + b"   " + b"  ".join(parts) + pwo[line_end:]


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    root = tmp_path_factory.mktemp("bad")
    return build_corpus(root)


def _ids(cases):
    return [c.name for c in cases]


with tempfile.TemporaryDirectory(prefix="dw-corpus-ids-") as _tmp:   # names only; removed at once
    CORPUS_NAMES = _ids(build_corpus(Path(_tmp)))


def _case(corpus, name) -> Case:
    return next(c for c in corpus if c.name == name)


def _one_line_naming(msg: str, path: Path, problem: str):
    assert "\n" not in msg.strip(), f"not one line: {msg!r}"
    assert str(path) in msg, f"does not name the file {path}: {msg}"
    assert re.search(problem, msg), f"does not say {problem!r}: {msg}"
    assert "Traceback" not in msg


# ----------------------------------------------------------------------------- API and CLI
@pytest.mark.parametrize("name", CORPUS_NAMES)
def test_corpus_entry_is_refused_with_one_line_naming_the_file(name, corpus):
    c = _case(corpus, name)
    with pytest.raises(DriftwatchError) as err:
        driftwatch.analyze(c.path)
    assert isinstance(err.value, InputError), f"{type(err.value).__name__}: {err.value}"
    _one_line_naming(str(err.value), c.path, c.problem)


@pytest.mark.parametrize("name", CORPUS_NAMES)
def test_cli_inspect_prints_one_line_and_exits_1(name, corpus, capsys):
    # the CLI's own code path in this process (the subprocess test below checks a few for real)
    c = _case(corpus, name)
    rc = cli.main(["inspect", str(c.path)])
    out, err = capsys.readouterr()
    assert rc == 1 and out == ""
    assert err.startswith("driftwatch: error: ")
    _one_line_naming(err, c.path, c.problem)


def _dw(*args, timeout=120, **kw):
    return subprocess.run([sys.executable, "-m", "driftwatch", *map(str, args)],
                          capture_output=True, text=True, timeout=timeout, cwd=REPO, **kw)


@pytest.mark.parametrize("name", ["garbage_relax_traj", "inf_position_extxyz",
                                  "cell_1e-8_angstrom", "empty_OUTCAR_gz"])
def test_cli_process_one_line_and_traceback_only_with_debug(name, corpus):
    c = _case(corpus, name)
    r = _dw("inspect", c.path)
    assert r.returncode == 1 and r.stdout == ""
    _one_line_naming(r.stderr, c.path, c.problem)
    r = _dw("inspect", c.path, "--debug")
    assert r.returncode != 0 and "Traceback (most recent call last)" in r.stderr
    assert str(c.path) in r.stderr


def test_wrong_name_for_the_content_is_read_by_content(tmp_path):
    # a file whose content has a signature is read by it, whatever its name, and gives the same
    # frames as under its proper name (real pw.x output; ASE's genuine OUTCAR; an ASE trajectory)
    pairs = [(QE / "relax_atoms_to_sites" / "pw.out", "OUTCAR"),
             (RUNS / "L06_emt_bfgs.traj", "POSCAR"),
             (DATA / "vasp" / "vasprun_pstress.xml", "relax.traj"),
             (RUNS / "L08_emt_fire_loose.extxyz", "rows.db")]
    for src, wrong in pairs:
        p = tmp_path / src.stem / wrong
        p.parent.mkdir()
        shutil.copy(src, p)
        a, b = read_run(src), read_run(p)
        assert a.format == b.format
        assert np.array_equal(a.cells, b.cells) and np.array_equal(a.positions, b.positions)
    # forcing a wrong adapter is a one-line error naming the file
    pw = QE / "relax_atoms_to_sites" / "pw.out"
    for fmt in ("vasp-xml", "vasp-out", "traj", "extxyz", "ase-db", "vasp-xdatcar"):
        with pytest.raises(InputError) as err:
            read_run(pw, format=fmt)
        assert str(pw) in str(err.value) and "\n" not in str(err.value)


def test_truncated_real_output_gives_a_record_with_a_warning_not_an_error(tmp_path):
    # a pw.x job killed mid-relaxation (real output cut after its 3rd '!' energy): the completed
    # steps are analysed and the record says the file is truncated
    pwo = (QE / "layer_oblique_to_hex" / "pw.out").read_bytes()
    marks = [m.start() for m in re.finditer(rb"^!    total energy", pwo, re.M)]
    cut = tmp_path / "killed" / "pw.out"
    cut.parent.mkdir()
    cut.write_bytes(pwo[:marks[3] + 30])
    rec = driftwatch.analyze(cut)
    full = driftwatch.analyze(QE / "layer_oblique_to_hex")
    n = rec["run"]["n_frames"]
    assert 1 <= n < full["run"]["n_frames"]
    assert any("truncated" in w and str(cut) in w for w in rec["run"]["warnings"])
    for a, b in zip(rec["frames"], full["frames"][:n]):
        assert a["root_invariant"] == b["root_invariant"]       # the same numbers, never others


def test_a_compressed_copy_cut_mid_stream_is_told_from_a_whole_copy_of_a_killed_job(tmp_path):
    """A real pw.x output cut after its 3rd energy: gzipped whole, the job was killed (the gzip
    stream ends with its trailer); a gzip copy cut mid-stream (a transfer or copy stopped early)
    says its stream ends early instead. Either way the steps read are kept."""
    pwo = (QE / "layer_oblique_to_hex" / "pw.out").read_bytes()
    marks = [m.start() for m in re.finditer(rb"^!    total energy", pwo, re.M)]
    killed = tmp_path / "killed" / "pw.out.gz"
    killed.parent.mkdir()
    killed.write_bytes(gzip.compress(pwo[:marks[3] + 30]))
    whole = gzip.compress(pwo)
    copy = tmp_path / "copy" / "pw.out.gz"
    copy.parent.mkdir()
    copy.write_bytes(whole[:len(whole) * 2 // 3])
    with pytest.raises(EOFError):
        gzip.decompress(copy.read_bytes())                           # Python's gzip: cut
    a, b = driftwatch.analyze(killed)["run"], driftwatch.analyze(copy)["run"]
    assert a["unfinished"] == "cut short: job killed or still running"
    assert b["unfinished"] == "cut short: its compressed stream ends early: an incomplete copy, " \
                              "or a job still writing it"
    assert any("truncated" in w and "compressed stream ends early" in w for w in b["warnings"])
    assert not any("compressed stream" in w for w in a["warnings"])
    assert a["n_frames"] >= 1 and b["n_frames"] >= 1


def test_one_atom_and_5000_atom_cells_are_analysed(tmp_path):
    # one atom: the lattice alone (square of side 3 Å: root invariant (0, 3, 3), shared/math.md 1.3)
    p = tmp_path / "one.traj"
    ase.io.write(p, _layer_frames([[3, 0, 0], [0, 3, 0], [0, 0, 16]], n=2))
    rec = driftwatch.analyze(p)
    assert rec["geometry"]["dimension"] == 2
    assert np.allclose(rec["frames"][-1]["root_invariant"], [0, 3, 3], atol=1e-12)
    # 5000 atoms: an fcc Cu supercell (ASE bulk, a = 3.6 Å, 10 x 5 x 25 cubic cells), two frames
    from ase.build import bulk
    from driftwatch import symmetry
    big = bulk("Cu", "fcc", a=3.6, cubic=True).repeat((10, 5, 25))
    big.rattle(1e-4, seed=3)
    assert len(big) == 5000
    p = tmp_path / "big.traj"
    ase.io.write(p, [big, big])
    t0 = time.perf_counter()
    rec = driftwatch.analyze(p, frames=[])          # invariants of every frame, no spglib
    assert rec["run"]["n_atoms"] == 5000 and rec["geometry"]["dimension"] == 3
    # the 36 x 18 x 90 Å supercell lattice is orthorhombic primitive (oP), not tetragonal
    d = rec["frames"][-1]["distance"]
    assert d["oP"] < 1e-9 and d["tP"] > 1 and all(np.isfinite(v) for v in d.values())
    # spglib on all 5000 atoms at 1e-3 Å: Fm-3m (No. 225), the fcc space group (Int. Tables)
    s = symmetry.spectrum(big.cell.array, big.positions, big.numbers, symprecs=[1e-3],
                          bisect=False)
    assert s["group"] == [225]
    assert time.perf_counter() - t0 < 30


def test_file_growing_while_read_gives_only_prefixes(tmp_path):
    # a real pw.x output written by another thread in 4 kB pieces while driftwatch reads it: every
    # read returns completed steps equal to the start of the full run, or "no completed step"
    src = (QE / "layer_oblique_to_hex" / "pw.out").read_bytes()
    full = read_run(QE / "layer_oblique_to_hex" / "pw.out")
    live = tmp_path / "job" / "pw.out"
    live.parent.mkdir()
    live.write_bytes(b"")
    done = threading.Event()

    def writer():
        with open(live, "ab", buffering=0) as fh:
            for i in range(0, len(src), 4096):
                fh.write(src[i:i + 4096])
                time.sleep(0.002)
        done.set()

    t = threading.Thread(target=writer)
    t.start()
    counts = []
    try:
        while not done.is_set() or not counts or counts[-1] < len(full):
            try:
                run = read_run(live)
            except InputError as exc:
                assert str(live) in str(exc)
                assert re.search(r"empty file|no completed ionic step", str(exc)), exc
                continue
            n = len(run.cells)
            assert np.array_equal(run.cells, full.cells[:n])
            assert np.array_equal(run.positions, full.positions[:n])
            counts.append(n)
            if done.is_set() and n == len(full):
                break
    finally:
        t.join()
    assert counts == sorted(counts) and counts[-1] == len(full) and len(set(counts)) > 2


# ----------------------------------------------------------------------------- permissions
def _unprivileged(cmd):
    """Run ``cmd`` so that file permissions apply (as root: without CAP_DAC_OVERRIDE)."""
    if IS_ROOT:
        caps = "-dac_override,-dac_read_search"
        cmd = [SETPRIV, f"--inh-caps={caps}", f"--bounding-set={caps}", "--", *cmd]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=120, cwd=REPO)


@pytest.mark.skipif(IS_ROOT and SETPRIV is None, reason="root without setpriv: permissions "
                                                         "cannot be enforced")
def test_unreadable_file_and_folder(tmp_path):
    f = tmp_path / "locked.traj"
    shutil.copy(RUNS / "L06_emt_bfgs.traj", f)
    d = tmp_path / "lockeddir"
    d.mkdir()
    shutil.copytree(QE / "relax_atoms_to_sites", d / "run")
    f.chmod(0)
    d.chmod(0)
    try:
        for target, words in ((f, "cannot open (Permission denied)"),
                              (d / "run", "Permission denied"), (d, "cannot list folder")):
            r = _unprivileged([sys.executable, "-m", "driftwatch", "inspect", str(target)])
            assert r.returncode == 1, r.stderr
            _one_line_naming(r.stderr, target, re.escape(words))
        # in a campaign: the unreadable file and folder are failed entries, the rest is audited
        camp = tmp_path / "camp"
        camp.mkdir()
        shutil.copy(RUNS / "L09_emt_fixed_square.traj", camp / "ok.traj")
        os.symlink(f, camp / "locked.traj")
        os.symlink(d, camp / "lockeddir")
        out = tmp_path / "out"
        r = _unprivileged([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o", str(out),
                           "-j", "1", "--no-report", "--progress", "off", "--json"])
        assert r.returncode == 4, r.stderr
        s = json.loads(r.stdout)
        assert s["runs"] == 3 and len(s["failed"]) == 2 and list(s["records"]) == ["camp/ok.traj"]
        assert all("Permission denied" in x["error"] for x in s["failed"])
    finally:
        f.chmod(0o644)
        d.chmod(0o755)


# ----------------------------------------------------------------------------- campaign
def test_campaign_of_the_corpus_records_every_bad_run_as_failed(corpus, tmp_path):
    root = corpus[0].path.parent.parent
    good = root / "zz_good" / "L09.traj"
    good.parent.mkdir(exist_ok=True)
    shutil.copy(RUNS / "L09_emt_fixed_square.traj", good)
    out = tmp_path / "out"
    s = driftwatch.campaign.audit([root], out, workers=1, report=True, progress="off",
                                  quiet=True) if hasattr(driftwatch, "campaign") else None
    if s is None:
        from driftwatch.campaign import audit
        s = audit([root], out, workers=1, report=True, progress="off", quiet=True)
    assert list(s["records"]) == [f"{root.name}/zz_good/L09.traj"]
    failed = {f["run"]: f for f in s["failed"]}
    # a *.json file is a run only when its content is recognised (issue 16: parameter files, notes
    # and our own records are not runs), so the JSON cases of the corpus are not in the campaign
    corpus = [c for c in corpus if not c.path.name.endswith(".json")]
    for c in corpus:
        rid = next((k for k in failed if k.split("/")[1] == c.name), None)
        assert rid is not None, f"{c.name} is not a failed run of the campaign"
        err = failed[rid]["error"]
        assert str(c.path.parent) in err and "\n" not in err
    assert len(failed) == len(corpus)
    assert sorted(p.name for p in (out / "records").glob("*.json")) == \
        [records.safe_name(f"{root.name}/zz_good/L09.traj") + ".json"]
    import csv
    rows = list(csv.DictReader((out / "campaign.csv").open(encoding="utf-8")))
    assert sum(r["verdict"] == "failed" for r in rows) == len(corpus)
    assert all(r["error"] for r in rows if r["verdict"] == "failed")
    import ase.db
    with ase.db.connect(out / "runs.db") as db:
        assert db.count(verdict="failed") == len(corpus)
    assert "failed" in (out / "report" / "index.html").read_text(encoding="utf-8")


def _tree_with_loops(root: Path) -> Path:
    camp = root / "camp"
    (camp / "a").mkdir(parents=True)
    shutil.copy(RUNS / "L09_emt_fixed_square.traj", camp / "a" / "ok.traj")
    os.symlink(camp, camp / "a" / "up")                 # a loop through an ancestor
    (camp / "b").mkdir()
    shutil.copy(RUNS / "L06_emt_bfgs.traj", camp / "b" / "ok2.traj")
    return camp


def test_campaign_with_a_symlink_loop_through_an_ancestor(tmp_path):
    from driftwatch.campaign import audit
    camp = _tree_with_loops(tmp_path)
    s = audit([camp], tmp_path / "out", workers=1, report=False, progress="off", quiet=True)
    assert sorted(s["records"]) == ["camp/a/ok.traj", "camp/b/ok2.traj"] and not s["failed"]


def test_campaign_with_self_looping_symlinks_keeps_the_folders_runs(tmp_path):
    from driftwatch.campaign import audit
    camp = _tree_with_loops(tmp_path)
    os.symlink("selfloop", camp / "b" / "selfloop")       # ln -s selfloop selfloop
    os.symlink("y.traj", camp / "b" / "x.traj")           # x -> y -> x
    os.symlink("x.traj", camp / "b" / "y.traj")
    s = audit([camp], tmp_path / "out", workers=1, report=False, progress="off", quiet=True)
    assert "camp/b/ok2.traj" in s["records"]


def test_campaign_with_non_utf8_names(tmp_path):
    from driftwatch.campaign import audit
    camp = tmp_path / "camp"
    camp.mkdir()
    os.makedirs(os.fsencode(camp) + b"/caf\xe9")
    shutil.copy(RUNS / "L06_emt_bfgs.traj", os.fsencode(camp) + b"/caf\xe9/run\xff.traj")
    shutil.copy(RUNS / "L09_emt_fixed_square.traj", camp / "ok.traj")
    s = audit([camp], tmp_path / "out", workers=1, report=True, progress="off", quiet=True)
    assert len(s["records"]) == 2


def test_looping_and_dangling_symlinks_given_directly(tmp_path, capsys):
    loop = tmp_path / "loop.traj"
    os.symlink(loop.name, loop)                          # ln -s loop.traj loop.traj
    dangling = tmp_path / "OUTCAR"
    os.symlink(tmp_path / "gone" / "OUTCAR", dangling)
    for p in (loop, dangling):
        with pytest.raises(InputError) as err:
            read_run(p)
        _one_line_naming(str(err.value), p, r"broken symbolic link")
        assert cli.main(["inspect", str(p)]) == 1
        _one_line_naming(capsys.readouterr().err, p, r"broken symbolic link")


def test_non_utf8_file_name_inspect(tmp_path):
    p = os.fsencode(tmp_path) + b"/caf\xe9-run\xff.traj"
    shutil.copy(RUNS / "L06_emt_bfgs.traj", p)
    r = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", p], capture_output=True,
                       timeout=120, cwd=REPO)
    assert r.returncode == 0, r.stderr
    bad = os.fsencode(tmp_path) + b"/caf\xe9-bad\xff.traj"
    with open(bad, "wb") as fh:
        fh.write(b"garbage" * 100)
    r = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", bad], capture_output=True,
                       timeout=120, cwd=REPO)
    assert r.returncode == 1 and len(r.stderr.strip().splitlines()) == 1
    assert b"Traceback" not in r.stderr and b"caf" in r.stderr


# ----------------------------------------------------------------------------- YAML configs
BAD_CONFIGS = {
    "wrong_key.yaml": ("rules:\n  latice:\n    within: 1e-3 Å\n", r"unknown key 'rules\.latice'"),
    "wrong_top_key.yaml": ("symetry:\n  grid_points: 5\n", r"unknown key 'symetry'"),
    "wrong_type.yaml": ("symmetry:\n  grid_points: many\n", r"symmetry\.grid_points"),
    "bool_as_text.yaml": ("symmetry:\n  bisect: 'yes please'\n", r"symmetry\.bisect"),
    "missing_unit.yaml": ("rules:\n  lattice:\n    within: 0.001\n",
                          r"rules\.lattice\.within: missing unit"),
    "old_key.yaml": ("rules:\n  snapped:\n    within: 1e-3 Å\n",
                     r"'rules\.snapped' was renamed: use 'rules\.lattice'"),
    "wrong_unit.yaml": ("geometry:\n  vacuum_gap: 6 furlongs\n", r"geometry\.vacuum_gap.*unit"),
    "angle_as_length.yaml": ("symmetry:\n  angle_tolerance: 5 Å\n", r"symmetry\.angle_tolerance"),
    "not_a_mapping.yaml": ("- just\n- a list\n", r"mapping"),
    "broken_yaml.yaml": ("rules: [unclosed\n", r"invalid YAML"),
    "python_tag.yaml": ("rules: !!python/object/apply:os.system ['touch /tmp/dw-pwned']\n",
                        r"invalid YAML"),
    "inconsistent.yaml": ("symmetry:\n  symprec_min: 1 Å\n  symprec_max: 1e-3 Å\n",
                          r"symprec_min"),
}


@pytest.mark.parametrize("name", sorted(BAD_CONFIGS))
def test_bad_yaml_configs_give_one_line_naming_the_key(name, tmp_path, capsys):
    text, problem = BAD_CONFIGS[name]
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError) as err:
        dwconfig.load(p)
    assert re.search(problem, str(err.value)), err.value
    assert "\n" not in str(err.value)
    rc = cli.main(["inspect", str(QE / "relax_atoms_to_sites"), "-c", str(p)])
    out, errtext = capsys.readouterr()
    assert rc == 1 and len(errtext.strip().splitlines()) == 1 and "Traceback" not in errtext
    assert not Path("/tmp/dw-pwned").exists()


def test_config_value_errors_name_the_file(tmp_path):
    p = tmp_path / "site.yaml"
    p.write_text("rules:\n  lattice:\n    within: 0.001\n", encoding="utf-8")
    with pytest.raises(ConfigError, match=re.escape(str(p))):
        dwconfig.load(p)


def test_committed_bad_configs_are_refused():
    # tests/data/bad/*.yaml: small committed examples users can compare their files with
    for p in sorted((DATA / "bad").glob("*.yaml")):
        with pytest.raises(ConfigError):
            dwconfig.load(p)


# ----------------------------------------------------------------------------- errors with names
def test_analysis_errors_name_the_file(tmp_path):
    p = tmp_path / "molecule.traj"
    ase.io.write(p, [Atoms("CO", positions=[[0, 0, 0], [0, 0, 1.13]])] * 2)   # pbc False: 0D
    with pytest.raises(DriftwatchError, match=re.escape(str(p))):
        driftwatch.analyze(p)


def test_two_dimensional_ase_cell_with_zero_vacuum_vector_is_analysed(tmp_path):
    # ASE's 2D convention (pbc = T, T, F and c = 0, as ase.build.graphene(vacuum=None) writes):
    # the square layer of side 3 Å has root invariant (0, 3, 3) (shared/math.md 1.3) and spglib
    # finds the square layer group p4/mmm (No. 61; International Tables Vol. E) at 1e-3 Å
    p = tmp_path / "sq.traj"
    ase.io.write(p, _layer_frames([[3, 0, 0], [0, 3, 0], [0, 0, 0]], pbc=[True, True, False],
                                  pos=((0, 0, 0),)))
    rec = driftwatch.analyze(p)
    f = rec["frames"][-1]
    assert np.allclose(f["root_invariant"], [0, 3, 3]) and rec["geometry"]["dimension"] == 2
    i = int(np.argmin(np.abs(np.log(np.array(f["symmetry"]["symprec"]) / 1e-3))))
    assert f["symmetry"]["group"][i] == 61


# ============================================================================ kills and atomicity
def _campaign(root: Path, n: int) -> Path:
    camp = root / "camp"
    for i in range(n):
        g0, g1 = 95.0 + 2 * i, 101.0 + 2 * i
        frames = []
        for t in np.linspace(0, 1, 6):
            g = np.radians(g0 + t * (g1 - g0))
            frames.append(Atoms("C", positions=[[0, 0, 8.0]], pbc=True,
                                cell=[[3.0, 0, 0], [3.2 * np.cos(g), 3.2 * np.sin(g), 0],
                                      [0, 0, 16.0]]))
        p = camp / f"grp{i % 3}" / f"L-{i:02d}.traj"
        p.parent.mkdir(parents=True, exist_ok=True)
        ase.io.write(p, frames)
    (camp / "grp0" / "broken.traj").write_bytes(b"not a trajectory" * 10)
    shutil.copytree(QE / "relax_atoms_to_sites", camp / "qe")
    return camp


def _outputs(out: Path) -> dict:
    got = {p.name: p.read_bytes() for p in sorted((out / "records").glob("*.json"))}
    got["campaign.csv"] = (out / "campaign.csv").read_bytes()
    return got


def _check_cache(out: Path) -> int:
    from driftwatch.cache import CACHE_SCHEMA
    n = 0
    if not (out / ".cache").is_dir():
        return 0
    for p in sorted((out / ".cache").iterdir()):
        if p.name.startswith("."):       # a temporary file a kill left: never read as an entry
            assert p.name.endswith(".tmp"), p
            continue
        data = json.loads(p.read_text(encoding="utf-8"))    # every entry parses
        assert data["schema"] == CACHE_SCHEMA
        if p.name not in ("digests.json", "discovery.index"):     # entries, not the indexes
            assert data["key"] == p.stem and isinstance(data["result"], dict)
            n += 1
    return n


def test_audit_killed_at_several_points_then_rerun_matches_uninterrupted(tmp_path):
    """SIGKILL a real audit process at six moments (during discovery, after the first cache
    entry, after 1, 3 and 6 records, while the summary/database/report are written), re-running
    into the same folder after each kill; then finish. Records and CSV must equal those of an
    uninterrupted audit, and every cache entry must parse."""
    camp = _campaign(tmp_path, 9)
    out, ref = tmp_path / "out", tmp_path / "ref"
    code = ("import sys\nfrom driftwatch.campaign import audit\n"
            f"audit([{str(camp)!r}], {str(out)!r}, workers=1, report=True, progress='off', "
            "quiet=True)\n")

    def n_records():
        return len(list((out / "records").glob("*.json"))) if (out / "records").is_dir() else 0

    def n_cache():
        d = out / ".cache"
        return len([p for p in d.glob("*.json") if p.name != "digests.json"]) if d.is_dir() else 0

    points = [("discovery", lambda: (out / "records").is_dir()),
              ("first cache entry", lambda: n_cache() >= 1),
              ("1 record", lambda: n_records() >= 1),
              ("3 records", lambda: n_records() >= 3),
              ("6 records", lambda: n_records() >= 6),
              ("summary", lambda: (out / "campaign.csv").exists())]
    killed = []
    for label, ready in points:
        proc = subprocess.Popen([sys.executable, "-c", code], cwd=REPO)
        deadline = time.monotonic() + 120
        while proc.poll() is None and time.monotonic() < deadline:
            if ready():
                proc.send_signal(signal.SIGKILL)
                break
            time.sleep(0.002)
        proc.wait(60)
        if proc.returncode == -signal.SIGKILL:
            killed.append(label)
        _check_cache(out)                              # no corrupt entry after any kill
    assert len(killed) >= 4, f"too few kills landed: {killed}"
    from driftwatch.campaign import audit
    s = audit([camp], out, workers=1, report=True, progress="off", quiet=True)
    r = audit([camp], ref, workers=1, report=True, progress="off", quiet=True)
    assert s["runs"] == r["runs"] == 11 and len(s["failed"]) == len(r["failed"]) == 1
    assert _outputs(out) == _outputs(ref)
    assert _check_cache(out) == _check_cache(ref) == 11
    assert json.loads((out / "campaign.json").read_text())["runs"] == 11


def test_rerun_removes_temporary_files_left_by_a_kill(tmp_path):
    from driftwatch.campaign import audit
    camp = _campaign(tmp_path, 2)
    out = tmp_path / "out"
    audit([camp], out, workers=1, report=False, progress="off", quiet=True)
    left = [out / "records" / ".driftwatch-k1ll3d01.tmp",             # records.TEMP_PREFIX
            out / ".cache" / ".driftwatch-k1ll3d02.tmp"]
    for p in left:
        p.write_text('{"schema": "driftwatch/run-1", "fra')           # torn by the kill
    audit([camp], out, workers=1, report=False, progress="off", quiet=True)
    assert not [p for p in left if p.exists()]


def test_interrupted_write_keeps_the_old_file(tmp_path, monkeypatch):
    # atomic writes: a failure between writing the temporary file and the rename leaves the old
    # file intact and no temporary behind (records.write_json, used for records and cache entries)
    target = tmp_path / "rec.json"
    records.write_json({"schema": "driftwatch/run-1", "v": 1}, target)

    def boom(src, dst):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "replace", boom)
    with pytest.raises(OSError):
        records.write_json({"schema": "driftwatch/run-1", "v": 2}, target)
    monkeypatch.undo()
    assert json.loads(target.read_text())["v"] == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["rec.json"]


def test_symlink_planted_in_records_is_not_written_through(tmp_path):
    # a record file replaced by a symlink to a file outside OUTPUT: the audit never writes through it
    from driftwatch.campaign import audit
    camp = _campaign(tmp_path, 2)
    out = tmp_path / "out"
    audit([camp], out, workers=1, report=False, progress="off", quiet=True)
    victim = tmp_path / "victim.txt"
    victim.write_text("precious")
    rec = sorted((out / "records").glob("*.json"))[0]
    rec.unlink()
    os.symlink(victim, rec)
    try:
        audit([camp], out, workers=1, report=False, progress="off", quiet=True)
    except OutputError as exc:
        assert "outside the output folder" in str(exc)
    assert victim.read_text() == "precious"


# ============================================================================ security
_FORBIDDEN = {"pickle", "cPickle", "dill", "marshal", "shelve", "eval", "exec", "unsafe_load",
              "full_load", "__import__"}


def _names_in_source(path: Path):
    with open(path, "rb") as fh:
        for tok in tokenize.tokenize(fh.readline):
            if tok.type == tokenize.NAME:
                yield tok.string, tok.start[0]


def test_package_source_has_no_pickle_eval_exec_or_unsafe_yaml():
    # common practice (OWASP deserialisation guidance): no pickle/marshal/eval/exec of any data;
    # names are taken from the token stream, so comments and strings do not count
    hits = []
    for p in sorted((REPO / "driftwatch").rglob("*.py")):
        for name, line in _names_in_source(p):
            if name in _FORBIDDEN:
                hits.append(f"{p.relative_to(REPO)}:{line}: {name}")
        text = p.read_text(encoding="utf-8")
        for m in re.finditer(r"yaml\.load\(|Loader\s*=\s*yaml\.(Full|Unsafe)?Loader", text):
            hits.append(f"{p.relative_to(REPO)}: {m.group(0)}")
    assert not hits, hits


def test_registry_never_dispatches_to_a_pickle_reader(tmp_path):
    # a pickle payload (the old ASE PickleTrajectory format) under every trusted name: refused,
    # and the payload never runs (it would create a marker file)
    import pickle  # noqa: F401  (the test builds the payload; the package never imports it)
    marker = tmp_path / "PWNED"

    class Payload:
        def __reduce__(self):
            return (open, (str(marker), "w"))

    blob = pickle.dumps(Payload(), protocol=2)
    for name in TRUSTED + ["relax.pckl", "run.pickle", "x.traj"]:
        p = tmp_path / name
        p.write_bytes(blob)
        with pytest.raises(InputError):
            read_run(p)
        for fmt in driftwatch.adapters.formats():
            try:
                read_run(p, format=fmt)
            except InputError:
                pass
    assert not marker.exists()
    from driftwatch.adapters import registry
    for f in registry._formats.values():
        mod = f.load().__module__
        src = Path(sys.modules[mod].__file__)
        assert not [n for n, _ in _names_in_source(src) if n in _FORBIDDEN], mod


def test_pymatgen_json_cannot_import_modules(tmp_path):
    # monty's decoder (behind pymatgen's Structure.from_dict) imports any module named under
    # '@module'; a data file must not be able to run code that way. A canary module on the path
    # would write a marker file when imported.
    canary = tmp_path / "dw_canary_mod.py"
    marker = tmp_path / "IMPORTED"
    canary.write_text(f"open({str(marker)!r}, 'w').write('x')\ndef f():\n    pass\n")
    from pymatgen.io.ase import AseAtomsAdaptor
    d = AseAtomsAdaptor.get_structure(ase.io.read(RUNS / "L06_emt_bfgs.traj", 0)).as_dict()
    d["sites"][0]["properties"] = {"x": {"@module": "dw_canary_mod", "@callable": "f"}}
    d["properties"] = {"y": {"@module": "dw_canary_mod", "@class": "f"}}
    payload = tmp_path / "structures.json"
    payload.write_text(json.dumps([d, d]))
    r = subprocess.run([sys.executable, "-c", "import sys; from driftwatch import read_run; "
                        f"r = read_run({str(payload)!r}); print(len(r.cells), r.format)"],
                       capture_output=True, text=True, timeout=120, cwd=REPO,
                       env=dict(os.environ, PYTHONPATH=f"{tmp_path}{os.pathsep}{REPO}"))
    assert r.returncode == 0, r.stderr
    assert r.stdout.split() == ["2", "pymatgen-json"]
    assert not marker.exists(), "a module named in the data file was imported"


def test_soft_stop_writes_only_inside_the_run_folder(tmp_path):
    from driftwatch.live import request_stop
    run = tmp_path / "run"
    run.mkdir()
    outside = tmp_path / "outside"
    outside.mkdir()
    victim = outside / "STOPCAR"
    # a STOPCAR symlink planted in the run folder pointing outside: refused, nothing written
    os.symlink(victim, run / "STOPCAR")
    with pytest.raises(OutputError, match="outside the run folder"):
        request_stop(run, "vasp", reason="snapped")
    assert not victim.exists()
    (run / "STOPCAR").unlink()
    # pw.x: prefixes and outdirs that climb out, absolute or through a symlink
    os.symlink(outside, run / "scratch")
    for kw in ({"prefix": "../evil", "outdir": "."}, {"prefix": "x", "outdir": "../outside"},
               {"prefix": "x", "outdir": str(outside)}, {"prefix": "x", "outdir": "scratch"},
               {"prefix": "..", "outdir": "."}):
        with pytest.raises(OutputError):
            request_stop(run, "espresso", reason="snapped", **kw)
    assert sorted(p.name for p in outside.iterdir()) == []
    # and in range: written atomically inside the folder, with the reason
    info = request_stop(run, "vasp", reason="snapped <script>")
    assert Path(info["path"]) == (run / "STOPCAR").resolve()
    assert (run / "STOPCAR").read_text().startswith("LSTOP = .TRUE.")
    assert sorted(p.name for p in outside.iterdir()) == []


def test_report_output_stays_inside_the_output_folder(tmp_path):
    # a run whose id holds ../ (a folder literally named '..x..' and a record claiming a
    # traversing source): every page is written inside the chosen report folder
    from driftwatch.campaign import audit
    camp = tmp_path / "camp"
    (camp / "x..").mkdir(parents=True)          # (names starting with a dot are hidden: skipped)
    shutil.copy(RUNS / "L09_emt_fixed_square.traj", camp / "x.." / "r..traj")
    out = tmp_path / "deep" / "out"
    s = audit([camp], out, workers=1, report=True, progress="off", quiet=True)
    assert list(s["records"]) == ["camp/x../r..traj"]
    before = {p for p in tmp_path.rglob("*")}
    written = [p for p in before if str(p).startswith(str(out))]
    assert written and all(p.resolve().is_relative_to(out.resolve()) for p in written)
    assert not (tmp_path / "deep" / "r..traj.html").exists()
    assert not [p for p in before if p.parent == tmp_path / "deep" and p != out]


@pytest.mark.slow       # ~22 s: ase.db's own SQLite busy timeout is 20 s
def test_locked_sqlite_database_fails_cleanly_within_bounded_time(tmp_path):
    """Another process holds a write transaction on the campaign's ase.db file (real SQLite,
    BEGIN EXCLUSIVE): the audit ends with a one-line error naming the database, within a bounded
    time, and a later audit (lock gone) completes from the cache."""
    camp = _campaign(tmp_path, 2)
    db = tmp_path / "shared.db"
    import ase.db
    with ase.db.connect(db) as c:                       # an existing ASE database
        c.write(Atoms("H"), note="someone else's row")
    holder = subprocess.Popen([sys.executable, "-c",
                               "import sqlite3, sys, time\n"
                               f"c = sqlite3.connect({str(db)!r}, isolation_level=None)\n"
                               "c.execute('BEGIN EXCLUSIVE')\n"
                               "print('locked', flush=True)\n"
                               "time.sleep(300)\n"], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        t0 = time.monotonic()
        r = _dw("audit", camp, "-o", tmp_path / "out", "--db", db, "--no-report", "--progress",
                "off", "-j", "1", timeout=200)
        took = time.monotonic() - t0
        assert r.returncode == 1, r.stderr
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and str(db) in lines[0] and "Traceback" not in r.stderr
        assert re.search(r"locked|cannot write", lines[0])
        assert took < 90, f"waited {took:.0f} s on a locked database"
    finally:
        holder.kill()
        holder.wait()
    r = _dw("audit", camp, "-o", tmp_path / "out", "--db", db, "--no-report", "--progress", "off",
            "-j", "1", "--json")
    assert r.returncode == 4, r.stderr                   # one run of the campaign is broken
    s = json.loads(r.stdout)
    assert s["cached"] == s["runs"] and not s["db_problems"]
    with ase.db.connect(db) as c:
        assert c.count(note="someone else's row") == 1 and c.count(verdict="failed") == 1


@pytest.mark.skipif(CHROMIUM is None, reason="headless chromium (Debian 'chromium') not installed")
@pytest.mark.browser
def test_script_in_input_files_does_not_run_in_the_report(tmp_path):
    """Input files whose title, file name and folder name carry script payloads (a POSCAR comment
    line, an extxyz comment, a failing file's name): the audit's HTML report, loaded in headless
    Chromium, shows them as text; no injected element exists and the page title is unchanged."""
    from driftwatch.campaign import audit
    js = "document.title='pwned'"
    camp = tmp_path / "camp"
    run = camp / "<img src=x onerror=\"document.title='pwned'\">"
    run.mkdir(parents=True)
    frames = ase.io.read(RUNS / "L06_emt_bfgs.traj", ":3")
    for a in frames:
        a.info["note"] = f"<script>{js}</script>"
    ase.io.write(run / "<b onmouseover=\"document.title='pwned'\">relax.extxyz", frames)
    poscar = _poscar_text().replace("invented square layer", f"<script>{js}</script> layer")
    (camp / "vasp").mkdir()
    (camp / "vasp" / "CONTCAR").write_text(poscar)
    (camp / f"<svg onload=\"{js}\">.traj").write_bytes(b"garbage" * 10)
    out = tmp_path / "out"
    s = audit([camp], out, workers=1, report=True, progress="off", quiet=True)
    assert len(s["records"]) == 2 and len(s["failed"]) == 1
    pages = [out / "report" / "index.html", *sorted((out / "report").rglob("runs/*.html"))]
    assert len(pages) >= 3
    for page in pages:
        with tempfile.TemporaryDirectory() as profile:
            res = subprocess.run([CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu",
                                  "--no-first-run", "--disable-background-networking",
                                  f"--user-data-dir={profile}", "--dump-dom", page.as_uri()],
                                 capture_output=True, text=True, timeout=120)
        assert res.returncode == 0, res.stderr[-1000:]
        dom = res.stdout
        title = dom[dom.index("<title>") + 7:dom.index("</title>")]
        assert title != "pwned" and "driftwatch" in title, title   # no script set the title
        from html.parser import HTMLParser

        class Tags(HTMLParser):
            found = []

            def handle_starttag(self, tag, attrs):
                self.found.append((tag, dict(attrs)))

        p = Tags()
        p.found = []
        p.feed(dom)
        assert not [a for t, a in p.found if t in ("img", "svg") and
                    ("onerror" in a or "onload" in a)], page
        for t, a in p.found:
            assert not any(k.startswith("on") and "pwned" in (v or "") for k, v in a.items()), page
        scripts = [i for i in range(len(p.found)) if p.found[i][0] == "script"]
        assert js not in "".join(str(p.found[i]) for i in scripts)
        assert "pwned" in dom          # the payload is there, as text


def test_an_audit_in_an_iso_8859_1_locale_names_runs_as_in_a_utf_8_one(tmp_path):
    """A campaign under a folder named in UTF-8 ("Ünïcødé ✓", the bytes on disk), audited from a
    UTF-8 shell and then from a batch job whose locale is ISO-8859-1 (glibc's localedef, Debian's
    locales): the same run ids, one record file, and no internal error. Python decodes file names
    and arguments with the locale's encoding; the second audit had crashed printing a name
    (UnicodeEncodeError) after writing the run under a second, garbled id and record."""
    import csv
    camp = tmp_path / "my runs" / "Ünïcødé ✓"
    shutil.copytree(REPO / "example_runs" / "L01_qe_vcrelax", camp / "L01 qe")
    (tmp_path / "locale").mkdir()
    made = subprocess.run(["localedef", "-i", "en_US", "-f", "ISO-8859-1",
                           str(tmp_path / "locale" / "en_US.ISO-8859-1")],
                          capture_output=True, text=True, check=False)
    if not (tmp_path / "locale" / "en_US.ISO-8859-1").is_dir():
        pytest.skip(f"no ISO-8859-1 locale could be made here: {made.stderr.strip()[:200]}")
    latin = {**os.environ, "LOCPATH": str(tmp_path / "locale"), "LC_ALL": "en_US.ISO-8859-1"}
    latin.pop("PYTHONIOENCODING", None)
    check = subprocess.run([sys.executable, "-c", "import sys; print(sys.getfilesystemencoding())"],
                           env=latin, capture_output=True, text=True, check=True)
    assert check.stdout.strip() == "iso8859-1"
    ids = []
    for env in (dict(os.environ, LC_ALL="C.UTF-8"), latin):
        proc = subprocess.run([sys.executable, "-m", "driftwatch", "audit", "my runs", "-o", "out",
                               "--no-report"], cwd=tmp_path, env=env, capture_output=True,
                              timeout=600, check=False)
        assert proc.returncode == 0 and b"internal error" not in proc.stderr, proc.stderr
        with open(tmp_path / "out" / "campaign.csv", newline="", encoding="utf-8") as fh:
            ids.append([r["run"] for r in csv.DictReader(fh)])
    assert ids[0] == ids[1] == ["my runs/Ünïcødé ✓/L01 qe"]
    assert [p.name for p in (tmp_path / "out" / "records").glob("*.json")] == \
        ["my_runs_Ünïcødé___L01_qe.json"]


def test_a_nan_mid_run_ends_the_run_there(tmp_path):
    """A real pw.x output whose second ATOMIC_POSITIONS card (step 2) holds a NaN coordinate, as
    a run that blew up writes: the two steps before it are the run, marked damaged there, in one
    warning naming the file (the whole run had been refused)."""
    pwo = (QE / "relax_atoms_to_sites" / "pw.out").read_bytes()
    (tmp_path / "pw.out").write_bytes(_nan_in_pw_positions(pwo))
    run = read_run(tmp_path / "pw.out")
    assert len(run) == 2 and run.unfinished == "damaged: non-finite positions at step 2"
    said = [w for w in run.warnings if "blew up" in w]
    assert len(said) == 1 and said[0].startswith(str(tmp_path / "pw.out"))


def test_an_audit_folder_takes_the_users_umask_for_every_file(tmp_path):
    """In a group-shared project folder (umask 002) every file an audit makes is group-writable,
    so a colleague of the group can re-audit: the lock file and runs.db had been 0644 (the lock
    made so, SQLite's default for the database) while the other outputs took the umask."""
    import stat
    camp = tmp_path / "camp"
    camp.mkdir()
    shutil.copy(RUNS / "L06_emt_bfgs.traj", camp)
    r = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                        str(tmp_path / "out"), "--no-report"], capture_output=True, text=True,
                       timeout=600, preexec_fn=lambda: os.umask(0o002), check=False)
    assert r.returncode == 0, r.stderr
    out = tmp_path / "out"
    for p in [out / ".driftwatch-audit.lock", out / "runs.db", out / "campaign.csv",
              *out.glob("records/*.json")]:
        assert stat.S_IMODE(p.stat().st_mode) == 0o664, (p, oct(p.stat().st_mode))


@pytest.mark.skipif(IS_ROOT and SETPRIV is None, reason="root without setpriv: permissions "
                                                         "cannot be enforced")
def test_follow_stops_at_once_where_waiting_cannot_help(tmp_path):
    """`follow` waits for a job to write, up to --idle; a file it may not read, a folder of run
    folders (a campaign) and a folder of several runs will not become a run by waiting: each
    fails at once in one line (it had waited the whole --idle, 300 s by default)."""
    locked = tmp_path / "locked.traj"
    shutil.copy(RUNS / "L06_emt_bfgs.traj", locked)
    locked.chmod(0)
    camp = tmp_path / "camp"
    for name in ("L06_emt_bfgs.traj", "L07_emt_fire.traj"):
        (camp / name.split("_")[0]).mkdir(parents=True)
        shutil.copy(RUNS / name, camp / name.split("_")[0])
    several = tmp_path / "several"
    several.mkdir()
    for name in ("L06_emt_bfgs.traj", "L07_emt_fire.traj"):
        shutil.copy(RUNS / name, several)
    for path, said in ((locked, "Permission denied"), (camp, "run folders in it: L06/, L07/"),
                       (several, "ambiguous run folder: it holds 2 runs")):
        t0 = time.monotonic()
        r = _unprivileged([sys.executable, "-m", "driftwatch", "follow", str(path),
                           "--idle", "60"])
        assert time.monotonic() - t0 < 30 and r.returncode == 1, (path, r.stderr)
        assert said in r.stderr and r.stderr.startswith(f"driftwatch: error: {path}"), r.stderr


def test_a_fifo_named_like_an_output_is_a_failed_run_naming_it(tmp_path):
    """A FIFO named OUTCAR in a run folder (beside a good run): the audit lists it as a failed
    run, "not a regular file (FIFO)", and `inspect` of its folder says the same, without reading
    it (reading a FIFO blocks); it had been dropped unsaid, and inspect had said no OUTCAR was
    there."""
    camp = tmp_path / "camp"
    (camp / "fifo_outcar").mkdir(parents=True)
    os.mkfifo(camp / "fifo_outcar" / "OUTCAR")
    (camp / "ok").mkdir()
    shutil.copy(RUNS / "L06_emt_bfgs.traj", camp / "ok")
    r = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o",
                        str(tmp_path / "out"), "--no-report", "--json"], capture_output=True,
                       text=True, timeout=120)
    assert r.returncode == 4, r.stderr
    failed = json.loads(r.stdout)["failed"]
    assert [f["run"] for f in failed] == ["camp/fifo_outcar/OUTCAR"]
    assert "not a regular file (FIFO): refused" in failed[0]["error"]
    r = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", str(camp / "fifo_outcar")],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 1 and "OUTCAR: not a regular file (FIFO): refused" in r.stderr


def test_a_damaged_marker_or_database_gets_advice_that_helps(tmp_path):
    """An audit folder whose marker was cut (a copy tool, an editor) is said to hold a damaged
    marker, and --overwrite audits into it (it had been "holds no driftwatch audit", pointing
    away from the fix); a runs.db that is no SQLite file is refused before any run is read,
    saying to move it away (re-running had met the same error after every audit)."""
    camp = tmp_path / "camp"
    camp.mkdir()
    shutil.copy(RUNS / "L06_emt_bfgs.traj", camp)
    out = tmp_path / "out"
    args = [sys.executable, "-m", "driftwatch", "audit", str(camp), "-o", str(out),
            "--no-report", "--progress", "off"]
    assert subprocess.run(args, capture_output=True, timeout=300).returncode == 0
    marker = out / ".driftwatch-audit.json"
    marker.write_text(marker.read_text()[:20])
    r = subprocess.run(args, capture_output=True, text=True, timeout=300)
    assert r.returncode == 1 and r.stderr.strip() == (
        f"driftwatch: error: {marker}: the marker of the audit in this folder is damaged; pass "
        f"--overwrite to audit into it anew (its audit files are replaced), or choose another "
        f"--output")
    assert subprocess.run(args + ["--overwrite"], capture_output=True, timeout=300).returncode == 0
    (out / "runs.db").write_bytes(b"\x00garbage, not a database" * 40)
    r = subprocess.run(args, capture_output=True, text=True, timeout=300)
    assert r.returncode == 1 and "runs.db: not an SQLite database (damaged, or another kind of " \
        "file); move it away" in r.stderr and "audit:" not in r.stderr


@pytest.mark.skipif(IS_ROOT and SETPRIV is None, reason="root without setpriv: permissions "
                                                         "cannot be enforced")
def test_a_cache_that_cannot_be_written_leaves_the_audit_uncached(tmp_path):
    """A read-only .cache/ (the README calls it safe to delete: it only saves time) in an earlier
    audit's folder, and a new run: the audit analyses it, says once that its results are not
    cached, and ends as usual (it had stopped: ".cache/...json: cannot write")."""
    camp = tmp_path / "camp"
    camp.mkdir()
    shutil.copy(RUNS / "L06_emt_bfgs.traj", camp)
    out = tmp_path / "out"
    args = [sys.executable, "-m", "driftwatch", "audit", str(camp), "-o", str(out), "--no-report",
            "--progress", "off"]
    assert subprocess.run(args, capture_output=True, timeout=300).returncode == 0
    shutil.copy(RUNS / "L07_emt_fire.traj", camp)
    cache = out / ".cache"
    for p in [cache, *cache.iterdir()]:
        p.chmod(0o555 if p.is_dir() else 0o444)
    try:
        r = _unprivileged(args)
    finally:
        for p in [cache, *cache.iterdir()]:
            p.chmod(0o755 if p.is_dir() else 0o644)
    assert r.returncode == 0, r.stderr
    said = [ln for ln in r.stderr.splitlines() if "not cached" in ln]
    assert len(said) == 1 and "cannot write (Permission denied); this audit's results are not " \
        "cached" in said[0]
    assert "2 runs: 2 with a verdict, 0 failed (1 read now, 1 from the cache)" in r.stdout
