"""Per-run result cache of a campaign audit: ``OUTPUT/.cache/<key>.json``.

The key is the sha256 of the path string the run is read from (it appears in the record), the
effective configuration (:func:`driftwatch.config.fingerprint`) and the versions of driftwatch,
spglib and ASE. The entry also holds the run's *inputs* as the readers recorded them while reading
(``Run.inputs``: every file opened, with the sha256 of its bytes, or None when it was missing, and
every folder whose listing decided what was read, with the sha256 of its names). A hit needs every
one of them unchanged, so a change to any file a reader used (a ``*.log`` pw.x output, a ``pw.in``
beside two outputs, an INCAR.gz) or a file appearing in a run folder is seen; an unchanged run is
never analysed twice. A file that changed while it was being read (its stamp differs between the
read and the digest) makes the result uncacheable, so a failure caused by a file deleted or emptied
during an audit is never served once the file is back. An entry that is not exactly what this
version writes (even valid JSON of the right schema) is a miss.

File digests are memoised in ``OUTPUT/.cache/digests.json`` on (size, mtime, ctime, inode): the
ctime cannot be set back by user tools, so an unchanged stat means unchanged bytes and a re-audit of
a large campaign does not re-read every file (except a file changed within :data:`RACY_NS` before
it was hashed, whose digest is not saved: timestamps advance in ticks). Entries are written
atomically; a corrupt or foreign entry is ignored (and recomputed).
"""

from __future__ import annotations

import fnmatch
import hashlib
import json
import os
import time
from pathlib import Path

from . import records
from .errors import OutputError

__all__ = ["Cache", "FileDigests", "run_inputs", "run_key", "versions", "freeze_inputs",
           "inputs_digest", "CACHE_SCHEMA"]

CACHE_SCHEMA = "driftwatch/cache-2"
RACY_NS = 2_000_000_000
"""ns: the digest of a file changed this recently before it was hashed is not saved for the next
audit, which hashes it again (a filesystem's timestamps advance in ticks of milliseconds, so a
same-size rewrite in the tick after it was hashed would keep size, mtime and ctime)."""
_HEX = frozenset("0123456789abcdef")


def versions() -> dict:
    """Versions that change results: driftwatch, spglib, ASE."""
    import ase
    import spglib

    from . import __version__
    return {"driftwatch": __version__, "spglib": str(spglib.__version__), "ase": ase.__version__}


def run_inputs(path, kind: str) -> list[Path]:
    """The files a run is likely read from (the file itself, or the files of a run folder matching
    the code table's ``run_files`` globs): for ordering work by size, not for the cache."""
    from .adapters.registry import codes
    path = Path(path)
    if kind == "file":
        return [path]
    globs = [g for c in codes().values() for g in c.run_files]
    out = []
    with os.scandir(path) as it:
        for entry in it:
            if entry.name.startswith(".") or not entry.is_file():
                continue
            if any(fnmatch.fnmatchcase(entry.name, g) for g in globs):
                out.append(Path(entry.path))
    return sorted(out, key=lambda p: p.name)


def _is_digest(x) -> bool:
    return isinstance(x, str) and len(x) == 64 and set(x) <= _HEX


class FileDigests:
    """sha256 of files, memoised on their stat in a JSON index (``None`` path: no index)."""

    def __init__(self, index_path=None):
        self.path = None if index_path is None else Path(index_path)
        self._memo: dict = {}
        self._racy: set = set()       # digests of files changed just before: not saved
        self._dirty = False
        self.problem: str | None = None     # why the index could not be written, if so
        if self.path is not None and self.path.is_file():
            try:
                data = json.loads(self.path.read_text(encoding="utf-8"))
                files = data.get("files") if isinstance(data, dict) else None
                if data.get("schema") == CACHE_SCHEMA and isinstance(files, dict):
                    self._memo = files
            except (OSError, ValueError, AttributeError):
                self._memo = {}

    def stamp_digest(self, file) -> tuple[list | None, str | None]:
        """(stamp, hex sha256) of a file's bytes; (None, None) when it is missing. The digest is
        None as well when the file changed while it was hashed. Raises OSError when it exists but
        cannot be read."""
        from .adapters.run import file_stamp
        real = os.path.realpath(file)
        stamp = file_stamp(real)
        if stamp is None:
            return None, None
        hit = self._memo.get(real)
        if isinstance(hit, list) and len(hit) == 2 and hit[0] == stamp and _is_digest(hit[1]):
            return stamp, hit[1]
        h = hashlib.sha256()
        with open(real, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
        if file_stamp(real) != stamp:
            return stamp, None
        self._memo[real] = [stamp, h.hexdigest()]
        self._dirty = True
        if time.time_ns() - max(stamp[1], stamp[2]) <= RACY_NS:   # git's "racy clean": a file
            self._racy.add(real)          # changed in the clock's tick after this keeps its stamp
        return stamp, h.hexdigest()

    def digest(self, file) -> str | None:
        """Hex sha256 of a file's bytes, None when it is missing (OSError when unreadable)."""
        return self.stamp_digest(file)[1]

    def save(self) -> None:
        """Write the digests (a failure is kept in ``problem``: the cache only saves time)."""
        if self.path is not None and self._dirty and self.problem is None:
            try:
                keep = {k: v for k, v in self._memo.items() if k not in self._racy}
                records.write_text_atomic(self.path, json.dumps({"schema": CACHE_SCHEMA,
                                                                 "files": keep}))
            except OutputError as exc:
                self.problem = str(exc)
            self._dirty = False


def run_key(path: str, kind: str, fingerprint: str, vers: dict) -> str:
    """Cache key of a run (hex sha256) from its path, kind, config fingerprint and versions; the
    inputs' bytes are checked against the entry (:meth:`Cache.get`)."""
    h = hashlib.sha256()
    h.update(json.dumps({"schema": CACHE_SCHEMA, "path": str(path), "kind": kind,
                         "config": fingerprint, "versions": vers}, sort_keys=True).encode())
    return h.hexdigest()


def freeze_inputs(inputs, digests: FileDigests) -> list | None:
    """The cache's form of ``Run.inputs`` (``[kind, path, stamp]`` recorded while reading):
    ``[kind, path, sha256 | None]``. None (do not cache) when a file is not what the reader saw:
    it changed, appeared or vanished since it was read, or cannot be read now."""
    from .adapters.batch import wal_of
    from .adapters.run import folder_listing
    out = []
    try:
        for kind, path, stamp in inputs or ():
            if kind == "folder":
                if folder_listing(path) != stamp:
                    return None
                out.append(["folder", str(path), stamp])
                continue
            if kind == "part":
                base, fmt, keys, name, when_read = path
                now, digest = digests.stamp_digest(base)
                part = _part_digest(base, fmt, keys, name) if now == list(stamp or ()) else None
                log = os.path.exists(wal_of(base))   # WAL mode: rows changed since the read?
                if digest is None or part is None or digests.stamp_digest(base)[0] != now or \
                        when_read != part and (log or when_read is not None):
                    return None
                out.append(["part", [str(base), fmt, list(keys), name, digest], part])
                continue
            now, digest = digests.stamp_digest(path)
            if now != (None if stamp is None else list(stamp)) or (now is not None and
                                                                 digest is None):
                return None
            out.append(["file", str(path), digest])
    except (OSError, TypeError, ValueError):
        return None
    return out if out else None


def inputs_digest(frozen) -> str | None:
    """A short digest of a run's inputs as :func:`freeze_inputs` gives them (None: unknown): equal
    digests, the same bytes read. A structure of a many-structure file counts by its own part
    (not the whole file's digest, which another structure appended changes)."""
    if not frozen:
        return None
    key = [["part", x[1][:4], x[2]] if x[0] == "part" else x for x in frozen]
    return hashlib.sha1(json.dumps(key).encode()).hexdigest()[:16]


def _inputs_unchanged(inputs, digests: FileDigests) -> bool:
    from .adapters.run import folder_listing
    if not isinstance(inputs, list) or not inputs:
        return False
    from .adapters.batch import wal_of
    listed = {item[1] for item in inputs if isinstance(item, list) and len(item) == 3
              and isinstance(item[1], str)}
    for item in inputs:
        if isinstance(item, list) and len(item) == 3 and item[0] == "part":
            if not _part_unchanged(item, digests):
                return False
            continue
        if not (isinstance(item, list) and len(item) == 3 and item[0] in ("file", "folder")
                and isinstance(item[1], str) and (item[2] is None or _is_digest(item[2]))):
            return False
        kind, path, want = item
        if kind == "file" and wal_of(path) not in listed and os.path.exists(wal_of(path)):
            return False              # an SQLite file now in WAL mode: its bytes may not say
        try:
            have = folder_listing(path) if kind == "folder" else digests.digest(path)
        except OSError:
            return False
        if have != want:
            return False
    return True


def _part_digest(base, fmt, keys, name) -> str | None:
    """:func:`~driftwatch.adapters.batch.member_digest`, None when the file cannot say (damaged,
    unreadable, or no longer naming its structures by the same key): a miss."""
    import sqlite3

    from .adapters.batch import member_digest
    from .errors import DriftwatchError
    try:
        return member_digest(base, fmt, tuple(keys), name)
    except (DriftwatchError, OSError, ValueError, LookupError, sqlite3.Error):
        return None


def _part_unchanged(item, digests: FileDigests) -> bool:
    """A ``["part", [file, format, keys, name, file sha256], structure sha256]`` input: the file
    is unchanged (its memoised digest, no read), or the structure's own frames are."""
    spec, want = item[1], item[2]
    if not (isinstance(spec, list) and len(spec) == 5 and all(isinstance(x, str) for x in
            (spec[0], spec[1], spec[3])) and isinstance(spec[2], list) and _is_digest(spec[4])
            and _is_digest(want)):
        return False
    base, fmt, keys, name, whole = spec
    from .adapters.batch import wal_of
    try:
        if digests.digest(base) == whole and not os.path.exists(wal_of(base)):
            return True               # (in WAL mode new rows leave the file's bytes alone)
    except OSError:
        return False
    return _part_digest(base, fmt, keys, name) == want


def _checked(res) -> dict | None:
    """A stored result of the exact shape the audit uses, else None (a miss). A record's result
    comes back with the record parsed (``parsed_record``), so the audit parses it once."""
    if not isinstance(res, dict):
        return None
    if res.get("ok") is False:
        return res if isinstance(res.get("error"), str) else None
    if res.get("ok") is not True or not isinstance(res.get("record_text"), str):
        return None
    st = res.get("structure")
    try:
        rec = json.loads(res["record_text"])
        cell, pos, numbers, pbc = st["cell"], st["positions"], st["numbers"], st["pbc"]
        ok_shapes = (len(cell) == 3 and all(len(r) == 3 for r in cell) and len(pbc) == 3
                     and len(pos) == len(numbers) > 0 and all(len(r) == 3 for r in pos)
                     and all(isinstance(z, int) for z in numbers))
        ok_record = (isinstance(rec, dict) and str(rec.get("schema", "")).startswith("driftwatch/run-")
                     and isinstance(rec.get("frames"), list) and rec["frames"]
                     and isinstance(rec.get("summary"), dict) and isinstance(rec.get("flags"), list)
                     and isinstance(rec.get("geometry"), dict) and isinstance(rec.get("run"), dict))
    except (TypeError, KeyError, ValueError, AttributeError):
        return None
    return dict(res, parsed_record=rec) if ok_shapes and ok_record else None


class Cache:
    """A folder of results keyed by :func:`run_key`; ``enabled=False`` reads nothing (still writes)."""

    def __init__(self, folder, enabled: bool = True):
        self.folder = Path(folder)
        self.enabled = enabled
        self.problem: str | None = None     # the first write that failed: no more are tried

    def _file(self, key: str) -> Path:
        return self.folder / f"{key}.json"

    def get(self, key: str, digests: FileDigests | None = None) -> dict | None:
        """The stored result when every input it was read from is unchanged, else None (also for
        a missing, unreadable, corrupt or malformed entry, or one for another key)."""
        if not self.enabled:
            return None
        try:
            data = json.loads(self._file(key).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        if not (isinstance(data, dict) and data.get("schema") == CACHE_SCHEMA
                and data.get("key") == key):
            return None
        if not _inputs_unchanged(data.get("inputs"), digests or FileDigests()):
            return None                     # (checked first: a stale record is not parsed)
        res = _checked(data.get("result"))
        return None if res is None else dict(res, inputs_digest=inputs_digest(data["inputs"]))

    def put(self, key: str, result: dict, inputs: list) -> None:
        """Store a result with the inputs it was read from, atomically (a killed audit leaves the
        old entry or the new one).

        No fsync (unlike records): after a power cut an entry may be empty, which :meth:`get`
        treats as a miss, so durability is not needed and the audit saves a disk flush per run.
        """
        from .records import write_text_atomic
        if self.problem is not None:
            return
        try:
            write_text_atomic(self._file(key), json.dumps({"schema": CACHE_SCHEMA, "key": key,
                                                           "inputs": inputs, "result": result},
                                                          allow_nan=False), fsync=False)
        except OutputError as exc:      # a read-only or full .cache/: the audit goes on uncached
            self.problem = str(exc)
