"""Hardening against hostile files, faults and concurrent use (issue 19).

Each test is one case of the issue, written first and seen failing on the code before the fix.
Real things throughout: real processes and real signals (SIGTERM, SIGKILL) for the worker pool,
real FIFOs and /dev/zero, a real tmpfs filled up (as root) or a real RLIMIT_FSIZE otherwise, real
SQLite through ase.db, real compressed streams (Python's gzip, bz2, lzma), real locales.
Genuine inputs: ASE trajectories of example_runs/, real pw.x outputs (tests/data/qe, Quantum
ESPRESSO from Debian), ASE's genuine VASP OUTCAR (tests/data/vasp).
"""
from __future__ import annotations

import bz2
import csv
import gzip
import json
import lzma
import os
import re
import resource
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from ase import Atoms
import ase.io

import driftwatch
from driftwatch import config as dwconfig
from driftwatch import geometry, records
from driftwatch.adapters import _io, read_run
from driftwatch.campaign import audit
from driftwatch.errors import ConfigError, InputError, OutputError

REPO = Path(__file__).resolve().parent.parent
DATA = REPO / "tests" / "data"
QE = DATA / "qe"
RUNS = REPO / "example_runs"
IS_ROOT = hasattr(os, "geteuid") and os.geteuid() == 0


def _dw(*args, timeout=120, env=None, **kw):
    return subprocess.run([sys.executable, "-m", "driftwatch", *args], capture_output=True,
                          timeout=timeout, cwd=REPO, env=env, **kw)


def _camp(root: Path, n: int = 2, name: str = "camp") -> Path:
    """A small campaign of genuine ASE trajectories (example_runs)."""
    camp = root / name
    camp.mkdir(parents=True)
    src = [RUNS / "L06_emt_bfgs.traj", RUNS / "L09_emt_fixed_square.traj",
           RUNS / "L07_emt_fire.traj"]
    for i in range(n):
        shutil.copy(src[i % len(src)], camp / f"run{i}.traj")
    return camp


def _snapshot(path: Path) -> dict:
    """Every file below ``path`` (or the file itself) with its bytes."""
    if path.is_file():
        return {path.name: path.read_bytes()}
    return {str(p.relative_to(path)): p.read_bytes() for p in sorted(path.rglob("*"))
            if p.is_file()}


def _one_line(text: str) -> str:
    lines = text.strip().splitlines()
    assert len(lines) == 1, f"not one line: {text!r}"
    assert "Traceback" not in text and "internal error" not in text, text
    return lines[0]


# ============================================================================ decompression bombs
_CHILD = """
import sys
from driftwatch.adapters import read_run
from driftwatch.errors import InputError
try:
    read_run(sys.argv[1])
    print("READ")
except InputError as exc:
    print("REFUSED", exc)
# the peak resident set of this process image (ru_maxrss would keep the forking parent's peak)
print("MAXRSS_KB", next(int(line.split()[1]) for line in open("/proc/self/status")
                        if line.startswith("VmHWM:")))
"""


def _bombs(folder: Path) -> dict:
    """The issue's bombs (a 65 kB OUTCAR.gz, a 10 kB .xz, an 81-byte .bz2 of zeros) and two of
    short lines (concatenated members, which gzip, bzip2 and xz all allow)."""
    folder.mkdir(exist_ok=True)
    zeros = b"\0" * (64 << 20)
    nl_bz2 = bz2.compress(b"\n" * (45 << 20), 9)
    nl_gz = gzip.compress(b"\n" * (1 << 20), 9)
    made = {"OUTCAR.gz": gzip.compress(zeros, 9), "pw.out.xz": lzma.compress(zeros),
            "OUTCAR.bz2": bz2.compress(zeros[: 45 << 20], 9),
            "lines_OUTCAR.bz2": b"".join([nl_bz2] * 100),             # 4.7 GB of newlines, 8 kB
            "lines_pw.out.gz": b"".join([nl_gz] * 3000)}              # 3.1 GB of newlines, 3 MB
    out = {}
    for name, blob in made.items():
        p = folder / name
        p.write_bytes(blob)
        out[name] = p
    return out


@pytest.fixture(scope="module")
def bombs(tmp_path_factory):
    return _bombs(tmp_path_factory.mktemp("bombs"))


@pytest.mark.parametrize("name", ["OUTCAR.gz", "pw.out.xz", "OUTCAR.bz2", "lines_OUTCAR.bz2",
                                  "lines_pw.out.gz"])
def test_decompression_bomb_is_refused_with_bounded_memory(name, bombs):
    p = bombs[name]
    r = subprocess.run([sys.executable, "-c", _CHILD, str(p)], capture_output=True, text=True,
                       timeout=90, cwd=REPO)
    assert r.returncode == 0, r.stderr[-2000:]
    out = dict(line.split(" ", 1) for line in r.stdout.strip().splitlines())
    assert "REFUSED" in out, r.stdout
    assert str(p) in out["REFUSED"] and "\n" not in out["REFUSED"]
    assert re.search(r"longer than|decompresses to more than", out["REFUSED"]), out["REFUSED"]
    # memory: the interpreter with numpy and ASE is ~150 MB; the bomb must add little to it
    assert int(out["MAXRSS_KB"]) < 400_000, out


def test_decompressor_holds_a_bounded_buffer_and_reads_real_files_unchanged(tmp_path, monkeypatch):
    # no re-copying of one large buffer: the decompressed output is produced in steps of at most
    # _io.STEP bytes, whatever the compression ratio (64 MiB of zeros from 65 kB of gzip; the ratio
    # limit is lifted here so that the size limit, set to 32 MB, is what stops it)
    p = tmp_path / "zeros.gz"
    p.write_bytes(gzip.compress(b"\0" * (64 << 20), 9))
    monkeypatch.setenv("DRIFTWATCH_MAX_DECOMPRESSED", "32M")
    fh = _io.open_bytes(p, max_ratio=float("inf"))
    biggest, total = 0, 0
    with pytest.raises(InputError, match=r"decompresses to more than 32,000,000 bytes"):
        while True:
            block = fh.read(1 << 16)
            total += len(block)
            biggest = max(biggest, len(fh.raw._out))
            if not block:
                break
    assert 0 < biggest <= _io.STEP and total >= 30_000_000
    monkeypatch.delenv("DRIFTWATCH_MAX_DECOMPRESSED")
    # a genuine VASP OUTCAR (ASE's test data) as gz, bz2, xz, and gz split into two members at
    # odd offsets: the same frames as the plain file
    plain = tmp_path / "plain" / "OUTCAR"
    plain.parent.mkdir()
    raw = gzip.decompress((DATA / "vasp" / "OUTCAR_example_1.gz").read_bytes())
    plain.write_bytes(raw)
    ref = read_run(plain)
    variants = {"OUTCAR.gz": gzip.compress(raw), "OUTCAR.bz2": bz2.compress(raw),
                "OUTCAR.xz": lzma.compress(raw),
                "two_OUTCAR.gz": gzip.compress(raw[:65536]) + gzip.compress(raw[65536:]),
                "three_OUTCAR.bz2": b"".join(bz2.compress(raw[i:i + 70001])
                                             for i in range(0, len(raw), 70001))}
    for name, blob in variants.items():
        q = tmp_path / name.split("_")[0] / name.split("_")[-1]
        q.parent.mkdir(exist_ok=True)
        q.write_bytes(blob)
        run = read_run(q)
        assert np.array_equal(run.cells, ref.cells) and np.array_equal(run.positions, ref.positions)
        assert not [w for w in run.warnings if "truncated" in w], (name, run.warnings)


def test_decompressed_size_limit_is_documented_and_can_be_set(tmp_path, monkeypatch):
    raw = gzip.decompress((DATA / "vasp" / "OUTCAR_example_1.gz").read_bytes())   # 161,682 bytes
    p = tmp_path / "OUTCAR.gz"
    p.write_bytes(gzip.compress(raw))
    assert _io.max_decompressed() == _io.MAX_DECOMPRESSED == 4_000_000_000
    monkeypatch.setenv("DRIFTWATCH_MAX_DECOMPRESSED", "100k")
    assert _io.max_decompressed() == 100_000
    with pytest.raises(InputError) as err:
        read_run(p)
    msg = str(err.value)
    assert str(p) in msg and "DRIFTWATCH_MAX_DECOMPRESSED" in msg and "100,000 bytes" in msg
    monkeypatch.setenv("DRIFTWATCH_MAX_DECOMPRESSED", "1M")
    assert len(read_run(p).cells) == 1
    monkeypatch.setenv("DRIFTWATCH_MAX_DECOMPRESSED", "lots")
    with pytest.raises(InputError, match="DRIFTWATCH_MAX_DECOMPRESSED"):
        read_run(p)


def test_line_longer_than_the_cap_is_refused_naming_the_line(tmp_path):
    # a plain OUTCAR whose second line is 3 MiB long (no compression involved)
    p = tmp_path / "OUTCAR"
    p.write_bytes(b" vasp.5.4.4.18Apr17-6-g9f103f2a35 (build Mar 27 2019) complex\n"
                  + b"x" * (3 << 20) + b"\n POSCAR = invented\n")
    with pytest.raises(InputError) as err:
        read_run(p)
    assert str(p) in str(err.value)
    assert re.search(r"line 2 is longer than 1,048,576 characters", str(err.value)), err.value
    with _io.Lines(p) as fh:                       # the cap, as the line reader documents it
        assert fh.readline().startswith(" vasp.5")
        with pytest.raises(InputError, match="line 2"):
            fh.readline()


@pytest.mark.parametrize("block", [1, 2, 3, 7, 1 << 16])
def test_line_reader_gives_the_lines_python_text_files_give(tmp_path, monkeypatch, block):
    # Lines splits decoded blocks itself; the reference is the standard library's text file
    # (io.TextIOWrapper, errors="replace", universal newlines: \r\n and \r read as \n), whose
    # complete lines it must give one for one, with blocks so small that every \r\n, multibyte
    # character and bad byte falls across a block boundary; a partial last line is dropped and
    # marked cut, also from a cut .gz (every complete line before the cut delivered).
    import io
    monkeypatch.setattr(_io.Lines, "_READ", block)
    text = ("first line\r\nsecond\rthird\n\n  é ü 中文 \r\n\r\n".encode() + b"bad \xff\xfe byte\n"
            + b"x" * 300 + b"\r\n" + "last é".encode())
    for name, data in (("plain.txt", text), ("ends.txt", text + b"\n"), ("empty.txt", b""),
                       ("cr.txt", b"a\rb\r"), ("crlf.txt", b"a\r\n\r\nb\r")):
        p = tmp_path / name
        p.write_bytes(data)
        ref = [ln for ln in io.TextIOWrapper(io.BytesIO(data), encoding="utf-8", errors="replace",
                                             newline=None) if ln.endswith("\n")]
        with _io.Lines(p) as fh:
            got = list(fh)
            assert got == ref, name
            assert fh.lineno == len(ref)
            assert fh.cut_line == (not data.endswith((b"\n", b"\r")) and bool(data)), name
    whole = gzip.compress(text * 200)
    cut = tmp_path / "cut.txt.gz"
    cut.write_bytes(whole[: len(whole) * 2 // 3])
    with gzip.open(cut, "rb") as raw:        # the complete lines before the cut, read by gzip
        got_bytes = b""
        try:
            while chunk := raw.read1(1 << 12):
                got_bytes += chunk
        except EOFError:
            pass
    ref = [ln for ln in io.TextIOWrapper(io.BytesIO(got_bytes), encoding="utf-8",
                                         errors="replace", newline=None) if ln.endswith("\n")]
    with _io.Lines(cut) as fh:
        got = list(fh)
        assert fh.cut                          # (a cut stream is marked, not raised)
    assert got == ref[: len(got)] and len(ref) - len(got) <= 1    # at most the line at the cut


@pytest.mark.parametrize("block", [1, 5, 64, 1 << 16])
def test_skipping_to_marked_lines_equals_testing_each_line(tmp_path, monkeypatch, block):
    # Lines.skip_to finds marked lines with str.find over a decoded block; the reference is the
    # plain test `any(key in line for key in keys)` on each line of Python's own text file, with
    # readline and read_lines calls mixed in (a reader reads the lines after a marker itself,
    # also across block ends and past the end) and keys that overlap, repeat on one line, end a
    # line or fall across a block boundary.
    import io
    monkeypatch.setattr(_io.Lines, "_READ", block)
    keys = ("total energy", "Forces", "ces acting", "é", "\r")
    rng = np.random.default_rng(5)
    parts = ["   total energy = 1\n", "Forces acting on atoms\n", "nothing here\n", "é\r\n",
             "x total energy total energy\n", "\n", "Forces", " tail\n", "ce", "s acting\n"]
    data = "".join(parts[k] for k in rng.integers(0, len(parts), 400)).encode() + b"\n"
    p = tmp_path / "marked.txt"
    p.write_bytes(data)
    lines = list(io.TextIOWrapper(io.BytesIO(data), encoding="utf-8", newline=None))
    # after each marker the reader reads 0-70 lines itself, with readline or read_lines
    after = rng.integers(0, 70, 400) * (rng.random(400) < 0.1) + (rng.random(400) < 0.5)
    want, got = [], []
    k = 0
    while k < len(lines):                          # the reference walk over the line list
        if any(key in lines[k] for key in keys):
            n = int(after[len(want)])
            want.append((k + 1, lines[k], lines[k + 1:k + 1 + n]))
            k += 1 + n
        else:
            k += 1
    with _io.Lines(p) as fh:
        while line := fh.skip_to(keys):
            at, n = fh.lineno, int(after[len(got)])
            read = (fh.read_lines(n) if len(got) % 2 else
                    [ln for ln in (fh.readline() for _ in range(n)) if ln])
            got.append((at, line, read))
        assert fh.lineno == len(lines) and fh.read_lines(3) == [] and fh.readline() == ""
    assert got == want and len(got) > 20 and sum(len(r) > 1 for *_, r in got) > 3


def test_blank_lines_are_detected_at_once(tmp_path):
    # 50 kB of blank lines (what the format detection reads): every signature search is linear
    # (a pattern starting with ^\s* under re.M retried from each line start was quadratic: 50 s)
    p = tmp_path / "blank.dat"
    p.write_bytes(b"\n" * 50_000)
    r = _dw("inspect", str(p), timeout=30)
    assert r.returncode == 1 and "unknown format" in _one_line(r.stderr.decode())


# ============================================================================ non-regular files
def test_fifo_and_links_to_devices_are_refused_at_open(tmp_path):
    camp = _camp(tmp_path, 1)
    os.mkfifo(tmp_path / "pipe.traj")
    os.symlink(tmp_path / "pipe.traj", camp / "link.traj")          # a link to a FIFO
    os.symlink("/dev/zero", camp / "zero.traj")                      # a link to a device
    (camp / "v").mkdir()
    os.symlink("/dev/null", camp / "v" / "OUTCAR.gz")               # a VASP folder with only that
    out = tmp_path / "out"
    r = _dw("audit", str(camp), "-o", str(out), "-j", "1", "--no-report", "--progress", "off",
            "--json", timeout=120)
    assert r.returncode == 4, r.stderr
    s = json.loads(r.stdout)
    assert list(s["records"]) == ["camp/run0.traj"]
    failed = {f["run"]: f["error"] for f in s["failed"]}
    for name, kind in (("link.traj", "FIFO"), ("zero.traj", "character device")):
        err = failed[f"camp/{name}"]
        assert str(camp / name) in err and f"not a regular file ({kind})" in err, err
    # a folder holding only a device named like an output: that file is the failed run, named
    assert "not a regular file (character device)" in failed["camp/v/OUTCAR.gz"], failed
    # inspect on a FIFO and on a link to /dev/zero: one line naming the file, exit 1
    for target, kind in ((tmp_path / "pipe.traj", "FIFO"),
                         (camp / "zero.traj", "character device")):
        r = _dw("inspect", str(target), timeout=60)
        assert r.returncode == 1
        line = _one_line(r.stderr.decode())
        assert str(target) in line and f"not a regular file ({kind})" in line


# ============================================================================ workers and signals
def _descendants(pid: int) -> list:
    import psutil
    try:
        return psutil.Process(pid).children(recursive=True)
    except psutil.NoSuchProcess:
        return []


def _alive(procs) -> list:
    import psutil
    out = []
    for p in procs:
        try:
            if p.is_running() and p.status() != psutil.STATUS_ZOMBIE:
                out.append(p)
        except psutil.NoSuchProcess:
            pass
    return out


def _slow_config(tmp_path: Path) -> Path:
    cfg = tmp_path / "slow.yaml"        # spglib on every frame at 60 tolerances: minutes of work
    cfg.write_text("symmetry:\n  grid_points: 60\n  precision: 1.001\nselection:\n"
                   "  all_frames: true\n", encoding="utf-8")
    return cfg


# the audit's CLI, optionally with a thread running first: then the pool starts its workers from
# multiprocessing's fork server (fork is unsafe once threads run), as under a terminal progress bar
_CLI = ("import sys, threading, time\n"
        "if sys.argv[1] == 'forkserver':\n"
        "    threading.Thread(target=time.sleep, args=(600,), daemon=True).start()\n"
        "from driftwatch.cli import main\n"
        "sys.exit(main(sys.argv[2:]))\n")


@pytest.mark.parametrize("start", ["fork", "forkserver"])
@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGKILL], ids=["SIGTERM", "SIGKILL"])
def test_workers_end_with_their_parent(sig, start, tmp_path, killable_env):
    camp = tmp_path / "camp"
    shutil.copytree(RUNS, camp, ignore=shutil.ignore_patterns("pseudo", "README.md"))
    out = tmp_path / "out"
    proc = subprocess.Popen([sys.executable, "-c", _CLI, start, "audit", str(camp), "-o", str(out),
                             "-j", "2", "--no-report", "--progress", "off", "-c",
                             str(_slow_config(tmp_path))], cwd=REPO, env=killable_env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    workers = []
    try:
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline and proc.poll() is None:
            now = [p for p in _descendants(proc.pid) if "python" in p.name().lower()]
            workers += [p for p in now if p not in workers]   # (a fork server and its children)
            if len(now) >= 2 and list((out / ".cache").glob("*.json")):
                break                        # the pool is up and has finished a run or more
            time.sleep(0.05)
        assert proc.poll() is None and len(workers) >= 2, "the audit did not start its workers"
        proc.send_signal(sig)
        proc.wait(60)
        deadline = time.monotonic() + 30
        while _alive(workers) and time.monotonic() < deadline:
            time.sleep(0.1)
        left = _alive(workers)
        assert not left, f"workers still alive after the parent got {sig.name}: {left}"
        if sig == signal.SIGTERM:
            err = proc.stderr.read().decode()
            assert proc.returncode == -signal.SIGTERM, err       # ended by the signal (shell: 143)
            assert "terminated" in err and str(out) in err and "Traceback" not in err, err
    finally:
        for p in _alive(workers):
            p.kill()
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stderr.close()


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_an_audit_stopped_without_workers_says_what_it_leaves(sig, tmp_path):
    """Ctrl-C or SIGTERM to an audit analysing its runs in process (one worker; or the parent
    after its pool has ended, writing the tables): it says that the runs finished are kept and a
    re-run finishes (SIGTERM had ended such an audit with nothing on stderr, and Ctrl-C said only
    'interrupted'); the runs it says are kept are in the cache."""
    camp = tmp_path / "camp"
    shutil.copytree(RUNS, camp, ignore=shutil.ignore_patterns("pseudo", "README.md"))
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "driftwatch", "audit", str(camp), "-o", str(out), "-j", "1",
           "--no-report", "--progress", "off", "-c", str(_slow_config(tmp_path))]
    proc = subprocess.Popen(cmd, cwd=REPO, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and proc.poll() is None and \
                not list((out / ".cache").glob("*.json")):
            time.sleep(0.05)
        assert proc.poll() is None, "the audit ended before a run was cached"
        proc.send_signal(sig)
        proc.wait(60)
        err = proc.stderr.read().decode()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stderr.close()
    assert proc.returncode == (130 if sig == signal.SIGINT else -signal.SIGTERM), err
    assert f"runs finished so far, if any, are kept in {out}/.cache" in err, err
    assert "re-run the same command to finish" in err and "Traceback" not in err, err
    assert list((out / ".cache").glob("*.json"))       # what it says is kept is there


# a pool's forked child that blocks before the pool's initializer runs (where the parent watch
# starts), as a child forked while another thread held a lock would; "guarded": forked while the
# audit's fork guard is armed, as _new_pool arms it
_BLOCKED_CHILD = ("import os, sys, time\n"
                  "from driftwatch import campaign\n"
                  "if sys.argv[1] == 'guarded':\n"
                  "    campaign._FORK_GUARD[0] = (os.getpid(), campaign._pdeathsig_setter())\n"
                  "pid = os.fork()\n"
                  "if pid == 0:\n"
                  "    time.sleep(120)\n"
                  "    os._exit(0)\n"
                  "print(pid, flush=True)\n"
                  "time.sleep(120)\n")


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="prctl(PR_SET_PDEATHSIG): Linux")
@pytest.mark.parametrize("guard", ["guarded", "unguarded"])
def test_a_forked_worker_dies_with_the_audit_before_its_initializer_runs(guard, tmp_path,
                                                                          killable_env):
    """SIGKILL the parent of a forked child that never reached the pool's initializer: with the
    fork guard the kernel ends the child with it (prctl(2), PR_SET_PDEATHSIG); without, the child
    outlives it (the control: it shows the test can fail)."""
    import psutil
    proc = subprocess.Popen([sys.executable, "-c", _BLOCKED_CHILD, guard], cwd=REPO,
                            env=killable_env, stdout=subprocess.PIPE)
    child = None
    try:
        child = psutil.Process(int(proc.stdout.readline()))
        proc.send_signal(signal.SIGKILL)
        proc.wait(30)
        deadline = time.monotonic() + 5
        while _alive([child]) and time.monotonic() < deadline:
            time.sleep(0.1)
        assert bool(_alive([child])) == (guard == "unguarded"), guard
    finally:
        if child is not None and _alive([child]):
            child.kill()
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stdout.close()


# ============================================================================ the output folder
@pytest.mark.parametrize("planted", ["records", ".cache", "report", "records/stale", "runs.db",
                                     "campaign.csv", ".driftwatch-audit.json"])
def test_planted_symlink_in_the_output_folder_is_refused(planted, tmp_path):
    camp = _camp(tmp_path, 3)
    out = tmp_path / "out"
    audit([camp], out, workers=1, report=True, progress="off", quiet=True)
    victim = tmp_path / ("victim.db" if planted == "runs.db" else "victim")
    if planted == "runs.db":                     # someone's own ase.db, with a run_id we also use
        import ase.db
        with ase.db.connect(victim) as db:
            db.write(Atoms("H"), run_id="camp/run0.traj", note="foreign row")
            db.write(Atoms("He"), run_id="theirs", note="foreign row")
    elif planted in ("campaign.csv", ".driftwatch-audit.json"):
        victim.write_text("precious\n")
    else:
        victim.mkdir()
        (victim / "keep.json").write_text('{"precious": true}\n')
        (victim / "index.html").write_text("precious\n")
    link = out / planted
    if link.is_dir():
        shutil.rmtree(link)
    elif link.exists():
        link.unlink()
    link.parent.mkdir(exist_ok=True)
    os.symlink(victim, link)
    (camp / "run2.traj").unlink()                # its record is retired to records/stale/
    before = _snapshot(victim)
    with pytest.raises(OutputError) as err:
        audit([camp], out, workers=1, report=True, progress="off", quiet=True)
    assert str(link) in str(err.value) and "symbolic link" in str(err.value), err.value
    assert _snapshot(victim) == before
    # the CLI: one line naming the link, exit 1
    r = _dw("audit", str(camp), "-o", str(out), "-j", "1", "--progress", "off")
    assert r.returncode == 1 and str(link) in _one_line(r.stderr.decode())
    assert _snapshot(victim) == before


def test_planted_record_link_is_replaced_not_written_through(tmp_path):
    # a record file replaced by a link to a file outside: the rename replaces the link itself
    camp = _camp(tmp_path, 2)
    out = tmp_path / "out"
    audit([camp], out, workers=1, report=False, progress="off", quiet=True)
    victim = tmp_path / "victim.txt"
    victim.write_text("precious")
    rec = sorted((out / "records").glob("*.json"))[0]
    good = rec.read_bytes()
    rec.unlink()
    os.symlink(victim, rec)
    s = audit([camp], out, workers=1, report=False, progress="off", quiet=True)
    assert len(s["records"]) == 2 and victim.read_text() == "precious"
    assert not rec.is_symlink() and rec.read_bytes() == good


def test_output_folder_at_or_above_a_root_is_refused(tmp_path):
    camp = _camp(tmp_path, 2)
    for out in (camp, tmp_path):
        before = sorted(p.name for p in camp.iterdir())
        r = _dw("audit", str(camp), "-o", str(out), "--overwrite", "-j", "1", "--progress", "off")
        assert r.returncode == 1, (out, r.stderr)
        line = _one_line(r.stderr.decode())
        assert str(out) in line and "campaign root" in line and str(camp) in line, line
        assert sorted(p.name for p in camp.iterdir()) == before


def test_overwrite_removes_only_driftwatchs_own_temporaries(tmp_path):
    camp = _camp(tmp_path, 1)
    out = tmp_path / "mine"
    out.mkdir()
    mine = [out / ".draft.tmp", out / "notes.tmp", out / ".results.json.a1b2c3.tmp"]
    for p in mine:
        p.write_text("the user's own file")
    ours = out / ".driftwatch-k1ll3d01.tmp"          # what a killed audit of this version leaves
    ours.write_text('{"torn')
    audit([camp], out, workers=1, report=False, progress="off", quiet=True, overwrite=True)
    assert all(p.read_text() == "the user's own file" for p in mine)
    assert not ours.exists()


def _lock_holder(out: Path, wait: bool = True):
    """A second real process that takes the output folder's lock the way an audit does (it prints
    'locked', or 'busy' when ``wait`` is False and another process holds the lock)."""
    code = ("import fcntl, os, sys, time\n"
            f"fd = os.open({str(out / '.driftwatch-audit.lock')!r}, os.O_RDWR | os.O_CREAT)\n"
            "try:\n"
            f"    fcntl.flock(fd, fcntl.LOCK_EX{'' if wait else ' | fcntl.LOCK_NB'})\n"
            "except BlockingIOError:\n"
            "    print('busy', flush=True)\n"
            "    sys.exit()\n"
            "print('locked', flush=True)\ntime.sleep(300)\n")
    return subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)


def test_one_audit_per_output_folder_at_a_time(tmp_path, killable_env):
    camp = _camp(tmp_path, 2)
    out = tmp_path / "out"
    # a real audit running (slow config) while a second one starts into the same folder
    slow = subprocess.Popen([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o", str(out),
                             "-j", "1", "--no-report", "--progress", "off", "-c",
                             str(_slow_config(tmp_path))], cwd=REPO, env=killable_env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and not (out / "records").is_dir():
            time.sleep(0.02)
        assert slow.poll() is None, "the first audit ended too soon for the test"
        r = _dw("audit", str(camp), "-o", str(out), "-j", "1", "--no-report", "--progress", "off")
        assert slow.poll() is None, "the first audit ended too soon for the test"
        assert r.returncode == 1, r.stderr
        line = _one_line(r.stderr.decode())
        assert str(out) in line and "another driftwatch audit" in line, line
    finally:
        slow.kill()
        slow.wait()
    # the killed audit's lock went with its process: the next audit runs, one row per run
    s = audit([camp], out, workers=1, report=False, progress="off", quiet=True)
    assert len(s["records"]) == 2
    import ase.db
    with ase.db.connect(out / "runs.db") as db:
        ids = [row.run_id for row in db.select()]
    assert sorted(ids) == ["camp/run0.traj", "camp/run1.traj"]
    # through the API, with the lock held by another process
    holder = _lock_holder(out)
    try:
        assert holder.stdout.readline().strip() == "locked"
        with pytest.raises(OutputError, match="another driftwatch audit"):
            audit([camp], out, workers=1, report=False, progress="off", quiet=True)
    finally:
        holder.kill()
        holder.wait()


def test_the_folder_lock_is_never_held_by_a_forked_child(tmp_path):
    # a worker (here: any child forked by multiprocessing while the lock is held) must not keep
    # the folder locked after the audit process releases it or dies (flock is shared with forks)
    import multiprocessing as mp
    from driftwatch.campaign import _FolderLock
    out = tmp_path / "out"
    out.mkdir()
    lock = _FolderLock()
    lock.acquire(out)
    child = mp.get_context("fork").Process(target=time.sleep, args=(60,))
    child.start()
    try:
        lock.release()
        holder = _lock_holder(out, wait=False)
        try:
            assert holder.stdout.readline().strip() == "locked"   # not blocked by the child
        finally:
            holder.kill()
            holder.wait()
    finally:
        child.kill()
        child.join()


# ============================================================================ CSV and names
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def _is_number(cell: str) -> bool:
    try:
        float(cell)
        return True
    except ValueError:
        return False


def test_csv_cells_never_start_a_formula(tmp_path, monkeypatch):
    # OWASP "CSV Injection" (common practice): a cell starting with = + - @ tab or CR is read as a
    # formula by spreadsheets; such text cells get a leading apostrophe (tab and CR are written as
    # \t and \r, as everywhere names are shown: a bare CR also splits a row), numbers stay numbers
    monkeypatch.chdir(tmp_path)
    roots = ["=HYPERLINK(1)", "+SUM(1)", "-2+3", "@cmd", "\tTAB", "\rCR"]
    for i, name in enumerate(roots):
        camp = _camp(tmp_path, 1, name=name)
        (camp / "=bad.traj").write_bytes(b"not a trajectory" * 4)
    out = tmp_path / "out"
    audit(roots, out, workers=1, report=False, progress="off", quiet=True)
    with open(out / "campaign.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    assert len(rows) == 1 + 2 * len(roots)
    cells = [c for row in rows[1:] for c in row if c]
    assert cells
    bad = [c for c in cells if c.startswith(_FORMULA_START) and not _is_number(c)]
    assert not bad, bad
    runs = sorted(row[0] for row in rows[1:])
    assert "'=HYPERLINK(1)/run0.traj" in runs and "\\tTAB/=bad.traj" in runs   # tab as \t
    assert records.csv_cell("-0.25") == "-0.25" and records.csv_cell("=1") == "'=1"


def test_multibyte_names_under_255_bytes_do_not_stop_the_audit(tmp_path):
    # Linux NAME_MAX is 255 bytes per path component (common practice); these names are 240 and
    # 251 bytes of UTF-8 but only 80 and 84 characters
    folder = "结构" * 40
    fname = "弛豫" * 41 + ".traj"
    assert len(folder.encode()) == 240 and len(fname.encode()) == 251
    camp = tmp_path / "camp"
    (camp / folder / folder).mkdir(parents=True)
    shutil.copy(RUNS / "L06_emt_bfgs.traj", camp / folder / folder / fname)
    shutil.copy(RUNS / "L09_emt_fixed_square.traj", camp / "ok.traj")
    out = tmp_path / "out"
    s = audit([camp], out, workers=1, report=True, progress="off", quiet=True)
    assert len(s["records"]) == 2 and not s["failed"]
    for p in out.rglob("*"):
        assert len(p.name.encode()) <= 255, p.name
    assert len(records.safe_name("é" * 300).encode()) <= 200


def test_non_utf8_names_give_valid_utf8_outputs_and_stable_db_rows(tmp_path):
    camp = tmp_path / "camp"
    camp.mkdir()
    os.makedirs(os.fsencode(camp) + b"/caf\xe9")
    shutil.copy(RUNS / "L06_emt_bfgs.traj", os.fsencode(camp) + b"/caf\xe9/run\xff.traj")
    shutil.copy(RUNS / "L09_emt_fixed_square.traj", camp / "ok.traj")
    with open(os.fsencode(camp) + b"/bad\xfe.traj", "wb") as fh:
        fh.write(b"garbage" * 10)
    out = tmp_path / "out"
    for _ in range(3):
        s = audit([camp], out, workers=1, report=True, progress="off", quiet=True)
        assert len(s["records"]) == 2 and len(s["failed"]) == 1
    text = (out / "campaign.csv").read_bytes().decode("utf-8")       # strict: valid UTF-8
    assert "caf\\xe9/run\\xff.traj" in text and "bad\\xfe.traj" in text
    for page in (out / "report").rglob("*.html"):
        page.read_bytes().decode("utf-8")
    import ase.db
    with ase.db.connect(out / "runs.db") as db:
        ids = sorted(row.run_id for row in db.select())
    assert ids == ["camp/bad\\xfe.traj", "camp/caf\\xe9/run\\xff.traj", "camp/ok.traj"]


def _has_locale(name: str) -> bool:
    r = subprocess.run(["locale", "-a"], capture_output=True, text=True)
    return name.lower().replace("-", "") in r.stdout.lower().replace("-", "")


@pytest.mark.parametrize("how", ["PYTHONIOENCODING=utf-8:strict", "LC_ALL=en_US.UTF-8"])
def test_inspect_and_audit_print_non_utf8_names_under_a_utf8_locale(how, tmp_path):
    # In the C and C.UTF-8 locales Python writes undecodable names back with surrogateescape;
    # under a regular UTF-8 locale (en_US.UTF-8; Debian package 'locales') stdout is strict, which
    # PYTHONIOENCODING=utf-8:strict reproduces in any locale
    key, value = how.split("=", 1)
    if key == "LC_ALL" and not _has_locale(value):
        pytest.skip("en_US.UTF-8 locale not installed (apt-get install locales; locale-gen)")
    env = dict(os.environ, **{key: value})
    p = os.fsencode(tmp_path) + b"/caf\xe9-run\xff.traj"
    shutil.copy(RUNS / "L06_emt_bfgs.traj", p)
    r = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", p], capture_output=True,
                       timeout=120, cwd=REPO, env=env)
    assert r.returncode == 0, r.stderr
    assert b"caf\\xe9-run\\xff.traj" in r.stdout
    r = subprocess.run([sys.executable, "-m", "driftwatch", "audit", os.fsencode(tmp_path), "-o",
                        os.fsencode(tmp_path) + b"/out", "-j", "1", "--no-report"],
                       capture_output=True, timeout=120, cwd=REPO, env=env)
    assert r.returncode == 0, r.stderr
    assert b"caf\\xe9-run\\xff.traj" in r.stdout             # the summary table, on stdout


def test_terminal_escapes_in_names_are_shown_escaped(tmp_path):
    camp = tmp_path / "camp"
    camp.mkdir()
    evil = "run\x1b]0;pwned\x07\x1b[2J\x9b31m.traj"
    shutil.copy(RUNS / "L06_emt_bfgs.traj", camp / evil)
    (camp / "bad\x1b[31m.traj").write_bytes(b"garbage" * 10)
    r = _dw("inspect", str(camp / evil))
    assert r.returncode == 0, r.stderr
    assert b"\x1b" not in r.stdout and b"\x07" not in r.stdout and "\x9b".encode() not in r.stdout
    assert b"run\\x1b]0;pwned\\x07\\x1b[2J\\x9b31m.traj" in r.stdout
    r = _dw("inspect", str(camp / "bad\x1b[31m.traj"))
    assert r.returncode == 1 and b"\x1b" not in r.stderr and b"bad\\x1b[31m.traj" in r.stderr
    r = _dw("audit", str(camp), "-o", str(tmp_path / "out"), "-j", "1", "--no-report")
    assert r.returncode == 4, r.stderr
    assert b"\x1b" not in r.stdout + r.stderr and b"\x07" not in r.stdout + r.stderr
    assert b"bad\\x1b[31m.traj" in r.stdout                       # the summary table


def test_numeric_overflow_in_a_file_is_a_warning_not_a_runtime_warning(tmp_path):
    # a real pw.x output with one force component replaced by 1e308 Ry/bohr: converting it to
    # eV/Å overflows; the run reads with a warning in the record, and Python prints no
    # RuntimeWarning
    src = (QE / "relax_atoms_to_sites" / "pw.out").read_text()
    m = re.search(r"atom    1 type  1   force =\s+(\S+)", src)
    p = tmp_path / "force" / "pw.out"
    p.parent.mkdir()
    p.write_text(src.replace(m.group(0), m.group(0).replace(m.group(1), "1.0E+308"), 1))
    r = _dw("inspect", str(p))
    assert r.returncode == 0 and b"RuntimeWarning" not in r.stderr, r.stderr
    assert re.search(rb"warning: .*pw\.out: .*floating-point range", r.stdout), r.stdout[-2000:]
    # a position of 1e308 alat in the third step: that step on is damaged, the first two are read,
    # said in one line, without a RuntimeWarning
    i = src.index("ATOMIC_POSITIONS", src.index("ATOMIC_POSITIONS") + 1)
    j = src.index("\n", i) + 1
    k = src.index("\n", j)
    parts = src[j:k].split()
    parts[1] = "1.0E+308"
    q = tmp_path / "pos" / "pw.out"
    q.parent.mkdir()
    q.write_text(src[:j] + "  ".join(parts) + src[k:])
    r = _dw("inspect", str(q))
    assert r.returncode == 0 and b"RuntimeWarning" not in r.stderr
    assert re.search(rb"warning: .*pw\.out: non-finite positions at step 2: a run that blew up",
                     r.stdout), r.stdout[-2000:]


# ============================================================================ config
BOMB = """\
rules:
  lattice:
    within: [&a [lol,lol,lol,lol,lol,lol,lol,lol,lol], &b [*a,*a,*a,*a,*a,*a,*a,*a,*a],
      &c [*b,*b,*b,*b,*b,*b,*b,*b,*b], &d [*c,*c,*c,*c,*c,*c,*c,*c,*c],
      &e [*d,*d,*d,*d,*d,*d,*d,*d,*d], &f [*e,*e,*e,*e,*e,*e,*e,*e,*e],
      &g [*f,*f,*f,*f,*f,*f,*f,*f,*f], &h [*g,*g,*g,*g,*g,*g,*g,*g,*g],
      &i [*h,*h,*h,*h,*h,*h,*h,*h,*h]]
"""


def test_yaml_alias_bomb_is_refused_at_once(tmp_path):
    p = tmp_path / "bomb.yaml"
    p.write_text(BOMB, encoding="utf-8")
    assert len(BOMB.encode()) < 500
    code = ("import resource, sys\n"
            "resource.setrlimit(resource.RLIMIT_AS, (3 << 30, 3 << 30))\n"
            "from driftwatch import config\n"
            "try:\n    config.load(sys.argv[1])\nexcept config.ConfigError as exc:\n"
            "    print('REFUSED', exc)\n")
    r = subprocess.run([sys.executable, "-c", code, str(p)], capture_output=True, text=True,
                       timeout=60, cwd=REPO)
    assert r.returncode == 0, r.stderr[-1000:]
    line = _one_line(r.stdout)
    assert line.startswith("REFUSED") and str(p) in line and "alias" in line, line
    assert len(line) < 400 and "lol" not in line
    with pytest.raises(ConfigError, match="alias"):
        dwconfig.load(p)
    # a plain anchor with no alias is refused the same way (configs have no use for either)
    q = tmp_path / "anchor.yaml"
    q.write_text("rules:\n  lattice: &s\n    within: 1e-3 Å\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="anchor"):
        dwconfig.load(q)


RANGES = {
    "negative_within": ("rules:\n  lattice:\n    within: -1 Å\n", r"rules\.lattice\.within"),
    "zero_persistence": ("rules:\n  persistence:\n    steps: 0\n", r"rules\.persistence\.steps"),
    "angle_1000": ("symmetry:\n  angle_tolerance: 1000 deg\n", r"symmetry\.angle_tolerance"),
    "angle_minus_2": ("symmetry:\n  angle_tolerance: -2 deg\n", r"symmetry\.angle_tolerance"),
    "grid_100000": ("symmetry:\n  grid_points: 100000\n", r"symmetry\.grid_points"),
    "negative_common": ("report:\n  common_symprecs: [1e-3 Å, -1e-2 Å]\n",
                        r"report\.common_symprecs\[1\]"),
    "infinite_gap": ("geometry:\n  vacuum_gap: 1e999 Å\n", r"geometry\.vacuum_gap"),
    "zero_gap": ("geometry:\n  vacuum_gap: 0 Å\n", r"geometry\.vacuum_gap"),
    "symprec_5A": ("symmetry:\n  symprec_max: 5 Å\n", r"symmetry\.symprec_max"),
    "negative_on_change": ("selection:\n  on_change: -0.1 Å\n", r"selection\.on_change"),
    "negative_far": ("rules:\n  loose_symprec:\n    far: -1 Å\n",
                     r"rules\.loose_symprec\.far"),
    "precision_1000": ("symmetry:\n  precision: 1000\n", r"symmetry\.precision"),
}


@pytest.mark.parametrize("name", sorted(RANGES))
def test_config_values_out_of_range_are_refused_naming_the_key(name, tmp_path):
    text, key = RANGES[name]
    p = tmp_path / f"{name}.yaml"
    p.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError) as err:
        dwconfig.load(p)
    msg = str(err.value)
    assert re.search(key, msg) and str(p) in msg and "\n" not in msg, msg
    assert re.search(r"must be|between|at most|at least", msg), msg
    r = _dw("inspect", str(RUNS / "L06_emt_bfgs.traj"), "-c", str(p))
    assert r.returncode == 1
    line = _one_line(r.stderr.decode())
    assert re.search(key, line) and "math domain" not in line


def test_every_preset_is_inside_the_ranges():
    for name in dwconfig.PRESETS:
        dwconfig.load(name)


# ============================================================================ geometry
def test_atoms_far_outside_the_cell_and_atoms_on_one_site_are_warned(tmp_path):
    cell = [[3.0, 0, 0], [0, 3.0, 0], [0, 0, 16.0]]
    far = tmp_path / "far.extxyz"
    ase.io.write(far, [Atoms("C2", positions=[(0, 0, 8), (3e6, 0, 8)], cell=cell, pbc=True)] * 3)
    # (frames=[]: no spglib here; spglib fails on such cells, and symmetry.versions() counts
    # failures per process into every record, which later tests of identical records would see)
    rec = driftwatch.analyze(far, frames=[])
    w = [x for x in rec["run"]["warnings"] if "outside the cell" in x]
    assert len(w) == 1 and "atom 1" in w[0] and str(far) in w[0], rec["run"]["warnings"]
    # 1e300 Å (beyond adapters.run.POSITION_LIMIT) is no position but damage: refused at the start
    ase.io.write(far, [Atoms("C2", positions=[(0, 0, 8), (1e300, 0, 8)], cell=cell, pbc=True)] * 3)
    with pytest.raises(InputError, match="a position 1e[+]300 Å from the origin at step 0"):
        driftwatch.analyze(far, frames=[])
    same = tmp_path / "same.extxyz"
    ase.io.write(same, [Atoms("C3", positions=[(0, 0, 8), (1.5, 1.5, 8), (4.5, 1.5, 8)],
                              cell=cell, pbc=True)] * 2)    # atoms 1 and 2: one site, a cell apart
    rec = driftwatch.analyze(same, frames=[])
    w = [x for x in rec["run"]["warnings"] if "same position" in x]
    assert len(w) == 1 and "atoms 1 and 2" in w[0], rec["run"]["warnings"]
    # genuine runs: no such warning
    for p in (RUNS / "L06_emt_bfgs.traj", QE / "relax_atoms_to_sites"):
        rec = driftwatch.analyze(p)
        assert not [x for x in rec["run"]["warnings"]
                    if "outside the cell" in x or "same position" in x]
    # the function itself: a few cells out is normal (unwrapped coordinates), 1e6 cells is not
    cells = np.array([cell] * 2)
    pos = np.array([[[0, 0, 8], [3 * 5 + 1, 0, 8]], [[0, 0, 8], [3e6 + 1.5, 0, 8]]], float)
    msgs = geometry.position_warnings(cells, pos, [True, True, True])
    assert len(msgs) == 1 and "frame 1" in msgs[0] and "atom 1" in msgs[0], msgs
    assert geometry.position_warnings(cells[:1], pos[:1], [True, True, True]) == []


# ============================================================================ disk full
def _mount_tmpfs(where: Path, size: str) -> bool:
    if not IS_ROOT or not shutil.which("mount"):
        return False
    where.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(where)],
                       capture_output=True)
    return r.returncode == 0


def _fill(folder: Path) -> None:
    """Fill the filesystem of ``folder`` to the last byte."""
    try:
        with open(folder / "filler", "ab") as fh:
            while True:
                fh.write(b"\0" * 4096)
                fh.flush()
    except OSError:
        pass


def test_disk_full_is_an_output_error_naming_the_file(tmp_path):
    """A real full filesystem: a 200 kB tmpfs (as root), else a real RLIMIT_FSIZE of 20 kB per
    file (EFBIG, "File too large", instead of ENOSPC: the same code path)."""
    camp = tmp_path / "camp"
    shutil.copytree(RUNS, camp, ignore=shutil.ignore_patterns("pseudo", "README.md"))
    mnt = tmp_path / "small"
    mounted = _mount_tmpfs(mnt, "200k")
    try:
        if mounted:
            out, pre, words = mnt / "out", None, "No space left on device"
        else:
            def pre():
                resource.setrlimit(resource.RLIMIT_FSIZE, (20_000, 20_000))
                signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
            out, words = tmp_path / "out", "File too large"
        r = subprocess.run([sys.executable, "-m", "driftwatch", "audit", str(camp), "-o", str(out),
                            "-j", "1", "--progress", "off"], capture_output=True, text=True,
                           timeout=300, cwd=REPO, preexec_fn=pre)
        assert r.returncode == 1, r.stderr
        line = _one_line(r.stderr)
        assert re.search(re.escape(str(out)) + r"/\S+: cannot write", line), line
        assert words in line, line
        # inspect -o FILE on a full filesystem: the same
        if mounted:
            _fill(mnt)
        target = (mnt if mounted else tmp_path) / "record.json"
        r = subprocess.run([sys.executable, "-m", "driftwatch", "inspect",
                            str(RUNS / "B04_emt_fire_loose.extxyz"), "-o", str(target)],
                           capture_output=True, text=True, timeout=120, cwd=REPO, preexec_fn=pre)
        assert r.returncode == 1, r.stderr
        line = _one_line(r.stderr)
        assert str(target) in line and words in line, line
    finally:
        if mounted:
            subprocess.run(["umount", str(mnt)], check=False)


def test_readme_states_the_limits_the_code_has():
    # one fact, one number: the README's "Limits on inputs and outputs" quotes the constants
    text = " ".join((REPO / "README.md").read_text(encoding="utf-8").split())
    lo, hi = dwconfig.RANGES["symmetry.grid_points"][:2]
    for fact in (f"{_io.MAX_LINE:,} characters", f"decompress to {_io.MAX_DECOMPRESSED / 1e9:g} GB",
                 f"beyond {_io.RATIO_FLOOR / 1e6:g} MB, to {_io.MAX_RATIO}x",
                 f"or {_io.MAX_TEXT_RATIO}x for the formats read line by line",
                 f"may hold {dwconfig.MAX_BYTES / 1e6:g} MB", f"`grid_points` {lo}-{hi}",
                 f"`symprec` up to {dwconfig.RANGES['symmetry.symprec_max'][1]:g} Å",
                 "DRIFTWATCH_MAX_DECOMPRESSED"):
        assert fact in text, fact


def test_record_output_never_replaces_a_file_that_is_not_a_record(tmp_path):
    """`inspect RUN -o FILE` (and follow, and the observer) refuse an existing file that is not a
    driftwatch record: the run's own pw.x output, its input, a user's notes. A record is replaced."""
    run = tmp_path / "L01"
    shutil.copytree(Path(__file__).parents[1] / "example_runs" / "L01_qe_vcrelax", run)
    before = (run / "pw.out").read_bytes()
    for target in (run / "pw.out", run / "pw.in"):
        p = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", run, "-o", target],
                           capture_output=True, text=True)
        assert p.returncode == 1 and p.stdout == ""
        assert p.stderr.strip() == (f"driftwatch: error: {target}: exists and is not a driftwatch "
                                    f"run record; refusing to overwrite it (remove it, or choose "
                                    f"another file for the record)")
    assert (run / "pw.out").read_bytes() == before
    rec = tmp_path / "rec.json"
    for _ in range(2):                                   # a record is refreshed in place
        p = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", run, "-o", rec],
                           capture_output=True, text=True)
        assert p.returncode == 0, p.stderr
    from driftwatch.errors import OutputError
    from driftwatch.live import SymmetryWatch
    notes = tmp_path / "notes.txt"
    notes.write_text("chapter 1")
    with pytest.raises(OutputError, match="is not a driftwatch run record"):
        SymmetryWatch(Atoms("Si2", cell=np.eye(3) * 5, positions=[[0, 0, 0], [1, 1, 1]],
                            pbc=True), output=notes)
    assert notes.read_text() == "chapter 1"


@pytest.mark.parametrize("fmt", ["pw.x", "OUTCAR"])
def test_a_field_of_stars_mid_run_marks_the_run_damaged(tmp_path, fmt):
    """Fortran prints '*****' for a number too wide for its field: a genuine output with one such
    coordinate mid-run gives the steps before it, marked unfinished ('damaged'), with a warning
    naming the field; it passed as a finished relaxation (the bundled L03 read 'kept' instead of
    'gained'). pw.x: the bundled L03; OUTCAR: VASP 6.2.0's (tests/data/public/vasp620_nelm)."""
    from driftwatch.adapters import read_run
    if fmt == "pw.x":
        lines = (Path(__file__).parents[1] / "example_runs" / "L03_qe_vcrelax" / "pw.out"
                 ).read_text().splitlines(keepends=True)
        cards = [i for i, ln in enumerate(lines) if ln.startswith("ATOMIC_POSITIONS")]
        k = cards[len(cards) // 2] + 1
        f = lines[k].split()
        lines[k] = f"{f[0]} ********** {' '.join(f[2:])}\n"
        path = tmp_path / "pw.out"
    else:
        lines = gzip.open(Path(__file__).parent / "data" / "public" / "vasp620_nelm" /
                          "OUTCAR.gz", "rt").read().splitlines(keepends=True)
        heads = [i for i, ln in enumerate(lines) if ln.lstrip().startswith("POSITION")]
        k = heads[2] + 2
        lines[k] = "     ************ " + lines[k][18:]
        path = tmp_path / "OUTCAR"
    path.write_text("".join(lines))
    run = read_run(path)
    assert run.unfinished.startswith("unreadable after step")
    assert "a field of '*'" in run.unfinished
    assert any("the steps after it are not seen" in w for w in run.warnings)


def test_report_says_which_inputs_it_could_not_use(tmp_path):
    """`driftwatch report` names each unusable input on stderr (they are on the index too)."""
    recs = tmp_path / "recs"
    recs.mkdir()
    (recs / "cut.json").write_text('{"schema": "driftwatch/run-2", "run": ')
    (recs / "notes.json").write_text('{"note": "a user file"}')
    p = subprocess.run([sys.executable, "-m", "driftwatch", "report", recs, "-o", tmp_path / "site"],
                       capture_output=True, text=True)
    assert p.returncode == 0, p.stderr
    said = [ln for ln in p.stderr.splitlines() if ln.startswith("driftwatch: warning:")]
    assert len(said) == 2 and all(": not used (" in ln for ln in said)
    assert any("cut.json" in ln for ln in said) and any("notes.json" in ln for ln in said)


def test_a_line_break_in_a_run_name_is_one_table_row(tmp_path):
    """A folder name with a line break: the summary table spells it as campaign.csv does (\\n), one
    line per run, so grep and awk over the table still see one row."""
    root = tmp_path / "camp"
    (root / "new\nline").mkdir(parents=True)
    shutil.copy(RUNS / "L09_emt_fixed_square.traj", root / "new\nline" / "relax.traj")
    p = subprocess.run([sys.executable, "-m", "driftwatch", "audit", root, "-o", tmp_path / "out",
                        "--no-report", "--progress", "off"], capture_output=True, text=True)
    assert p.returncode == 0, p.stderr
    rows = [ln for ln in p.stdout.splitlines() if ln.startswith("camp/")]
    assert len(rows) == 1 and rows[0].startswith("camp/new\\nline/relax.traj ")


def test_a_file_that_only_holds_a_record_somewhere_is_not_replaced(tmp_path):
    """-o refuses a JSON list of records or notes quoting one: only a file that is a record (its
    first key the schema) is replaced."""
    run = RUNS / "L09_emt_fixed_square.traj"
    notes = tmp_path / "merged.json"
    notes.write_text('[{"schema": "driftwatch/run-2", "run": {}}]')
    p = subprocess.run([sys.executable, "-m", "driftwatch", "inspect", run, "-o", notes],
                       capture_output=True, text=True)
    assert p.returncode == 1 and "is not a driftwatch run record" in p.stderr
    assert notes.read_text().startswith("[")


def test_xdatcar_with_a_field_of_stars_keeps_the_steps_before_it(tmp_path):
    """An XDATCAR written by ASE's own writer from the bundled B05 relaxation (a real EMT run),
    with one coordinate of its third configuration overflowed to stars: the configurations before
    it stand, the run is damaged (the whole run failed)."""
    from driftwatch.adapters import read_run
    frames = ase.io.read(RUNS / "B05_emt_bfgs.extxyz", ":")
    ase.io.write(tmp_path / "XDATCAR", frames, format="vasp-xdatcar")
    lines = (tmp_path / "XDATCAR").read_text().splitlines(keepends=True)
    heads = [i for i, ln in enumerate(lines) if "configuration=" in ln]
    k = heads[2] + 1
    f = lines[k].split()
    lines[k] = f"  ************ {f[1]} {f[2]}\n"
    (tmp_path / "XDATCAR").write_text("".join(lines))
    run = read_run(tmp_path / "XDATCAR")
    assert len(run) == 2 and run.unfinished.startswith("unreadable after step")


# ---------------------------------------------------------------- what the API and a structure say
_NAFENIO = Path(__file__).parent / "data" / "public" / "broken" / "custodian_stopped" / "zpotrf"


def test_a_cut_poscar_says_where_it_ends(tmp_path):
    """custodian's genuine Na2FeNiO4 POSCAR (8 atoms; tests/data/public/README.md) cut after 7 of
    its atom lines, or after its cell: the error says so, not numpy's broadcast message that ASE's
    reader raises."""
    lines = (_NAFENIO / "POSCAR").read_text().splitlines(keepends=True)
    cut = tmp_path / "cut" / "POSCAR"
    cut.parent.mkdir()
    cut.write_text("".join(lines[:15]))
    head = tmp_path / "head" / "POSCAR"
    head.parent.mkdir()
    head.write_text("".join(lines[:5]))
    for path, said in ((cut, "ends after 7 of its 8 atom lines (a file cut while being written?)"),
                       (head, "5 lines: too short for a POSCAR")):
        proc = _dw("tolerance", str(path))
        err = proc.stderr.decode()
        assert proc.returncode == 1 and said in err and "broadcast" not in err, err
    assert len(read_run(_NAFENIO / "POSCAR").numbers) == 8                     # the whole file


def test_a_trajectory_cut_before_its_offset_table_says_it_was_cut(tmp_path):
    """A real ASE trajectory of more than 50 frames (example_runs' EMT FIRE path, 86 frames: ASE's
    ULM writer moves its offset table to the end after 50 items, ase/io/ulm.py Writer.sync)
    cut before that table: the error says the file was cut short, not that its header is
    damaged (a new user's field trial); a header past all sense is still called damaged."""
    import numpy as np
    src = Path(__file__).parent.parent / "example_runs" / "B07_emt_fire_path.traj"
    data = src.read_bytes()
    nitems, pos0 = (int(x) for x in np.frombuffer(data[32:48], "<i8"))
    assert nitems == 86 and pos0 > 30_000                # the table past the first 50 frames
    cut = tmp_path / "cut.traj"
    cut.write_bytes(data[:20_000])
    proc = _dw("inspect", str(cut))
    err = proc.stderr.decode()
    assert proc.returncode == 1 and "cut.traj: cut short: its header lists 86 frames whose " \
        f"offset table is at byte {pos0}, past the file's end (20000 bytes)" in err, err
    bad = tmp_path / "bad.traj"
    bad.write_bytes(data[:32] + np.array([1 << 40, 48], "<i8").tobytes() + data[48:20_000])
    err = _dw("inspect", str(bad)).stderr.decode()
    assert "damaged ASE trajectory header" in err, err


def test_a_structure_spglib_refuses_says_spglib_s_reason(tmp_path):
    """The same POSCAR with one atom written twice: spglib finds no group at any symprec ("too
    close distance between atoms", its own message): `tolerance` says so under its table of (0),
    and the verdict says the group is unknown, not "( 0, 0 operations)"."""
    import spglib
    lines = (_NAFENIO / "POSCAR").read_text().splitlines(keepends=True)
    lines[6] = "3 1 1 4\n"                                     # two Na on one site
    lines.insert(9, lines[8])
    twice = tmp_path / "POSCAR"
    twice.write_text("".join(lines))
    atoms = ase.io.read(twice, format="vasp")
    try:                     # spglib's own: None, or SpglibError in its newer error handling
        got = spglib.get_symmetry_dataset((atoms.cell.array, atoms.get_scaled_positions(),
                                           atoms.numbers), symprec=1e-3)
    except spglib.error.SpglibError as exc:
        got = None
        assert "too close distance between atoms" in str(exc)
    assert got is None
    proc = _dw("tolerance", str(twice))
    out = proc.stdout.decode()
    assert proc.returncode == 0 and ("spglib found no space group at 15 of 15 symprecs (shown as "
                                     "(0)): too close distance between atoms") in out, out
    record = driftwatch.analyze(twice)
    assert ("group unknown at symprec 0.001 Å (spglib found none for the structure: see the "
            "warnings)") in record["summary"]["verdict"]["text"]


def test_the_api_says_what_it_takes(tmp_path):
    """Mistakes a notebook user makes get driftwatch's own one-line errors: a frame index out of
    range (as --frame says it), a frame that is no integer, an ASE Atoms object, a file that is
    not a record, a format name that does not exist given with a run folder (it had been 'not a
    run folder')."""
    from ase import Atoms
    from driftwatch.errors import InputError, UnknownFormatError
    run = REPO / "example_runs" / "L03_qe_vcrelax"
    with pytest.raises(InputError, match=r"frame 99 out of range \(the run has 20 frames\)"):
        driftwatch.analyze(run, frames=[99])
    with pytest.raises(TypeError, match="frames: frame indices"):
        driftwatch.analyze(run, frames="0")
    with pytest.raises(TypeError, match="analyze needs a file, a run folder or a Run, got Atoms"):
        driftwatch.analyze(Atoms("Cu", cell=[3, 3, 3], pbc=True))
    assert len(driftwatch.analyze(run, frames=[0, -1])["frames"]) == 20
    text = tmp_path / "notes.txt"
    text.write_text("not json\n")
    with pytest.raises(ValueError, match=r"notes\.txt: not a driftwatch run record \(not JSON"):
        records.read_json(text)
    with pytest.raises(UnknownFormatError, match="unknown format 'vasp-outt'"):
        read_run(run, format="vasp-outt")
