"""VASP: vasprun.xml, OUTCAR, XDATCAR, POSCAR/CONTCAR, and VASP run folders.

All readers stream: memory holds one ionic step at a time.

* vasprun.xml: ``xml.etree.ElementTree.iterparse`` with each ``<calculation>``
  cleared once read (ASE's ``read_vasp_xml`` keeps every step in memory). Energy,
  forces and stress follow ASE's conventions exactly (checked frame by frame in
  the tests): energy = ``e_fr_energy`` - PSTRESS*V + (e_0 - e_fr of the last SC step)
  is ASE's ``energy``; we keep ASE's force-consistent ``free_energy``
  = ``e_fr_energy`` - PSTRESS*V.
* OUTCAR: ASE's header parser for the species, then a focused scanner over ASE's own chunks
  (one ionic step at a time, complete lines only) for cells, positions, forces, stress and the
  free energy; ASE's chunk parser (``ase.io.vasp_parsers.vasp_outcar_parsers``) reads the rest
  of the file from the first step the scanner cannot read exactly as ASE would.
* XDATCAR: a small line scanner (ASE's reader cannot stream and fails on a cut file).

Settings: ISYM, SYMPREC, ISIF, IBRION, NSW as VASP reports them in its output
(the values it actually used); an INCAR next to a standard-named output fills
keys the output lacks, and a disagreement between the two is a warning.
"""
from __future__ import annotations

import re
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np

from ..errors import InputError
from ._io import STREAM_ERRORS, Lines, open_bytes, strip_compression, tail_bytes
from .run import Frame, ReadContext, frame_from_atoms

__all__ = ["read_vasprun", "read_outcar", "read_xdatcar", "read_poscar", "read_incar",
           "pick_from_folder", "SETTING_KEYS"]

SETTING_KEYS = ("ISYM", "SYMPREC", "ISIF", "IBRION", "NSW")
_INT_KEYS = {"ISYM", "ISIF", "IBRION", "NSW"}
_KBAR_TO_EV_A3 = 1e-22 / 1.60217733e-19   # ASE's conversion (ase/io/vasp.py, EVTOJ)
_STD_NAMES = ("vasprun", "OUTCAR", "XDATCAR", "CONTCAR", "POSCAR")


def _symbol_numbers(symbols):
    from ase.data import atomic_numbers
    out = []
    for s in symbols:
        s = s.strip()
        key = s[:2] if s[:2] in atomic_numbers else s[:1]
        if key not in atomic_numbers:
            raise ValueError(f"unknown element {s!r}")
        out.append(atomic_numbers[key])
    return np.array(out, int)


# ---------------------------------------------------------------- settings
def _num(text: str):
    return float(text.strip().replace("d", "e").replace("D", "E"))


def read_incar(path) -> dict:
    """The symmetry-related tags an INCAR sets explicitly (``{}`` if none)."""
    out = {}
    with Lines(path) as fh:
        for line in fh:
            line = line.split("#", 1)[0].split("!", 1)[0]
            for part in line.split(";"):
                if "=" not in part:
                    continue
                key, _, val = part.partition("=")
                key = key.strip().upper()
                if key in SETTING_KEYS and val.split():
                    try:
                        v = _num(val.split()[0])
                        out[key] = int(v) if key in _INT_KEYS else v
                    except ValueError:
                        pass
    return out


def _merge_incar(path, ctx: ReadContext, reported: dict) -> None:
    """Put the output's settings in ctx; fill from a sibling INCAR; warn on disagreement."""
    settings = {"code": "vasp", **reported}
    p = Path(path)
    incar = p.parent / "INCAR"
    if strip_compression(p.name).startswith(_STD_NAMES) and incar.is_file():
        try:
            given = read_incar(incar)
        except OSError:
            given = {}
        filled = False
        for k, v in given.items():
            if k not in settings:
                settings[k] = v
                filled = True
            elif not np.isclose(settings[k], v):
                ctx.warn(f"INCAR sets {k} = {v} but the output reports {k} = {settings[k]} "
                         f"(the output's value is kept)")
        if filled:
            settings["settings_from"] = f"{p.name}+INCAR" if reported else "INCAR"
    settings.setdefault("settings_from", p.name)
    if len(settings) > 2:
        ctx.settings.update(settings)


# ---------------------------------------------------------------- vasprun.xml
def _xml_value(el):
    typ = el.attrib.get("type", "float")
    txt = (el.text or "").strip()
    try:
        if typ == "int":
            return int(txt)
        if typ == "logical":
            return txt.upper().startswith("T")
        if typ == "string":
            return txt
        return float(txt)
    except ValueError:
        return None


def _varray(el):
    return np.array([[float(x) for x in v.text.split()] for v in el.findall("v")], float)


def _vasprun_frame(calc, step, numbers, pstress):
    from ase.units import GPa
    st = calc.find("structure")
    cell = _varray(st.find("crystal/varray[@name='basis']"))
    frac = _varray(st.find("varray[@name='positions']"))
    energy = None
    e = calc.find("energy/i[@name='e_fr_energy']")
    if e is not None:
        energy = float(e.text) - pstress * _KBAR_TO_EV_A3 * abs(np.linalg.det(cell))
    forces = calc.find("varray[@name='forces']")
    stress = calc.find("varray[@name='stress']")
    if stress is not None:
        s = _varray(stress) * (-0.1 * GPa)         # kBar -> eV/Å3, ASE's sign and factor
        stress = s.reshape(9)[[0, 4, 8, 5, 2, 1]]
    return Frame(cell=cell, positions=frac @ cell, numbers=numbers,
                 pbc=np.ones(3, bool), step=step, energy=energy,
                 forces=None if forces is None else _varray(forces), stress=stress)


def read_vasprun(path, ctx: ReadContext):
    """Stream the completed ionic steps of a vasprun.xml (plain or compressed)."""
    numbers, params, step, complete = None, {}, 0, False
    calc = None          # the <calculation> being read
    calc_ready = False   # its structure and energy are closed: a completed step
    depth = 0
    root = None
    fh = open_bytes(path)
    try:
        for event, el in ET.iterparse(fh, events=("start", "end")):
            if event == "start":
                depth += 1
                if depth == 1:
                    root = el
                    if el.tag != "modeling":
                        raise InputError(path, f"not a vasprun.xml: root element <{el.tag}>")
                elif depth == 2 and el.tag == "calculation":
                    calc, calc_ready = el, False
                continue
            depth -= 1
            tag = el.tag
            if depth == 0:
                complete = tag == "modeling"
            elif depth == 1:
                if tag == "parameters":
                    params = {i.attrib.get("name"): _xml_value(i) for i in el.iter("i")}
                    _merge_incar(path, ctx, {k: params[k] for k in SETTING_KEYS
                                             if params.get(k) is not None})
                elif tag == "incar":
                    sysname = el.find("i[@name='SYSTEM']")
                    if sysname is not None and sysname.text:
                        ctx.title = sysname.text.strip()
                elif tag == "atominfo":
                    rows = el.findall("array[@name='atoms']/set/rc")
                    numbers = _symbol_numbers([r.find("c").text for r in rows])
                elif tag == "calculation":
                    yield _vasprun_frame(el, step, numbers, params.get("PSTRESS") or 0.0)
                    step += 1
                    calc = None
                if root is not None:
                    root.clear()      # keep memory flat: drop what has been read
            elif depth == 2 and calc is not None and tag == "energy" and \
                    calc.find("structure") is not None:
                calc_ready = True
            elif depth >= 2 and tag in ("eigenvalues", "dos", "projected"):
                el.clear()        # large and unused
    except (ET.ParseError, *STREAM_ERRORS) as exc:      # cut XML, or a cut .gz/.bz2/.xz
        if calc is not None and calc_ready and numbers is not None:
            # cut after the step's energy (eigenvalues/DOS missing): the step itself is complete
            yield _vasprun_frame(calc, step, numbers, params.get("PSTRESS") or 0.0)
            step += 1
        if root is None:
            raise InputError(path, f"no completed ionic step (the XML ends before its first "
                                   f"element: {exc})") from None
        where = f"after step {step - 1} ({step} completed steps)" if step else \
            "before the first ionic step completed"
        ctx.warn(f"truncated {where}: XML ends abnormally ({type(exc).__name__}: {exc}); "
                 f"job killed or still running")
        return
    finally:
        fh.close()
    if not complete:
        ctx.warn(f"truncated after step {step - 1} ({step} completed steps): no </modeling>")


# ---------------------------------------------------------------- OUTCAR
_OUT_INT = re.compile(r"^\s*(ISYM|ISIF|IBRION|NSW)\s*=\s*(-?\d+)")
_OUT_SYMPREC = re.compile(r"SYMPREC\s*=\s*([-+0-9.EeDd]+)")
_OUT_SYSTEM = re.compile(r"^\s*SYSTEM\s*=\s*(.*\S)")
_OUTCAR_END = "General timing and accounting"


def _outcar_header(path):
    reported, title = {}, None
    with Lines(path) as fh:
        for line in fh:
            if "Iteration" in line:
                break
            m = _OUT_INT.match(line)
            if m and m.group(1) not in reported:
                reported[m.group(1)] = int(m.group(2))
            m = _OUT_SYMPREC.search(line)
            if m and "SYMPREC" not in reported:
                try:
                    reported["SYMPREC"] = _num(m.group(1))
                except ValueError:
                    pass
            m = _OUT_SYSTEM.match(line)
            if m and title is None:
                title = m.group(1)
    return reported, title


class _WatchedLines(Lines):
    """Lines that notes whether VASP's closing timing section went past."""

    ended = False

    def readline(self):
        line = super().readline()
        if _OUTCAR_END in line:
            self.ended = True
        return line


_SCF_END = "FREE ENERGIE OF THE ION-ELECTRON SYSTEM"   # ASE's chunk delimiter (+4 lines)


class _ScanStopped(Exception):
    """The fast scanner met a step it does not read exactly like ASE; ASE takes over there."""


def _scan_outcar_steps(fd, natoms):
    """Yield (cell, positions, forces, stress|None, free_energy) per completed ionic step.

    The same chunks as ASE's ``outcarchunks`` (through the SCF delimiter and 4 more lines; a step
    cut before them is not complete) and the same lines inside them (last occurrence of each
    marker), read with one ``float`` conversion per block instead of ASE's ~15 parsers per line.
    Raises ``_ScanStopped`` on anything unusual so that ASE's parser reads that step.
    """
    from ase.io.vasp_parsers.vasp_outcar_parsers import convert_vasp_outcar_stress
    lines = []
    while True:
        line = fd.readline()
        if not line:
            return
        lines.append(line)
        if _SCF_END not in line:
            continue
        for _ in range(4):
            nxt = fd.readline()
            if not nxt:
                return
            lines.append(nxt)
        cell = pos = stress = None
        try:
            for k, text in enumerate(lines):
                if "direct lattice vectors" in text:
                    cell = np.array([r.split()[:3] for r in lines[k + 1:k + 4]], float)
                elif "POSITION          " in text:
                    block = lines[k + 2:k + 2 + natoms]
                    pos = np.array([r.split() for r in block], float)
                elif "in kB " in text:
                    stress = convert_vasp_outcar_stress([float(a) for a in text.split()[2:]])
            free = float(lines[-3].split()[4])
        except (ValueError, IndexError):
            raise _ScanStopped from None
        if cell is None or pos is None or cell.shape != (3, 3) or pos.shape != (natoms, 6):
            raise _ScanStopped
        yield cell, pos[:, :3], pos[:, 3:6], stress, free
        lines = []


def read_outcar(path, ctx: ReadContext):
    """Stream the completed ionic steps of an OUTCAR.

    ASE's header parser reads the species; a focused scanner (``_scan_outcar_steps``: reading
    ~3x faster than through ASE's chunk parser, equal to it frame by frame on every test file)
    reads the steps; from the first step it cannot read exactly as ASE would, ASE's own chunk parser reads
    the rest (so damaged steps behave as with ASE).
    """
    from ase.data import atomic_numbers
    from ase.io import ParseError
    from ase.io.vasp_parsers.vasp_outcar_parsers import OutcarHeaderParser, build_header

    reported, ctx.title = _outcar_header(path)
    _merge_incar(path, ctx, reported)
    step = 0
    with _WatchedLines(path) as fd:
        try:
            # workdir=None: do not let ASE read constraints from a CONTCAR next to it
            header = OutcarHeaderParser(workdir=None).build(build_header(fd))
        except ParseError:
            if fd.lineno == 0 and not fd.cut:
                raise InputError(path, "empty file") from None
            raise InputError(path, "no completed ionic step (no 'Iteration' line: the file ends "
                                   "inside the OUTCAR header, or it is not an OUTCAR)") from None
        numbers = np.array([atomic_numbers[s] for s in header["symbols"]], int)
        pbc = np.ones(3, bool)
        try:
            for cell, pos, forces, stress, free in _scan_outcar_steps(fd, len(numbers)):
                yield Frame(cell=cell, positions=pos, numbers=numbers, pbc=pbc, step=step,
                            energy=free, forces=forces, stress=stress)
                step += 1
        except _ScanStopped:
            yield from _outcar_with_ase(path, ctx, skip=step)
            return
        _warn_if_unfinished(fd, step, ctx)


def _outcar_with_ase(path, ctx, skip):
    """ASE's chunk parser over the whole file, yielding the steps from ``skip`` on."""
    from ase.io.vasp_parsers.vasp_outcar_parsers import OutcarHeaderParser, outcarchunks
    step = 0
    with _WatchedLines(path) as fd:
        for chunk in outcarchunks(fd, header_parser=OutcarHeaderParser(workdir=None)):
            if step >= skip:
                yield frame_from_atoms(chunk.build(), step)
            step += 1
        _warn_if_unfinished(fd, step, ctx)


def _warn_if_unfinished(fd, step, ctx):
    if not fd.ended:
        where = f"after step {step - 1} ({step} completed steps)" if step else \
            "before the first ionic step completed"
        extra = "; last line cut" if fd.cut else ""
        ctx.warn(f"truncated {where}: no closing timing section{extra}; "
                 f"job killed or still running")


# ---------------------------------------------------------------- XDATCAR
def read_xdatcar(path, ctx: ReadContext):
    """Stream an XDATCAR (VASP 5 layout, header repeated for variable-cell runs)."""
    _merge_incar(path, ctx, {})
    cell = numbers = None
    total = 0
    n_done, last_step = 0, None
    header_only = False          # a header was read and its configuration has not started
    with Lines(path) as fh:
        def cut(where):
            w = (f"after step {last_step} ({n_done} completed steps)" if n_done
                 else "before the first configuration completed")
            ctx.warn(f"truncated {w}: file ends inside {where}; job killed or still running")

        while True:
            line = fh.readline()
            if not line:
                if fh.cut or header_only:
                    cut("a header" if header_only else "a line")
                return
            if not line.strip():
                continue
            if "configuration=" not in line:
                head = [line] + [fh.readline() for _ in range(6)]
                if not all(head):
                    cut("a header")
                    return
                ctx.title = ctx.title or head[0].strip()
                try:
                    scale = _num(head[1])
                    cell = np.array([[_num(x) for x in h.split()[:3]] for h in head[2:5]])
                    counts = [int(x) for x in head[6].split()]
                    symbols = head[5].split()
                    if len(symbols) != len(counts):
                        raise ValueError("element and count lines disagree")
                    if not all(0 <= c for c in counts) or not 0 < sum(counts) <= 10_000_000:
                        raise ValueError(f"atom counts {counts[:8]} out of range")
                except (ValueError, IndexError) as exc:
                    raise InputError(path, f"not a VASP 5 XDATCAR header near line "
                                           f"{fh.lineno}: {exc}") from None
                cell = cell * (scale if scale > 0 else
                               (-scale / abs(np.linalg.det(cell))) ** (1 / 3))
                numbers = np.repeat(_symbol_numbers(symbols), counts)
                total = len(numbers)
                header_only = True
                continue
            header_only = False
            if cell is None:
                raise InputError(path, "not a VASP XDATCAR: configuration before any header")
            try:
                step = int(line.split("=")[1].split()[0]) - 1
            except (IndexError, ValueError):
                step = n_done
            rows = []
            for _ in range(total):
                ln = fh.readline()
                if not ln:
                    cut(f"configuration {step + 1}")
                    return
                rows.append(ln.split()[:3])
            try:
                coords = np.array(rows, float)
            except ValueError as exc:
                raise InputError(path, f"bad coordinates in configuration {step + 1}: {exc}") \
                    from None
            cart = coords @ cell if line.lstrip().lower().startswith("direct") else coords
            yield Frame(cell=cell.copy(), positions=cart, numbers=numbers,
                        pbc=np.ones(3, bool), step=step)
            n_done, last_step = n_done + 1, step


# ---------------------------------------------------------------- POSCAR
def read_poscar(path, ctx: ReadContext):
    """A POSCAR/CONTCAR: one structure, not a trajectory (said in the warnings)."""
    import ase.io
    _merge_incar(path, ctx, {})
    with Lines(path) as fh:
        text = "".join(fh)
    if not text.strip():
        raise InputError(path, "empty file")
    for line in text.splitlines()[5:7]:           # the atom counts (VASP 4 or 5 layout)
        if line.split() and all(w.isdigit() for w in line.split()):
            if not 0 < sum(int(w) for w in line.split()) <= 10_000_000:
                raise InputError(path, f"atom counts {line.strip()[:40]!r} out of range")
            break
    atoms = ase.io.read(path, format="vasp")   # a path: ASE may need POTCAR/OUTCAR beside it
    ctx.title = text.splitlines()[0].strip() or None
    ctx.warn("a single structure (POSCAR/CONTCAR), not a trajectory: "
             "no drift can be measured from it alone")
    yield frame_from_atoms(atoms, 0)


# ---------------------------------------------------------------- folders
def _find(folder: Path, stem: str):
    for cand in (stem, stem + ".gz", stem + ".bz2", stem + ".xz"):
        p = folder / cand
        if p.is_file() and p.stat().st_size > 0:
            return p
    return None


def _complete(path: Path, marker: bytes) -> bool:
    try:
        return marker in tail_bytes(path, 16384)
    except OSError:
        return False


_VASP_FORMATS = {"vasp-xml": "vasprun.xml", "vasp-out": "OUTCAR", "vasp-xdatcar": "XDATCAR"}


def pick_from_folder(folder: Path, format=None):
    """Choose the richest complete VASP output in ``folder``; None if it is not a VASP folder.

    Preference: a complete vasprun.xml, then a complete OUTCAR; when neither is
    complete (killed job), OUTCAR first (VASP flushes it every ionic step, while
    vasprun.xml is written through a buffer and lags), then vasprun.xml, then
    XDATCAR; CONTCAR or POSCAR alone give one structure.
    """
    found = {f: _find(folder, stem) for f, stem in _VASP_FORMATS.items()}
    single = _find(folder, "CONTCAR") or _find(folder, "POSCAR")
    if format is not None:
        if format in found and found[format] is not None:
            return found[format], format, ()
        if format == "vasp-poscar" and single is not None:
            return single, format, ()
        return None
    xml, out, xdat = found["vasp-xml"], found["vasp-out"], found["vasp-xdatcar"]
    if not (xml or out or xdat or single):
        return None
    if xml is not None and _complete(xml, b"</modeling>"):
        return xml, "vasp-xml", ()
    if out is not None and _complete(out, _OUTCAR_END.encode()):
        note = (f"{folder}: {xml.name} is incomplete; read {out.name} instead",) if xml else ()
        return out, "vasp-out", note
    for path, fmt in ((out, "vasp-out"), (xml, "vasp-xml"), (xdat, "vasp-xdatcar")):
        if path is not None:
            note = () if fmt == "vasp-xdatcar" and not (xml or out) else \
                (f"{folder}: no complete VASP output; reading the incomplete {path.name}",)
            return path, fmt, note
    return single, "vasp-poscar", (f"{folder}: only {single.name}, a single structure",)
