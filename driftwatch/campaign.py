"""Campaign audit: discover runs, analyse them on local cores or a Dask cluster, cache, write outputs.

``audit(roots, output)`` is what ``driftwatch audit`` runs. In order:

1. **Output folder** (default ``./driftwatch-audit``): a marker ``.driftwatch-audit.json`` names the
   roots it belongs to. An existing non-empty folder without a marker, or with a marker for other
   roots, is refused unless ``overwrite=True``; so is a folder that is or contains a root. Nothing
   driftwatch did not write is ever deleted. One audit per folder at a time: an advisory lock
   (``fcntl.flock`` on ``.driftwatch-audit.lock``, held for the whole audit, released by the
   kernel when the process ends) refuses a second one. driftwatch makes no symbolic links: a link
   found where it writes (``records/``, ``records/stale/``, ``.cache/``, ``report/``, the
   database, the summary files) stops the audit before anything is written through it; a link
   put in place of one record file is replaced by the file (its target is never touched).
2. **Discovery** (:func:`discover`): run folders (a VASP set, or one pw.x output) count once, their
   files are not counted again; other files count when an adapter recognises them. Hidden entries,
   the output folder and the database file are skipped; symlinked folders are followed once (real
   paths are tracked, so loops end); an unreadable folder becomes a failed entry.
3. **Cache** (:mod:`driftwatch.cache`): a run whose inputs, config and versions are unchanged is
   not analysed again. Failed runs are cached too (deterministic failures only: a file driftwatch
   cannot read today is retried tomorrow).
4. **Execution**: ``workers=1`` in this process; more: a ``ProcessPoolExecutor`` of long-lived
   workers fed chunks of runs; ``scheduler=ADDRESS``: a ``distributed.Client`` and its executor; or
   any ``concurrent.futures.Executor`` passed as ``executor=``. A worker never raises: it returns
   the record or a one-line error, so one bad run never stops the audit. A worker process that dies
   (a crash in a native library, out of memory) breaks the pool: the runs not finished are re-run
   one at a time so that only the culprit is reported failed. Local workers end with their parent:
   they ask Linux to kill them when it dies (``PR_SET_PDEATHSIG``) and watch their parent process
   id. A SIGTERM to the audit kills its workers, says so on stderr and ends the audit by that
   signal (exit status 143 in a shell); finished runs are kept in the cache.
5. **Outputs**, each written atomically: ``records/<run>.json`` as results arrive (without the
   ``timing`` block and spglib's per-frame ``calls`` counter, which differ between two analyses of
   the same input, so an interrupted and re-run audit leaves the same bytes as an uninterrupted
   one; per-run timing stays in the cache entry and the campaign total in ``campaign.json``), ``campaign.csv``, ``runs.db`` (ase.db, one row per run), ``campaign.json``
   (the summary returned) and the HTML report. Records of runs no longer in the campaign (or now
   failing) are moved to ``records/stale/``, so ``records/`` holds exactly the current campaign;
   their database rows (the run ids the previous audit wrote, kept in the folder's marker) are
   deleted, so ``runs.db`` holds exactly the current campaign too.
"""

from __future__ import annotations

import fnmatch
import hashlib
import json
import os
import re
import signal
import stat
import sys
import threading
import time
from collections import Counter
from concurrent.futures import FIRST_COMPLETED, Executor, wait
from dataclasses import dataclass
from pathlib import Path

from . import records
from .cache import (CACHE_SCHEMA, RACY_NS, Cache, FileDigests, freeze_inputs, inputs_digest,
                    run_key)
from .cache import versions as _versions
from .tasks import Progress, duration, mp_context, progress_on
from .rules import FLAGS, campaign_advice
from .errors import ConfigError, DriftwatchError, InputError, OutputError

__all__ = ["audit", "discover", "RunSpec", "SCHEMA", "MARKER", "LOCK", "DEFAULT_OUTPUT"]

SCHEMA = "driftwatch/campaign-1"
MARKER = ".driftwatch-audit.json"
LOCK = ".driftwatch-audit.lock"
DEFAULT_OUTPUT = "driftwatch-audit"
TABLE_LIMIT = 500          # the printed table lists every run up to this many, else only notable ones
_TOLERANCE_FLAGS = tuple(c for c, what in FLAGS.items() if what == "tolerance")  # the symprec's


# ----------------------------------------------------------------------------- discovery
@dataclass(frozen=True)
class RunSpec:
    """One run of a campaign."""

    id: str
    """Unique run id: the root's name, then the path below the root (``/`` separated)."""
    path: str
    """Path the run is read from (the root as given joined with the relative path)."""
    kind: str
    """``"file"`` or ``"folder"``."""


def _strip(name: str) -> str:
    from .adapters._io import strip_compression
    return strip_compression(name)


def _root_name(root: Path) -> str:
    return root.name if root.name not in ("", ".", "..") else (root.resolve().name or "root")


def _matches(spec: RunSpec, patterns) -> bool:
    """A pattern matches the run's path relative to its root (``L0*``, ``*/relax/*``), or its whole
    id (``campaign/L0*``); an absolute pattern matches the run's absolute path. ``*`` also matches
    ``/``."""
    rel = spec.id.split("/", 1)[1] if "/" in spec.id else spec.id
    return any(fnmatch.fnmatchcase(os.path.abspath(spec.path), p) if os.path.isabs(p) else
               fnmatch.fnmatchcase(rel, p) or fnmatch.fnmatchcase(spec.id, p) for p in patterns)


def _file_runs(path: str, rid: str, keys) -> list[RunSpec]:
    """The runs of one file: one per structure of a many-structure extended XYZ or ase.db
    (``FILE::NAME``, :mod:`driftwatch.adapters.batch`), else the file itself."""
    from .adapters.registry import structures
    names = structures(path, keys)
    if not names:
        return [RunSpec(rid, str(path), "file")]
    return [RunSpec(f"{rid}::{n}", f"{path}::{n}", "file") for n in names]


def _walk(root: Path, prefix: str, skip: set, seen_dirs: set, seen_runs: set, keys=None):
    """Yield RunSpecs and failed entries (dicts) below ``root`` (depth first, sorted).

    Symbolic links (to files or folders) are taken after every real path of the root, so a run
    reachable both ways is named by its real path; real paths seen are never entered twice.
    """
    from .adapters.registry import not_folder, recognised
    stack, later_dirs, later_files = [(Path(root), prefix)], [], []
    while stack or later_dirs or later_files:
        if not stack:
            for path, rid, name in later_files:
                freal = os.path.realpath(path)
                if freal not in seen_runs and freal not in skip and recognised(path, name):
                    seen_runs.add(freal)
                    yield from _file_runs(path, rid, keys)
            later_files = []
            stack, later_dirs = later_dirs[::-1], []
            continue
        folder, rid, *end = stack.pop()
        real = os.path.realpath(folder)
        if real in seen_dirs or real in skip:
            continue
        seen_dirs.add(real)
        if os.path.isfile(os.path.join(folder, MARKER)):   # an earlier audit's output folder:
            continue                                      # its runs.db and records are no runs
        try:
            with os.scandir(folder) as it:
                entries = sorted((e for e in it if not e.name.startswith(".")), key=lambda e: e.name)
            kinds = [(e, "file" if not_folder(e) else "dir") for e in entries]
            files = [e for e, k in kinds if k == "file"]
            dirs = [e for e, k in kinds if k == "dir"]
        except OSError as exc:
            yield {"run": rid, "source": str(folder),
                   "error": f"{folder}: cannot list folder ({exc.strerror or exc})"}
            continue
        from .adapters.registry import (foreign_output, inputs_only_problem, recognised,
                                        scan_folder)
        try:
            kind, got = scan_folder(folder, [e.name for e in files])
        except OSError as exc:
            yield {"run": rid, "source": str(folder),
                   "error": f"{folder}: cannot read folder ({exc.strerror or exc})"}
            continue
        ends = ()
        if end and kind != "run":   # a band's end point holding no run: its fixed input
            continue
        if kind == "band":        # no run itself, its images are; its end points hold inputs
            ends = set(got[1])
        elif kind == "inputs-of":  # inputs/ beside the job's outputs/: that run's, no run,
            dirs = []              # and its folders are that run's too (a band's images' inputs)
        elif kind == "inputs":    # failed unless a run lies below it (discover decides)
            yield {"run": rid, "source": str(folder), "inputs_only": True,
                   "error": f"{folder}: {inputs_only_problem(got, folder)}"}
        elif kind in ("run", "ambiguous"):      # an ambiguous folder fails as one run, saying why
            if real not in seen_runs:
                seen_runs.add(real)
                yield RunSpec(rid, str(folder), "folder")
            for name in got.others if kind == "run" else ():   # another run beside it
                path = str(Path(folder) / name)
                freal = os.path.realpath(path)
                if freal not in seen_runs and freal not in skip:
                    seen_runs.add(freal)
                    yield from _file_runs(path, f"{rid}/{name}", keys)
            staged = {Path(src).parent.name for _, src, _ in got.stages
                      if Path(src).parent != Path(folder)} if kind == "run" else set()
            dirs = [e for e in dirs if e.name not in staged]      # stage folders are this run
        else:
            wanted = set(got)
            for e in files:
                path, frid = str(Path(folder) / e.name), f"{rid}/{e.name}"
                if e.is_symlink():
                    later_files.append((path, frid, e.name))
                    continue
                freal = os.path.realpath(path)
                if freal in seen_runs or freal in skip:
                    continue
                if e.name in wanted:
                    seen_runs.add(freal)
                    yield from _file_runs(path, frid, keys)
                elif foreign_output(path):          # listed as skipped: never dropped unsaid
                    seen_runs.add(freal)
                    yield RunSpec(frid, path, "file")
        for e in reversed(dirs):
            item = (Path(folder) / e.name, f"{rid}/{e.name}", *(("end",) if e.name in ends else ()))
            (later_dirs if e.is_symlink() else stack).append(item)


def discover(roots, *, include=(), exclude=(), skip=(),
             structure_keys=None) -> tuple[list[RunSpec], list[dict]]:
    """Runs under ``roots`` (folders or files) and failed entries for what could not be searched.

    A file of many relaxations (an extended XYZ or ase.db whose frames name their structure by one
    of ``structure_keys``, default ``adapters.batch.STRUCTURE_KEYS``; a JSON list of task
    documents) gives one run per structure, id and path ``FILE::NAME``.

    Args:
        roots: folders or files.
        include: fnmatch globs on the run's path relative to its root (or its whole id, which starts
            with the root's name); when given, a run is kept only if one matches.
        exclude: the same; a run that one matches is dropped.
        skip: paths never entered or counted (the output folder, the database file).

    A folder of a code's job inputs with no output (a job not run yet, or one that stopped
    before writing) is a failed entry saying so, unless a run lies below it (a campaign's
    template inputs beside its run folders).

    Returns:
        (runs sorted by id, failed entries ``{"run", "source", "error"}``). Ids are unique.
    """
    if isinstance(roots, (str, os.PathLike)):
        roots = [roots]
    skip_real = {os.path.realpath(p) for p in skip}
    seen_dirs, seen_runs = set(), set()
    runs, failed, ids, unrun = [], [], set(), []
    for root in roots:
        root = Path(root)
        name = _root_name(root)
        if not root.exists():
            failed.append({"run": name, "source": str(root),
                           "error": f"{root}: no such file or directory"})
            continue
        if root.is_file():
            real = os.path.realpath(root)
            found = [] if real in seen_runs else _file_runs(str(root), name, structure_keys)
            seen_runs.add(real)
        else:
            real = os.path.realpath(root)
            inside = real in seen_dirs                          # (inside a root before it)
            found = list(_walk(root, name, skip_real, seen_dirs, seen_runs, structure_keys))
            if not found and not inside and len(roots) > 1 and _has_files(root) and not any(
                    p == real or p.startswith(real + os.sep)    # (nor holding a run read before)
                    for p in {s.split("::")[0] for s in seen_runs}):
                # a folder named beside others that holds files, none of which driftwatch reads:
                # said, as the audit of it alone says it (an empty folder is passed over)
                failed.append({"run": name, "source": str(root),
                               "error": f"{root}: " + _why_empty((), (), (), ())})
        for item in found:
            if isinstance(item, dict):
                spec = RunSpec(item["run"], item["source"], "folder")
                if item.pop("inputs_only", False):
                    if (not include or _matches(spec, include)) and not _matches(spec, exclude):
                        unrun.append(item)
                elif not _matches(spec, exclude):
                    failed.append(item)
                continue
            if include and not _matches(item, include):
                continue
            if exclude and _matches(item, exclude):
                continue
            base = _id_text(item.id)
            rid, k = base, 1
            while rid in ids:
                k += 1
                rid = f"{base}~{k}"
            ids.add(rid)
            runs.append(RunSpec(rid, item.path, item.kind))
    above = set()                                   # every folder that holds a run below it
    for r in runs:
        above.update(Path(os.path.realpath(r.path.split("::")[0])).parents)
    failed += [item for item in unrun if Path(os.path.realpath(item["source"])) not in above]
    for item in failed:
        item["run"] = _id_text(item["run"])
    return sorted(runs, key=lambda r: r.id), failed


def _has_files(folder: Path) -> bool:
    """Whether ``folder`` holds a file that is not hidden, at any depth."""
    for _, _, names in os.walk(folder):
        if any(not n.startswith(".") for n in names):
            return True
    return False


def _id_text(name: str) -> str:
    """A run id as the UTF-8 text of its path's bytes, whatever the locale: Python decodes file
    names with the locale's encoding, so an ISO-8859-1 batch job would give another id (and
    record name) than a UTF-8 login shell to the same run (bytes that are no UTF-8 stay escaped
    as before)."""
    return os.fsencode(name).decode("utf-8", "surrogateescape")


# ----------------------------------------------------------------------------- the worker
_WORKER_CFG = None


def _init_worker(cfg, parent: int | None = None, audit: int | None = None) -> None:
    global _WORKER_CFG
    _WORKER_CFG = cfg
    signal.signal(signal.SIGTERM, signal.SIG_DFL)     # a forked worker inherits the audit's handler
    _die_with_parent(parent, audit)
    import driftwatch.track  # noqa: F401  (import once per worker process, not per run)


_PR_SET_PDEATHSIG = 1       # <linux/prctl.h>


def _process_stamp(pid: int):
    """(state, start time) of a live process, from /proc (Linux); ("?", None) where /proc is not
    available but the process exists; None when it is gone."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as fh:
            data = fh.read()
    except FileNotFoundError:
        return None
    except OSError:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return None
        except OSError:
            pass
        return ("?", None)
    fields = data[data.rindex(b")") + 2:].split()
    return fields[0].decode(), fields[19]          # stat fields 3 (state) and 22 (start time)


def _pdeathsig_setter():
    """``prctl`` of the C library (Linux), resolved in the parent, or None."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        import ctypes
        return ctypes.CDLL(None, use_errno=True).prctl
    except (OSError, AttributeError):
        return None


#: (audit pid, prctl) while a pool of forked workers may start: a child forked then is told to die
#: with the audit at its first instruction, before the pool's machinery or the initializer runs
#: (a child that blocked there had outlived a killed audit, its parent watch not yet started).
_FORK_GUARD: list = [None]


def _guard_forked_child() -> None:
    guard, _FORK_GUARD[0] = _FORK_GUARD[0], None
    if guard is None:
        return
    parent, prctl = guard
    if prctl is not None:
        prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
    if os.getppid() != parent:                      # the audit died before the line above
        os._exit(1)


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_guard_forked_child)


def _die_with_parent(parent: int | None, audit: int | None = None) -> None:
    """Make this worker end when the audit ends, however it ends (SIGKILL included).

    Linux: ``prctl(PR_SET_PDEATHSIG, SIGKILL)``: the kernel kills the worker when the process that
    started it exits. Everywhere: a daemon thread that checks once a second that the parent
    process id is unchanged and that the audit process (``audit``; with a fork server it is not
    the parent, and the fork server outlives it while workers hold it open) still runs, the same
    process (same start time) and not a zombie; else the worker exits. ``parent``: the pid the
    worker must have as parent (None with a fork server); a worker whose parent is already gone
    exits at once."""
    ppid = os.getppid()
    prctl = _pdeathsig_setter()
    if prctl is not None:
        prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
    stamp = _process_stamp(audit) if audit is not None else None
    if (parent is not None and ppid != parent) or ppid == 1 or \
            (audit is not None and (stamp is None or stamp[0] == "Z")):
        os._exit(1)

    def gone() -> bool:
        if os.getppid() != ppid:
            return True
        if audit is None:
            return False
        now = _process_stamp(audit)
        return now is None or now[0] == "Z" or now[1] != stamp[1]

    def watch():
        while not gone():
            time.sleep(1.0)
        os._exit(1)

    threading.Thread(target=watch, name="driftwatch-parent-watch", daemon=True).start()


def _one_line(exc: BaseException, path: str) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    if not isinstance(exc, DriftwatchError):
        text = f"{type(exc).__name__}: {text}"
    if path not in text:
        text = f"{path}: {text}"
    return text if len(text) <= 400 else text[:397] + "..."


def _split_volatile(rec: dict) -> dict:
    """Remove and return the record's ``timing`` block (it differs between two analyses of the same
    input), so written records stay byte-stable."""
    return dict(rec.pop("timing", None) or {})


def _skip_reason(exc, path: str) -> dict | None:
    """A run driftwatch cannot analyse by its nature (a molecule, cluster or wire: not a layer and
    not bulk; a pw.x band-structure run: no ionic step; an output of a code it has no reader for):
    the reason and what would include it, or None for a real failure. The reason names the file
    it comes from when the run is a folder."""
    from .errors import NotAnalysed
    if not isinstance(exc, NotAnalysed):
        return None
    where, reason = getattr(exc, "path", None), exc.reason
    if where and os.path.normpath(where) != os.path.normpath(path):
        inside = os.path.normpath(where).startswith(os.path.normpath(path) + os.sep)
        reason = f"{os.path.relpath(where, path) if inside else where}: {reason}"
    return {"reason": reason, "include": exc.include}


def analyse_run(run_id: str, path: str, cfg: dict) -> dict:
    """Analyse one run; never raises (except KeyboardInterrupt/SystemExit).

    Returns ``{"run", "source", "ok": True, "record_text", "structure", "timing", "inputs"}`` (the
    record as the exact JSON text written to ``records/``, without the volatile fields of
    :func:`_split_volatile`; structure = final frame's cell, positions, numbers, pbc; inputs = the
    files and folders the readers used, ``Run.inputs``) or ``{"run", "source", "ok": False,
    "error": one line, "cacheable": bool, "inputs"}``, plus ``"skipped": {"reason", "include"}``
    for a run that is not a layer or bulk crystal (a molecule). Serialising here keeps the
    (pure-Python, indented) JSON encoding in the workers, not in the collecting process.
    """
    from .adapters import ReadContext
    ctx = ReadContext(path)
    run = None
    try:
        from .adapters import read_run
        from .track import analyze
        run = read_run(path, context=ctx, structure_keys=cfg["inputs"]["structure_keys"])
        rec = analyze(run, cfg)
        timing = _split_volatile(rec)
        structure = {"cell": run.cells[-1].tolist(), "positions": run.positions[-1].tolist(),
                     "numbers": [int(z) for z in run.numbers], "pbc": [bool(p) for p in run.pbc]}
        return {"run": run_id, "source": path, "ok": True,
                "record_text": records.dumps(rec) + "\n", "inputs": [list(x) for x in ctx.inputs()],
                "structure": structure, "timing": json.loads(records.dumps(timing, indent=False))}
    except Exception as exc:  # noqa: BLE001 - a worker must never raise
        # A file that could not be opened (permissions, I/O) or memory exhaustion may go away:
        # do not cache those. Everything else is a property of the inputs and this version.
        transient = isinstance(exc, (MemoryError, OSError)) and not isinstance(exc, DriftwatchError)
        out = {"run": run_id, "source": path, "ok": False, "error": _one_line(exc, path),
               "cacheable": not transient, "inputs": [list(x) for x in ctx.inputs()]}
        skipped = _skip_reason(exc, path)
        if skipped:
            out["skipped"] = skipped
        return out


def _analyse_chunk(items, cfg=None) -> list[dict]:
    cfg = _WORKER_CFG if cfg is None else cfg
    return [analyse_run(rid, path, cfg) for rid, path in items]


# ----------------------------------------------------------------------------- execution
def _chunks(items, size):
    return [items[i:i + size] for i in range(0, len(items), size)]


def _chunk_size(n: int, workers: int) -> int:
    """About four chunks per worker (load balance), at most 4 runs per chunk (records arrive
    steadily and an interrupt loses little)."""
    return max(1, min(4, n // max(1, 4 * workers)))


def _failed_chunk(chunk, why: str, broken: bool = False) -> list[dict]:
    out = [{"run": rid, "source": path, "ok": False, "cacheable": False,
            "error": f"{path}: {why}"} for rid, path in chunk]
    if broken:
        for res in out:
            res["broken_pool"] = True
    return out


SLOWEST = 5
"""campaign.json's ``slowest``: the runs analysed now that took longest, this many; the summary
names them when the slowest took :data:`SLOW_RUN` seconds or more."""
SLOW_RUN = 60.0

SLOW_CALL = 10.0
"""s: a spglib call this slow makes the progress line name the ``large`` preset."""

HEARTBEAT = 5.0
"""s: how long :func:`_drain` waits for a result before it yields None (the audit's progress line
says the workers are busy, at its own pace: every 30 s in a log)."""


def _drain(executor: Executor, chunks, cfg, *, pass_cfg: bool):
    """Yield results of every chunk from an executor, as they complete; None after each
    :data:`HEARTBEAT` seconds with none."""
    futs = {}
    for chunk in chunks:
        fut = executor.submit(_analyse_chunk, chunk, cfg) if pass_cfg else \
            executor.submit(_analyse_chunk, chunk)
        futs[fut] = chunk
    pending = set(futs)
    try:
        while pending:
            done, pending = wait(pending, timeout=HEARTBEAT, return_when=FIRST_COMPLETED)
            if not done:
                yield None                # none finished for a while: the caller may say so
            for fut in done:
                try:
                    yield from fut.result()
                except Exception as exc:  # noqa: BLE001 - a lost worker fails its runs only
                    from concurrent.futures.process import BrokenProcessPool
                    yield from _failed_chunk(futs[fut], f"worker failed ({type(exc).__name__}: "
                                                        f"{' '.join(str(exc).split())})",
                                             broken=isinstance(exc, BrokenProcessPool))
    finally:
        for fut in pending:
            fut.cancel()


def _terminate(ex) -> None:
    """Stop a process pool's workers at once (results already stored are kept; the rest is
    recomputed on the next audit): SIGTERM, then SIGKILL to any still alive after 2 s."""
    procs = list((getattr(ex, "_processes", None) or {}).values())
    ex.shutdown(wait=False, cancel_futures=True)
    for proc in procs:
        if proc.is_alive():
            proc.terminate()
    deadline = time.monotonic() + 2.0
    for proc in procs:
        proc.join(max(0.0, deadline - time.monotonic()))
        if proc.is_alive():
            proc.kill()
            proc.join(1.0)


_POOLS: list = []          # the local process pools now running (for the SIGTERM handler)
_HANDLER_PID = None
_SIGTERM_NOTE = b""


def _on_sigterm(signum, frame):
    """SIGTERM while local workers run: kill the workers, say so, and end by the same signal.

    Nothing is unwound (the interrupted code may be inside the executor's own machinery): records
    and cache entries are written atomically, so what finished is kept; the lock goes with the
    process. A forked worker that has not yet reset the handler just ends."""
    if os.getpid() == _HANDLER_PID:
        for ex in list(_POOLS):
            for proc in list((getattr(ex, "_processes", None) or {}).values()):
                try:
                    os.kill(proc.pid, signal.SIGKILL)
                except (OSError, AttributeError, TypeError):
                    pass
        try:
            os.write(2, _SIGTERM_NOTE)
        except OSError:
            pass
    signal.signal(signum, signal.SIG_DFL)
    os.kill(os.getpid(), signum)


def _catch_sigterm(note: str = ""):
    """Handle SIGTERM as :func:`_on_sigterm` while an audit and its local workers run (main thread
    only); returns the previous handler to restore, or None when none was installed."""
    global _HANDLER_PID, _SIGTERM_NOTE
    if threading.current_thread() is not threading.main_thread():
        return None
    _HANDLER_PID = os.getpid()
    _SIGTERM_NOTE = note.encode("utf-8", "replace")
    try:
        return signal.signal(signal.SIGTERM, _on_sigterm)
    except (ValueError, OSError):
        return None


#: What every worker imports (the analysis, ASE's parsers behind the OUTCAR and pw.x readers):
#: imported once in the audit process before its workers fork, so they share it instead of each
#: paying ~0.9 s CPU (the audit imports ASE for runs.db anyway).
WORKER_PRELOAD = ("driftwatch.track", "ase.io")


def _new_pool(workers, cfg):
    import importlib
    from concurrent.futures import ProcessPoolExecutor
    ctx = mp_context()
    if ctx.get_start_method() == "fork":
        for name in WORKER_PRELOAD:
            importlib.import_module(name)
        _FORK_GUARD[0] = (os.getpid(), _pdeathsig_setter())
    elif ctx.get_start_method() == "forkserver":
        ctx.set_forkserver_preload(list(WORKER_PRELOAD))
    parent = os.getpid() if ctx.get_start_method() in ("fork", "spawn") else None
    ex = ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_init_worker,
                             initargs=(cfg, parent, os.getpid()))
    _POOLS.append(ex)
    return ex


def _end_pool(ex, *, wait: bool) -> None:
    ex.shutdown(wait=wait, cancel_futures=True)
    _FORK_GUARD[0] = None
    if ex in _POOLS:
        _POOLS.remove(ex)


def _local_pool(todo, cfg, workers, note: str = ""):
    """Process pool. After a worker death (a crash in a native library, the out-of-memory killer)
    the unfinished runs are analysed again in a fresh pool, and after a second death one at a time
    (so only the run that kills its worker fails); each step is said on stderr. ``note`` is printed
    on stderr if SIGTERM ends the audit while the pool runs."""
    from concurrent.futures.process import BrokenProcessPool
    finished = set()
    previous = _catch_sigterm(note)

    def pool(items):                      # yields results; returns True if a worker died
        ex = _new_pool(workers, cfg)
        broken = False
        try:
            for res in _drain(ex, _chunks(items, _chunk_size(len(items), workers)), cfg,
                              pass_cfg=False):
                if res is None:
                    yield None
                    continue
                if res.get("broken_pool"):
                    broken = True
                    continue
                finished.add(res["run"])
                yield res
        except BaseException:       # interrupted (Ctrl-C, generator closed): stop the workers now
            _terminate(ex)
            raise
        finally:
            _end_pool(ex, wait=not broken)
        return broken

    try:
        for attempt in range(2):
            left = [t for t in todo if t[0] not in finished]
            if attempt:
                print(f"driftwatch: a worker process died (a crash in a native library or out of "
                      f"memory); analysing the {len(left)} unfinished runs again", file=sys.stderr)
            if not (yield from pool(left)):
                return
        left = [t for t in todo if t[0] not in finished]
        print(f"driftwatch: a worker process died again; the {len(left)} unfinished runs go one at "
              f"a time, so only a run that kills its worker fails", file=sys.stderr)
        for rid, path in left:
            ex = _new_pool(1, cfg)
            try:
                yield ex.submit(_analyse_chunk, [(rid, path)]).result()[0]
            except BrokenProcessPool:
                yield _failed_chunk([(rid, path)], "the worker process died while analysing this "
                                                  "run (crash in a native library or out of "
                                                  "memory)")[0]
            except BaseException:
                _terminate(ex)
                raise
            finally:
                _end_pool(ex, wait=False)
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


def _execute(todo, cfg, *, workers, scheduler, executor, note=""):
    """Yield a result for every (run id, path) in ``todo``. Returns (generator, description)."""
    if not todo:
        return iter(()), "none"
    if executor is not None:
        n = getattr(executor, "_max_workers", None) or 2
        return _drain(executor, _chunks(todo, _chunk_size(len(todo), n)), cfg, pass_cfg=True), \
            type(executor).__name__
    if scheduler:
        return _dask(todo, cfg, scheduler), f"dask {scheduler}"
    workers = max(1, min(workers, len(todo)))
    if workers == 1:
        return (analyse_run(rid, path, cfg) for rid, path in todo), "in process"
    return _local_pool(todo, cfg, workers, note), f"{workers} local processes"


def _dask(todo, cfg, scheduler):
    try:
        from distributed import Client
    except ImportError as exc:
        raise ConfigError("--scheduler needs Dask: pip install 'driftwatch[dask]' "
                          "(dask[distributed])") from exc
    try:
        client = Client(scheduler, timeout="20s")
    except Exception as exc:  # noqa: BLE001 - OSError, TimeoutError, ValueError (bad address)
        raise ConfigError(f"--scheduler {scheduler}: cannot connect ({type(exc).__name__}: {exc})"
                          ) from exc
    try:
        n = max(1, sum(client.nthreads().values()))
        yield from _drain(client.get_executor(), _chunks(todo, _chunk_size(len(todo), n)), cfg,
                          pass_cfg=True)
    finally:
        client.close()


# ----------------------------------------------------------------------------- progress
# ----------------------------------------------------------------------------- output folder
_OWN_PATHS = ("records", "records/stale", ".cache", "report", "report/runs", MARKER, LOCK,
              "campaign.csv", "campaign.json")
"""Fixed paths of an audit folder: a symbolic link at any of them is refused (driftwatch makes
none); so is one at the default database ``runs.db`` and its ``.lock``."""
_OUTPUT_NAMES = ("campaign.csv", "campaign.json", "records", "report", ".cache")
"""What an audit writes in its folder (and ``runs.db`` there by default): in a folder no audit
wrote, any of them is the user's own, and the audit refuses to replace it, even with --overwrite."""


def _link_error(path: Path) -> OutputError:
    return OutputError(f"{path}: is a symbolic link, which driftwatch did not make; refusing to "
                       f"write through it (remove the link, or choose another --output)")


def _check_links(out: Path, db_name: str | None = None) -> None:
    """Raise OutputError for a symbolic link at one of the audit folder's own paths."""
    paths = [out / name for name in _OWN_PATHS]
    default_db = out / "runs.db"
    if db_name is None or db_name == str(default_db.absolute()):
        paths += [default_db, out / "runs.db.lock"]
    for p in paths:
        if p.is_symlink():
            raise _link_error(p)


def _check_not_a_root(out: Path, roots) -> None:
    """Refuse an output folder that is a campaign root or contains one (discovery skips the output
    folder, so nothing would be audited)."""
    real = os.path.realpath(out)
    for root in roots:
        r = os.path.realpath(root)
        if r == real or r.startswith(real.rstrip(os.sep) + os.sep):
            raise OutputError(f"{out}: the output folder is or contains the campaign root {root}, "
                              f"whose runs would all be skipped as audit outputs; choose an "
                              f"--output outside it (a folder inside a root is fine)")


_HELD_LOCKS: set = set()


def _forget_locks_in_child() -> None:
    """In a forked child (a worker pool, the report's pool): close the inherited lock descriptors,
    so the lock ends with the audit process, never with a straggling child."""
    for fd in list(_HELD_LOCKS):
        try:
            os.close(fd)
        except OSError:
            pass
    _HELD_LOCKS.clear()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_forget_locks_in_child)


class _FolderLock:
    """One audit per output folder: ``fcntl.flock`` on ``OUTPUT/.driftwatch-audit.lock`` (advisory,
    held until :meth:`release` or the end of the process; the file itself stays). Forked children
    close their copy of the descriptor at once, so they never hold the lock."""

    def __init__(self):
        self.fd = None

    def acquire(self, out: Path) -> None:
        try:
            import fcntl
        except ImportError:             # no flock on this platform: unprotected, as before
            return
        path = out / LOCK
        flags = os.O_RDWR | os.O_CREAT | getattr(os, "O_CLOEXEC", 0) | getattr(os, "O_NOFOLLOW", 0)
        try:
            fd = os.open(path, flags, 0o666)    # the user's umask applies (shared folders)
        except OSError as exc:
            if path.is_symlink():
                raise _link_error(path) from None
            raise OutputError(f"{path}: cannot open the audit lock ({exc.strerror or exc})"
                              ) from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.pread(fd, 32, 0).decode("ascii", "replace").strip()
            os.close(fd)
            who = f" (process {holder})" if holder.isdigit() else ""
            raise OutputError(f"{out}: another driftwatch audit{who} is writing into this folder; "
                              f"wait for it to finish, or choose another --output") from None
        except OSError as exc:          # a filesystem without locks (some Lustre/NFS mounts)
            os.close(fd)
            sys.stderr.write(f"driftwatch: warning: {path}: cannot lock ({exc.strerror or exc}); "
                             f"make sure no other audit writes into {out} at the same time\n")
            return
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        self.fd = fd
        _HELD_LOCKS.add(fd)

    def release(self) -> None:
        if self.fd is not None:
            _HELD_LOCKS.discard(self.fd)
            os.close(self.fd)           # closing the last descriptor releases the flock
            self.fd = None


def _read_marker(out: Path) -> dict | None:
    try:
        data = json.loads((out / MARKER).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) and data.get("tool") == "driftwatch" else None


def _write_marker(out: Path, roots: list[str], record_files: list[str],
                  runs: dict | list | None, inputs: dict | None = None) -> None:
    """The output folder's own marker: what wrote it, the records this audit wrote and every run id
    of the audit with a digest of its answer (``runs``: :func:`_answers`) and of the inputs it was
    read from (``inputs``: :func:`~driftwatch.cache.inputs_digest`): the next audit retires the
    records and database rows of runs gone since, and says what changed."""
    from . import __version__
    data = {"tool": "driftwatch", "kind": "campaign audit", "version": __version__,
            "roots": roots, "records": sorted(record_files)}
    if runs is not None:
        data["runs"] = sorted(runs)
    if isinstance(runs, dict):
        data["answers"] = dict(sorted(runs.items()))
    if isinstance(inputs, dict) and inputs:
        data["inputs"] = dict(sorted(inputs.items()))
    records.write_text_atomic(out / MARKER, json.dumps(data, indent=1) + "\n")


def _digest(text: str) -> str:
    return hashlib.sha1(text.encode()).hexdigest()[:16]


def _answers(results: list[dict]) -> dict:
    """``{run id: digest}`` of each run's answer (its record, or why it failed or was skipped)."""
    return {x["run"]: x.get("answer") or _digest(json.dumps(x.get("error") or x.get("skipped"),
                                                            sort_keys=True, default=str))
            for x in results}


def _since_last(old: dict, now: dict, inputs: dict, read_now: set) -> dict | None:
    """What changed since the audit that wrote ``old`` (the folder's previous marker): runs new,
    gone, and read again (their files changed since that audit, or their answer is not the one it
    gave); None when the previous audit did not list its runs (none, or an older driftwatch).
    ``now``: :func:`_answers`; ``inputs``: {run id: digest of its inputs or None}; ``read_now``:
    the runs analysed now (not from the cache). A run read from the same bytes as then (the cache
    deleted, or not used) is not read again; one served from the cache of an audit interrupted
    since, from other bytes, is."""
    if "runs" not in old:
        return None
    before, after, answers = set(old["runs"]), set(now), old.get("answers") or {}
    then = old.get("inputs") or {}

    def changed(r):
        if then.get(r) is not None and inputs.get(r) is not None:
            return then[r] != inputs[r]
        return r in read_now                 # (an older marker, or inputs not known)
    return {"new": sorted(after - before), "gone": sorted(before - after),
            "read_again": sorted(r for r in after & before if changed(r)
                                 or answers.get(r, now[r]) != now[r])}


def _prepare_output(out: Path, roots: list[str], overwrite: bool,
                    lock: _FolderLock | None = None, db_name: str | None = None) -> dict:
    """Check the output folder may be used; create it, lock it and write its marker. Returns the
    old marker."""
    if out.exists() and not out.is_dir():
        raise OutputError(f"{out}: exists and is not a folder; choose another --output")
    if out.is_dir():
        _check_links(out, db_name)
    marker = _read_marker(out) if out.is_dir() else None
    if out.is_dir() and marker is None and os.path.lexists(out / MARKER):
        if not overwrite:
            raise OutputError(f"{out / MARKER}: the marker of the audit in this folder is "
                              f"damaged; pass --overwrite to audit into it anew (its audit files "
                              f"are replaced), or choose another --output")
        marker = {}                         # an audit's folder all the same
    if out.is_dir() and marker is None:     # the user's own folder: nothing of theirs is replaced
        default_db = out / "runs.db"
        mine = _OUTPUT_NAMES + (("runs.db",) if db_name is None or
                                db_name == str(default_db.absolute()) else ())
        taken = [n + ("/" if (out / n).is_dir() else "") for n in mine
                 if os.path.lexists(out / n)]
        if taken:
            raise OutputError(f"{out}: holds {', '.join(taken)}, which no driftwatch audit of this "
                              f"folder wrote (it has no {MARKER}); an audit would replace "
                              f"{'them' if len(taken) > 1 else 'it'}: move "
                              f"{'them' if len(taken) > 1 else 'it'} away, or choose another "
                              f"--output")
    if out.is_dir() and any(p.name != LOCK for p in out.iterdir()) and not overwrite:
        if marker is None:
            raise OutputError(f"{out}: folder exists, is not empty and holds no driftwatch audit; "
                              f"choose another --output, or pass --overwrite to add the audit's "
                              f"files to it (your files there are left as they are)")
        if sorted(marker.get("roots", [])) != roots:
            raise OutputError(f"{out}: holds the audit of other roots "
                              f"({', '.join(marker.get('roots', [])) or 'unknown'}); choose another "
                              f"--output, or pass --overwrite to replace its audit files")
    try:
        out.mkdir(parents=True, exist_ok=True)
        if lock is not None:
            lock.acquire(out)
        _check_links(out, db_name)
        for sub in (out, out / "records", out / ".cache", out / "report", out / "report" / "runs"):
            records.remove_stale_temporaries(sub)  # left by a killed audit's atomic writes
        _write_marker(out, roots, (marker or {}).get("records", []),
                      (marker or {}).get("answers") or (marker or {}).get("runs"),
                      (marker or {}).get("inputs"))
    except OutputError:
        raise
    except OSError as exc:
        raise OutputError(f"{out}: cannot write the output folder ({exc.strerror or exc})") from exc
    return marker or {}


def _record_names(runs: list[RunSpec]) -> dict[str, str]:
    """Run id -> record file name (safe, unique; a colliding name gets a hash of the id)."""
    import hashlib
    base = {r.id: records.safe_name(r.id) for r in runs}
    counts = Counter(n.lower() for n in base.values())
    out = {}
    for rid, name in base.items():
        if counts[name.lower()] > 1:
            digest = hashlib.sha256(rid.encode("utf-8", "surrogatepass")).hexdigest()
            name = f"{name[:100]}-{digest[:10]}"
        # the UTF-8 bytes on disk whatever the locale (a name decoded as ISO-8859-1 would be
        # written as other bytes: another file)
        out[rid] = os.fsdecode(f"{name}.json".encode("utf-8", "surrogateescape"))
    return out


def _inside(folder: Path, file: Path) -> Path:
    """``file`` checked to lie in ``folder`` (itself not a link) or below. The last component is
    not followed: a link there is replaced by the atomic rename, never written through."""
    if folder.is_symlink():
        raise _link_error(folder)
    parent = file.parent.resolve()
    if not parent.is_relative_to(folder.resolve()):
        raise OutputError(f"{file}: would be written outside the output folder {folder}")
    return parent / file.name


def _write_if_changed(path: Path, text: str) -> None:
    """Write ``text`` atomically unless the regular file at ``path`` holds it already (a link or
    special file there is never read through: it is replaced)."""
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0) |
                     getattr(os, "O_NONBLOCK", 0))
    except OSError:
        fd = None
    if fd is not None:
        with os.fdopen(fd, "rb") as fh:
            if stat.S_ISREG(os.fstat(fh.fileno()).st_mode) and \
                    fh.read() == text.encode("utf-8", "driftwatch-names"):
                return
    records.write_text_atomic(path, text)


def _retire_stale(rec_dir: Path, previous: list[str], current: set[str]) -> list[str]:
    """Move records driftwatch wrote earlier that are no longer current to records/stale/; drop
    the stale copy of a run that is current again (its record in records/ is the live one)."""
    moved = []
    stale = rec_dir / "stale"
    if stale.is_dir() and not stale.is_symlink():
        for name in current:
            old = stale / name
            if old.is_file() and not old.is_symlink():
                old.unlink()
    for name in previous:
        src = rec_dir / name
        if name in current or "/" in name or src.is_symlink() or not src.is_file():
            continue
        if stale.is_symlink() or rec_dir.is_symlink():
            raise _link_error(stale if stale.is_symlink() else rec_dir)
        try:
            stale.mkdir(exist_ok=True)
            os.replace(src, stale / name)
        except OSError as exc:
            raise OutputError(f"{src}: cannot move to {stale} ({exc.strerror or exc})") from exc
        moved.append(name)
    return moved


def _regular_file_runs(runs: list[RunSpec]) -> tuple[list[RunSpec], list[dict]]:
    """Split file runs that are FIFOs, devices or sockets (behind a link) off as failed entries:
    reading or hashing them could block or never end."""
    from .adapters._io import not_regular
    keep, bad = [], []
    for r in runs:
        if r.kind == "file":
            try:
                mode = os.stat(r.path).st_mode
            except OSError:
                mode = None              # gone or a broken link: its reader says so
            if mode is not None and not stat.S_ISREG(mode):
                bad.append({"run": r.id, "source": r.path, "error": str(not_regular(r.path, mode))})
                continue
        keep.append(r)
    return keep, bad


class _Shown:
    """A text stream that writes names safely (:func:`records.shown_lines`: terminal escapes and
    undecodable bytes as ``\\xNN``)."""

    def __init__(self, stream):
        self.stream = stream

    def write(self, text: str) -> int:
        return self.stream.write(records.shown_lines(text))

    def flush(self) -> None:
        self.stream.flush()


# ----------------------------------------------------------------------------- summary
def _slim(text: str, run_id: str, rec: dict | None = None) -> dict:
    """What the campaign summary, CSV and database need of a record (the record itself is dropped,
    so memory stays small for thousands of runs). ``rec``: the record already parsed from ``text``."""
    rec = json.loads(text) if rec is None else rec
    spec = rec["frames"][-1].get("symmetry") or {}
    grid = spec.get("symprec") or []
    return {"summary": rec["summary"], "dimension": rec["geometry"]["dimension"],
            "flags": [{"code": f["code"], "concerns": f.get("concerns"), "step": f["step"]}
                      for f in rec["flags"]],
            "grid": [min(grid), max(grid)] if grid else None,
            "verdict": records.verdict_fields(rec),
            "csv": records.csv_row(rec, run_id), "kv": records.db_key_values(rec, run_id),
            "steps": [[f["step"], f.get("energy"), f.get("fmax")] for f in rec["frames"]],
            "settings": {k: v for k, v in rec["run"]["code_settings"].items()
                         if k != "settings_from"}}


COPIES_WHY = "a folder kept twice, a rerun, two files of one run, one-frame runs of one start"
"""What runs that read the same frames may be, in words (the summary and the report)."""


def _copies(ok: list[dict]) -> list[list[str]]:
    """Groups of runs that read the same frames (a run folder copied, e.g. ``outputs_bk/``): the
    same steps, energies and largest forces, the same code settings, and the same final structure
    bit for bit (a static run after a converged relaxation differs in its settings). Runs of
    several steps, each with an energy, are also the same when those agree to the digits a text
    format keeps (1e-6 eV, 1e-5 eV/Å, 1e-5 Å) and no setting both record differs: one relaxation
    written to two files (an ASE optimiser's trajectory and the extended XYZ an observer appended
    to; the second records none), not two inputs that happen to give the same steps."""
    groups: dict = {}
    for r in ok:
        steps, st = r["view"]["steps"], r["structure"]
        if len(steps) > 1 and all(e is not None for _, e, _ in steps):
            key = json.dumps([[[k, round(e, 6), None if f is None else round(f, 5)]
                               for k, e, f in steps],
                              [[round(x, 5) for x in row] for row in st["cell"] + st["positions"]],
                              st["numbers"], st["pbc"]])
        else:
            key = json.dumps([steps, r["view"]["settings"], st], sort_keys=True, default=str)
        clusters = groups.setdefault(key, [])
        mine = r["view"]["settings"]
        home = next((c for c in clusters if all(_agree(mine, o) for o in c[1])), None)
        if home is None:
            clusters.append(([r["run"]], [mine]))
        else:
            home[0].append(r["run"])
            home[1].append(mine)
    return sorted(sorted(c[0]) for cs in groups.values() for c in cs if len(c[0]) > 1)


def _agree(a: dict, b: dict) -> bool:
    """No code setting that both runs record differs."""
    return all(json.dumps(a[k], sort_keys=True, default=str) ==
               json.dumps(b[k], sort_keys=True, default=str) for k in a.keys() & b.keys())


_TABLE_HEAD = ["run", "dim", "verdict", "lattice", "drift/Å (deformation)", "group", "flags"]


def _summary_rows(ok: list[dict], failed: list[dict], skipped=()) -> list[list[str]]:
    """One row per run, every cell read from the record's verdict (``records.verdict_fields``)."""
    rows = []
    for r in ok:
        v, rec = r["view"]["verdict"], r["view"]
        lat = (f"{v['lattice_initial']} -> {v['lattice_final']}"
               if v["lattice_initial"] != v["lattice_final"] else v["lattice_final"])
        drift = (f"{v['drift_type']} {v['drift_initial']:.3g}->{v['drift_final']:.3g}"
                 if v.get("drift_type") and v.get("drift_initial") is not None else "-")
        grp = (v["group_initial"] if v["group_initial"] == v["group_final"] else
               f"{v['group_initial']} -> {v['group_final']}") or "-"
        flags = ",".join(sorted({f["code"] for f in rec["flags"]})) or "-"
        marks = ("~" if rec["csv"]["not_relaxation"] else "") + \
            ("*" if rec["csv"]["unfinished"] else "") + \
            ("=" if int(rec["csv"].get("n_frames") or 2) < 2 else "")   # footnoted below
        rows.append([r["run"], str(rec["dimension"]) + "D", v["verdict"] + marks, lat, drift, grp,
                     flags])
    for f in failed:
        rows.append([f["run"], "-", "failed", "-", "-", "-", f["error"]])
    for k in skipped:
        rows.append([k["run"], "-", "skipped", "-", "-", "-", f"{k['reason']} (to include: "
                                                               f"{k['include']})"])
    # one line per run, names spelled as in campaign.csv (a line break in a folder name is \n)
    return sorted(([records.shown(c) for c in row] for row in rows), key=lambda x: x[0])


def _runs(n: int) -> str:
    return f"{n} run{'s' if n != 1 else ''}"


def counts_text(summary: dict) -> str:
    """The audit's runs in one line, parts that add up: "48 runs: 36 with a verdict, 9 failed, 3
    skipped (46 read now, 0 from the cache, 2 failed before reading)" (the terminal and the
    report's index)."""
    n_fail, n_skip = len(summary["failed"]), len(summary.get("skipped") or ())
    unread = summary["runs"] - summary["analysed"] - summary["cached"]  # failed at discovery
    n = summary["runs"]
    return (f"{_runs(n)}: {n - n_fail - n_skip} with a verdict, "
            f"{n_fail} failed" + (f", {n_skip} skipped" if n_skip else "")
            + f" ({summary['analysed']} read now, {summary['cached']} from the cache"
            + (f", {unread} failed before reading" if unread else "") + ")")


def copies_text(group: list[str]) -> str:
    """One group of copies in words, three of its runs named (the terminal and the report)."""
    return " = ".join(group[:3]) + (f" (and {len(group) - 3} more)" if len(group) > 3 else "")


def since_text(since: dict) -> str:
    """The summary's ``since_last`` in words (the terminal and the report's index)."""
    def some(key, word):
        ids = since[key]
        if not ids:
            return f"0 {word}"
        return f"{len(ids)} {word} ({', '.join(ids[:3])}{', ...' if len(ids) > 3 else ''})"
    return (f"{some('new', 'new')}, {some('read_again', 'read again')}, {some('gone', 'gone')} "
            f"(all in campaign.json since_last; a gone run's record is in records/stale/)")


def _notable(rows: list[list[str]]) -> list[list[str]]:
    """The table's rows to print: every one up to :data:`TABLE_LIMIT`, else those of runs that did
    not keep their symmetry or carry a flag beyond the tolerance's (about which symprec to take)."""
    if len(rows) <= TABLE_LIMIT:
        return rows
    return [r for r in rows if r[2].rstrip("~=") != "kept"
            or set(r[6].split(",")) - {"-", *_TOLERANCE_FLAGS}]


def _print_table(summary: dict, rows: list[list[str]], stream) -> None:
    head = _TABLE_HEAD
    shown = _notable(rows)
    n = len(head) - 1
    widths = [max(len(head[i]), *(len(r[i]) for r in shown)) if shown else len(head[i])
              for i in range(n)]

    def line(r):
        return "  ".join(c.ljust(w) for c, w in zip(r, widths)) + "  " + r[n]

    print(line(head), file=stream)
    for r in shown:
        print(line(r), file=stream)
    if len(shown) < len(rows):
        print(f"({len(rows) - len(shown)} runs that kept their symmetry, with no flag or only "
              f"{' or '.join(_TOLERANCE_FLAGS)}, not shown: see campaign.csv)", file=stream)
    if any("*" in r[2] for r in shown):
        print("* unfinished: cut short, damaged or unreadable after a step, or stopped at its "
              "step or time limit, on request, on a code error or without converging; the "
              "verdict compares the first frame with a structure that is not a relaxed one",
              file=stream)
    if any("~" in r[2] for r in shown):
        print("~ no relaxation (molecular dynamics, a single point or structure, a band image: "
              "column not_relaxation of campaign.csv): the verdict compares the first and last "
              "frames, not where a relaxation ended", file=stream)
    if any("=" in r[2] for r in shown):
        print("= one frame read (column n_frames; its warnings say why): nothing to compare it "
              "with, so the verdict says no drift could be seen, not that none happened",
              file=stream)
    vc = ", ".join(f"{k} {v}" for k, v in sorted(summary["verdict_counts"].items()))
    fc = ", ".join(f"{k} {v}" for k, v in sorted(summary["flag_counts"].items())) or "none"
    print(f"\n{counts_text(summary)} in {summary['elapsed_s']:.1f} s", file=stream)
    print(f"verdicts: {vc}", file=stream)
    print(f"flags (runs): {fc}", file=stream)
    if summary.get("since_last"):
        print(f"since the last audit: {since_text(summary['since_last'])}", file=stream)
    slow = [f"{x['run']} ({duration(x['analysis_s'])})" for x in summary.get("slowest") or ()
            if x["analysis_s"] >= SLOW_RUN]
    if slow:
        print(f"slowest to analyse: {', '.join(slow)} (spglib's calls grow steeply with the "
              f"number of atoms: the `large` preset asks fewer than the default; campaign.json "
              f"slowest)", file=stream)
    if summary.get("copies"):
        groups = summary["copies"]
        shown = "; ".join(copies_text(g) for g in groups[:3])
        print(f"copies: {len(groups)} group{'s' if len(groups) > 1 else ''} of runs that read the "
              f"same frames ({shown}{'; ...' if len(groups) > 3 else ''}; all in campaign.json "
              f"copies): {COPIES_WHY}; each is counted above once per copy", file=stream)
    if summary.get("not_relaxation"):
        what = Counter(x["what"].split(" (")[0].split(":")[0].removeprefix("a ")
                       for x in summary["not_relaxation"])
        theirs = Counter(c for x in summary["not_relaxation"] for c in x.get("flags") or ())
        print(f"not relaxations: {_runs(len(summary['not_relaxation']))} ("
              f"{', '.join(f'{k} {v}' for k, v in sorted(what.items()))}; column not_relaxation "
              f"of campaign.csv): their verdicts compare how the structure moved from the first "
              f"frame to the last, not where a relaxation ended"
              + (f"; of the flags above, theirs: "
                 f"{', '.join(f'{k} {v}' for k, v in sorted(theirs.items()))}" if theirs else ""),
              file=stream)
    if summary.get("unfinished"):
        why = Counter(re.sub(r" after step -?\d+$", "", x["why"].split(" (")[0].split(":")[0])
                      for x in summary["unfinished"])
        print(f"unfinished: {_runs(len(summary['unfinished']))} ("
              f"{', '.join(f'{k} {v}' for k, v in sorted(why.items()))}; column unfinished of "
              f"campaign.csv): their final structures are not relaxed ones", file=stream)
    tol = summary["tolerance"]
    for c in tol["changes"]:
        print(f"spglib verdict changes between symprec {c['low']:g} and {c['high']:g} Å: "
              f"{c['runs']} of {tol['runs_considered']} runs", file=stream)
    value = (f"{tol['recommended_symprec']:.3g} Å" if tol["recommended_symprec"]
             else "any in the range searched" if tol.get("safe_runs") else "none to recommend")
    print(f"campaign symprec: {value} ({tol['reason']})", file=stream)
    print(records.DIAGNOSTICS, file=stream)
    print(f"outputs: {summary['output']}", file=stream)


# ----------------------------------------------------------------------------- the audit
def _csv_text(rows: list[dict]) -> str:
    return records.csv_text(rows)         # text cells escaped (formulas, control characters)


def audit(roots, output=None, *, config=None, include=(), exclude=(), workers=None,
          scheduler=None, db=None, use_cache=True, overwrite=False, report=True, progress="auto",
          reject_on=(), executor: Executor | None = None, quiet: bool = True) -> dict:
    """Audit a campaign: every run under ``roots`` analysed (or taken from the cache) and written out.

    Args:
        roots: folders or files (a str/path or a list of them).
        output: output folder (default ``./driftwatch-audit``).
        config: preset name, YAML path, mapping or loaded config.
        include, exclude: fnmatch globs on run ids and paths.
        workers: local processes (default: the number of cores; 1 = in this process).
        scheduler: Dask scheduler address (needs ``dask[distributed]``). The workers need
            driftwatch installed and the runs on a shared filesystem; they are sent absolute paths,
            so the records of a Dask audit name absolute sources.
        db: ase.db file or URL (default ``OUTPUT/runs.db``).
        use_cache: False: analyse every run again (results are still cached for next time).
        overwrite: allow writing into a folder that is not this campaign's audit.
        report: build the HTML report in ``OUTPUT/report``.
        progress: "auto" or "on" (on stderr: a line updated in place on a terminal, dated lines
            every 30 s in a log; ``$DRIFTWATCH_PROGRESS=off`` turns "auto" off), or "off".
        reject_on: flag codes (or what they concern); runs where one was raised are listed in
            ``rejected``.
        executor: any ``concurrent.futures.Executor`` to run on (overrides workers/scheduler).
        quiet: True (default): print nothing but progress; False: the summary table on stdout
            (what ``driftwatch audit`` does) and, when runs failed, a one-line notice on stderr.

    Returns:
        The campaign summary (schema ``driftwatch/campaign-1``), also written to
        ``OUTPUT/campaign.json``.

    Raises:
        OutputError: the output folder cannot be used (another audit holds it, a root is inside
            it, a symbolic link where driftwatch writes, a full disk: the message names the file).
    """
    lock = _FolderLock()
    note = _stop_note(Path(output if output is not None else DEFAULT_OUTPUT))
    previous = _catch_sigterm(f"driftwatch: terminated by SIGTERM: {note}\n")
    try:
        return _run_audit(lock, roots, output, config=config, include=include, exclude=exclude,
                          workers=workers, scheduler=scheduler, db=db, use_cache=use_cache,
                          overwrite=overwrite, report=report, progress=progress, reject_on=reject_on,
                          executor=executor, quiet=quiet)
    except KeyboardInterrupt:
        raise KeyboardInterrupt(note) from None
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)
        lock.release()


def _stop_note(out: Path) -> str:
    """What an audit stopped by Ctrl-C or SIGTERM leaves, and what to do, in words."""
    return (f"runs finished so far, if any, are kept in {records.shown(out)}/.cache (a run cut "
            f"while being analysed is analysed again), and the folder's tables and report may be "
            f"partly of this audit; re-run the same command to finish")


def _run_audit(lock, roots, output, *, config, include, exclude, workers, scheduler, db,
               use_cache, overwrite, report, progress, reject_on, executor, quiet) -> dict:
    from . import config as _config
    from .store import check_foreign, check_lock, clear_stale_lock, db_location
    t0 = time.perf_counter()
    cfg = _config.coerce(config)
    roots = [roots] if isinstance(roots, (str, os.PathLike)) else list(roots)
    if not roots:
        raise ConfigError("audit: give at least one folder or file to search for runs")
    missing = [r for r in roots if not os.path.lexists(r) and not re.search(r"::|@", str(r))]
    if missing:                  # a typo in a root is the command's error, not a failed run
        raise InputError(missing[0], "no such file or folder")
    out = Path(output if output is not None else DEFAULT_OUTPUT)
    roots_abs = sorted(str(Path(r).resolve()) for r in roots)
    db_name = db_location(db, out)
    _check_not_a_root(out, roots)
    if db is None:   # the folder's own runs.db: only audits of it write it, one at a time
        stale = clear_stale_lock(db_name)
        if stale is not None:
            print(records.shown(f"driftwatch: removed {stale}, left by an audit of this folder "
                                f"that was killed while writing it"), file=sys.stderr)
    check_lock(db_name)                       # fail before hours of analysis, not after
    check_foreign(db_name)
    old_marker = _prepare_output(out, roots_abs, overwrite, lock, db_name)

    skip = [out] + ([] if "://" in db_name else [db_name])
    memo = _Memo(out / ".cache" / "discovery.index", use_cache)
    runs, failed = discover(roots, include=include, exclude=exclude, skip=skip,
                            structure_keys=cfg["inputs"]["structure_keys"])
    if not runs and not failed:
        raise InputError(", ".join(str(r) for r in roots), _why_empty(roots, include, exclude, skip))
    if (include or exclude) and not overwrite and old_marker.get("runs"):
        _keep_what_the_selection_leaves_out(out, roots, old_marker["runs"], runs, failed, skip,
                                            cfg)
    runs, not_files = _regular_file_runs(runs)
    failed += not_files
    res = _Results(out, _record_names(runs), Cache(out / ".cache", enabled=use_cache))
    todo = res.lookup(runs, _config.fingerprint(cfg))   # keyed on the paths as a local audit's
    if scheduler:      # Dask workers may run elsewhere: give them absolute paths (shared filesystem)
        todo = [(rid, os.path.abspath(path)) for rid, path in todo]
    if (workers or os.cpu_count() or 1) > 1 or scheduler or executor is not None:
        todo = _largest_first(todo, {r.id: r.kind for r in runs})
    gen, how = _execute(todo, cfg, workers=workers or os.cpu_count() or 1, scheduler=scheduler,
                        executor=executor,
                        note=f"driftwatch: terminated by SIGTERM: {_stop_note(out)}\n")
    bar = Progress(len(runs), "driftwatch audit", enabled=progress_on(progress),
                   initial=len(runs) - len(todo))
    from . import symmetry, track
    spent = [0, 0.0]                  # the current run's spglib calls and their seconds
    heavy = bool(cfg["symmetry"]["bisect"]) or cfg["symmetry"]["symprec_max"] > 0.1   # not large's

    def asked(symprec, seconds):
        spent[0] += 1
        spent[1] += seconds
        bar.busy(f"this run: {spent[0]} spglib call{'s' if spent[0] > 1 else ''}, "
                 f"{duration(spent[1])} in spglib (the last, at symprec {symprec:.3g} Å, "
                 f"{duration(seconds)}"
                 + ("; on a large cell `-c large` asks fewer" if seconds >= SLOW_CALL and heavy
                    else "") + ")")
    if how == "in process" and bar.enabled:        # a long run's frames, as they are checked
        track.frame_progress, symmetry.after_call = bar.within, asked
    try:
        for r in gen:
            if r is None:             # workers still busy: said at the progress line's pace
                bar.busy(f"{how}: runs still being analysed")
                continue
            res.store(r)
            bar.update(r["ok"] or bool(r.get("skipped")))    # a skipped run has not failed
            spent[:] = [0, 0.0]
    finally:
        track.frame_progress = symmetry.after_call = None
        bar.close()
        getattr(gen, "close", lambda: None)()

    res.digests.save()
    memo.save()
    problem = res.cache.problem or res.digests.problem
    if problem:                       # the cache only saves time: said, the audit goes on
        print(f"driftwatch: {problem}; this audit's results are not cached (the next audit "
              f"reads these runs again)", file=sys.stderr)
    ok = [res.results[r.id] for r in runs if res.results[r.id]["ok"]]
    skipped = [{"run": r.id, "source": r.path, **res.results[r.id]["skipped"]} for r in runs
               if not res.results[r.id]["ok"] and res.results[r.id].get("skipped")]
    failed = failed + [{"run": r.id, "source": r.path, "error": res.results[r.id]["error"]}
                       for r in runs if not res.results[r.id]["ok"]
                       and not res.results[r.id].get("skipped")]
    current = {res.names[r["run"]] for r in ok}
    _check_links(out, db_name)                # again: a link planted while the runs were analysed
    try:
        db_problems = _write_tables(out, db_name, ok, failed, skipped,
                                    gone=old_marker.get("runs", []))
        stale = _retire_stale(out / "records", list(old_marker.get("records", [])), current)
        summary = _summary(out, roots, ok, failed, cfg, reject_on, res, len(todo), how, db_name,
                           db_problems, stale, skipped)
        every = _answers([*ok, *failed, *skipped])
        read_from = {rid: r.get("inputs_digest") for rid, r in res.results.items()}
        summary["since_last"] = _since_last(old_marker, every, read_from, {
            rid for rid, r in res.results.items() if not r.get("cached")})
        summary["elapsed_s"] = time.perf_counter() - t0
        records.write_text_atomic(out / "campaign.json", records.dumps(summary) + "\n")
        _write_marker(out, roots_abs, sorted(current), every,
                      {rid: d for rid, d in read_from.items() if d is not None and rid in every})
        if report:
            summary["report"] = str(_build_report(out, summary,
                                                  workers=workers or os.cpu_count() or 1,
                                                  progress=progress_on(progress)))
            summary["elapsed_s"] = time.perf_counter() - t0
            records.write_text_atomic(out / "campaign.json", records.dumps(summary) + "\n")
    except OutputError as exc:      # every file stays whole, but some are of the last audit
        raise OutputError(f"{exc} (the audit's outputs in {out} are not all updated; re-run to "
                          f"complete them: finished runs come from the cache)") from exc
    if not quiet:          # the answer on stdout, as a Unix tool gives it (pipes, redirects)
        _print_table(summary, _summary_rows(ok, failed, skipped), _Shown(sys.stdout))
    if failed and quiet is not True:
        sys.stderr.write(f"driftwatch audit: {len(failed)} of {summary['runs']} runs could not be "
                         f"analysed (listed with their error in the table and campaign.csv)\n")
    return summary


def _keep_what_the_selection_leaves_out(out, roots, before, runs, failed, skip, cfg) -> None:
    """Refuse to audit an --include/--exclude selection into a folder whose last audit holds runs
    that still exist but the selection leaves out: the audit would retire their rows of runs.db
    and their records as gone."""
    selected = {r.id for r in runs} | {f["run"] for f in failed}
    every, unread = discover(roots, skip=skip, structure_keys=cfg["inputs"]["structure_keys"])
    left = sorted((set(before) & ({r.id for r in every} | {f["run"] for f in unread})) - selected)
    if left:
        raise OutputError(f"{out}: its last audit holds {_runs(len(left))} this selection "
                          f"(--include/--exclude) leaves out ({', '.join(left[:3])}"
                          f"{', ...' if len(left) > 3 else ''}); auditing the selection into it "
                          f"would retire their rows of runs.db and their records as gone: give "
                          f"the selection its own --output, audit the whole campaign, or pass "
                          f"--overwrite to narrow this audit to the selection")


class _Memo:
    """What the readers learnt at discovery of files only their bytes decide (the runs of a pw.x
    output of several: ``registry.discovery_memo``), kept in ``OUTPUT/.cache/discovery.index``
    (JSON) for the next audit, each entry with its file's stamp (:func:`adapters.run.file_stamp`);
    a file changed within ``cache.RACY_NS`` before it was seen is not kept (its stamp may not
    change)."""

    def __init__(self, path: Path, enabled: bool):
        from .adapters.registry import remember
        self.path = path if enabled else None
        if self.path is not None and self.path.is_file():
            try:
                data = json.loads(self.path.read_text(encoding="utf-8"))
                if data.get("schema") == CACHE_SCHEMA and data.get("versions") == _versions():
                    remember(data.get("modules"))
            except Exception:  # noqa: BLE001 - anything wrong in the index is a miss
                pass

    def save(self) -> None:
        from .adapters.registry import discovery_memo
        if self.path is None:
            return
        now = time.time_ns()
        kept = {name: {real: entry for real, entry in got.items()       # (files gone: dropped)
                       if now - max(entry[0][1], entry[0][2]) > RACY_NS and os.path.exists(real)}
                for name, got in discovery_memo().items()}
        try:
            records.write_text_atomic(self.path, json.dumps({"schema": CACHE_SCHEMA,
                                                             "versions": _versions(),
                                                             "modules": kept}))
        except OutputError:
            pass                                   # (it only saves time)


def _why_empty(roots, include, exclude, skip) -> str:
    """The reason an audit found nothing to do, in the command line's terms."""
    if include or exclude:
        every, _ = discover(roots, skip=skip)
        if every:
            pats = " ".join(f"--include '{p}'" for p in include) + \
                (" " if include and exclude else "") + " ".join(f"--exclude '{p}'" for p in exclude)
            example = every[0].id.split("/", 1)[-1]
            return (f"{pats} left none of the {len(every)} runs found (patterns match the path "
                    f"below the root, e.g. '{example}')")
    return ("no run found: no file or run folder here is one driftwatch reads (see 'driftwatch "
            "formats')")


def _largest_first(todo, kinds):
    """Order runs by input size, largest first, so a long run does not start last (parallel only;
    records and tables do not depend on the order)."""
    from .cache import run_inputs

    def size(item):
        try:
            return sum(f.stat().st_size for f in run_inputs(item[1], kinds[item[0]]))
        except OSError:
            return 0
    return sorted(todo, key=lambda item: (-size(item), item[0]))


class _Results:
    """Results by run id: cache lookups, cache writes, record files, slim in-memory views."""

    def __init__(self, out: Path, names: dict[str, str], cache: Cache):
        self.rec_dir = out / "records"
        self.rec_dir.mkdir(exist_ok=True)
        self.names, self.cache = names, cache
        self.digests = FileDigests(out / ".cache" / "digests.json")
        self.results: dict[str, dict] = {}
        self.keys: dict[str, str] = {}
        self.cached = 0

    def lookup(self, runs: list[RunSpec], fingerprint: str) -> list[tuple[str, str]]:
        """Take cached results; return the (run id, path) pairs left to analyse."""
        vers, todo = _versions(), []
        for r in runs:
            self.keys[r.id] = run_key(r.path, r.kind, fingerprint, vers)
            hit = self.cache.get(self.keys[r.id], self.digests)
            if hit is not None:
                try:
                    self.keep(dict(hit, run=r.id, source=r.path, cached=True))
                    self.cached += 1
                    continue
                except Exception:  # noqa: BLE001 - an entry this audit cannot use is a miss
                    self.results.pop(r.id, None)
            todo.append((r.id, r.path))
        self.digests.save()
        return todo

    def keep(self, res: dict) -> None:
        """Write the record (if its bytes changed); keep a slim view, never the whole record."""
        rid = res["run"]
        if res["ok"]:
            _write_if_changed(_inside(self.rec_dir, self.rec_dir / self.names[rid]),
                              res["record_text"])
            text = res.pop("record_text")
            view = _slim(text, rid, res.pop("parsed_record", None))
            res = dict(res, view=view, answer=_digest(text))
        self.results[rid] = res

    def store(self, res: dict) -> None:
        """A fresh result: cache it (deterministic failures too), then keep it."""
        rid = res["run"]
        inputs = res.pop("inputs", None)
        frozen = None
        if rid in self.keys and (res["ok"] or res.get("cacheable")):
            frozen = freeze_inputs(inputs, self.digests)
            if frozen is not None:        # None: an input changed while it was read, or since
                self.cache.put(self.keys[rid], {k: v for k, v in res.items()
                                                if k not in ("run", "source")}, frozen)
        self.keep(dict(res, inputs_digest=inputs_digest(frozen)))


def _write_tables(out: Path, db_name: str, ok: list[dict], failed: list[dict],
                 skipped=(), gone=()) -> list[str]:
    """campaign.csv and the database rows (failed runs too: an empty structure, their error;
    skipped runs in the CSV with their reason); the rows of the run ids in ``gone`` (the previous
    audit's runs) that have no row now are deleted. Returns the database's problems."""
    from .store import write_rows
    unanalysed = records.unanalysed_rows(failed, skipped)
    rows = [r["view"]["csv"] for r in ok] + unanalysed
    db_rows = [(r["run"], r["structure"], r["view"]["kv"]) for r in ok]
    db_rows += [(row["run"], None, {"run_id": row["run"], "verdict": row["verdict"],
                                    "error": row["error"][:300]}) for row in unanalysed]
    # the database first: the output most likely to fail (locked, read-only), so that a failure
    # leaves the tables as they were
    problems = write_rows(db_name, sorted(db_rows, key=lambda x: x[0]),
                          remove=sorted(set(gone) - {x[0] for x in db_rows}))
    records.write_text_atomic(out / "campaign.csv",
                              _csv_text(sorted(rows, key=lambda row: row["run"])))
    return problems


def _summary(out, roots, ok, failed, cfg, reject_on, res, n_analysed, how, db_name, db_problems,
             stale, skipped=()) -> dict:
    from .rules import gate
    gates = [(r, gate(r["view"]["flags"], reject_on, r["view"]["csv"]["not_relaxation"]))
             for r in ok]
    return {
        "schema": SCHEMA,
        "output": str(out),
        "roots": [str(r) for r in roots],
        "runs": len(ok) + len(failed) + len(skipped),
        "analysed": n_analysed,
        "cached": res.cached,
        "failed": sorted(failed, key=lambda f: f["run"]),
        "skipped": sorted(skipped, key=lambda f: f["run"]),
        "copies": _copies(ok),
        "not_relaxation": [{"run": r["run"], "what": r["view"]["csv"]["not_relaxation"],
                            "flags": sorted({f["code"] for f in r["view"]["flags"]})}
                           for r in sorted(ok, key=lambda r: r["run"])
                           if r["view"]["csv"]["not_relaxation"]],
        "unfinished": [{"run": r["run"], "why": r["view"]["csv"]["unfinished"]}
                       for r in sorted(ok, key=lambda r: r["run"]) if r["view"]["csv"]["unfinished"]],
        "rejected": [{"run": r["run"], "code": f["code"], "step": f["step"]}
                     for r, g in gates for f in g[0]],
        "not_gated": [{"run": r["run"], "code": f["code"], "step": f["step"]}
                      for r, g in gates for f in g[1]],
        "flag_counts": dict(sorted(Counter(c for r in ok for c in
                                           {f["code"] for f in r["view"]["flags"]}).items())),
        "verdict_counts": dict(sorted(Counter([r["view"]["verdict"]["verdict"] for r in ok]
                                              + ["failed"] * len(failed)
                                              + ["skipped"] * len(skipped)).items())),
        "tolerance": campaign_advice([{"run": r["run"], "summary": r["view"]["summary"],
                                       "grid": r["view"]["grid"],
                                       "not_relaxation": r["view"]["csv"]["not_relaxation"]}
                                      for r in ok],
                                     cfg["report"]["common_symprecs"]),
        "records": {r["run"]: f"records/{res.names[r['run']]}" for r in ok},
        "stale_records": [f"records/stale/{n}" for n in stale],
        "db": db_name,
        "db_problems": db_problems,
        "executor": how,
        "report": None,
        "analysis_s": sum((r.get("timing") or {}).get("total_s", 0.0) for r in ok
                          if not r.get("cached")),
        "slowest": sorted(({"run": r["run"], "analysis_s": round(r["timing"]["total_s"], 3)}
                           for r in ok if not r.get("cached") and "total_s" in (r.get("timing")
                                                                               or {})),
                          key=lambda x: -x["analysis_s"])[:SLOWEST],
        "elapsed_s": 0.0,
    }


def _build_report(out: Path, summary: dict, *, workers=None, progress=False) -> Path:
    """The HTML report from the records just written; pages of unchanged records are kept, pages
    are built in ``workers`` processes when there are many, progress on stderr when asked."""
    from .report import build
    return build([out / "records"], out / "report", overwrite=True, campaign=summary,
                 workers=workers, progress=progress)
