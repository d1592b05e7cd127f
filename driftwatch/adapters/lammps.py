"""LAMMPS: text dumps, read with what the job's input script and ``log.lammps`` beside them say.

A dump holds positions and atom types only. The job's commands (its log echoes every command
LAMMPS ran, includes and loops expanded; else its input script) name the types' elements
(``mass`` lines, or the Masses section of the ``read_data`` file), the length unit (``units``), a
relaxed box (``fix ... box/relax``) and what ran (``minimize`` or MD ``run``). The log adds how
each minimisation stopped ("Stopping criterion = max iterations" is a run at its step limit) and
the thermo energies at the steps it printed. A script or log counts as the dump's job when it
names the dump's file in a ``dump`` or ``write_dump`` command, or is the folder's only one and
names no other dump; a log in the folder above counts when it names the dump by its subfolder. A
pattern with ``*`` writes one file per frame: a folder of those files alone is one run of them all
(format ``lammps-dump-series``), a file of them passed alone is read alone.

Steps are LAMMPS timesteps (``ITEM: TIMESTEP``), so a dump written every N steps keeps the
minimiser's own count, counted on across ``reset_timestep``. Frames are read one at a time; a frame
cut by a killed or running job is dropped and said.
"""
from __future__ import annotations

import dataclasses
import fnmatch
import io
import os
import re
from pathlib import Path

import numpy as np

from ..errors import InputError
from ._io import Lines, peek, strip_compression
from .ase_native import MAX_ATOMS
from .run import ReadContext, decimals, frame_from_atoms

__all__ = ["read_lammps_dump", "read_lammps_series", "job_of", "register_all"]

_SCRIPT_NAMES = re.compile(r"(?i)^(in\..+|.+\.in|.+\.lmp|.+\.lammps|.*\blog\.lammps(\.\d+)?|"
                           r"log\..+\.lammps)$")
_COMMAND = re.compile(r"^(units|mass|read_data|dump|write_dump|undump|fix|minimize|run|"
                      r"min_style|thermo_modify|dump_modify|create_box|variable)[ \t]+(\S.*)$")
_STOP = re.compile(r"^[ \t]*Stopping criterion = (.+?)[ \t]*$")
_LOOP_ATOMS = re.compile(r"^Loop time of .* with (\d+) atoms")
_TEXT_STYLES = ("atom", "custom", "atom/gz", "custom/gz", "atom/zstd", "custom/zstd")
"""LAMMPS dump styles written as the text frames this module reads."""
_DUMP_NAMES = ("*.lammpstrj", "*.dump", "dump.*", "*.dump.*", "*.lammpstrj.*")
"""Names of LAMMPS dump files as users write them (compression suffixes stripped)."""
_STEP_LIMIT = ("max iterations", "max force evaluations")
_CONVERGED = ("energy tolerance", "force tolerance", "forces are zero")
_TO_EV = {"metal": 1.0, "real": 0.0433641043, "electron": 27.211386245988}
"""eV per energy unit of a LAMMPS units style (LAMMPS docs, ``units`` command; CODATA 2018)."""
_ANGSTROM_UNITS = ("metal", "real")
_FORCE_UNIT = {"metal": "eV/Å", "real": "kcal/mol/Å", "electron": "Hartree/Bohr"}


@dataclasses.dataclass
class Job:
    """What the job's commands and log say about a dump (see the module doc)."""

    source: Path | None = None          # the log or script read (None: none found)
    units: str | None = None            # the ``units`` style; LAMMPS's default is lj
    masses: dict = dataclasses.field(default_factory=dict)   # type -> mass (u)
    data_file: Path | None = None       # the ``read_data`` file
    box_relax: str | None = None        # "fix box/relax aniso", ... (words)
    stops: list = dataclasses.field(default_factory=list)    # (criterion, max force component)
    finished: bool = False              # the log's "Total wall time"
    energies: dict = dataclasses.field(default_factory=dict)  # timestep -> energy (eV)
    per_atom: bool = False              # thermo_modify norm yes: the log's energies per atom
    dump_format: bool = False           # a dump_modify ... format: not LAMMPS's default %g
    names_dump: bool = False            # a dump/write_dump command names this dump's file
    names_other: bool = False           # ... names other files only: another job's
    per_frame: str | None = None        # the dump's file pattern holds '*': one file a frame
    ntypes: int = 0                     # create_box N
    elements: dict = dataclasses.field(default_factory=dict)   # type -> element of a data file's
    #                                     Masses comment ("1 24.305 # Mg", as ASE writes it)
    active: list = dataclasses.field(default_factory=list)    # per minimize: was this dump on
    #                                     (one entry per minimize command, in order)
    sequence: list = dataclasses.field(default_factory=list)  # "minimize" / "run", in order
    repeated: set = dataclasses.field(default_factory=set)    # thermo steps printed twice
    natoms: int = 0                     # atoms of the job's last run ("Loop time ... with N atoms")
    elsewhere: list = dataclasses.field(default_factory=list)  # logs/scripts of other dumps
    aux: dict = dataclasses.field(default_factory=dict)   # file -> style of the job's dumps
    #                                     of no text style (xyz, dcd, ...: no cell, or binary)


def _types(spec: str, ntypes: int) -> range:
    """LAMMPS type ranges: ``2``, ``*``, ``2*``, ``*3``, ``1*3`` (an open end at ``ntypes``, the
    number of types, when known; at least the lower bound)."""
    if "*" not in spec:
        return range(int(spec), int(spec) + 1)
    lo, hi = spec.split("*", 1)
    first = int(lo) if lo else 1
    return range(first, max(first, int(hi) if hi else ntypes) + 1)


def _potential(header: list, row: list) -> float | None:
    """The potential energy of a thermo row (the log's units): ``PotEng``, else ``E_pair + E_mol``
    (LAMMPS's default thermo columns); None when neither is printed. ``TotEng`` is not used: under
    a damped-dynamics minimiser (``min_style fire``) it holds the minimiser's kinetic energy."""
    try:
        if "PotEng" in header:
            return float(row[header.index("PotEng")])
        if "E_pair" in header:
            return float(row[header.index("E_pair")]) + (
                float(row[header.index("E_mol")]) if "E_mol" in header else 0.0)
    except ValueError:
        return None
    return None


def _with_includes(lines, path: Path, ctx: ReadContext, depth: int = 0):
    """The lines of an input script with the files its ``include`` commands name inlined."""
    for raw in lines:
        yield raw
        f = raw.split("#", 1)[0].split()
        if f[:1] == ["include"] and len(f) > 1 and depth < 8:
            inc = path.parent / f[1]
            if inc.is_file():
                ctx.uses(inc)
                with Lines(inc) as fh:
                    yield from _with_includes(fh, inc, ctx, depth + 1)


def _substituted(line: str, variables: dict) -> str:
    """``${name}`` and ``$x`` of a command replaced by the values of the script's variables."""
    if "$" not in line:
        return line
    line = re.sub(r"\$\{(\w+)\}", lambda m: variables.get(m.group(1), m.group(0)), line)
    return re.sub(r"\$([A-Za-z])", lambda m: variables.get(m.group(1), m.group(0)), line)


def _named(target: str, dump_name: str) -> str | None:
    """The file name (a pattern with ``*``: one file a frame) by which a ``dump`` command's
    ``target`` names the dump ``dump_name`` (its path relative to the script's folder), or None.
    A target with folders names the dump at that path (or, for a dump beside the script, the
    file of that name: copied there); an absolute one by its file name."""
    target = strip_compression(target.strip("'\""))
    if not target:
        return None
    rel = os.path.normpath(target)
    here = "/" not in dump_name
    if os.path.isabs(rel) or (here and rel != os.path.basename(rel)):
        rel, want = os.path.basename(rel), os.path.basename(dump_name)
    else:
        want = dump_name
    if rel == want or ("*" in rel and fnmatch.fnmatchcase(want, rel)):
        return os.path.basename(rel)
    return None


def _read_commands(path: Path, dump_name: str, ctx: ReadContext) -> Job:
    """Parse the commands (and, for a log, the minimiser's stops and thermo) of one file;
    ``dump_name``: the dump's path relative to the file's folder."""
    job = Job(source=path)
    header, thermo_units = None, None
    last_stop_block: dict | None = None
    pending_masses = []
    dump_id, dump_on = None, False
    ctx.uses(path)
    variables: dict = {}
    is_log = peek(path, 16).startswith(b"LAMMPS (")        # a log echoes its includes
    with Lines(path) as fh:
        for raw in (fh if is_log else _with_includes(fh, path, ctx)):
            line = _substituted(raw.split("#", 1)[0].strip(), variables)
            if header is not None:                    # inside a thermo table, to "Loop time"
                f = line.split()
                if len(f) == len(header) and f[0].lstrip("-").isdigit():
                    e = _potential(header, f)
                    if e is not None and thermo_units in _TO_EV:
                        step, e = int(f[0]), e * _TO_EV[thermo_units]
                        old = job.energies.get(step)
                        if step in job.repeated or (old is not None and e != old):
                            job.repeated.add(step)   # reset_timestep: two energies, one step
                            job.energies.pop(step, None)
                        else:            # a new minimize or run prints its first step again
                            job.energies[step] = e
                    continue
                if not raw.startswith(("Loop time", "ERROR")):   # a WARNING, fix print: go on
                    continue
                header = None
                m = _LOOP_ATOMS.match(raw)
                if m:
                    job.natoms = int(m.group(1))
            if line.startswith("Step ") and line.split()[0] == "Step":
                header, thermo_units = line.split(), job.units or "lj"
                continue
            m = _STOP.match(raw)
            if m:
                last_stop_block = {"criterion": m.group(1), "fmax": None}
                job.stops.append(last_stop_block)
                continue
            if last_stop_block is not None and line.startswith("Force max component"):
                try:
                    last_stop_block["fmax"] = float(line.split()[-1])
                except ValueError:
                    pass
                continue
            if raw.startswith("Total wall time:"):
                job.finished = True
                continue
            m = _COMMAND.match(line)
            if not m:
                continue
            cmd, args = m.group(1), m.group(2).split()
            if cmd == "variable" and len(args) >= 3 and args[1] in ("string", "index", "equal"):
                variables.setdefault(args[0], args[2].strip('"'))   # LAMMPS keeps the first
            elif cmd == "units":
                job.units = args[0]
            elif cmd == "mass" and len(args) >= 2:
                pending_masses.append((args[0], args[1]))
            elif cmd == "read_data" and (path.parent / args[0]).is_file():   # not the log's
                job.data_file = path.parent / args[0]             # "read_data CPU = ..." line
            elif cmd in ("dump", "write_dump"):
                target = args[4] if cmd == "dump" and len(args) > 4 else \
                    args[2] if cmd == "write_dump" and len(args) > 2 else ""
                name = _named(target, dump_name)
                if cmd == "dump" and len(args) > 4 and args[2] not in _TEXT_STYLES:
                    job.aux[strip_compression(os.path.basename(target))] = args[2]
                    continue
                if name is not None:
                    job.names_dump = True
                    job.per_frame = name if "*" in name else job.per_frame
                    dump_id = args[0] if cmd == "dump" else dump_id
                    dump_on = cmd == "dump"
                elif target:
                    job.names_other = True
            elif cmd == "undump" and args[:1] == [dump_id]:
                dump_on = False
            elif cmd == "create_box" and args[0].isdigit():
                job.ntypes = int(args[0])
            elif cmd == "fix" and len(args) >= 3 and args[2] == "box/relax":
                # its keywords (each then a pressure); the value of 'couple' (xy, xyz, ...) names
                # dimensions coupled, not relaxed
                mode = " ".join(a for k, a in enumerate(args[3:], 3)
                                if a in ("iso", "aniso", "tri", "x", "y", "z", "xy", "xz", "yz")
                                and args[k - 1] != "couple")
                job.box_relax = f"'fix box/relax{' ' + mode if mode else ''}'"
            elif cmd == "minimize" and len(args) >= 4:
                job.active.append(dump_on)
                job.sequence.append("minimize")
            elif cmd == "run" and args[0].isdigit() and int(args[0]) > 0:
                job.sequence.append("run")
            elif cmd == "dump_modify" and "format" in args:
                job.dump_format = True
            elif cmd == "thermo_modify" and "norm" in args[:-1]:
                job.per_atom = args[args.index("norm") + 1] == "yes"
    masses, job.elements = _data_masses(job.data_file, ctx) if job.data_file is not None \
        else ({}, {})
    ntypes = max([job.ntypes, *masses])
    for spec, value in pending_masses:
        try:
            for t in _types(spec, ntypes):
                masses[t] = float(value)
        except ValueError:
            continue
    job.masses = masses
    return job


def _data_masses(path: Path, ctx: ReadContext) -> tuple[dict, dict]:
    """(type -> mass, type -> element its comment names) of a LAMMPS data file's ``Masses``
    section (``1 24.304999 # Mg``, as ASE writes it); ({}, {}) when missing or unreadable."""
    from ase.data import chemical_symbols
    ctx.uses(path)
    out: dict = {}
    names: dict = {}
    try:
        with Lines(path) as fh:
            inside = False
            for raw in fh:
                line, _, comment = raw.partition("#")
                line = line.strip()
                if not inside:
                    inside = line == "Masses"
                    continue
                f = line.split()
                if not f:
                    if out:
                        break
                    continue
                if len(f) < 2 or not f[0].isdigit():
                    break
                out[int(f[0])] = float(f[1])
                word = comment.split()[0] if comment.split() else ""
                if word in chemical_symbols[1:]:
                    names[int(f[0])] = word
    except (OSError, InputError, ValueError):
        return {}, {}
    return out, names


def job_of(dump: Path, ctx: ReadContext) -> Job:
    """The job of ``dump``: the log or input script beside it that names it (a log first: it
    holds what ran), else the folder's only log or script; else one in the folder above that names
    the dump by its subfolder (``dump ... frames/relax.*.lammpstrj``); an empty :class:`Job` when
    none."""
    named, jobs = _jobs_in(dump.parent, strip_compression(dump.name), ctx)
    if named:
        return named[0]
    alone = [j for j in jobs if not j.names_other]     # one that names other dumps is another job's
    if len(jobs) == 1 and alone:
        return alone[0]
    if not jobs and dump.parent.parent != dump.parent:
        above, _ = _jobs_in(dump.parent.parent,
                            f"{dump.parent.name}/{strip_compression(dump.name)}", ctx)
        if above:
            return above[0]
    return Job(elsewhere=[j.source.name for j in jobs if j.names_other])


def _jobs_in(folder: Path, dump_name: str, ctx: ReadContext) -> tuple[list, list]:
    """(the jobs in ``folder`` that name ``dump_name``, every job there), logs first."""
    ctx.lists(folder)
    try:
        names = sorted(n for n in os.listdir(folder)
                       if _SCRIPT_NAMES.match(strip_compression(n)) and (folder / n).is_file())
    except OSError:
        return [], []
    logs = [n for n in names if "log" in n.lower()
            and strip_compression(n).lower().endswith("lammps")]
    jobs = []
    for n in logs + [n for n in names if n not in logs]:
        try:
            if _looks_like_lammps(folder / n):
                jobs.append(_read_commands(folder / n, dump_name, ctx))
        except (OSError, InputError):
            continue
    return [j for j in jobs if j.names_dump], jobs


def _looks_like_lammps(path: Path) -> bool:
    head = peek(path, 8192).decode("utf-8", "replace")
    return head.startswith("LAMMPS (") or any(
        _COMMAND.match(ln.split("#", 1)[0].strip()) for ln in head.splitlines()
        if ln.split("#", 1)[0].strip().split(" ", 1)[0] in ("units", "read_data", "minimize",
                                                               "run", "mass"))


def _elements(masses: dict, names: dict | None = None) -> list | None:
    """Elements by type 1..n: the element a data file's comment names, else the standard atomic
    mass nearest each (within 0.1 u); None when a type has neither."""
    from ase.data import atomic_masses, chemical_symbols
    names = names or {}
    if not masses and not names:
        return None
    out = []
    for t in range(1, max([*masses, *names]) + 1):
        if t in names:
            out.append(names[t])
            continue
        if t not in masses:
            return None
        z = int(np.argmin(np.abs(atomic_masses[1:] - masses[t]))) + 1
        if abs(atomic_masses[z] - masses[t]) > 0.1:
            return None
        out.append(chemical_symbols[z])
    return out


def _frames_text(path, ctx: ReadContext):
    """(timestep, text of one complete frame) in file order; a frame cut short is said and
    dropped (the frames before it are whole)."""
    with Lines(path) as fh:
        n_read = 0
        while True:
            head = fh.read_lines(4)
            if not head:
                return
            extra = []               # dump_modify units yes / time yes: a line each, first
            while head and head[0].startswith(("ITEM: UNITS", "ITEM: TIME\n")):
                extra += head[:2]
                head = head[2:] + fh.read_lines(2)
            if len(head) < 4 or not head[0].startswith("ITEM: TIMESTEP") or \
                    not head[2].startswith("ITEM: NUMBER OF ATOMS"):
                if len(head) < 4 and all(h.startswith("ITEM") or h.strip().isdigit()
                                         for h in head):
                    break
                raise InputError(path, f"line {fh.lineno - len(head) + 1}: not a LAMMPS dump "
                                       f"frame header ({head[0].strip()[:60]!r})")
            try:
                step, n = int(head[1].split()[0]), int(head[3].split()[0])
            except (ValueError, IndexError):
                raise InputError(path, f"line {fh.lineno - 2}: a timestep or atom count that is "
                                       f"not an integer") from None
            if not 0 < n <= MAX_ATOMS:
                raise InputError(path, f"line {fh.lineno}: {n} atoms in a frame")
            rest = fh.read_lines(5 + n)
            if len(rest) < 5 + n:
                got = max(0, len(rest) - 5)
                ctx.truncated(f"truncated: its last frame (timestep {step}) holds {got} of its "
                              f"{n} atom lines; {n_read} whole frame{'s' if n_read != 1 else ''} "
                              f"read (job killed or still running)")
                return
            n_read += 1
            yield step, "".join(extra) + "".join(head) + "".join(rest)
        ctx.truncated(f"truncated: its last frame's header is cut; {n_read} whole frame"
                      f"{'s' if n_read != 1 else ''} read (job killed or still running)")


def printed_step(values) -> float | None:
    """The coarsest rounding step of numbers printed by one C format: fixed decimals (``%f``:
    the most decimals seen) or significant digits (``%g``, LAMMPS's default: the most digits
    seen, which the largest value carries at its magnitude); trailing zeros that ``%g`` strips
    make either count a lower bound, so the coarser of the two is taken. None when no value
    shows a decimal point."""
    most_decimals = most_digits = None
    top = 0.0
    for v in values:
        d = decimals(v)
        if d is None:
            continue
        digits = v.strip().lstrip("+-").replace(".", "").lstrip("0")
        most_decimals = d if most_decimals is None else max(most_decimals, d)
        most_digits = len(digits) if most_digits is None else max(most_digits, len(digits))
        top = max(top, abs(float(v)))
    if most_decimals is None:
        return None
    by_digits = 10.0 ** (np.floor(np.log10(top)) - most_digits + 1) if top > 0 else 0.0
    return float(max(10.0 ** -most_decimals, by_digits))


DEFAULT_DIGITS = 6
"""Significant digits of LAMMPS's default dump format for floats, ``%g`` (C's printf; LAMMPS docs,
``dump_modify format``), which also drops trailing zeros."""


def _atom_table(text: str) -> tuple[list[str], list[list[str]]]:
    """(column names, fields of each atom line) of one frame's text."""
    lines = text.split("\n")
    at = next((i for i, ln in enumerate(lines) if ln.startswith("ITEM: ATOMS")), None)
    if at is None:
        return [], []
    return lines[at].split()[2:], [f for ln in lines[at + 1:] if (f := ln.split())]


def _coordinates(texts) -> tuple[str | None, list[str]]:
    """(kind "cartesian"/"fractional", the printed coordinate strings) of frames' texts."""
    kind, values = None, []
    for text in texts:
        cols, rows = _atom_table(text)
        for names, k in ((("x", "y", "z"), "cartesian"), (("xu", "yu", "zu"), "cartesian"),
                         (("xs", "ys", "zs"), "fractional"),
                         (("xsu", "ysu", "zsu"), "fractional")):
            if all(c in cols for c in names):
                idx = [cols.index(c) for c in names]
                kind = k
                values += [f[i] for f in rows for i in idx if i < len(f)]
                break
    return kind, values


def _note_rounding(texts, job: Job, ctx: ReadContext) -> None:
    """The printed rounding of the coordinate columns. LAMMPS's default ``%g``: 6 significant
    digits at the magnitude of the largest coordinate (trailing zeros are dropped, so an exact
    lattice site such as ``1.8`` shows fewer); a ``dump_modify ... format``: what the frames
    given (the first and the last) show (:func:`printed_step`)."""
    kind, values = _coordinates(texts)
    if kind is None or not values:
        return
    if job.dump_format:
        step = printed_step(values)
    else:
        top = max(abs(float(v)) for v in values)
        step = 10.0 ** (np.floor(np.log10(top)) - DEFAULT_DIGITS + 1) if top > 0 else None
    if step is not None:
        ctx.round_to(kind, float(step))


def read_lammps_dump(path, ctx: ReadContext):
    """A LAMMPS text dump, frame by frame through ASE's parser, with the job beside it (module
    doc). Types become elements through the dump's ``element`` column, else the job's masses;
    with neither, the run is refused (ASE would take type 1 as hydrogen). One file of a dump
    written one file a frame is read alone, and said (its folder reads them all)."""
    path = Path(path)
    job = job_of(path, ctx)
    if job.per_frame:
        ctx.warn(f"one file of a dump written one file per frame ({job.per_frame}, "
                 f"{job.source.name}): read alone; its folder, when it holds no other dump, is "
                 f"read as one trajectory of all {len(series(path, job.per_frame))} files")
    yield from _read([path], job, ctx)


def read_lammps_series(path, ctx: ReadContext):
    """The files of a dump written one file a frame (``dump ... relax.*.lammpstrj``: LAMMPS puts
    the timestep where the name has ``*``), read in timestep order as one trajectory; ``path`` is
    one of them (the code table's folder rule, :func:`folder`, picks the first)."""
    path = Path(path)
    job = job_of(path, ctx)
    files = series(path, job.per_frame) if job.per_frame else [path]
    ctx.settings["dump_files"] = f"{len(files)} ({job.per_frame or path.name})"
    yield from _read(files, job, ctx, whole=True)


def series(dump: Path, pattern: str) -> list[Path]:
    """The files beside ``dump`` that the one-file-a-frame ``pattern`` (one ``*``) names, in
    timestep order."""
    head, _, tail = pattern.partition("*")
    rx = re.compile(re.escape(head) + r"(\d+)" + re.escape(tail.replace("*", "")) + r"\Z")
    try:
        names = os.listdir(dump.parent)
    except OSError:
        return [dump]
    got = sorted((int(m.group(1)), n) for n in names
                 if (m := rx.match(strip_compression(n))) and (dump.parent / n).is_file())
    return [dump.parent / n for _, n in got] or [dump]


def _read(files: list, job: Job, ctx: ReadContext, whole: bool = False):
    """Frames of the dump ``files`` (one, or a one-file-a-frame series in timestep order) read
    with their ``job``; ``whole``: the files are all the job wrote, so its stop is judged."""
    import warnings as _w

    from ase.io.lammpsrun import read_lammps_dump_text
    path = files[0]
    head = peek(path, 4000).decode("utf-8", "replace")
    columns = head.split("ITEM: ATOMS", 1)[-1].split("\n", 1)[0].split()
    kwargs = {}
    if job.units in _TO_EV or job.units in ("si", "cgs", "micro", "nano"):
        kwargs["units"] = job.units                  # ASE converts lengths to Å
    if "element" not in columns:
        order = _elements(job.masses, job.elements) \
            if job.units not in (None, "lj") or job.source is None else None
        if order is None:
            raise InputError(path, _no_types(path, job))
        ctx.settings.setdefault("type_map_from", job.source.name if job.masses and
                                not job.data_file else
                                (job.data_file.name if job.data_file else job.source.name))
        kwargs["specorder"] = order
    settings = {"code": "lammps"}
    if job.source is not None:
        settings["lammps_job"] = job.source.name
        settings["units"] = job.units or "lj"
        if job.box_relax:
            settings["box_relax"] = job.box_relax
        settings["ran"] = ("minimize" if not job.sequence or job.sequence[-1] == "minimize"
                           else "minimize, then run" if "minimize" in job.sequence else "run")
    ctx.settings.update({k: v for k, v in settings.items() if v is not None})
    if job.source is not None and (job.units or "lj") not in _ANGSTROM_UNITS + ("electron",):
        ctx.warn(f"LAMMPS units '{job.units or 'lj'}' ({job.source.name}): "
                 + ("reduced units: lengths in sigma are read as Å and types named by their "
                    "masses, so every Å threshold applies in sigma" if (job.units or "lj") == "lj"
                    else "lengths converted to Å by ASE"))
    if whole or not job.per_frame:   # one frame of many files: the job's end is not its end
        _judge_stop(job, ctx)
    offset, last_step, n = 0, None, 0
    for file in files:
        ctx.uses(file)
        cut = ctx.unfinished
        for raw_step, text in _frames_text(file, ctx):
            if n == 0:
                first = text
                if "element" not in columns:
                    _note_species(text, kwargs.get("specorder"), ctx)
            with _w.catch_warnings():
                _w.simplefilter("ignore")
                atoms = read_lammps_dump_text(io.StringIO(text), index=0, **kwargs)
            if n == 0 and job.natoms and len(atoms) < job.natoms:
                ctx.warn(f"the dump holds {len(atoms)} of the job's {job.natoms} atoms "
                         f"({job.source.name}: a dump of a group): its symmetry is that of "
                         f"those atoms alone, not of the structure")
            if last_step is not None and raw_step + offset <= last_step:   # reset_timestep:
                offset = last_step + 1 - raw_step                          # count on
                ctx.warn(f"the dump's timesteps start again at {raw_step} after {last_step} "
                         f"(reset_timestep): later steps are counted on from {raw_step + offset}")
            step = raw_step + offset
            # ASE gives a dump with force columns energy 0.0 (a placeholder): the log's energy
            # at this timestep (none where the log printed a timestep twice with two energies)
            e = job.energies.get(raw_step)
            fr = dataclasses.replace(frame_from_atoms(atoms, step), energy=None if e is None else
                                     e * (len(atoms) if job.per_atom else 1))
            last_step = step
            n += 1
            last = text
            yield fr
        if ctx.unfinished != cut and file is not files[-1]:    # a file cut short mid-series
            ctx.warn(f"{file.name} is cut short: the {len(files) - files.index(file) - 1} files "
                     f"after it are not read")
            break
    if n:
        _note_rounding((first, last), job, ctx)
    if n == 1:
        ctx.settings["single_structure"] = f"{path.name}, one frame"


def _note_species(text: str, order, ctx: ReadContext) -> None:
    """When two LAMMPS types are one element (a model of two sublattices: charges, spins), the
    types are told apart for spglib as the code's species (``Run.species``), in ASE's atom order
    (by id)."""
    if not order or len(set(order)) == len(order):
        return
    cols, rows = _atom_table(text)
    if "type" not in cols:
        return
    it = cols.index("type")
    if "id" in cols:                                   # ASE orders the atoms by id
        rows.sort(key=lambda f: int(f[cols.index("id")]))
    try:
        ctx.species = tuple(f"{order[int(f[it]) - 1]}{int(f[it])}" for f in rows)
    except (ValueError, IndexError):
        return


def _no_types(path: Path, job: Job) -> str:
    if job.source is not None and (job.units or "lj") == "lj":
        return (f"LAMMPS dump without an 'element' column, in reduced units (units "
                f"{job.units or 'lj'}, {job.source.name}): the atom types name no elements (add "
                f"'element' to the dump and dump_modify ... element A B)")
    looked = (f"{job.source.name} gives no mass of every type" +
              (f" and its data file {job.data_file.name} no Masses" if job.data_file else "")
              if job.source is not None else
              "no LAMMPS input script or log.lammps naming it beside it (looked at in.*, *.in, "
              "*.lmp, *.lammps, log.lammps" + (f"; {', '.join(job.elsewhere)} name other dump "
                                                f"files" if job.elsewhere else "") + ")")
    return (f"LAMMPS dump without an 'element' column, and {looked}: the atom types cannot be "
            f"named (add 'element' to the dump and dump_modify ... element A B)")


def _judge_stop(job: Job, ctx: ReadContext) -> None:
    """Mark the run unfinished when the job's last minimisation stopped at its step limit, or the
    log ends inside one; warn when it stopped for a reason that is no convergence test."""
    if not job.active or job.source is None or "log" not in job.source.name.lower():
        return
    if len(job.stops) < len(job.active):
        if not job.finished:
            ctx.unfinished = ("cut short: LAMMPS's log ends inside a minimisation (job killed "
                              "or still running)")
            ctx.warn(f"{job.source.name} ends inside a minimisation (no 'Stopping criterion' "
                     f"after its last minimize): job killed or still running")
        return
    if not job.finished:        # between two commands: a later minimize may follow (or killed)
        ctx.unfinished = ("cut short: LAMMPS's log has no 'Total wall time' (job killed or still "
                          "running)")
        return
    # the last minimisation while this dump was written (one after `undump` wrote nothing to it)
    on = [k for k, a in enumerate(job.active) if a] or [len(job.stops) - 1]
    stop = job.stops[on[-1]]
    crit, fmax = stop["criterion"], stop["fmax"]
    unit = _FORCE_UNIT.get(job.units or "lj", f"({job.units or 'lj'} units)")
    force = f"; force max component {fmax:.3g} {unit} at the end" if fmax is not None else ""
    if crit in _STEP_LIMIT:
        ctx.unfinished = f"stopped at its step limit (LAMMPS: 'Stopping criterion = {crit}')"
    elif crit not in _CONVERGED:
        ctx.warn(f"LAMMPS's last minimisation stopped on 'Stopping criterion = {crit}'{force} "
                 f"({job.source.name}): no tolerance was met, so the final structure may not be "
                 f"relaxed")


# ---------------------------------------------------------------- code table
def run_kind(code_settings: dict) -> str | None:
    """Molecular dynamics when the job's last command of steps is ``run`` (after a minimisation
    too: the final frames are MD)."""
    ran = code_settings.get("ran")
    if ran == "run":
        return "molecular dynamics (LAMMPS 'run')"
    if ran == "minimize, then run":
        return ("a minimisation followed by molecular dynamics (LAMMPS 'minimize', then 'run'): "
                "the final frames are MD")
    return None


def cell_free(code_settings: dict) -> str | None:
    """The job's ``fix box/relax``, in words, else None."""
    return code_settings.get("box_relax")


def ended(source) -> str | None:
    """"log.lammps: Total wall time" when the job whose log names the dump ``source`` has ended
    (LAMMPS prints it last), else None."""
    job = job_of(Path(source), ReadContext(str(source)))
    if job.finished and job.source is not None:
        return f"{job.source.name}: Total wall time"
    return None


def folder(folder, names, format=None, ctx=None):
    """A folder whose dumps are the files of one dump written one file a frame (two or more,
    named by a ``*`` pattern of the job's log or script beside them or in the folder above) is
    one run of them all; else None: a dump is a run of its own (discovery lists each file)."""
    if format not in (None, "lammps-dump", "lammps-dump-series"):
        return None
    dumps = [n for n in names if not _SCRIPT_NAMES.match(strip_compression(n))
             and any(fnmatch.fnmatchcase(strip_compression(n).lower(), g) for g in _DUMP_NAMES)]
    if not dumps:
        return None
    from .registry import FolderPick
    first = Path(folder) / dumps[0]
    ctx = ctx if ctx is not None else ReadContext(str(first))
    job = job_of(first, ctx) if len(dumps) > 1 or any(
        _SCRIPT_NAMES.match(strip_compression(n)) for n in names) else Job()
    aux = sorted(n for n in names if strip_compression(n) in job.aux and n not in dumps)
    if len(dumps) == 1 and aux and job.names_dump:  # the job's other dumps: no run of their own
        return FolderPick([("", first, "lammps-dump")], tuple(
            f"{n}: the job's '{job.aux[strip_compression(n)]}' dump (no cell, or binary), not "
            f"read: the run is its dump {dumps[0]}" for n in aux), also=tuple(aux))
    if not job.per_frame:
        return None
    files = series(first, job.per_frame)
    if len(files) < 2 or not set(dumps) <= {f.name for f in files}:
        return None
    return FolderPick([("", files[0], "lammps-dump-series")],
                      also=tuple(f.name for f in files) + tuple(aux))


def inputs_only(folder: Path, names, ctx=None):
    """(what the folder holds, those names[, ran]) for a folder of a LAMMPS job (an input script
    or log.lammps) and no dump, else None."""
    from .registry import recognised
    if any(recognised(Path(folder) / n, n) for n in names):
        return None
    got = [n for n in names if _SCRIPT_NAMES.match(strip_compression(n))
           and _looks_like_lammps(Path(folder) / n)]
    if not got:
        return None
    logs = [n for n in got if "log" in n.lower()]
    how = "add a dump: dump ID all custom N FILE id type element x y z"
    if logs:
        ctx2 = ReadContext(Path(folder) / logs[0])
        job = _read_commands(Path(folder) / logs[0], "", ctx2)
        if job.finished:
            return (f"a LAMMPS job ({', '.join(got)}) that ran and wrote no dump: no ionic steps "
                    f"to read ({how})", got, True)
    return f"a LAMMPS job ({', '.join(got)}) and no dump", got


def register_all(register, register_code) -> None:
    """The LAMMPS dump row of the format table and the LAMMPS entry of the code table."""
    from .registry import Code
    register("lammps-dump", __name__ + ":read_lammps_dump", globs=("*.lammpstrj", "*.dump"),
             magic=rb"\A(ITEM: UNITS\r?\n[^\n]*\n)?(ITEM: TIME\r?\n[^\n]*\n)?ITEM: TIMESTEP",
             description="LAMMPS text dump (types from an element column, else the masses "
                         "of the job's script, log.lammps or data file)")
    register("lammps-dump-series", __name__ + ":read_lammps_series",
             description="LAMMPS text dump written one file per frame, its files read in "
                         "timestep order (picked by a LAMMPS run folder, never detected)")
    register_code(Code(
        name="lammps", label="LAMMPS", formats=("lammps-dump", "lammps-dump-series"),
        folder=__name__ + ":folder",
        run_files=("*.lammpstrj*", "*.dump*", "in.*", "*.in", "*.lmp", "*.lammps", "log.*",
                   "*.data"),
        settings_files=("in.*", "*.in", "*.lmp", "*.lammps", "log.lammps"),
        run_kind=__name__ + ":run_kind", cell_free=__name__ + ":cell_free",
        inputs_only=__name__ + ":inputs_only", ended=__name__ + ":ended"), replace=True)
