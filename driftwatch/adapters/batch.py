"""Many structures in one file: extended XYZ and ASE databases holding many relaxations.

ML-potential batch relaxations (and high-throughput databases) write the frames of many relaxations
into one extended XYZ or one ase.db, with a key naming the structure each frame belongs to. The rule:

* **The structure key** is the first name in ``inputs.structure_keys`` (default
  :data:`STRUCTURE_KEYS`) that the file's first frame carries: an extended XYZ frame's ``info``
  (its comment line's ``key=value`` pairs), an ase.db row's key-value pairs. Every frame must then
  carry it (a frame without it is an error naming the frame). A file whose first frame carries none
  of the keys is one run, as before (ase.db rows in id order).
* **One structure, one run.** Frames with the same value belong to one structure, wherever they are
  in the file (contiguous or interleaved, as a batched optimizer writes them). Within a structure,
  frames are ordered by their step key (``step``, ``nsteps``, ``ionic_step``: the first one every
  frame of the structure has) and otherwise kept in file order (ase.db: row id); two frames with
  the same step are an error (two relaxations under one name). A file with one structure is one
  run with the usual id; with several, discovery lists ``FILE::NAME`` for each and reading ``FILE``
  alone is refused with the names it holds.
* **End points.** A structure of exactly two frames, one marked initial and one final (``state`` =
  ``initial`` / ``final``, or ``relaxed`` = False / True), as databases of initial/final pairs store
  them, is an *end-points* run (``Run.kind``): initial first, steps 0 and 1, and no intermediate
  ionic steps exist (the record says "initial" and "final", not step numbers).

An index pass reads only the comment lines (extended XYZ) or the key-value pairs (ase.db); frames
are parsed by ASE's own readers.
"""
from __future__ import annotations

import numbers
import re
from dataclasses import dataclass, field

from ..errors import InputError, NotARunError

__all__ = ["STRUCTURE_KEYS", "STEP_KEYS", "END_POINT_MARKERS", "Member", "Index", "split",
           "refuse_many", "listing",
           "index_extxyz", "index_db", "SEPARATOR", "PART_FORMATS", "member_digest", "wal_of"]

STRUCTURE_KEYS = ("structure_id", "relax_id", "material_id", "system_name", "config_type")
"""Default ``inputs.structure_keys``: the info / key-value names tried, in order, to name the
structure a frame belongs to."""
STEP_KEYS = ("step", "nsteps", "ionic_step")
"""Keys holding an optimizer's step counter (ordering within a structure)."""
END_POINT_MARKERS = {"state": {"initial": "initial", "final": "final"},
                     "relaxed": {False: "initial", True: "final"}}
"""Key -> {value: end}: the marks of an initial/final pair."""
SEPARATOR = "::"
"""``FILE::NAME`` names one structure of a many-structure file."""


def split(path: str):
    """``FILE::NAME`` -> (FILE, NAME); anything else -> (path, None)."""
    import os
    text = str(path)
    if SEPARATOR in text and not os.path.exists(text):
        base, _, name = text.partition(SEPARATOR)
        if os.path.exists(base):
            return base, name
    return text, None


@dataclass
class Member:
    """One frame's place: ``pos`` (frame number in the file, or ase.db row id), the structure key's
    value, the step counter (or None) and the end mark ("initial", "final" or None)."""

    pos: int
    value: object
    step: int | None
    end: str | None
    name: str = ""


@dataclass
class Index:
    """What a file holds: the structure key (None: one run) and every frame's :class:`Member`."""

    path: str
    key: str | None
    members: list = field(default_factory=list)
    kind: str = "frame"                  # "frame" (extended XYZ) or "row" (ase.db), for messages
    cut: tuple | None = None             # extended XYZ: (frames read, "frame" | "line") if cut
    cut_name: str | None = None          # ... the structure the cut frame names, when it says
    damaged: str | None = None           # extended XYZ: why the index stopped at a damaged header

    def groups(self) -> dict:
        """Structure name -> its members in file order (names in order of first appearance)."""
        if getattr(self, "_groups", None) is None or self._n != len(self.members):
            out: dict = {}
            for m in self.members:
                out.setdefault(m.name, []).append(m)
            self._groups, self._n = out, len(self.members)
        return self._groups

    def names(self) -> list[str]:
        """Structure names in order of first appearance."""
        return list(self.groups())

    def many(self) -> bool:
        return self.key is not None and len(self.names()) > 1

    def structure(self, name: str | None):
        """(members in reading order, kind) of structure ``name`` (None: the whole file as one
        structure); kind is "trajectory" or "end-points"."""
        if name is None:
            chosen = list(self.members)
        else:
            chosen = list(self.groups().get(name, ()))
            if not chosen:
                raise InputError(self.path, f"no structure {name!r} (by {self.key!r}; "
                                            f"structures: {listing(self.names())})")
        ends = [m.end for m in chosen]
        if len(chosen) == 2 and sorted(map(str, ends)) == ["final", "initial"]:
            return sorted(chosen, key=lambda m: m.end != "initial"), "end-points"
        if all(m.step is not None for m in chosen):
            seen: dict = {}
            for m in chosen:
                if m.step in seen:
                    what = f"structure {name!r}" if name is not None else "the file"
                    hint = "" if name is not None else (
                        f"; if a key of the {self.kind}s names their structure, add it to the "
                        f"config's inputs.structure_keys (none of those keys is in the file"
                        f"{self._varying()})")
                    raise InputError(self.path, f"{what} has two {self.kind}s of step {m.step} "
                                                f"({self.kind}s {seen[m.step]} and {m.pos}): two "
                                                f"relaxations under one name?{hint}")
                seen[m.step] = m.pos
            chosen = sorted(chosen, key=lambda m: m.step)
        return chosen, "trajectory"

    def _varying(self) -> str:
        """'; keys whose value changes: ...' of an extended XYZ file (or "")."""
        if self.kind != "frame":
            return ""
        try:
            keys = varying_keys(self.path)[:4]
        except (InputError, OSError):
            return ""
        return ("; keys whose value changes between frames: "
                + ", ".join(f"{k} ({n} values)" for k, n in keys)) if keys else ""

    def refuse_many(self):
        """The one-line error for reading a many-structure file as one run."""
        refuse_many(self.path, self.names(), f"structures named by {self.key!r}")


def refuse_many(path, names: list[str], what: str):
    """Raise the one-line error for reading a file of many runs (``names``, ``what`` they are) as
    one run: what it holds and how to read one (``FILE::NAME``). A :class:`NotARunError`: the
    file will not become one run by growing."""
    raise NotARunError(path, f"holds {len(names)} {what} ({listing(names)}): read one as "
                           f"FILE{SEPARATOR}NAME, e.g. '{path}{SEPARATOR}{names[0]}'; an audit "
                           f"lists each")


def _name(value) -> str:
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, numbers.Integral) and not isinstance(value, bool):
        return str(int(value))
    return str(value)


def listing(names, limit: int = 8) -> str:
    shown = ", ".join(names[:limit])
    return shown + (f", ... ({len(names)} in all)" if len(names) > limit else "")


def _step_of(values: dict) -> int | None:
    for k in STEP_KEYS:
        v = values.get(k)
        if isinstance(v, str):
            try:
                v = int(v)
            except ValueError:
                continue
        if isinstance(v, numbers.Integral) and not isinstance(v, bool):
            return int(v)
        if isinstance(v, float) and v.is_integer():
            return int(v)
    return None


def _end_of(values: dict) -> str | None:
    for key, marks in END_POINT_MARKERS.items():
        v = values.get(key)
        if v is None:
            continue
        if isinstance(v, str):
            v = v.strip().lower()
            v = {"true": True, "t": True, "false": False, "f": False}.get(v, v)
        if isinstance(v, numbers.Integral) and not isinstance(v, bool) and v in (0, 1):
            v = bool(v)
        try:
            got = marks.get(v)
        except TypeError:            # an unhashable value (an array)
            got = None
        if got is not None:
            return got
    return None


def _key_of(first: dict, keys) -> str | None:
    for k in keys:
        if k in first and first[k] is not None:
            return k
    return None


def _members(path, rows, keys, kind) -> Index:
    """Index from ``rows``: an iterable of (pos, values dict)."""
    index, key = Index(str(path), None, kind=kind), None
    for n, (pos, values) in enumerate(rows):
        if n == 0:
            key = index.key = _key_of(values, keys)
        value = values.get(key) if key is not None else None
        if key is not None and value is None:
            raise InputError(path, f"{kind} {pos} has no {key!r} (the first {kind} has: every "
                                   f"{kind} of a many-structure file must name its structure)")
        index.members.append(Member(pos, value, _step_of(values), _end_of(values),
                                    _name(value) if key is not None else ""))
    return index


# ---------------------------------------------------------------- extended XYZ
def extxyz_frames(path):
    """``(frame number, comment line, first line number, lines)`` of every complete frame, then,
    for a file that ends abnormally, ``(None, frames read, "frame" | "line", lines read of the cut
    frame | None)``: it ends inside a frame, or its last line is cut. Frame headers are checked
    (atom count 1..MAX_ATOMS)."""
    from ._io import Lines
    from .ase_native import MAX_ATOMS
    n = 0
    with Lines(path) as fh:
        while True:
            first = fh.readline()
            if not first.strip():
                if first:
                    continue
                break
            try:
                natoms = int(first.split()[0])
            except (ValueError, IndexError):
                raise InputError(path, f"not an XYZ frame header at line {fh.lineno}: "
                                       f"{first.strip()[:40]!r}") from None
            if not 0 < natoms <= MAX_ATOMS:
                raise InputError(path, f"XYZ frame header at line {fh.lineno} gives {natoms} "
                                       f"atoms (expected 1..{MAX_ATOMS})")
            block = [first]
            for _ in range(natoms + 1):
                ln = fh.readline()
                if not ln:
                    break
                block.append(ln)
            if len(block) < natoms + 2:
                yield None, n, "frame", block        # the cut frame's lines (its comment, if any)
                return
            yield n, block[1], fh.lineno - natoms, block
            n += 1
        if fh.cut:
            yield None, n, "line", None


_PAIR = re.compile(r"""(?:^|\s)([A-Za-z_][\w.-]*)=("(?:[^"\\]|\\.)*"|'[^']*'|\{[^}]*\}|\S+)""")


def comment_info(comment: str, wanted) -> dict:
    """The values of the ``wanted`` keys in an extended XYZ comment line, as the text written there
    (quotes removed). A regular expression, not ASE's full parser: ~100x faster, and only the
    structure, step and end-point keys are needed here."""
    out: dict = {}
    for k, v in _PAIR.findall(comment):
        if k in wanted and k not in out:
            out[k] = v[1:-1] if v[:1] in "\"'" else v
    return out


_NUMBER = re.compile(r"[-+]?(\d+\.\d*|\.\d+|\d+(?=[eE]))([eE][-+]?\d+)?")   # a measured value
_NOT_NAMES = {"Lattice", "Properties", "pbc"}


def varying_keys(path, limit: int = 5000) -> list[tuple[str, int]]:
    """Comment-line keys of an extended XYZ file whose values vary among its first ``limit``
    frames, with their numbers of values: the keys that could name its structures, names before
    integers, most values first (real numbers, such as energies, arrays, the cell and the columns
    are left out)."""
    values: dict = {}
    for n, comment, _, _ in extxyz_frames(path):
        if n is None or n >= limit:
            break
        for k, v in _PAIR.findall(comment):
            v = v[1:-1] if v[:1] in "\"'" else v
            if k not in _NOT_NAMES and not _NUMBER.fullmatch(v) and not any(c.isspace() for c in v):
                values.setdefault(k, set()).add(v)
    counted = [(k, len(s), all(x.lstrip("+-").isdigit() for x in s)) for k, s in values.items()]
    return [(k, n) for k, n, _ in sorted(counted, key=lambda x: (x[2], -x[1])) if n > 1]


MEMO_BYTES = 64 << 20
"""Extended XYZ files up to this many bytes (decompressed) keep their frames' lines in memory after
the index pass, so that reading each of their structures does not scan the file again."""
_MEMO: dict = {}          # (kind, path, stamp, keys) -> (Index, {frame: (line, lines)} | None)


def _remember(key, value):
    _MEMO.pop(key, None)
    _MEMO[key] = value
    while len(_MEMO) > 4:                         # a few files: a worker reads one at a time
        _MEMO.pop(next(iter(_MEMO)))


def _memo_key(kind, path, keys):
    from .run import file_stamp
    stamp = file_stamp(path)
    if stamp is None:
        return None
    # an ase.db in WAL mode: its log's size and mtime too (a reader touches the log's ctime)
    wal = file_stamp(wal_of(path)) if "db" in kind else None
    return kind, str(path), tuple(stamp), tuple((wal or [])[:2]), tuple(keys)


def wal_of(path) -> str:
    """The write-ahead log beside an SQLite file (``FILE-wal``): in WAL mode new rows are there,
    not in the file's bytes, until a checkpoint."""
    return f"{path}-wal"


def index_extxyz(path, keys=STRUCTURE_KEYS, keep_lines: bool = False):
    """The structure key and every complete frame's place (comment lines only). With
    ``keep_lines``: ``(index, {frame number: (first line number, lines)} or None)``, the lines kept
    for files up to :data:`MEMO_BYTES`; the result is remembered for the file's current stamp."""
    key = _memo_key("extxyz", path, keys)
    hit = _MEMO.get(key) if key is not None else None
    if hit is not None and (hit[1] is not None or not keep_lines):
        _remember(key, hit)
        return hit if keep_lines else hit[0]
    wanted = set(keys) | set(STEP_KEYS) | set(END_POINT_MARKERS)
    kept: dict | None = {} if keep_lines else None
    size = 0
    cut = None

    def rows():
        nonlocal kept, size, cut, cut_name, damaged
        try:
            for n, comment, line, block in extxyz_frames(path):
                if n is None:
                    cut = (comment, line)
                    if block and len(block) > 1:          # its comment line is whole: it says
                        cut_name = comment_info(block[1], wanted)   # which structure it was
                    return
                if kept is not None:
                    size += sum(map(len, block))
                    if size > MEMO_BYTES:
                        kept = None
                    else:
                        kept[n] = (line, block)
                yield n, comment_info(comment, wanted)
        except InputError as exc:    # a damaged frame header: the frames before it are indexed,
            damaged = exc.problem    # and every structure's reading says so
            return
    cut_name = damaged = None
    index = _members(path, rows(), keys, "frame")
    index.cut, index.damaged = cut, damaged
    if cut_name and index.key is not None and cut_name.get(index.key) is not None:
        index.cut_name = _name(cut_name[index.key])
    if key is not None:
        _remember(key, (index, kept))
    return (index, kept) if keep_lines else index


# ---------------------------------------------------------------- ase.db
def connect(path):
    import ase.db
    return ase.db.connect(str(path), create_indices=False, use_lock_file=False)


def _kv_rows(db, selection=None):
    try:
        rows = db.select(selection, sort="id", columns=["id", "key_value_pairs"],
                         include_data=False)
        for row in rows:
            yield row.id, dict(row.key_value_pairs)
    except TypeError:                         # a backend without column selection (JSON)
        for row in db.select(selection, sort="id"):
            yield row.id, dict(row.key_value_pairs)


def _sqlite_kv_rows(path):
    """(row id, key-value pairs) of every row of an ase.db SQLite file in id order, read with
    sqlite3 and decoded as ase.db decodes them (``ase.io.jsonio``): a row object per row costs
    ASE ~0.3 ms, which the index of a file of thousands of relaxations paid on every audit."""
    from ase.io.jsonio import decode
    for row_id, kvp in _query(path, "SELECT id, key_value_pairs FROM systems ORDER BY id"):
        yield row_id, dict(decode(kvp) if isinstance(kvp, str) else {})


def _query(path, sql):
    import sqlite3
    from urllib.parse import quote
    con = sqlite3.connect(f"file:{quote(str(path))}?mode=ro", uri=True)
    try:
        yield from con.execute(sql)
    finally:
        con.close()


def index_db(path, keys=STRUCTURE_KEYS, selection=None) -> Index:
    """The structure key and every row's place (key-value pairs only; rows in id order); remembered
    for the file's current stamp. Read with sqlite3 (:func:`_sqlite_kv_rows`), or through ase.db
    for a selection (ASE's query syntax) or a file sqlite3 does not read."""
    key = _memo_key("db", path, (*keys, f"@{selection}"))
    hit = _MEMO.get(key) if key is not None else None
    if hit is not None:
        _remember(key, hit)
        return hit[0]
    index = None
    if selection is None:
        import sqlite3
        try:
            index = _members(path, _sqlite_kv_rows(path), keys, "row")
        except (sqlite3.Error, ValueError, TypeError):
            index = None                      # (ASE says what is wrong with the file)
    if index is None:
        with connect(path) as db:
            index = _members(path, _kv_rows(db, selection), keys, "row")
    if key is not None:
        _remember(key, (index, None))
    return index


# ---------------------------------------------------------------- what one structure reads
PART_FORMATS = ("extxyz", "ase-db")
"""Formats whose ``FILE::NAME`` runs the campaign cache keys on their own frames (or rows), so a
relaxation appended to the file leaves the others' results in the cache
(:func:`member_digest`)."""


def member_digest(path, fmt: str, keys, name: str) -> str | None:
    """sha256 (hex) of what structure ``name`` of a many-structure file reads: its frames' lines
    (extended XYZ, decompressed) or its rows' columns (ase.db), the key naming the structures and
    whether the file ends cut. None when the file names no structures by ``keys`` or holds no
    ``name``. One pass over the file serves every structure (remembered for its stamp)."""
    key = _memo_key("digests-" + fmt, path, keys)
    hit = _MEMO.get(key) if key is not None else None
    if hit is None:
        hit = (_member_digests(path, fmt, tuple(keys)), None)
        if key is not None:
            _remember(key, hit)
    return hit[0].get(name)


def _member_digests(path, fmt: str, keys: tuple) -> dict:
    import hashlib
    import json
    index, kept = index_extxyz(path, keys, keep_lines=True) if fmt == "extxyz" else \
        (index_db(path, keys), None)
    if index.key is None:
        return {}
    of = {m.pos: m.name for m in index.members}
    hashes = {name: hashlib.sha256() for name in index.names()}
    if fmt == "extxyz":                 # the frames' lines the index kept, else a second pass
        frames = ((n, b) for n, (_, b) in kept.items()) if kept is not None else \
            ((n, b) for n, _, _, b in extxyz_frames(path))
        try:
            for n, block in frames:
                if n is None or n not in of:             # (the index stopped at a damage)
                    break
                hashes[of[n]].update(f"{n}\n".encode() + "".join(block).encode())
        except InputError:                               # the damage itself: in the tail
            pass
    else:                               # every row of the table in id order (id its first column)
        for row in _query(path, "SELECT * FROM systems ORDER BY id"):
            h = hashes.get(of.get(row[0]))
            if h is not None:
                for v in row:
                    h.update(v if isinstance(v, bytes) else repr(v).encode())
                    h.update(b"\0")
    out = {}
    for name, h in hashes.items():
        cut = index.cut if index.cut_name in (None, name) else None
        h.update(json.dumps([index.key, cut, index.damaged]).encode())
        out[name] = h.hexdigest()
    return out


# ---------------------------------------------------------------- for discovery (the format table)
def extxyz_names(path, keys=STRUCTURE_KEYS) -> list[str]:
    """Structure names of an extended XYZ file (one name or none: one run)."""
    index = index_extxyz(path, keys)
    return index.names() if index.key is not None else []


def db_names(path, keys=STRUCTURE_KEYS) -> list[str]:
    """Structure names of an ASE database (one name or none: one run)."""
    index = index_db(path, keys)
    return index.names() if index.key is not None else []
