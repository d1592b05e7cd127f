"""The adapter registry: a table of formats, a table of codes, detection, and the entry points.

**Formats** (:func:`register`) say how one file is read. **Codes** (:func:`register_code`, a
:class:`Code` per DFT code, defined in the code's own module: ``vasp.py``, ``espresso.py``) say
everything else a program needs to know about a code: which folders are its run folders and which
file (or files, one per stage) of such a folder to read, the files its settings live in, the text
it prints when a job ends, its soft stop, and its own symmetry handling. Discovery
(:func:`scan_folder`) is shared by ``read_run(folder)``, ``driftwatch inspect`` and the campaign
audit, so all three see the same runs.

Detection order for a path (first that decides wins):

1. the ``format`` the caller names;
2. for a directory: the codes' folder rules (a VASP or pw.x run folder, with its stages), else the
   one file in it that a format recognises;
3. "magic": a bytes regular expression searched in the first 50 kB (decompressed);
4. files named like a format's that are none, told by their first bytes (NWChem's run-time
   database ``nwchem.db``), refused;
5. filename globs, matched case-insensitively on the name without ``.gz/.bz2/.xz``.

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
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterator

from ..errors import (AtomsChangeError, DamagedFrameError, DriftwatchError, ForeignOutputError,
                      InputError, NotARunError, UnknownFormatError)
from ._io import (check_readable, file_size, job_log_name, peek, quiet_numbers,
                  strip_compression, tail_bytes)
from .batch import PART_FORMATS, wal_of
from .run import Frame, ReadContext, Run, StraightLine, checked, collect

__all__ = ["register", "detect", "formats", "read_run", "iter_frames", "Format", "PEEK_BYTES",
           "ENTRY_POINT_GROUP", "Code", "FolderPick", "register_code", "codes", "code_of_format",
           "scan_folder", "symmetry_setting", "recognised", "structures"]

PEEK_BYTES = 50_000
LOG_PEEK_BYTES = 1 << 20
"""Bytes searched for a format's magic in a file named as a batch job's log
(:func:`~driftwatch.adapters._io.job_log_name`), whose site prologue (module lists, an environment
dump) can come before the code's output."""
ENTRY_POINT_GROUP = "driftwatch.adapters"


@dataclass
class Format:
    """One registry entry."""

    name: str
    reader: Callable | str
    globs: tuple = ()
    magic: re.Pattern | None = None
    description: str = ""
    members: Callable | str | None = None
    """``members(path, structure_keys) -> [names]``: the structures a file of this format holds
    (several: one run each, ``FILE::NAME``), for formats that can hold many."""

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


@dataclass
class FolderPick:
    """What a code's folder rule chose in a run folder: one ``(stage name, file, format)`` per stage
    in the order the stages ran (one entry, named ``""``, for a single-stage run), and notes."""

    stages: list
    warnings: tuple = ()
    also: tuple = ()
    """Names of the folder's files the run accounts for besides its stages' (the rest of a LAMMPS
    dump written one file per frame, a job's dump of no cell)."""
    others: tuple = ()
    """Names of files beside the run that another format reads (an ASE trajectory beside a VASP
    run): runs of their own (set by :func:`scan_folder`, with those the code's rule found)."""
    after: Callable | None = None
    """``after(ctx, last_frame)``, called once the stages are read: takes what a file beside them
    says of the run (a GPAW log beside the trajectory of the relaxation it logged)."""


@dataclass
class Code:
    """Everything driftwatch knows about one DFT code (one row of the code table).

    Functions may be given as ``"module:function"`` strings (imported on first use).

    * ``folder(folder: Path, names: list[str], format: str | None, ctx) -> FolderPick | None``:
      is this a run folder of the code (``names``: the folder's non-hidden file names), and which
      file(s) to read. It calls ``ctx.uses(path)`` for every file whose content decides the pick.
    * ``run_files``: globs of the files a run folder of this code may read (outputs and settings),
      for ordering work by size; the cache itself keys on the files the readers record.
    * ``settings_files``: globs of the input files the readers take settings from.
    * ``end_markers``: ``{format: ((bytes regex, label), ...)}`` printed once when a job ends
      (searched in the last 8 kB).
    * ``soft_stop(run_dir, *, reason, dry_run, **options) -> dict``: ask a running job to stop
      itself cleanly (see :func:`driftwatch.live.request_stop`).
    * ``symmetry_setting(code_settings, dimension) -> dict | None``: the code's own symmetry
      handling when it was on (``{"operations", "how", "undo"}``), None when off or unknown.
    * ``run_kind(code_settings) -> str | None``: what the run's ionic steps are when they are no
      relaxation (molecular dynamics, finite differences, ...), None for a relaxation or unknown.
    * ``cell_free(code_settings) -> str | None``: the setting that let the cell change, in words
      (``"ISIF = 3"``), None when the cell was held or nothing is known.
    * ``cell_held(code_settings, dimension) -> str | None``: what of a cell it let change the code
      still held (pw.x's ``cell_dofree``; ``dimension`` 2 for a layer), in words, None when nothing
      or nothing known.
    * ``inputs_only(folder, names, ctx) -> (str, [names][, ran]) | None``: for a folder ``folder``
      did not claim, whether it holds the code's job inputs and no output (a job not run yet, or
      stopped before writing): what it holds, in words, and those files; ``ran`` True when the
      folder shows the job ran (a crash file, a log) and the words say how.
    * ``ended(source) -> str | None``: that the job writing ``source`` has ended, as a file beside
      it says (LAMMPS's log.lammps: "Total wall time"), in words; None while it may run on.
    * ``band(folder, names, ctx) -> (str, [names]) | None``: whether ``folder`` is the parent of a
      calculation of many images each run in a subfolder of its own (VASP's nudged elastic band):
      why it is no run, in words, and the subfolders that are the band's fixed inputs rather than
      runs unless they hold a run (the end points).
    """

    name: str
    label: str
    formats: tuple
    folder: Callable | str
    run_files: tuple = ()
    settings_files: tuple = ()
    end_markers: dict = field(default_factory=dict)
    soft_stop: Callable | str | None = None
    symmetry_setting: Callable | str | None = None
    run_kind: Callable | str | None = None
    cell_free: Callable | str | None = None
    cell_held: Callable | str | None = None
    inputs_only: Callable | str | None = None
    band: Callable | str | None = None
    ended: Callable | str | None = None
    aliases: tuple = ()

    def function(self, attr: str) -> Callable | None:
        fn = getattr(self, attr)
        if isinstance(fn, str):
            mod, _, name = fn.partition(":")
            fn = getattr(importlib.import_module(mod), name)
            setattr(self, attr, fn)
        return fn


_formats: dict[str, Format] = {}
_codes: dict[str, Code] = {}
_plugins_loaded = False


def register(name: str, reader, *, globs=(), magic=None, description: str = "",
             replace: bool = False, members=None) -> None:
    """Add a format. ``magic`` is a bytes regex (or literal bytes) found in the first 50 kB.
    ``members(path, structure_keys) -> [names]``: for a format that can hold many structures, the
    names of those a file holds (discovery lists one run per name, ``FILE::NAME``).

    Re-registering an existing name raises ``ValueError`` unless ``replace=True``.
    """
    if name in _formats and not replace:
        raise ValueError(f"format {name!r} is already registered (pass replace=True)")
    if isinstance(globs, str):
        globs = (globs,)
    if isinstance(magic, (bytes, str)):
        magic = re.compile(magic if isinstance(magic, bytes) else magic.encode(), re.M)
    _formats[name] = Format(name, reader, tuple(globs), magic, description, members)


def register_code(code: Code, *, replace: bool = False) -> None:
    """Add a code to the code table (its formats are registered with :func:`register`)."""
    if code.name in _codes and not replace:
        raise ValueError(f"code {code.name!r} is already registered (pass replace=True)")
    _codes[code.name] = code


def codes() -> dict[str, Code]:
    """The code table: name -> :class:`Code`."""
    _load_plugins()
    return dict(_codes)


def code_of_format(fmt: str | None) -> Code | None:
    """The code whose outputs ``fmt`` reads (None for formats of no registered code)."""
    for c in codes().values():
        if fmt in c.formats:
            return c
    return None


def _code_named(name) -> Code | None:
    name = str(name or "").lower()
    for c in codes().values():
        if name == c.name or name in c.aliases:
            return c
    return None


def symmetry_setting(code_settings: dict, dimension: int = 3) -> dict | None:
    """The code's own symmetry handling of a run (see :class:`Code`), from its ``code_settings``;
    None when it was off, unknown, or the code has no such rule. ASE's ``FixSymmetry``
    constraint (any calculator, ``fix_symmetry`` in the settings) holds its operations too."""
    fs = (code_settings or {}).get("fix_symmetry")
    if fs:
        n, prec = fs.get("operations"), fs.get("symprec")
        tol = "its symprec not recorded" if prec is None else f"its symprec {prec:g} Å"
        held = "the symmetry operations of the first structure" if n is None else \
            f"{n} symmetry operations"                 # (an atomate2 document does not count them)
        return {"operations": n, "who": "the constraint",
                "how": f"ASE's FixSymmetry constraint held {held} ({tol}) through the relaxation",
                "undo": "no FixSymmetry constraint"}
    s = code_settings or {}          # an ASE run: the calculator's code, if it has a rule
    code = _code_named(s.get("code")) or _code_named(s.get("calculator"))
    fn = code.function("symmetry_setting") if code is not None else None
    return fn(code_settings, dimension) if fn is not None else None


def cell_free(code_settings: dict) -> str | None:
    """The code's setting that let the run's cell change, in words (see :class:`Code`), or None."""
    code = _code_named((code_settings or {}).get("code"))
    fn = code.function("cell_free") if code is not None else None
    return fn(code_settings) if fn is not None else None


def cell_held(code_settings: dict, dimension: int = 3) -> str | None:
    """What of a moving cell the code held, in words (see :class:`Code`), or None; ``dimension``:
    the run's (2: a layer)."""
    code = _code_named((code_settings or {}).get("code"))
    fn = code.function("cell_held") if code is not None else None
    return fn(code_settings, dimension) if fn is not None else None


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
        every = entry_points()       # one scan of the installed packages' metadata (~25 ms)
        eps = every.select(group=ENTRY_POINT_GROUP)
    except Exception as exc:  # a broken metadata install must not break reading
        warnings.warn(f"driftwatch: cannot list {ENTRY_POINT_GROUP} entry points: {exc}")
        return
    for ep in eps:
        _register_entry_point(ep)
    try:
        code_eps = every.select(group=ENTRY_POINT_GROUP + ".codes")
    except Exception:  # noqa: BLE001 - as above
        code_eps = ()
    for ep in code_eps:
        try:
            obj = ep.load()
            register_code(obj if isinstance(obj, Code) else Code(**dict(obj)))
        except Exception as exc:  # noqa: BLE001 - a broken plugin warns, never raises
            warnings.warn(f"driftwatch: failed to register external code {ep.name!r} "
                          f"({ep.value}): {type(exc).__name__}: {exc}")


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
    for pattern, what in _NOT_TRAJECTORIES_BY_CONTENT:     # whatever its name and the rest say
        if pattern.search(head):
            raise UnknownFormatError(path, f"{what}, not a file of ionic steps")
    if _CP2K_POSITIONS.search(head):                   # a plain XYZ by its name: no cell in it
        raise ForeignOutputError(path, "CP2K's positions file of a run (no cell: CP2K writes the "
                                       "cell of each step to PROJECT-1.cell and its output)",
                                 _CP2K_TO_XYZ)
    for f in _formats.values():
        if f.magic is not None and f.magic.search(head):
            return f.name
    name = strip_compression(path.name).lower()
    if len(head) == PEEK_BYTES and job_log_name(name):   # a batch log: a prologue first
        deeper = peek(path, LOG_PEEK_BYTES)
        for f in _formats.values():
            if f.magic is not None and f.magic.search(deeper):
                return f.name
    for f in _formats.values():
        if any(fnmatch.fnmatchcase(name, g.lower()) for g in f.globs):
            return f.name
    code = foreign_code(head)
    if code:
        raise ForeignOutputError(path, f"an output of {code[0]}, which driftwatch has no reader "
                                       f"for{_cut_short(path, code[0])}", code[1])
    seen = next((what for pattern, what in _NOT_TRAJECTORIES if pattern.search(head)), None)
    if seen:                    # known for what it is: no format would read it
        raise UnknownFormatError(path, f"{seen}, not a file of ionic steps")
    raise UnknownFormatError(path, f"unknown format (known formats: {_known()}; choose one with "
                                   f"--format NAME, or format= in Python)")


# Outputs of codes with no reader here, by their banners (as the codes print them in genuine
# outputs: CP2K 2.5's in ShakeNBreak's test data, neb.x 6.0's in Quantum ESPRESSO's examples, ph.x
# 6.0-6.4's, Gaussian 16's and Psi4 1.2's in quacc's): an audit lists them as skipped, never drops
# them unsaid
_TO_XYZ = "write its ionic steps to extended XYZ (e.g. with ASE, where it reads them) and audit that"
_MOLECULAR = "nothing for a molecule (driftwatch audits periodic cells); a periodic run: " + _TO_XYZ
# where the steps of each code's own optimiser are (CP2K 2023.1, ABINIT 9.6.2, Elk 8.4.30 runs made
# here, tests/data/native_trials; ASE 3.29 reads none of the CP2K files, nor ABINIT's steps: its
# reader of the .abo gives one structure, and its cell without acell)
_CP2K_TO_XYZ = ("write its steps to extended XYZ with their cells (PROJECT-pos-1.xyz holds the "
                "positions in Å; PROJECT-1.cell the cell of each step, when MOTION/PRINT/CELL is "
                "on) and audit that")
_ABINIT_TO_XYZ = ("write the steps of its *_HIST.nc (rprimd in bohr, xred, etotal in Ha) to "
                  "extended XYZ and audit that")
_ELK_TO_XYZ = ("write the steps of its GEOMETRY_OPT.OUT (lattice vectors in bohr, atoms in "
               "lattice coordinates) to extended XYZ and audit that")
_FOREIGN = ((re.compile(rb"^ CP2K\| version string:", re.M), "CP2K", _CP2K_TO_XYZ),
            (re.compile(rb"^[ \t]*Program NEB v\.", re.M), "Quantum ESPRESSO's neb.x",
             "nothing: its images are points of a path, not a relaxation's steps"),
            (re.compile(rb"^[ \t]*Program PHONON v\.", re.M), "Quantum ESPRESSO's ph.x",
             "nothing: phonons of one structure, no ionic steps (audit the pw.x run it follows)"),
            (re.compile(rb"^ Entering Gaussian System", re.M), "Gaussian", _MOLECULAR),
            (re.compile(rb"Psi4: An Open-Source Ab Initio Electronic Structure Package"), "Psi4",
             _MOLECULAR),
            # ABINIT 9.6's main output (.abo; its log, which repeats the banner after a line of
            # its own, is not listed again); NWChem 7.0's output (as ASE names it, .nwo)
            (re.compile(rb"\A\s*\.Version \S+ of ABINIT"), "ABINIT", _ABINIT_TO_XYZ),
            (re.compile(rb"Northwest Computational Chemistry Package \(NWChem\)"), "NWChem",
             _TO_XYZ),
            # Elk's INFO.OUT (its stdout, which repeats the start, is not listed again)
            (re.compile(rb"\A\+-+\+\s*\| Elk version \S+ started \|"), "Elk", _ELK_TO_XYZ))
# programs of a code with a reader whose outputs beside its run belong to that run: the code
# table's name, and what the output is
_COMPANIONS = {"Quantum ESPRESSO's ph.x": ("espresso", "the phonons of this run's structure")}
# where discovery looks for them (outputs' usual names; ABINIT's .abo, NWChem's .nwo, as ASE
# names it)
_FOREIGN_NAMES = (".out", ".log", ".txt", ".abo", ".nwo")


# CP2K's PROJECT-pos-1.xyz of a geometry or cell optimisation: plain XYZ whose comment is
# "i = N, E = ..." (with ", time = ..." in MD); CP2K 2023.1's, tests/data/native_trials
_CP2K_POSITIONS = re.compile(rb"\A[ \t]*\d+[ \t]*\r?\n[ \t]*i =[ \t]*\d+,(?:[ \t]*time =[^,\n]*,)?"
                             rb"[ \t]*E =")


def _cut_short(path, code: str) -> str:
    """", cut short: ..." when the output of ``code`` (a code with no reader here whose closing
    line is known: :data:`~driftwatch.adapters.ase_native.CLOSING_LINES`) ends without it."""
    from .ase_native import CLOSING_LINES
    if code not in CLOSING_LINES:
        return ""
    line, said = CLOSING_LINES[code]
    if line.search(tail_bytes(path, 65536)):
        return ""
    return f", cut short: it ends without {code}'s closing {said} (killed, stopped on an " \
           f"error, or still running)"


# a text each line-anchored banner holds, found at bytes.find's speed before its pattern is tried
_FOREIGN_KEYS = {"CP2K": b"CP2K| version string", "Quantum ESPRESSO's neb.x": b"Program NEB",
                 "Quantum ESPRESSO's ph.x": b"Program PHONON", "Gaussian": b"Entering Gaussian"}


def foreign_code(head: bytes) -> tuple[str, str] | None:
    """(the code, what would include its run) when ``head`` (a file's first bytes) holds the banner
    of a code driftwatch has no reader for, else None."""
    return next(((what, how) for pattern, what, how in _FOREIGN
                 if _FOREIGN_KEYS.get(what, b"") in head and pattern.search(head)), None)


def output_code(path) -> tuple[str, str] | None:
    """:func:`foreign_code` of a file named like an output (``*.out``, ``*.log``, any
    compression), None for any other file or one that cannot be read."""
    if not strip_compression(Path(path).name).lower().endswith(_FOREIGN_NAMES):
        return None
    try:
        return foreign_code(peek(path, PEEK_BYTES))
    except (OSError, InputError):
        return None


def foreign_output(path) -> bool:
    """True for a file named like an output whose banner is one of a code driftwatch has no
    reader for (:func:`output_code`)."""
    return output_code(path) is not None


# Files of the trade that are no trajectory, said by name when a user passes one (their first lines
# as the codes write them: common practice)
_NOT_TRAJECTORIES = (
    # [ \t]*, not \s*: a pattern that can cross lines, retried from each line start, is quadratic
    (re.compile(rb"^[ \t]*&control\b", re.I | re.M), "a pw.x input (pass its output, or the run "
                                                     "folder)"),
    (re.compile(rb"^[ \t]*(ISIF|IBRION|NSW|ENCUT|PREC|EDIFF)[ \t]*=", re.I | re.M),
     "a VASP INCAR (pass the run folder)"),
    (re.compile(rb"^[ \t]*[-+.0-9eE]+[ \t]+[-+.0-9eE]+[ \t]+xlo[ \t]+xhi\b", re.M),
     "a LAMMPS data file (one structure; pass the job's dump)"),
    (re.compile(rb"\ALAMMPS \("), "a LAMMPS log (pass the job's dump)"),
    (re.compile(rb"\A(AFFormatGPAW|AtomicNumbers\x00)"), "a GPAW restart file (one structure and "
     "its wave functions; pass GPAW's text output)"),
    (re.compile(rb"^[ \t]*Program (DOS|PROJWFC|POST-PROC|BANDS|DYNMAT|MATDYN|Q2R) v\.", re.M),
     "an output of a Quantum ESPRESSO post-processing program (pass the pw.x output it follows)"),
    (re.compile(rb"\A[ \t]*ABINIT \d+\.\d+"), "ABINIT's log (its main output, .abo, holds the "
                                              "run; driftwatch has no reader for ABINIT)"),
)

# ... and those whose name is a format's (their first bytes decide before the name): NWChem's
# run-time database, which ASE's NWChem calculator keeps in the run folder's nwchem/ as nwchem.db,
# named like an ASE database (an SQLite file, whose first bytes the ase-db format's magic knows)
_NOT_TRAJECTORIES_BY_CONTENT = (
    (re.compile(rb"\Ahdbm v"), "NWChem's run-time database (pass the ASE trajectory the optimiser "
                               "wrote)"),
    # maggma's JSONStore of a JobStore's additional store: a list of {"blob_uuid", "data", ...}
    # (the Structures in its blobs would match pymatgen-json's magic)
    (re.compile(rb'\A\s*\[\s*\{[^{}\[\]]{0,400}"blob_uuid"\s*:'),
     "a jobflow store of large job outputs (blobs; the task documents of the store beside it "
     "refer to them, and are read with them)"),
)


@dataclass
class _Pick:
    stages: list            # [(name, source Path, format)]
    run_dir: Path | None
    warnings: tuple = ()
    selection: str | None = None
    after: Callable | None = None           # FolderPick.after

    @property
    def source(self) -> Path:
        return self.stages[-1][1]

    @property
    def format(self) -> str:
        return self.stages[-1][2]


def _split_selection(path: Path):
    """``file.db@key=value`` (ase.db rows) or ``FOLDER@stage`` -> (base, selection)."""
    if not path.exists() and _SEP in str(path):
        base, name = _batch_split(str(path))
        if name is not None:
            return Path(base), _SEP + name
    if not path.exists() and "@" in path.name:
        base, _, selection = str(path).rpartition("@")
        if Path(base).exists():
            return Path(base), selection
    return path, None


def _batch_split(text: str):
    from .batch import split
    return split(text)


_SEP = "::"      # FILE::NAME: one structure of a many-structure file (adapters/batch.py)


def _resolve(path, format=None, ctx: ReadContext | None = None) -> _Pick:
    _load_plugins()
    ctx = ctx if ctx is not None else ReadContext(path)
    path, selection = _split_selection(Path(path))
    if not path.exists():
        ctx.uses(path)
        if path.is_symlink():
            raise InputError(path, "broken symbolic link (its target is missing, or the link "
                                   "points back to itself)")
        raise InputError(path, "no such file or directory")
    if path.is_dir() and selection and selection.startswith(_SEP):
        raise InputError(path, f"a folder holds no structures by name ({selection}): pass the file")
    if format is not None and format not in _formats:       # a typo, not the folder's fault
        raise UnknownFormatError(path, f"unknown format {format!r} (known formats: {_known()})")
    if path.is_dir():
        try:
            next(iter(os.scandir(path)), None)
        except OSError as exc:
            raise InputError(path, f"cannot list folder ({exc.strerror or exc})") from None
        pick = _pick_folder(path, format, ctx)
        if selection:
            pick = _select_stage(pick, selection, path)
            selection = None
    else:
        ctx.uses(path)
        check_readable(path)          # refuses FIFOs and devices without blocking
        fmt = _detect_file(path) if format is None else format
        pick = _Pick([("", path, fmt)], None)
    for _, src, fmt in pick.stages:
        if fmt not in _formats:
            raise UnknownFormatError(src, f"unknown format {fmt!r} (known formats: {_known()})")
    if selection and selection.startswith(_SEP) and _formats[pick.format].members is None:
        raise InputError(path, f"{_formats[pick.format].description or pick.format} holds one run; "
                               f"'{_SEP}NAME' names a structure of an extended XYZ or ase.db of "
                               f"many relaxations")
    pick.selection = selection
    return pick


def _select_stage(pick: _Pick, selection: str, folder: Path) -> _Pick:
    names = [n for n, _, _ in pick.stages]
    if selection in names:
        k = names.index(selection)
    elif selection.isdigit() and 1 <= int(selection) <= len(names):
        k = int(selection) - 1
    else:
        have = ", ".join(n or "(single stage)" for n in names)
        raise InputError(folder, f"no stage {selection!r} (stages: {have})")
    return _Pick([pick.stages[k]], pick.run_dir, pick.warnings, after=pick.after)


def recognised(path, name: str | None = None) -> bool:
    """True when a format recognises the file (magic or glob); a broken file counts when its name
    says what it should be (so that its reader reports the problem)."""
    name = Path(path).name if name is None else name
    try:
        detect(path)
        return True
    except UnknownFormatError:
        return False
    except (InputError, OSError):
        low = strip_compression(name).lower()
        return any(fnmatch.fnmatchcase(low, g.lower()) for f in _formats.values() for g in f.globs)


def beside_single_point(folder, names, output, single_point: Callable[[], str | None],
                        code_formats, ctx=None):
    """The pick of a code's folder whose one output is a single-point calculation beside exactly
    one trajectory of another format: the relaxation an ASE optimiser drove, calling the code once
    per step (the output holds the last step only). ``single_point()``: what makes the output one
    (``"calculation = 'scf'"``), or None; asked only when a file named like another format's
    (``relax.traj``) is there; or ``(what the output is, what it holds)``. None when the output
    is no single point, or no such trajectory, or several, are there."""
    other = [f for f in _formats.values() if f.name not in code_formats]
    names = [n for n in names if any(fnmatch.fnmatchcase(strip_compression(n).lower(), g.lower())
                                     for f in other for g in f.globs)]
    what = single_point() if names else None
    if what is None:
        return None
    found = []
    for n in names:
        p = Path(folder) / n
        fmt = _safe_detect(p)
        if fmt is not None and fmt not in code_formats:
            found.append((p, fmt))
    if len(found) != 1:
        return None
    (path, fmt), = found
    if ctx is not None:
        ctx.uses(path)
    what, holds = what if isinstance(what, tuple) else \
        (f"a single-point calculation ({what})", "the code's output holds its last step only")
    return FolderPick([("", path, fmt)], (
        f"{output}: {what} beside {path.name}: read {path.name}, the relaxation an ASE optimiser "
        f"drove ({holds})",))


def scan_folder(folder, names=None, format=None, ctx: ReadContext | None = None):
    """What a folder holds, as discovery sees it: ``("run", FolderPick)`` when a code claims it as a
    run folder (its stages included), ``("ambiguous", [files])`` when several codes do,
    ``("band", (why, [end-point subfolders]))`` when it is the parent of a nudged-elastic-band
    calculation (its images are runs, it is none), ``("inputs", (what, [files a format reads]))``
    when it holds a code's job inputs and no output nor other readable file (a job not run yet),
    ``("inputs-of", why)`` when those inputs (or a structure alone) sit in ``inputs/`` beside the
    job's ``outputs/`` (:func:`outputs_beside`: they are that run's inputs, no run of their own),
    else ``("files", [file names a format recognises])``.

    ``names``: the folder's non-hidden regular file names (listed here when None).
    """
    _load_plugins()
    folder = Path(folder)
    ctx = ctx if ctx is not None else ReadContext(folder)
    ctx.lists(folder)
    if names is None:
        names = sorted(e.name for e in os.scandir(folder)
                       if not e.name.startswith(".") and not_folder(e))
    claims = []
    for code in _codes.values():
        got = code.function("folder")(folder, list(names), format, ctx)
        if got is not None:
            claims.append((code, got))
    if len(claims) > 1:     # a code's run folder is that, an ASE trajectory in it a run of its own
        claims = [(c, got) for c, got in claims if c.formats] or claims
    for code, got in claims:
        others, programs = _others(folder, names, got, code)
        got.others = tuple(dict.fromkeys(tuple(got.others) + tuple(others)))  # (the rule's own)
        got.warnings = tuple(got.warnings) + tuple(
            f"{n} beside it is another run (read on its own)" for n in got.others) + tuple(
            f"{n} beside it is an output of {what}, {how}: no run of its own"
            for n, what, how in programs)
    claims = [got for _, got in claims]
    if len(claims) > 1:                      # e.g. an OUTCAR and a pw.x output side by side
        return "ambiguous", [st[1].name for c in claims for st in c.stages]
    if claims:
        beside = all(fmt == "vasp-poscar" for *_, fmt in claims[0].stages) and \
            outputs_beside(folder)
        if beside:                                      # a structure alone beside outputs/
            return "inputs-of", _inputs_of_why(folder, beside)
        return "run", claims[0]
    for code in _codes.values() if format is None else ():
        fn = code.function("band")
        got = fn(folder, list(names), ctx) if fn is not None else None
        if got is not None:
            beside = outputs_beside(folder)         # a band's inputs beside its outputs
            return ("inputs-of", _inputs_of_why(folder, beside)) if beside else ("band", got)
    files = []
    for n in names:
        p = folder / n
        if format is None:
            ok = recognised(p, n)
        else:
            low = strip_compression(n).lower()
            f = _formats.get(format)
            ok = f is not None and any(fnmatch.fnmatchcase(low, g.lower()) for g in f.globs)
            ok = ok or (_safe_detect(p) == format)
        if ok:
            files.append(n)
    for code in _codes.values() if format is None else ():
        fn = code.function("inputs_only")
        got = fn(folder, list(names), ctx) if fn is not None else None
        if got is not None and set(files) <= set(got[1]):
            beside = outputs_beside(folder)
            if beside:
                return "inputs-of", _inputs_of_why(folder, beside)
            return "inputs", (got[0], [n for n in files if file_size(folder / n)], *got[2:])
    return "files", _one_per_run(_cp2k_parts(folder, names, files))


def _cp2k_parts(folder: Path, names, files: list) -> list:
    """``files`` without CP2K's positions files (``PROJECT-pos-1.xyz``) when an output of CP2K is
    in the folder: they are that run's, which is listed (skipped) by its output."""
    parts = [n for n in files if re.search(r"-pos-\d+\.xyz$", strip_compression(n))
             and _CP2K_POSITIONS.search(peek(folder / n, 256))]
    if parts and any((output_code(folder / n) or ("",))[0] == "CP2K" for n in names):
        return [n for n in files if n not in parts]
    return files


def _one_per_run(files: list) -> list:
    """The files of a folder that are runs: a CASTEP ``NAME.geom`` beside its ``NAME.castep`` (the
    same optimisation's iterations, which CASTEP writes to both) is not one of its own; the
    .castep, which also has the run's settings and how it ended, is read. A CIF is none (read
    when given)."""
    castep = {strip_compression(n)[:-len(".castep")] for n in files
              if strip_compression(n).endswith(".castep")}
    return [n for n in files if not (strip_compression(n).endswith(".geom")
                                     and strip_compression(n)[:-len(".geom")] in castep)
            and not strip_compression(n).lower().endswith(".cif")]


_INPUT_FOLDERS = ("input", "inputs")


def outputs_beside(folder) -> Path | None:
    """The folder holding the run whose inputs ``folder`` keeps, or None: ``folder`` is named
    ``inputs`` (or ``input``), or lies in one (a band's image ``inputs/01``), and the same place
    under a sibling whose name starts with ``output`` (``outputs``, ``outputs_bk``, ...) is a run
    folder or a band's (the layout of workflow test data and of archives that keep a job's inputs
    apart, e.g. atomate's and atomate2's)."""
    folder = Path(folder)
    top, below = (folder, ()) if folder.name.lower() in _INPUT_FOLDERS else \
        (folder.parent, (folder.name,))
    if top.name.lower() not in _INPUT_FOLDERS:
        return None
    try:
        with os.scandir(top.parent) as it:
            beside = sorted(e.name for e in it if e.name.lower().startswith("output") and e.is_dir())
    except OSError:
        return None
    for name in beside:
        out = top.parent.joinpath(name, *below)
        try:
            if out.is_dir() and scan_folder(out)[0] in ("run", "band"):
                return out
        except OSError:
            continue
    return None


def _inputs_of_why(folder: Path, out: Path) -> str:
    where = os.path.relpath(out, folder.parent)
    return (f"the inputs of the job whose outputs are in {where}/ beside it, not a run of their "
            f"own (pass {out})")


def structures(path, structure_keys=None) -> list[str]:
    """Names of the structures a file holds when its format can hold many and it holds more than
    one (discovery lists ``FILE::NAME`` for each); [] otherwise, also for a file that cannot be
    indexed (reading it reports the problem)."""
    from .batch import STRUCTURE_KEYS
    fmt = _formats.get(_safe_detect(path) or "")
    if fmt is None or fmt.members is None:
        return []
    fn = fmt.members
    if isinstance(fn, str):
        mod, _, name = fn.partition(":")
        fn = fmt.members = getattr(importlib.import_module(mod), name)
    try:
        names = fn(str(path), tuple(structure_keys or STRUCTURE_KEYS))
    except Exception:  # noqa: BLE001 - a file that cannot be indexed is one (failing) run
        return []
    return list(names) if len(names) > 1 else []


def _safe_detect(p):
    try:
        return detect(p)
    except (InputError, OSError):
        return None


def not_folder(entry) -> bool:
    """A folder's entry (``os.DirEntry``) that is no folder: a regular file, or a FIFO, socket,
    device or broken link, which a reader then refuses naming it; an entry whose type cannot be
    read (a link loop) counts too (discovery and the folder scan list the same entries)."""
    try:
        return not entry.is_dir()
    except OSError:
        return True


def inputs_only_problem(got: tuple, folder) -> str:
    """The one-line problem of a folder of job inputs and no output: ``got`` is ``scan_folder``'s
    ``(what, readable files[, ran])`` of "inputs"; ``ran``: the folder shows the job ran (a crash
    file, a log), and ``what`` says how."""
    what, readable, ran = (*got, False)[:3]
    also = f"; pass {Path(folder) / readable[0]} to read that structure alone" if readable else ""
    if ran:
        return f"{what}{also}"
    return f"{what}: a job not run yet, or one that stopped before writing an ionic step{also}"


def _others(folder: Path, names, pick: FolderPick, code: Code) -> tuple[list, list]:
    """The files beside a code's run that a format of no code or of another code reads, by name
    first (only those are opened), and outputs of codes with no reader (:func:`foreign_output`):
    runs of their own (those skipped), never dropped unsaid; and, apart, ``(name, program,
    what it is)`` of the outputs of the code's own programs with no ionic steps beside its run
    (ph.x beside pw.x: the phonons of that run's structure), said in the run's notes."""
    used = {Path(src).name for _, src, _ in pick.stages} | set(pick.also)
    foreign = [f for f in _formats.values() if f.name not in code.formats and f.globs]
    out, programs = [], []
    for n in names:
        if n in used:
            continue
        low = strip_compression(n).lower()
        if not any(fnmatch.fnmatchcase(low, g.lower()) for f in foreign for g in f.globs):
            what = (output_code(Path(folder) / n) or (None,))[0]
            if what is not None:
                if _COMPANIONS.get(what, ("",))[0] == code.name:
                    programs.append((n, what, _COMPANIONS[what][1]))
                else:
                    out.append(n)
            continue
        fmt = _safe_detect(Path(folder) / n)
        if fmt is not None and fmt not in code.formats and fmt != "vasp-error-archive":
            out.append(n)
    return out, programs


def _pick_folder(path: Path, format=None, ctx: ReadContext | None = None) -> _Pick:
    kind, got = scan_folder(path, format=format, ctx=ctx)
    if kind == "ambiguous":
        raise NotARunError(path, f"ambiguous run folder: outputs of several codes "
                                 f"({', '.join(got)}); pass the file itself")
    if kind == "run":
        return _Pick(list(got.stages), path, tuple(got.warnings), after=got.after)
    if kind == "inputs":
        raise InputError(path, inputs_only_problem(got, path))
    if kind == "band":
        raise NotARunError(path, got[0])
    if kind == "inputs-of":
        raise NotARunError(path, got)
    if not got:
        hint = f" readable as {format!r}" if format else ""
        outputs = [n for n in sorted(os.listdir(path)) if foreign_output(path / n)]
        if len(outputs) == 1 and format is None:     # a run of a code with no reader: say so
            detect(path / outputs[0])                 # (raises ForeignOutputError, naming it)
        below = _runs_in_subfolders(path)
        raise (NotARunError if below else InputError)(   # a campaign's folder: no run to wait for
            path, f"not a run folder: no VASP (vasprun.xml, OUTCAR, XDATCAR, CONTCAR/POSCAR), pw.x "
                  f"output or other trajectory{hint} found"
            + (f"; run folders in it: {', '.join(below)} (pass one; `driftwatch audit {path}` "
               f"reads them all)" if below else ""))
    if len(got) > 1:
        shown = ", ".join(got[:8]) + (f", ... ({len(got)} in all)" if len(got) > 8 else "")
        raise NotARunError(path, f"ambiguous run folder: it holds {len(got)} runs ({shown}); "
                                 f"pass the file itself")
    source = path / got[0]
    if ctx is not None:
        ctx.uses(source)
    return _Pick([("", source, format or detect(source))], path)


def _runs_in_subfolders(path: Path, limit: int = 8) -> list[str]:
    """Names (``name/``) of the subfolders of ``path`` that are run folders, the first ``limit``."""
    try:
        with os.scandir(path) as it:
            subs = sorted(e.name for e in it if not e.name.startswith(".") and e.is_dir())
    except OSError:
        return []
    out = []
    for name in subs:
        try:
            kind, got = scan_folder(path / name)
            if kind == "run" or (kind == "files" and got):
                out.append(f"{name}/")
        except OSError:
            continue
        if len(out) == limit:
            out.append("...")
            break
    return out


def detect(path) -> str:
    """The format name ``read_run`` would use for ``path`` (a file or a run folder)."""
    return _resolve(path).format


# ---------------------------------------------------------------- reading
def _stream(fmt_name: str, source, ctx: ReadContext) -> Iterator[Frame]:
    """Frames from the reader; reader failures become InputError, or a warning after frames."""
    fmt = _formats[fmt_name]
    base, name = _batch_split(str(source))
    if name is not None and fmt_name in PART_FORMATS and Path(base).exists():
        ctx.part(base, fmt_name, name)     # (WAL mode: the structure's rows say, through SQLite)
    else:
        base = base.rpartition("@")[0] if not Path(base).exists() and "@" in base else base
        ctx.uses(base)
        if fmt_name == "ase-db" and os.path.exists(wal_of(base)):   # WAL mode: rows in its log
            ctx.uses(wal_of(base))
    n = 0
    last = None
    try:
        for fr in checked(quiet_numbers(fmt.open(str(source), ctx), ctx), source):
            n += 1
            last = fr.step
            yield fr
    except AtomsChangeError as exc:   # a many-structure format: say what would split it
        if fmt.members is None:
            raise
        raise AtomsChangeError(source, f"{exc.problem}; " + _not_one_run(
            ctx, fmt_name in ("ase-db", "ase-json-db"))
            + (_keys_that_vary(base, ctx.structure) if fmt_name == "extxyz" else "")) from None
    except DamagedFrameError as exc:    # a blow-up: the steps before it are the run
        if n == 0:
            raise
        ctx.warn(f"{exc.problem}: a run that blew up, or a damaged file; the {n} steps before it "
                 f"are read, the steps from there are not")
        ctx.unfinished = f"damaged: {exc.problem}"
    except DriftwatchError:
        raise
    except Exception as exc:
        what = fmt.description or fmt_name
        why = " ".join(str(exc).split())            # one line, whatever the library printed
        why = why if len(why) <= 300 else why[:297] + "..."
        if n == 0:
            raise InputError(source, f"cannot be read as {what}: "
                                     f"{type(exc).__name__}: {why}") from exc
        stars = " (a field of '*': the code printed a number too wide for its format)" \
            if "**" in why else ""
        ctx.warn(f"unreadable after step {last} ({n} steps read; {type(exc).__name__}: {why})"
                 f"{stars}: the steps after it are not seen")
        ctx.unfinished = (f"unreadable after step {last}{stars}: a damaged file, or a layout "
                          f"of it that the reader does not know")


def _keys_that_vary(path, structure: dict | None) -> str:
    """The extended XYZ keys that could name the file's structures (other than the one that named
    this structure), said in words (or "")."""
    from .batch import varying_keys
    used = (structure or {}).get("key")
    try:
        keys = [(k, n) for k, n in varying_keys(path) if k != used][:4]
    except (DriftwatchError, OSError):
        return ""
    return ("; keys whose value changes between frames: "
            + ", ".join(f"{k} ({n} values)" for k, n in keys)) if keys else ""


def _not_one_run(ctx: ReadContext, rows: bool) -> str:
    """Why frames of other atoms are in one run, and what would split them (``rows``: an ASE
    database, whose rows ``FILE@selection`` picks)."""
    got, pick = ctx.structure, " or pick rows with FILE@selection" if rows else ""
    if got:
        return (f"the frames with {got['key']} = {got['value']!r} are not one relaxation (a "
                f"category of a training set?): name structures by another key "
                f"(inputs.structure_keys){pick}")
    return (f"a file of unrelated structures? name each with a key of inputs.structure_keys "
            f"(the frames' info or key-value pairs){pick}")


def _source_of(pick: _Pick, src: Path) -> str:
    if not pick.selection:
        return str(src)
    return f"{src}{pick.selection}" if pick.selection.startswith(_SEP) else f"{src}@{pick.selection}"


def _frames(pick: _Pick, ctx: ReadContext, stages_out: list | None = None) -> Iterator[Frame]:
    """Every completed step of every stage, steps numbered on across stages."""
    import dataclasses
    offset, index, first_numbers, kinds = 0, 0, None, []
    moved, seen = True, None          # moved: no frame's structure is the one before it
    ctx.stage_count = len(pick.stages)
    for name, src, fmt in pick.stages:
        ctx.path = _source_of(pick, src)
        n, last = 0, None
        ctx.unfinished = None               # the run's is its last stage's
        line = StraightLine()
        for fr in _stream(fmt, ctx.path, ctx):
            line.add(fr)
            if first_numbers is None:
                first_numbers = fr.numbers
            elif len(pick.stages) > 1 and n == 0 and not _same_atoms(first_numbers, fr.numbers):
                raise InputError(src, f"stage {name} holds other atoms than the stage before it; "
                                      f"read the stages one by one ({pick.run_dir}@{name})")
            mark = (fr.positions.shape, float(fr.positions.sum()), float(fr.cell.sum()))
            moved = moved and mark != seen          # (the same numbers read: the same sums)
            seen = mark
            if offset:
                fr = dataclasses.replace(fr, step=fr.step + offset)
            n, last = n + 1, fr.step
            yield fr
        # a stage that gave no frame (an archived attempt that is no stage of the run) is not listed
        if stages_out is not None and len(pick.stages) > 1 and n:
            stages_out.append({"name": name, "source": str(src), "format": fmt,
                               "first_frame": index, "n_frames": n, "step_offset": offset})
        index += n
        if last is not None:
            offset = last + 1
        if line.band and "band_path" not in ctx.settings:
            ctx.settings["band_path"] = StraightLine.BAND
        if n:
            kinds.append(run_kind(ctx.settings))       # each stage by its own settings
    if pick.after is not None and index:
        pick.after(ctx, fr)
    if stages_out is not None and len(stages_out) == 1:
        stages_out.clear()                  # one stage gave every frame: not a multi-stage run
    if ctx.unfinished and not ctx.unfinished.startswith("cut short"):   # (warned as truncated)
        ctx.warn(f"unfinished: {ctx.unfinished}; the final structure is not a relaxed one")
    # no relaxation when no stage is one (relaxations ending in a static stage are relaxations)
    what = ctx.not_relaxation = kinds[-1] if kinds and all(kinds) else None
    if what and moved and index > 1 and all(k.endswith(_ONE_STRUCTURE) for k in kinds):
        # single points run one after another (stages, or runs appended to one output)
        what = ctx.not_relaxation = (f"{what[:-len(_ONE_STRUCTURE)]} {index} times, one "
                                     f"after another, each on its own structure: no ionic steps "
                                     f"of the code's own")
    if what:
        ctx.warn(not_relaxation_note(what, index))


_ONE_STRUCTURE = ": one structure, no ionic steps"     # how a single point's words end


def not_relaxation_note(what: str, frames: int | None = None) -> str:
    """The warning of a run whose steps are no relaxation (``what`` they are), as every reader and
    the live watch say it; ``frames``: how many it has, when known."""
    return f"not a relaxation: {what}; " + (
        "one frame: no drift can be measured from it alone" if frames == 1 else
        "its verdict compares the first and last frames (how the structure moved), not where a "
        "relaxation ended")


def _same_atoms(a, b) -> bool:
    import numpy as np
    return len(a) == len(b) and bool(np.array_equal(np.asarray(a), np.asarray(b)))


def iter_frames(path, format=None, *, context: ReadContext | None = None,
                structure_keys=None) -> Iterator[Frame]:
    """Stream the completed ionic steps of ``path`` (a file or run folder) as Frames.

    Never yields an incomplete step, so it is safe on a file that is still being written. Stages
    of a multi-stage run follow each other (steps numbered on). Pass a :class:`ReadContext` as
    ``context`` to receive warnings, the code settings and the files read. Raises ``InputError``
    when no step is complete.
    """
    ctx = context if context is not None else ReadContext(path)
    if structure_keys is not None:
        ctx.structure_keys = tuple(structure_keys)
    pick = _resolve(path, format, ctx)
    ctx.path = _source_of(pick, pick.source)
    for w in pick.warnings:
        ctx.warn(w)
    n = 0
    for fr in _frames(pick, ctx):
        n += 1
        yield fr
    ctx.path = _source_of(pick, pick.source)
    if n == 0:
        detail = f" ({ctx.warnings[-1].split(': ', 1)[-1]})" if ctx.warnings else ""
        raise InputError(pick.source, "no completed ionic step" + detail)


def read_run(path, format=None, *, context: ReadContext | None = None,
             structure_keys=None) -> Run:
    """Read every completed ionic step of a file or run folder into a :class:`Run`.

    ``format`` overrides detection (see :func:`formats`). For a folder, the richest complete
    output is chosen and ``source`` names it; ``run_dir`` is the folder. A multi-stage folder
    (custodian ``vasprun.xml.relax1.gz`` ..., ``relax1/ relax2/`` stage folders) is read as one
    trajectory with ``stages`` giving the boundaries; ``FOLDER@relax1`` (or ``FOLDER@1``) reads
    one stage. A truncated output gives its completed steps plus a warning naming the file.
    ``FILE::NAME`` reads one structure of a many-structure extended XYZ or ase.db
    (:mod:`driftwatch.adapters.batch`; ``structure_keys``: the keys that name structures, default
    ``batch.STRUCTURE_KEYS``); reading such a file whole is refused with the names it holds.
    ``context``: a :class:`ReadContext` to fill (it keeps the files read even when reading fails).
    """
    ctx = context if context is not None else ReadContext(path)
    if structure_keys is not None:
        ctx.structure_keys = tuple(structure_keys)
    pick = _resolve(path, format, ctx)
    ctx.path = _source_of(pick, pick.source)
    for w in pick.warnings:
        ctx.warn(w)
    stages: list = []
    return collect(_frames(pick, ctx, stages), path=_source_of(pick, pick.source),
                   fmt=pick.format, ctx=ctx, run_dir=pick.run_dir, stages=stages)


def discovery_memo() -> dict:
    """What the code modules learnt of files during discovery and reading that only their bytes
    decide (a module's ``memo()``: espresso's runs of an output of several pw.x runs), as JSON
    values keyed by module, for the next audit of the same output folder (:func:`remember`)."""
    out = {}
    for name in _CODE_MODULES:
        fn = getattr(importlib.import_module(_A + name), "memo", None)
        if fn is not None:
            out[name] = fn()
    return out


def remember(saved: dict) -> None:
    """Give each code module back what :func:`discovery_memo` saved (its ``remember()``)."""
    for name in _CODE_MODULES:
        fn = getattr(importlib.import_module(_A + name), "remember", None)
        if fn is not None and isinstance((saved or {}).get(name), dict):
            fn(saved[name])


def run_kind(code_settings: dict) -> str | None:
    """What a run's ionic steps are when they are no relaxation (see :class:`Code`), else None.
    Any code: ``neb_image`` in the settings (which image of which band, in words) names an image
    of a nudged-elastic-band calculation (VASP's IMAGES folders, ASE's NEB trajectory); an ASE
    trajectory whose description names a molecular-dynamics class (``dynamics``) is MD; a
    structure file read alone (``single_structure``: its name, e.g. POSCAR) has no steps."""
    s = code_settings or {}
    if s.get("single_structure"):
        return f"a single structure ({s['single_structure']}): an input or a result, no ionic steps"
    if s.get("band_path"):
        return f"a band of images ({s['band_path']}): its frames are images, not ionic steps"
    if s.get("neb_image"):
        return (f"a nudged-elastic-band image ({s['neb_image']}): it moves along a path between "
                f"two end points")
    if s.get("code") == "ase" and s.get("dynamics"):      # an ASE MD class wrote the trajectory
        return f"molecular dynamics (ASE's {s['dynamics']})"
    if s.get("code") == "ase" and s.get("dynamics_seen"):   # no description; what the frames show
        return f"molecular dynamics ({s['dynamics_seen']})"
    if s.get("code") in ("castep", "aims", "atomate2"):   # no code table row
        from .ase_native import run_kind as through_ase
        return through_ase(s)
    code = _code_named(s.get("code"))
    fn = code.function("run_kind") if code is not None else None
    return fn(s) if fn is not None else None


# ---------------------------------------------------------------- the tables
# Order matters for magic detection: the most specific patterns first. The formats of a code are
# registered by its module's ``register_all`` (one module per code), then the generic ones.
_A = "driftwatch.adapters."
_CODE_MODULES = ("vasp", "espresso", "lammps")
for _module in _CODE_MODULES:
    importlib.import_module(_A + _module).register_all(register, register_code)
register("traj", _A + "ase_native:read_traj", globs=("*.traj",), magic=rb"\A- of UlmASE-Trajectory",
         description="ASE trajectory (.traj; an ASE NEB band's file.traj::image01 one image)",
         members=_A + "ase_native:traj_names")
register("ase-db", _A + "ase_native:read_db", globs=("*.db",), magic=rb"\ASQLite format 3\x00",
         description="ASE database rows (SQLite .db; file.db@selection picks rows; "
                     "file.db::NAME one structure)", members=_A + "batch:db_names")
# (an ASE JSON database, told by its first bytes, before the task documents' keys, which its
# rows' key-value pairs may use)
register("ase-json-db", _A + "ase_native:read_db", globs=(),
         magic=rb'\A\s*\{\s*"1"\s*:\s*\{', description="ASE database rows (JSON)",
         members=_A + "batch:db_names")
register("task-doc", _A + "pymatgen_json:read_task_doc", globs=("*task*.json",),
         magic=rb'"(?:calcs_reversed|ase_calculator_name|forcefield_name)"\s*:',
         description="workflow task document (JSON; calcs_reversed[].output.ionic_steps, or "
                     "atomate2's ASE and force-field output.ionic_steps; a list of them, or a "
                     "jobflow store's: file::NAME one document)",
         members=_A + "pymatgen_json:task_doc_names")
register("pymatgen-trajectory", _A + "pymatgen_json:read_pmg_trajectory", globs=(),
         magic=rb'\A\s*\{[^{}\[\]]{0,300}"@class"\s*:\s*"Trajectory"',
         description="pymatgen Trajectory in JSON (Trajectory.as_dict; atomate2's "
                     "traj_file_fmt='pmg')")
register("pymatgen-json", _A + "pymatgen_json:read_structures", globs=(),
         magic=rb'"@class"\s*:\s*"Structure"', description="pymatgen Structure list in JSON")
register("extxyz", _A + "ase_native:read_extxyz", globs=("*.xyz", "*.extxyz"),
         magic=rb"\A\s*\d+[ \t]*\r?\n[^\n]*(Lattice|Properties)=", description="extended XYZ "
                                                                      "(file::NAME one structure)",
         members=_A + "batch:extxyz_names")
register("aims-out", _A + "ase_native:read_aims", globs=("*aims*.out",),
         magic=rb"Invoking FHI-aims|Reading geometry description geometry\.in", description="FHI-aims output (through ASE)")
register("castep", _A + "ase_native:read_castep", globs=("*.castep",),
         magic=rb"CCC   AA    SSS  TTTTT  EEEEE  PPPP", description="CASTEP .castep output "
                                                                   "(through ASE)")
register("castep-geom", _A + "ase_native:read_castep_geom", globs=("*.geom",),
         magic=rb"BEGIN header[\s\S]*END header[\s\S]*<-- c", description="CASTEP .geom "
                                                                         "(through ASE)")
register("gpaw-out", _A + "ase_native:read_gpaw", globs=(),
         magic=rb"\|__ \|  _\|___\|_____\|", description="GPAW text output (through ASE)")
register_code(Code(
    name="gpaw", label="GPAW", formats=("gpaw-out",), folder=_A + "ase_native:no_folder",
    # the timing table GPAW prints when its calculator is done ("Total: ... 100.0%")
    end_markers={"gpaw-out": ((re.compile(rb"^Total: +[0-9.]+ +100\.0%", re.M),
                               "GPAW's closing timing table"),)},
    symmetry_setting=_A + "ase_native:gpaw_symmetry"), replace=True)
register_code(Code(name="abinit", label="ABINIT", formats=(), folder=_A + "ase_native:no_folder",
                   symmetry_setting=_A + "ase_native:abinit_symmetry"), replace=True)
# a folder where an ASE optimiser drove a calculator: its trajectory, and the calculator's files of
# the same relaxation beside it (a GPAW log, another code's output, a restart file)
register_code(Code(name="ase-driven", label="ASE-driven calculation", formats=(),
                   folder=_A + "ase_native:calculator_folder"), replace=True)
register("cif", _A + "ase_native:read_cif", globs=(), magic=rb"^data_\S",
         description="CIF (a single structure, through ASE; read when given, never a run of an "
                     "audit: a campaign's CIFs are its inputs and references)")
register("vasp-poscar", _A + "vasp:read_poscar", globs=("*POSCAR*", "*CONTCAR*", "*.vasp"),
         description="VASP POSCAR/CONTCAR (a single structure)")
