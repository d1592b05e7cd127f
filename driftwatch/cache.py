"""Per-run result cache of a campaign audit: ``OUTPUT/.cache/<key>.json``.

The key is the sha256 of everything a run's result depends on: the bytes of the run's input files
(for a folder run, every file the adapters may read there), the path string the run is read from
(it appears in the record), the effective configuration (:func:`driftwatch.config.fingerprint`) and
the versions of driftwatch, spglib and ASE. A changed file, config or version gives a new key, so a
stale result is never served; an unchanged run is never analysed twice.

File digests are memoised in ``OUTPUT/.cache/digests.json`` on (size, mtime, ctime, inode): the
ctime cannot be set back by user tools, so an unchanged stat means unchanged bytes and a re-audit of
a large campaign does not re-read every file. Entries are written atomically; a corrupt or foreign
entry is ignored (and recomputed).
"""

from __future__ import annotations

import fnmatch
import hashlib
import json
import os
from pathlib import Path

from . import records

__all__ = ["Cache", "FileDigests", "run_inputs", "run_key", "versions", "CACHE_SCHEMA",
           "FOLDER_INPUT_GLOBS"]

CACHE_SCHEMA = "driftwatch/cache-1"

# Files of a run folder that the VASP and pw.x adapters may read (outputs, inputs with the code's
# symmetry settings). Large binary outputs (WAVECAR, CHGCAR, *.save/) are not among them.
FOLDER_INPUT_GLOBS = ("vasprun*.xml*", "OUTCAR*", "XDATCAR*", "CONTCAR*", "POSCAR*", "INCAR*",
                      "OSZICAR*", "*.out", "*.out.gz", "*.out.bz2", "*.out.xz", "*.pwo*", "*.in",
                      "*.pwi")


def versions() -> dict:
    """Versions that change results: driftwatch, spglib, ASE."""
    import ase
    import spglib

    from . import __version__
    return {"driftwatch": __version__, "spglib": str(spglib.__version__), "ase": ase.__version__}


def run_inputs(path, kind: str) -> list[Path]:
    """The files a run is read from: the file itself, or the matching files of a run folder."""
    path = Path(path)
    if kind == "file":
        return [path]
    out = []
    with os.scandir(path) as it:
        for entry in it:
            if entry.name.startswith(".") or not entry.is_file():
                continue
            if any(fnmatch.fnmatchcase(entry.name, g) for g in FOLDER_INPUT_GLOBS):
                out.append(Path(entry.path))
    return sorted(out, key=lambda p: p.name)


class FileDigests:
    """sha256 of files, memoised on their stat in a JSON index (``None`` path: no index)."""

    def __init__(self, index_path=None):
        self.path = None if index_path is None else Path(index_path)
        self._memo: dict = {}
        self._dirty = False
        if self.path is not None and self.path.is_file():
            try:
                data = json.loads(self.path.read_text(encoding="utf-8"))
                if isinstance(data, dict) and data.get("schema") == CACHE_SCHEMA:
                    self._memo = dict(data.get("files", {}))
            except (OSError, ValueError):
                self._memo = {}

    def digest(self, file) -> str:
        """Hex sha256 of a file's bytes (raises OSError when it cannot be read)."""
        real = os.path.realpath(file)
        st = os.stat(real)
        stamp = [st.st_size, st.st_mtime_ns, st.st_ctime_ns, st.st_ino]
        hit = self._memo.get(real)
        if isinstance(hit, list) and len(hit) == 2 and hit[0] == stamp:
            return hit[1]
        h = hashlib.sha256()
        with open(real, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
        self._memo[real] = [stamp, h.hexdigest()]
        self._dirty = True
        return h.hexdigest()

    def save(self) -> None:
        if self.path is not None and self._dirty:
            records.write_text_atomic(self.path, json.dumps({"schema": CACHE_SCHEMA,
                                                             "files": self._memo}))
            self._dirty = False


def run_key(path: str, kind: str, fingerprint: str, vers: dict, digests: FileDigests) -> str:
    """Cache key of a run (hex sha256); raises OSError when an input file cannot be read."""
    h = hashlib.sha256()
    h.update(json.dumps({"schema": CACHE_SCHEMA, "path": str(path), "kind": kind,
                         "config": fingerprint, "versions": vers}, sort_keys=True).encode())
    for f in run_inputs(path, kind):
        h.update(b"\0" + f.name.encode("utf-8", "surrogateescape") + b"\0")
        h.update(digests.digest(f).encode())
    return h.hexdigest()


class Cache:
    """A folder of results keyed by :func:`run_key`; ``enabled=False`` reads nothing (still writes)."""

    def __init__(self, folder, enabled: bool = True):
        self.folder = Path(folder)
        self.enabled = enabled

    def _file(self, key: str) -> Path:
        return self.folder / f"{key}.json"

    def get(self, key: str) -> dict | None:
        """The stored result, or None (missing, unreadable, corrupt or for another key)."""
        if not self.enabled:
            return None
        try:
            data = json.loads(self._file(key).read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None
        if not (isinstance(data, dict) and data.get("schema") == CACHE_SCHEMA
                and data.get("key") == key and isinstance(data.get("result"), dict)):
            return None
        res = data["result"]
        if res.get("ok") is True and not (isinstance(res.get("record_text"), str)
                                          and isinstance(res.get("structure"), dict)):
            return None
        if res.get("ok") is False and not isinstance(res.get("error"), str):
            return None
        return res

    def put(self, key: str, result: dict) -> None:
        """Store a result atomically: a killed audit leaves the old entry or the new one.

        No fsync (unlike records): after a power cut an entry may be empty, which :meth:`get`
        treats as a miss, so durability is not needed and the audit saves a disk flush per run.
        """
        from .records import write_text_atomic
        write_text_atomic(self._file(key), json.dumps({"schema": CACHE_SCHEMA, "key": key,
                                                       "result": result}, allow_nan=False),
                          fsync=False)
