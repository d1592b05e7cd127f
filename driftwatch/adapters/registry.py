"""The adapter registry: one table of formats, detection, and the two entry points.

Detection order (first that decides wins):

1. the ``format`` the caller names;
2. folder rules, when ``path`` is a directory (a VASP or Quantum ESPRESSO run folder);
3. "magic": a bytes regular expression searched in the first 50 kB (decompressed);
4. filename globs, matched case-insensitively on the name without ``.gz/.bz2/.xz``.

A reader is a generator function ``reader(path)`` or ``reader(path, ctx)`` that
yields :class:`~driftwatch.adapters.run.Frame` (or ``ase.Atoms``) objects, one per
*completed* ionic step. ``ctx`` (a :class:`ReadContext`) collects warnings and the
code's settings. Readers may be given as ``"module:function"`` strings, imported
on first use. Third-party readers register through the entry-point group
``driftwatch.adapters``: the entry point loads to a reader function (its name is
the format name) or to a dict of :func:`register` keyword arguments including
``reader``. A plugin that fails to load is reported with a warning, never raised.
"""
from __future__ import annotations

import fnmatch
import importlib
import inspect
import os
import re
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator

from ..errors import DriftwatchError, InputError, UnknownFormatError
from ._io import check_readable, peek, quiet_numbers, strip_compression
from .run import Frame, ReadContext, Run, checked, collect

__all__ = ["register", "detect", "formats", "read_run", "iter_frames", "Format", "PEEK_BYTES",
           "ENTRY_POINT_GROUP"]

PEEK_BYTES = 50_000
ENTRY_POINT_GROUP = "driftwatch.adapters"


@dataclass
class Format:
    """One registry entry."""

    name: str
    reader: Callable | str
    globs: tuple = ()
    magic: re.Pattern | None = None
    description: str = ""

    def load(self) -> Callable:
        if isinstance(self.reader, str):
            mod, _, fn = self.reader.partition(":")
            self.reader = getattr(importlib.import_module(mod), fn)
        return self.reader

    def open(self, path, ctx: ReadContext) -> Iterator:
        reader = self.load()
        try:
            nparams = len(inspect.signature(reader).parameters)
        except (TypeError, ValueError):
            nparams = 2
        return reader(path, ctx) if nparams >= 2 else reader(path)


_formats: dict[str, Format] = {}
_folder_rules: list = ["driftwatch.adapters.vasp:pick_from_folder",
                       "driftwatch.adapters.espresso:pick_from_folder"]
_plugins_loaded = False


def register(name: str, reader, *, globs=(), magic=None, description: str = "",
             replace: bool = False) -> None:
    """Add a format. ``magic`` is a bytes regex (or literal bytes) found in the first 50 kB.

    Re-registering an existing name raises ``ValueError`` unless ``replace=True``.
    """
    if name in _formats and not replace:
        raise ValueError(f"format {name!r} is already registered (pass replace=True)")
    if isinstance(globs, str):
        globs = (globs,)
    if isinstance(magic, (bytes, str)):
        magic = re.compile(magic if isinstance(magic, bytes) else magic.encode(), re.M)
    _formats[name] = Format(name, reader, tuple(globs), magic, description)


def formats() -> dict[str, str]:
    """Registered format names -> one-line descriptions, in detection order."""
    _load_plugins()
    return {f.name: f.description for f in _formats.values()}


def _load_plugins() -> None:
    global _plugins_loaded
    if _plugins_loaded:
        return
    _plugins_loaded = True
    from importlib.metadata import entry_points
    try:
        eps = entry_points(group=ENTRY_POINT_GROUP)
    except Exception as exc:  # a broken metadata install must not break reading
        warnings.warn(f"driftwatch: cannot list {ENTRY_POINT_GROUP} entry points: {exc}")
        return
    for ep in eps:
        _register_entry_point(ep)


def _register_entry_point(ep) -> None:
    try:
        obj = ep.load()
        if callable(obj):
            register(ep.name, obj, description=f"plugin {ep.value}")
        else:
            spec = dict(obj)
            register(spec.pop("name", ep.name), spec.pop("reader"), **spec)
    except Exception as exc:
        warnings.warn(f"driftwatch: failed to register external adapter {ep.name!r} "
                      f"({ep.value}): {type(exc).__name__}: {exc}")


# ---------------------------------------------------------------- detection
def _known() -> str:
    return ", ".join(formats())


def _detect_file(path: Path) -> str:
    head = peek(path, PEEK_BYTES)
    if not head:
        # a compressed file that yields nothing is corrupt; a plain one was empty when peeked
        # (it may be growing: a live job's output)
        if strip_compression(path.name) != path.name and path.stat().st_size:
            raise InputError(path, "compressed file is corrupt or cut before any data "
                                   "(nothing could be decompressed)")
        raise InputError(path, "empty file")
    for f in _formats.values():
        if f.magic is not None and f.magic.search(head):
            return f.name
    name = strip_compression(path.name).lower()
    for f in _formats.values():
        if any(fnmatch.fnmatchcase(name, g.lower()) for g in f.globs):
            return f.name
    raise UnknownFormatError(path, f"unknown format (known formats: {_known()}; "
                                   f"pass format=... to choose one)")


@dataclass
class _Pick:
    source: Path
    format: str
    run_dir: Path | None
    warnings: tuple = ()


def _resolve(path, format=None) -> _Pick:
    _load_plugins()
    path = Path(path)
    selection = None
    if not path.exists() and "@" in path.name:          # rows of an ASE database: file.db@key=value
        base, _, selection = str(path).rpartition("@")
        if Path(base).exists():
            path = Path(base)
    if not path.exists():
        if path.is_symlink():
            raise InputError(path, "broken symbolic link (its target is missing, or the link "
                                   "points back to itself)")
        raise InputError(path, "no such file or directory")
    if path.is_dir():
        try:
            next(iter(os.scandir(path)), None)
        except OSError as exc:
            raise InputError(path, f"cannot list folder ({exc.strerror or exc})") from None
        pick = _pick_folder(path, format)
    else:
        check_readable(path)          # refuses FIFOs and devices without blocking
        if format is None:
            fmt = _detect_file(path)
        else:
            fmt = format
        pick = _Pick(path, fmt, None)
    if pick.format not in _formats:
        raise UnknownFormatError(pick.source, f"unknown format {pick.format!r} "
                                              f"(known formats: {_known()})")
    if selection:
        pick.source = Path(f"{pick.source}@{selection}")
    return pick


def _pick_folder(path: Path, format=None) -> _Pick:
    picks = []
    for rule in _folder_rules:
        if isinstance(rule, str):
            mod, _, fn = rule.partition(":")
            rule = getattr(importlib.import_module(mod), fn)
        got = rule(path, format)
        if got is not None:
            picks.append(got)
    if not picks:
        picks = _generic_folder_pick(path, format)
    if not picks:
        hint = f" readable as {format!r}" if format else ""
        raise InputError(path, f"not a run folder: no VASP (vasprun.xml, OUTCAR, XDATCAR, "
                               f"CONTCAR/POSCAR) or pw.x output{hint} found")
    if len(picks) > 1:
        names = ", ".join(p[0].name for p in picks)
        raise InputError(path, f"ambiguous run folder: several candidate outputs ({names}); "
                               f"pass the file itself")
    source, fmt, warns = picks[0]
    return _Pick(Path(source), fmt, path, tuple(warns))


def _generic_folder_pick(path: Path, format=None) -> list:
    """A folder holding exactly one trajectory of another registered format (e.g. the
    ``.traj`` of an ASE-driven relaxation), matched by the formats' globs."""
    found = []
    for p in sorted(path.iterdir()):
        if not p.is_file():
            continue
        name = strip_compression(p.name).lower()
        for f in _formats.values():
            if (format is None or f.name == format) and \
                    any(fnmatch.fnmatchcase(name, g.lower()) for g in f.globs):
                found.append((p, f.name, ()))
                break
    return found


def detect(path) -> str:
    """The format name ``read_run`` would use for ``path`` (a file or a run folder)."""
    return _resolve(path).format


# ---------------------------------------------------------------- reading
def _stream(pick: _Pick, ctx: ReadContext) -> Iterator[Frame]:
    """Frames from the reader; reader failures become InputError, or a warning after frames."""
    fmt = _formats[pick.format]
    n = 0
    last = None
    try:
        for fr in checked(quiet_numbers(fmt.open(str(pick.source), ctx), ctx), pick.source):
            n += 1
            last = fr.step
            yield fr
    except DriftwatchError:
        raise
    except Exception as exc:
        what = fmt.description or pick.format
        why = " ".join(str(exc).split())            # one line, whatever the library printed
        why = why if len(why) <= 300 else why[:297] + "..."
        if n == 0:
            raise InputError(pick.source, f"cannot be read as {what}: "
                                          f"{type(exc).__name__}: {why}") from exc
        ctx.warn(f"unreadable after step {last} ({n} steps read; {type(exc).__name__}: {why})")


def iter_frames(path, format=None, *, context: ReadContext | None = None) -> Iterator[Frame]:
    """Stream the completed ionic steps of ``path`` (a file or run folder) as Frames.

    Never yields an incomplete step, so it is safe on a file that is still being
    written. Pass a :class:`ReadContext` as ``context`` to receive warnings and the
    code settings. Raises ``InputError`` when no step is complete.
    """
    pick = _resolve(path, format)
    ctx = context if context is not None else ReadContext(pick.source)
    ctx.path = str(pick.source)
    for w in pick.warnings:
        ctx.warn(w)
    n = 0
    for fr in _stream(pick, ctx):
        n += 1
        yield fr
    if n == 0:
        detail = f" ({ctx.warnings[-1].split(': ', 1)[-1]})" if ctx.warnings else ""
        raise InputError(pick.source, "no completed ionic step" + detail)


def read_run(path, format=None) -> Run:
    """Read every completed ionic step of a file or run folder into a :class:`Run`.

    ``format`` overrides detection (see :func:`formats`). For a folder, the richest
    complete output is chosen and ``source`` names it; ``run_dir`` is the folder.
    A truncated output gives its completed steps plus a warning naming the file.
    """
    pick = _resolve(path, format)
    ctx = ReadContext(pick.source)
    for w in pick.warnings:
        ctx.warn(w)
    return collect(_stream(pick, ctx), path=pick.source, fmt=pick.format, ctx=ctx,
                   run_dir=pick.run_dir)


# ---------------------------------------------------------------- the table
# Order matters for magic detection: the most specific patterns first.
_A = "driftwatch.adapters."
register("vasp-xml", _A + "vasp:read_vasprun", globs=("*vasprun*.xml",), magic=rb"<modeling>",
         description="VASP vasprun.xml")
register("vasp-out", _A + "vasp:read_outcar", globs=("*OUTCAR*",), magic=rb"\A\s*vasp\.\d",
         description="VASP OUTCAR")
register("vasp-xdatcar", _A + "vasp:read_xdatcar", globs=("*XDATCAR*",),
         magic=rb"^[ \t]*(Direct|Cartesian) configuration=", description="VASP XDATCAR")
register("espresso-out", _A + "espresso:read_pw_out", globs=("*.pwo", "*pw*.out"),
         magic=rb"Program PWSCF", description="Quantum ESPRESSO pw.x output")
register("traj", _A + "ase_native:read_traj", globs=("*.traj",), magic=rb"\A- of UlmASE-Trajectory",
         description="ASE trajectory (.traj)")
register("ase-db", _A + "ase_native:read_db", globs=("*.db",), magic=rb"\ASQLite format 3\x00",
         description="ASE database rows (SQLite .db; file.db@selection picks rows)")
register("pymatgen-json", _A + "pymatgen_json:read_structures", globs=(),
         magic=rb'"@class"\s*:\s*"Structure"', description="pymatgen Structure list in JSON")
register("ase-json-db", _A + "ase_native:read_db", globs=("*.json",),
         magic=rb'\A\s*\{\s*"1"\s*:\s*\{', description="ASE database rows (JSON)")
register("extxyz", _A + "ase_native:read_extxyz", globs=("*.xyz", "*.extxyz"),
         magic=rb"\A\s*\d+[ \t]*\r?\n[^\n]*(Lattice|Properties)=", description="extended XYZ")
register("vasp-poscar", _A + "vasp:read_poscar", globs=("*POSCAR*", "*CONTCAR*", "*.vasp"),
         description="VASP POSCAR/CONTCAR (a single structure)")
