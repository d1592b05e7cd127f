"""VASP: vasprun.xml, OUTCAR, XDATCAR, POSCAR/CONTCAR, and VASP run folders.

All readers stream: memory holds one ionic step at a time.

* vasprun.xml: each ``<calculation>`` parsed whole by ``xml.etree.ElementTree`` and dropped once
  read, the rest through its event parser (ASE's ``read_vasp_xml`` keeps every step in memory).
  Energy, forces and stress follow ASE's conventions exactly (checked frame by frame in
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

import contextlib
import dataclasses
import itertools
import lzma
import os
import re
import shutil
import xml.etree.ElementTree as ET
import zlib
from pathlib import Path

import numpy as np

from ..errors import InputError
from ._io import (STREAM_ERRORS, Lines, file_size, max_decompressed, open_bytes,
                  strip_compression, tail_bytes)
from .run import (Frame, ReadContext, decimals, frame_from_atoms, note_fix_symmetry,
                  stage_folders)

__all__ = ["read_vasprun", "read_outcar", "read_xdatcar", "read_poscar", "read_incar",
           "pick_from_folder", "SETTING_KEYS"]

SETTING_KEYS = ("ISYM", "SYMPREC", "ISIF", "IBRION", "NSW", "IMAGES", "EDIFFG", "ICHARG")
_INT_KEYS = {"ISYM", "ISIF", "IBRION", "NSW", "IMAGES", "ICHARG"}
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


def _type_species(elements, types, ctx: ReadContext) -> None:
    """One species label per atom (``Fe1``, ``Fe2``: the element and its VASP atom type among
    those of that element) in ``ctx.species`` when an element is given as several atom types
    (two blocks of Fe: an antiferromagnetic or DFT+U set-up, each type with its own POTCAR entry),
    so that spglib is given one type per block, as VASP computes them; said in a warning."""
    per: dict = {}
    for el, t in zip(elements, types):
        if t not in per.setdefault(el, []):
            per[el].append(t)
    split = {el: ts for el, ts in per.items() if len(ts) > 1}
    if not split:
        return
    ctx.species = tuple(f"{el}{per[el].index(t) + 1}" if el in split else el
                        for el, t in zip(elements, types))
    ctx.warn("the file gives " + ", ".join(f"{el} as {len(ts)} atom types" for el, ts in
                                           split.items())
             + ": spglib is given one type per atom type, as VASP computes them")


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


def _stage_of(name: str) -> str:
    """'relax1' for 'vasprun.xml.relax1.gz', '' for 'OUTCAR'; '_11_19_39on29_01_24' for a saved
    segment ``OUTCAR_11_19_39on29_01_24`` (:data:`_SEGMENT`)."""
    name = strip_compression(name)
    m = _STAGED.match(name) or _SEGMENT.match(name)
    return "" if not m else m.group(2) or "" if m.re is _STAGED else name[len(m.group(1)):]


def _sibling(path: Path, kind: str, ctx: ReadContext) -> Path | None:
    """The ``kind`` file (INCAR, OUTCAR) of the same stage as ``path``, plain or compressed: for
    ``vasprun.xml.relax1.gz`` first ``INCAR.relax1`` (any compression), then ``INCAR``; for a
    saved segment ``vasprun.xml_<time>`` first ``INCAR_<time>``."""
    stage = _stage_of(path.name)
    ctx.lists(path.parent)
    stems = [f"{kind}{stage}" if stage.startswith("_") else f"{kind}.{stage}", kind] if stage \
        else [kind]
    for stem in stems:
        for ext in ("", ".gz", ".bz2", ".xz"):
            cand = path.parent / (stem + ext)
            if cand.is_file() and cand != path:
                ctx.uses(cand)
                return cand
    return None


def _merge_incar(path, ctx: ReadContext, reported: dict) -> None:
    """Put the output's settings in ctx; fill from the INCAR of the same stage (plain or
    compressed); warn on disagreement. The number of symmetry operations VASP found comes from
    the OUTCAR of the same stage when the output read is not that OUTCAR."""
    settings = {"code": "vasp", **reported}
    p = Path(path)
    if strip_compression(p.name).startswith(_STD_NAMES) or _STAGED.match(strip_compression(p.name)):
        incar = _sibling(p, "INCAR", ctx)
        member = _band_member(p.parent) if incar is None else None
        if member is not None and not 1 <= member[1] <= member[0]["images"]:
            member = None                  # an end point: not run by the band
        if member is not None:             # a band's image: VASP read the parent's INCAR
            incar = member[0]["incar"]
            ctx.uses(incar)
            settings["neb_image"] = f"folder {p.parent.name} of IMAGES = {member[0]['images']}"
        try:                               # (a band's INCAR is read already)
            given = member[0]["tags"] if member is not None else \
                read_incar(incar) if incar is not None else {}
        except (OSError, *STREAM_ERRORS):
            given = {}
        filled = False
        for k, v in given.items():
            if k not in settings:
                settings[k] = v
                filled = True
            elif not np.isclose(settings[k], v) and not _still_ibrion(k, settings, given):
                ctx.warn(f"{incar.name} sets {k} = {v} but the output reports {k} = {settings[k]} "
                         f"(the output's value is kept)")
        if filled:
            name = incar.name if member is None else f"../{incar.name}"
            settings["settings_from"] = f"{p.name}+{name}" if reported else name
        if "nsym" not in settings and not strip_compression(p.name).startswith("OUTCAR"):
            outcar = _sibling(p, "OUTCAR", ctx)
            if outcar is not None:
                try:
                    n = _outcar_header(outcar)[0].get("nsym")
                except (OSError, *STREAM_ERRORS):
                    n = None
                if n is not None:
                    settings["nsym"] = n
    settings.setdefault("settings_from", p.name)
    if len(settings) > 2:
        ctx.settings.update(settings)


def _still_ibrion(key: str, reported: dict, given: dict) -> bool:
    """True for an INCAR's IBRION that VASP replaced by -1 because NSW <= 0 (no ionic steps): not
    a disagreement worth a warning (the genuine atomate OUTCAR.relax1 of tests/data/public/
    atomate_static_stages prints IBRION = -1 under an INCAR with IBRION = 1, NSW = 0)."""
    nsw = reported.get("NSW", given.get("NSW"))
    return key == "IBRION" and reported[key] == -1 and nsw is not None and int(nsw) <= 0


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
    return np.array([(v.text or "").split() for v in el.findall("v")], float)   # numpy parses


def _stars(el, what: str, step: int):
    """``_varray(el)``, saying which array of which step holds a field of '*' (Fortran's overflow
    of a number too wide for its format)."""
    try:
        return _varray(el)
    except ValueError:
        if any("*" in (v.text or "") for v in el.findall("v")):
            raise ValueError(f"step {step}'s {what} hold a field of '*' (a number too wide for its "
                             f"format)") from None
        raise


def _vasprun_frame(calc, step, numbers, pstress, ctx=None):
    from ase.units import GPa
    st = calc.find("structure")
    cell = _stars(st.find("crystal/varray[@name='basis']"), "cell vectors", step)
    pos_el = st.find("varray[@name='positions']")
    frac = _stars(pos_el, "positions", step)
    if ctx is not None and ctx.rounding is None:
        v = pos_el.find("v")
        d = decimals(v.text.split()[0]) if v is not None and v.text and v.text.split() else None
        if d is not None:
            ctx.round_to("fractional", 10.0 ** -d)
    energy = None
    e = calc.find("energy/i[@name='e_fr_energy']")
    if e is not None:
        energy = float(e.text) - pstress * _KBAR_TO_EV_A3 * abs(np.linalg.det(cell))
    forces = calc.find("varray[@name='forces']")
    if forces is not None:
        try:
            forces = _varray(forces)
        except ValueError:          # a force too wide for its format: not a number, said
            forces = np.array([[np.nan if "*" in x else float(x) for x in (v.text or "").split()]
                               for v in forces.findall("v")])
            if ctx is not None:
                ctx.warn(f"step {step}: a force printed as a field of '*' (too wide for its "
                         f"format) is read as not a number")
    stress = calc.find("varray[@name='stress']")
    if stress is not None:
        s = _varray(stress) * (-0.1 * GPa)         # kBar -> eV/Å3, ASE's sign and factor
        stress = s.reshape(9)[[0, 4, 8, 5, 2, 1]]
    return Frame(cell=cell, positions=frac @ cell, numbers=numbers,
                 pbc=np.ones(3, bool), step=step, energy=energy, forces=forces, stress=stress)


_CALC_OPEN, _CALC_CLOSE = b"<calculation>", b"</calculation>"
_XML_DECL = re.compile(rb"\s*<\?xml[^>]*\?>")
_BLOCK_MAX = 2 << 20
"""Bytes: a ``<calculation>`` longer than this (eigenvalues, DOS, projections) is read element by
element, its large parts dropped as they end; a step of 10,000 atoms without them fits (its tree
held at once costs about ten times its bytes)."""


def _vasprun_pieces(fh, at_top, size=1 << 16):
    """Split a vasprun.xml byte stream, in order, into ``(bytes, True)``: a whole
    ``<calculation>`` element starting where ``at_top()`` says the parser stands between the root's
    children, and ``(bytes, False)``: anything else, for the event parser."""
    buf, pos, more = b"", 0, True
    while True:
        i = buf.find(_CALC_OPEN, pos)
        if i < 0:
            cut = len(buf) - (len(_CALC_OPEN) - 1 if more else 0)   # keep a split tag's start
            if cut > pos:
                yield buf[pos:cut], False
                pos = cut
            if not more:
                return
            data = fh.read(size)
            buf, pos, more = buf[pos:] + data, 0, bool(data)
            continue
        if i > pos:
            yield buf[pos:i], False
            pos = i
        if not at_top():
            yield buf[pos:pos + len(_CALC_OPEN)], False
            pos += len(_CALC_OPEN)
            continue
        j = buf.find(_CALC_CLOSE, pos)
        while j < 0 and more and len(buf) - pos <= _BLOCK_MAX:
            seen = len(buf) - pos
            data = fh.read(size)
            buf, pos, more = buf[pos:] + data, 0, bool(data)
            j = buf.find(_CALC_CLOSE, max(0, seen - len(_CALC_CLOSE)))
        if j < 0:                   # cut inside it, or too long to hold: the event parser reads it
            yield buf[pos:], False
            pos = len(buf)
            continue
        j += len(_CALC_CLOSE)
        yield buf[pos:j], True
        pos = j


def _stand_in(piece: bytes) -> bytes:
    """What the event parser reads for a ``<calculation>`` read whole: an empty element (which
    ends at the root's level, so the root is cleared and no text piles up) and whitespace, with
    the piece's line count and last line's length (so an error after it names the file's line
    and column)."""
    n = piece.count(b"\n")
    return b"<_/>" + (b"\n" * n + b" " * (len(piece) - 1 - piece.rfind(b"\n")) if n else
                      b" " * (len(piece) - 4))


def read_vasprun(path, ctx: ReadContext):
    """Stream the completed ionic steps of a vasprun.xml (plain or compressed).

    Each whole ``<calculation>`` between the root's children is parsed in one go
    (``ET.fromstring``, C speed) and the event parser reads :func:`_stand_in` for it; everything
    else (the header, a cut or very long step, anything malformed) goes through the event parser,
    which keeps memory flat and reports errors where they are in the file."""
    numbers, params, step, complete = None, {}, 0, False
    calc = None          # the <calculation> being read event by event
    calc_ready = False   # its structure and energy are closed: a completed step
    depth = 0
    root = None
    decl = b""           # the file's XML declaration (its encoding), put before each block
    parser = ET.XMLPullParser(events=("start", "end"))
    unconverged: list[int] = []     # steps whose SCF ran NELM electronic steps
    learned: dict = {}              # a machine-learned force field's step being read (see below)
    n_learned = 0
    structureless: list = []        # <energy> (or None) of each <calculation> without a <structure>
    final = None                    # <structure name="finalpos">

    def calculation(el):
        nonlocal step
        if el.find("structure") is not None:
            step += 1
            if _ran_nelm(len(el.findall("scstep")), params.get("NELM"), params.get("LEPSILON")):
                unconverged.append(step - 1)
            return _vasprun_frame(el, step - 1, numbers, params.get("PSTRESS") or 0.0, ctx)
        structureless.append(el.find("energy"))
        return None

    def learned_step(el):
        """VASP's on-the-fly machine-learned force field (ML_LMLFF) writes the steps it computes
        itself between the root's children, not in a <calculation>: a <structure> without a name,
        then its forces (and stress) and <energy>. Read in file order, as pymatgen's md_data."""
        nonlocal step, n_learned
        tag, name = el.tag, el.get("name")
        if tag == "structure" and not name:
            learned.clear()
            learned["structure"] = el
        elif learned and tag == "varray" and name in ("forces", "stress"):
            learned[name] = el
        elif learned and tag == "energy":
            calc_el = ET.Element("calculation")
            calc_el.extend([learned[k] for k in ("structure", "forces", "stress") if k in learned]
                           + [el])
            learned.clear()
            step, n_learned = step + 1, n_learned + 1
            return _vasprun_frame(calc_el, step - 1, numbers, params.get("PSTRESS") or 0.0, ctx)
        return None

    def events():
        nonlocal numbers, params, complete, calc, calc_ready, depth, root, final
        for event, el in parser.read_events():
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
                    params = _vasprun_params(el)
                    _merge_incar(path, ctx, {k: params[k] for k in SETTING_KEYS
                                             if params.get(k) is not None})
                elif tag == "incar":
                    sysname = el.find("i[@name='SYSTEM']")
                    if sysname is not None and sysname.text:
                        ctx.title = sysname.text.strip()
                elif tag == "atominfo":
                    rows = el.findall("array[@name='atoms']/set/rc")
                    numbers = _symbol_numbers([r.find("c").text for r in rows])
                    cols = [r.findall("c") for r in rows]
                    if ctx.species is None and all(len(c) > 1 for c in cols):
                        _type_species([c[0].text.strip() for c in cols],
                                      [c[1].text.strip() for c in cols], ctx)
                elif tag == "calculation":
                    frame = calculation(el)
                    if frame is not None:
                        yield frame
                    calc = None
                elif tag == "structure" and el.get("name") in ("initialpos", "finalpos"):
                    _selective(el, ctx)
                    final = el if el.get("name") == "finalpos" else final
                elif numbers is not None:
                    frame = learned_step(el)
                    if frame is not None:
                        yield frame
                if root is not None:
                    root.clear()      # keep memory flat: drop what has been read
            elif depth == 2 and calc is not None and tag == "energy" and \
                    calc.find("structure") is not None:
                calc_ready = True
            elif depth >= 2 and tag in ("eigenvalues", "dos", "projected"):
                el.clear()        # large and unused

    fh, closing = open_bytes(path), False
    try:
        for piece, whole in _vasprun_pieces(fh, lambda: depth == 1):
            if whole:
                try:
                    el = ET.fromstring(decl + piece)
                except ET.ParseError:
                    el = None           # the event parser reads it and says where it is wrong
                if el is not None:
                    frame = calculation(el)
                    if frame is not None:
                        yield frame
                    parser.feed(_stand_in(piece))
                    yield from events()
                    continue
            elif root is None and not decl:
                m = _XML_DECL.match(piece)
                decl = m.group(0).lstrip() if m else b""
            parser.feed(piece)
            yield from events()
        closing = True
        parser.close()
        yield from events()
    except (ET.ParseError, *STREAM_ERRORS) as exc:      # cut XML, or a cut .gz/.bz2/.xz
        if calc is not None and calc_ready and numbers is not None:
            # cut after the step's energy (eigenvalues/DOS missing): the step itself is complete
            yield calculation(calc)
        if root is None:
            raise InputError(path, f"no completed ionic step (the XML ends before its first "
                                   f"element: {exc})") from None
        where = f"after step {step - 1} ({step} completed steps)" if step else \
            "before the first ionic step completed"
        # expat stops on a cut file only when told the input ended (close); while fed, the text
        # itself is wrong (overlapping writes, a disk error), or the file ends in NUL bytes: cut
        # mid-write (a node or its file system stopped)
        wrong = isinstance(exc, ET.ParseError) and not closing
        nul = wrong and not tail_bytes(path, 64).strip(b"\0")
        if wrong and not nul:
            ctx.warn(f"malformed XML {where} ({exc}): the file is damaged there, not cut off; "
                     f"nothing after it is read")
        else:
            ctx.truncated(f"truncated {where}: XML ends abnormally ({type(exc).__name__}: {exc})"
                     + ("; the file ends in NUL bytes (a write its file system did not finish)"
                        if nul else "") + "; job killed or still running")
        return
    finally:
        fh.close()
        if unconverged:
            ctx.warn(_unconverged_note(unconverged, params["NELM"]))
        if n_learned:
            ctx.warn(f"{n_learned} of the {step} steps read are the machine-learned force field's "
                     f"(ML_LMLFF: VASP writes them between its first-principles steps, outside a "
                     f"<calculation>); read in file order, with the force field's energies and "
                     f"forces")
    if structureless and step:
        ctx.warn(f"{len(structureless)} <calculation>(s) without a <structure> (GW or response-"
                 f"function steps?) are no ionic steps: passed over")
    elif structureless and final is not None and numbers is not None:
        calc_el = ET.Element("calculation")     # one calculation on the file's final structure
        calc_el.extend([final] + [e for e in structureless[-1:] if e is not None])
        ctx.warn("its one <calculation> holds no <structure> (an optics, GW or response-function "
                 "run): the structure is the file's final one, <structure name=\"finalpos\">"
                 + ("" if structureless[-1] is not None else ", with no energy"))
        step = 1
        yield _vasprun_frame(calc_el, 0, numbers, params.get("PSTRESS") or 0.0, ctx)
    if not complete:
        ctx.truncated(f"truncated after step {step - 1} ({step} completed steps): no </modeling>")
    else:
        _at_end(Path(path), step, ctx)


def _selective(structure, ctx: ReadContext) -> None:
    """VASP's selective dynamics (the POSCAR's T/F flags, in vasprun.xml's ``selective`` array):
    the atoms it holds, said (:meth:`ReadContext.hold`). A flag holds a lattice-vector direction,
    so only the forces of atoms held in all three are zeroed (as ASE's FixAtoms)."""
    sel = structure.find("varray[@name='selective']")
    if sel is None:
        return
    try:
        free = np.array([[x.upper().startswith("T") for x in (v.text or "").split()]
                         for v in sel.findall("v")], bool)
    except ValueError:
        return
    if free.ndim == 2 and free.shape[1] == 3:
        whole = (~free).all(axis=1)
        ctx.hold(~free, "VASP's selective dynamics (the POSCAR's T/F flags)",
                 zero=np.repeat(whole[:, None], 3, axis=1))


def _vasprun_params(el) -> dict:
    """<parameters> as ``{name: value}``, as pymatgen's Vasprun reads them: a later value replaces
    an earlier one, except in the "response functions" separator, whose own NELM, ... (the
    response code's, e.g. NELM = 1) do not replace the run's."""
    out: dict = {}

    def walk(node, keep):
        for c in node:
            if c.tag == "i":
                name = c.attrib.get("name")
                if not (keep and name in out):
                    out[name] = _xml_value(c)
            else:
                walk(c, keep or c.attrib.get("name") == "response functions")
    walk(el, False)
    return out


def _ran_nelm(electronic: int | None, nelm: int | None, lepsilon) -> bool:
    """An ionic step whose SCF ran NELM electronic steps: not converged, as pymatgen's
    ``converged_electronic`` counts it (linear-response runs, LEPSILON, excepted)."""
    return bool(nelm) and not lepsilon and electronic is not None and electronic >= nelm


def _unconverged_note(steps: list[int], nelm: int) -> str:
    """The warning for the ionic steps :func:`_ran_nelm` finds."""
    more = f" and {len(steps) - 8} more" if len(steps) > 8 else ""
    shown = ", ".join(map(str, steps[:8])) + more
    vasp = ", ".join(str(k + 1) for k in steps[:8]) + more     # OUTCAR counts from 1
    return (f"the electronic SCF stopped at NELM = {nelm} steps without converging in "
            f"{len(steps)} ionic step(s) ({shown}; VASP's own count {vasp}): their energies and "
            f"forces are not converged")


# ---------------------------------------------------------------- OUTCAR
_OUT_INT = re.compile(r"^\s*(ISYM|ISIF|IBRION|NSW|ICHARG)\s*=\s*(-?\d+)")
_OUT_SYMPREC = re.compile(r"SYMPREC\s*=\s*([-+0-9.EeDd]+)")
_OUT_EDIFFG = re.compile(r"^\s*EDIFFG\s*=\s*([-+0-9.EeDd]+)")
_OUT_SYSTEM = re.compile(r"^\s*SYSTEM\s*=\s*(.*\S)")
_OUT_NELM = re.compile(r"^\s*NELM\s*=\s*(\d+)")
_OUT_LEPSILON = re.compile(r"^\s*LEPSILON\s*=\s*T")
_OUT_ITERATION = re.compile(r"Iteration\s+\d+\(\s*(\d+)\)")     # ionic(electronic) step
# VTST's NEB says so in the OUTCAR header (the genuine aiida-vasp NEB, tests/data/public/vasp544_neb)
_OUT_VTST_NEB = "CHAIN: Running the NEB"
# VASP 5.4/6: the last is INISYM's (the operations used); VASP 5.2 ends with MAGSYM's
_OUT_LAYOUT = re.compile(r"^\s*(NWRITE|ions per type)\s*=\s*((?:-?\d+\s*)+)")
_OUT_NSYM = re.compile(r"(?:GETGRP|DYNSYM|MAGSYM|INISYM) returns: Found\s+(\d+) space group operations")
_OUTCAR_END = "General timing and accounting"


def _outcar_header(path):
    """(settings VASP reports, SYSTEM title, NELM or None, LEPSILON, layout) from the lines before
    the first electronic iteration; layout: ``{"nwrite": NWRITE, "types": ions per type}`` as
    far as the file says them."""
    reported, title, nelm, lepsilon, layout = {}, None, None, False, {}
    with Lines(path) as fh:
        for line in fh:
            if "Iteration" in line:
                break
            m = _OUT_LAYOUT.match(line)
            if m and m.group(1) not in layout:
                layout[m.group(1)] = [int(x) for x in m.group(2).split()]
            m = _OUT_NELM.match(line)
            if m and nelm is None:
                nelm = int(m.group(1))
            lepsilon = lepsilon or bool(_OUT_LEPSILON.match(line))
            m = _OUT_INT.match(line)
            if m and m.group(1) not in reported:
                reported[m.group(1)] = int(m.group(2))
            for key, pattern in (("SYMPREC", _OUT_SYMPREC), ("EDIFFG", _OUT_EDIFFG)):
                m = pattern.search(line)
                if m and key not in reported:
                    try:
                        reported[key] = _num(m.group(1))
                    except ValueError:
                        pass
            m = _OUT_SYSTEM.match(line)
            if m and title is None:
                title = m.group(1)
            m = _OUT_NSYM.search(line)
            if m:
                reported["nsym"] = int(m.group(1))
            if _OUT_VTST_NEB in line:
                reported["neb_image"] = "VTST's NEB, as its OUTCAR says"
    return reported, title, nelm, lepsilon, {"nwrite": layout.get("NWRITE", [None])[0],
                                             "types": layout.get("ions per type")}


class _WatchedLines(Lines):
    """Lines that notes whether VASP's closing timing section, its soft stop and its converged
    relaxation went past (also when a marker search passes over them: the scanner's ``skip_to``
    keys include them)."""

    ended = soft_stop = converged = False

    def _note(self, line):
        if _OUTCAR_END in line:
            self.ended = True
        elif _SOFT_STOP in line:
            self.soft_stop = True
        elif _CONVERGED in line:
            self.converged = True

    def readline(self):
        line = super().readline()
        self._note(line)
        return line

    def read_lines(self, n):
        out = super().read_lines(n)
        for line in out:
            self._note(line)
        return out

    def skip_to(self, keys):
        line = super().skip_to(keys)
        self._note(line)
        return line


_SCF_END = "FREE ENERGIE OF THE ION-ELECTRON SYSTEM"   # ASE's chunk delimiter (+4 lines)
_ML = "(ML)"     # VASP 6's on-the-fly force field: 'POSITION ... TOTAL-FORCE (eV/Angst) (ML)'
_ML_END = "ML " + _SCF_END                     # ... and its energy block, 'ML FREE ENERGIE ...'
_CELL, _POSITION, _STRESS = "direct lattice vectors", "POSITION          ", "in kB "
_SOFT_STOP = "soft stop encountered"     # VASP read a STOPCAR with LSTOP = .TRUE.
_CONVERGED = "reached required accuracy"  # after a relaxation's last ionic step
_MARKS = (_OUTCAR_END, _SOFT_STOP, _CONVERGED)   # noted by _WatchedLines wherever they are met
_STEP_KEYS = (_SCF_END, _CELL, _POSITION, _STRESS, "Iteration", *_MARKS)
_TO_ENERGY_KEYS = (_SCF_END, "Iteration", *_MARKS)   # energy-first: only its SCF before it
_AFTER_ENERGY_KEYS = (_CELL, _POSITION, _STRESS, "Iteration", *_MARKS)


class _ScanStopped(Exception):
    """The fast scanner met a step it does not read exactly like ASE; ASE takes over there."""


def _cell_row(line: str) -> list[float]:
    """A lattice vector of the ``direct lattice vectors`` block (Å). VASP prints the fields in a
    fixed width (F13.9), so a component of 100 Å or more touches the one before it
    (``0.000000000113.517567000``: a slab's vacuum axis); such a line is split by the decimals."""
    fields = line.split()[:3]
    try:
        return [float(x) for x in fields]
    except ValueError:
        d = decimals(fields[0]) if fields else None
        got = re.findall(rf"-?\d*\.\d{{{d}}}", line)[:3] if d else []
        if len(got) < 3:
            raise
        return [float(x) for x in got]


def _scan_outcar_steps(fd: "_WatchedLines", natoms, state: dict | None = None):
    """Yield (cell, positions, forces, stress|None, free_energy, decimals, electronic steps|None,
    force field) per completed ionic step (the electronic steps: the last ``Iteration  i(  n)``
    line's n).

    ``fd`` is a ``Lines`` after the header: the scanner jumps between the lines it reads
    (``Lines.skip_to``), so the ~10^2-10^4 lines of a step's electronic iterations are never
    handled one by one. Two layouts of an ionic step are known:

    * ``"ase"`` (VASP 5.2.11 and later): cell, positions and forces are printed before the SCF
      delimiter ``FREE ENERGIE OF THE ION-ELECTRON SYSTEM``. A step is ASE's chunk (through the
      delimiter and 4 more lines; a step cut before them is not complete), read as ASE does: the
      last cell, POSITION block and stress line of the chunk, the free energy two lines after the
      delimiter, one ``float`` conversion per block instead of ASE's ~15 parsers per line.
    * ``"energy-first"`` (VASP 4.6 and 5.2.2 print the energy block first, then the stress, the
      ``VOLUME and BASIS-vectors`` block and ``POSITION ... TOTAL-FORCE``): a step runs from the
      delimiter through the last row of its POSITION block and is complete only then. ASE's chunk
      parser cannot read it ("Did not find required property positions").

    VASP 6's on-the-fly force field prints a ``POSITION ... (ML)`` block and an ``ML FREE
    ENERGIE`` delimiter for every step (the last tuple item True), and a first-principles block
    after it where it ran an SCF; with ``state["nwrite"] == 0`` a step printed with no structure
    yields None. The layout is decided on the first step (no POSITION block before its delimiter:
    energy-first) and put in ``state["layout"]``. Raises ``_ScanStopped`` on anything unusual (a
    block cut by
    the delimiter, a marker among the 4 lines after it, text where numbers belong; in the "ase"
    layout ASE's parser then reads that step).
    """
    state = {} if state is None else state
    from ase.io.vasp_parsers.vasp_outcar_parsers import convert_vasp_outcar_stress

    def rows(n):
        out = fd.read_lines(n)
        if len(out) < n:
            return None                      # the file ends inside the block
        if any(_SCF_END in r for r in out):
            raise _ScanStopped
        return out

    def take(line, got):
        """Read the block a marker line opens into ``got``; False if the file ends inside it."""
        if _CELL in line:
            block = rows(3)
            if block is None:
                return False
            got["cell"] = np.array([_cell_row(r) for r in block], float)
        elif _POSITION in line:
            block = rows(natoms + 1)
            if block is None:
                return False
            got["pos"] = np.array([r.split()[:6] for r in block[1:]], float)
            got["first"], got["ml"] = block[1], _ML in line
        elif _STRESS in line:
            got["stress"] = convert_vasp_outcar_stress([float(a) for a in line.split()[2:]])
        return True

    got: dict = {}
    scf = None           # the last electronic iteration line of this step
    while True:
        try:
            line = fd.skip_to(_TO_ENERGY_KEYS if state.get("layout") == "energy-first"
                              else _STEP_KEYS)
            if not line:
                return
            if "Iteration" in line:
                scf = line
                continue
            if _SCF_END not in line:
                if not take(line, got):
                    return
                continue
            tail = rows(4)
            if tail is None:
                return
            if any(k in t for t in tail for k in _STEP_KEYS[1:4]):
                raise _ScanStopped
            layout = state.setdefault("layout", "ase" if "pos" in got else "energy-first")
            m = _OUT_ITERATION.search(scf or "")
            electronic, scf = (int(m.group(1)) if m else None), None
            if layout == "energy-first":     # what belongs to this step follows the delimiter
                got = {}
                while "pos" not in got:
                    line = fd.skip_to(_AFTER_ENERGY_KEYS)
                    if not line:
                        return               # cut before the step's positions were complete
                    if "Iteration" in line:
                        if "---" in line:    # a new SCF cycle: no positions for this step
                            raise _ScanStopped
                    elif not take(line, got):
                        return
            free = float(tail[1].split("=")[1].split()[0])
        except (ValueError, IndexError):
            raise _ScanStopped from None
        cell, pos = got.get("cell"), got.get("pos")
        if pos is None and layout == "ase" and state.get("nwrite") == 0 and "pos" in state:
            yield None                       # NWRITE = 0: a step printed with no structure
            got = {}
            continue
        if cell is None or pos is None or cell.shape != (3, 3) or pos.shape != (natoms, 6):
            raise _ScanStopped
        if (_ML_END in line) != bool(got.get("ml")):
            raise _ScanStopped               # an ML energy for first-principles positions
        state["pos"] = True
        yield (cell, pos[:, :3], pos[:, 3:6], got.get("stress"), free,
               decimals(got["first"].split()[0]), electronic, bool(got.get("ml")))
        got = {}


def read_outcar(path, ctx: ReadContext):
    """Stream the completed ionic steps of an OUTCAR.

    ASE's header parser reads the species; a focused scanner (``_scan_outcar_steps``: reading
    ~3x faster than through ASE's chunk parser, equal to it frame by frame on every test file)
    reads the steps; from the first step it cannot read exactly as ASE would, ASE's own chunk parser reads
    the rest (so damaged steps behave as with ASE). OUTCARs of VASP 4.6 / 5.2.2, which print the
    energy block before the positions, are read by the scanner alone (ASE cannot read them).
    """
    from ase.data import atomic_numbers
    from ase.io import ParseError
    from ase.io.vasp_parsers.vasp_outcar_parsers import OutcarHeaderParser, build_header

    reported, ctx.title, nelm, lepsilon, layout = _outcar_header(path)
    _merge_incar(path, ctx, reported)
    step = 0
    unconverged: list[int] = []     # steps whose SCF ran NELM electronic steps (as vasprun.xml)
    with _WatchedLines(path) as fd:
        try:
            # workdir=None: do not let ASE read constraints from a CONTCAR next to it
            header = OutcarHeaderParser(workdir=None).build(build_header(fd))
        except ParseError:
            if fd.lineno == 0 and not fd.cut:
                raise InputError(path, "empty file") from None
            said = _stdout_error(Path(path).parent)
            raise InputError(path, "no completed ionic step (no 'Iteration' line: the file ends "
                                   "inside the OUTCAR header, or it is not an OUTCAR)"
                             + (f"; {said}" if said else "")) from None
        numbers = np.array([atomic_numbers[s] for s in header["symbols"]], int)
        types = layout["types"]
        if types and sum(types) == len(numbers):
            _type_species(header["symbols"], np.repeat(np.arange(len(types)), types), ctx)
        pbc = np.ones(3, bool)
        state: dict = {"nwrite": layout["nwrite"]}
        unprinted, learned = 0, 0     # NWRITE = 0 steps without a structure; force-field steps
        pending = None                # a force-field step whose first-principles step may follow
        try:
            for got in _scan_outcar_steps(fd, len(numbers), state):
                if got is None:
                    unprinted += 1
                    step += 1
                    continue
                cell, pos, forces, stress, free, d, electronic, ml = got
                if d is not None:
                    ctx.round_to("cartesian", 10.0 ** -d)
                fr = Frame(cell=cell, positions=pos, numbers=numbers, pbc=pbc, step=step,
                           energy=free, forces=forces, stress=stress)
                if pending is not None:
                    if not ml and _same_structure(pending, fr):   # then from first principles
                        fr, pending = dataclasses.replace(fr, step=pending.step), None
                        learned -= 1
                    else:
                        yield pending
                        pending = None
                if _ran_nelm(electronic, nelm, lepsilon):
                    unconverged.append(fr.step)
                if ml:
                    pending, learned = fr, learned + 1
                else:
                    yield fr
                step = fr.step + 1
            if pending is not None:
                yield pending
        except _ScanStopped:
            if pending is not None:
                yield pending
            if state.get("layout") == "energy-first" or learned or unprinted:
                what = ("of the energy-first OUTCAR layout (VASP 4.6/5.2.2)"
                        if state.get("layout") == "energy-first" else "after force-field or "
                        "unprinted steps (ASE cannot read this layout)")
                ctx.warn(f"unreadable after step {step - 1} ({step} steps read): an ionic step "
                         f"{what} is not as expected")
            else:               # the steps ASE reads from here on are not checked for NELM
                yield from _outcar_with_ase(path, ctx, skip=step)
        else:
            _warn_at_end(fd, step, ctx)
        finally:
            if unconverged:
                ctx.warn(_unconverged_note(unconverged, nelm))
            if unprinted:
                ctx.warn(f"NWRITE = 0: VASP printed the structure at the first and last ionic "
                         f"step only, so {unprinted} of {step} steps are not seen (vasprun.xml "
                         f"or XDATCAR hold every step)")
            if learned:
                ctx.warn(f"{learned} of {step} ionic steps were computed by VASP's machine-"
                         f"learned force field (ML_LMLFF; their energies and forces are the "
                         f"force field's), the others from first principles")


def _outcar_with_ase(path, ctx, skip):
    """ASE's chunk parser over the whole file, yielding the steps from ``skip`` on."""
    from ase.io.vasp_parsers.vasp_outcar_parsers import OutcarHeaderParser, outcarchunks
    step = 0
    ctx.round_to("cartesian", 1e-5)                     # VASP prints POSITION with f13.5
    with _WatchedLines(path) as fd:
        for chunk in outcarchunks(fd, header_parser=OutcarHeaderParser(workdir=None)):
            if step >= skip:
                yield frame_from_atoms(chunk.build(), step)
            step += 1
        _warn_at_end(fd, step, ctx)


def _outcar_marks(path: Path) -> "_WatchedLines | None":
    """The OUTCAR read through for its soft stop and converged-relaxation lines (None when it
    cannot be read)."""
    try:
        with _WatchedLines(path) as fh:
            while fh.skip_to(_MARKS):
                pass
        return fh
    except (OSError, InputError, *STREAM_ERRORS):
        return None


def _at_end(path: Path, steps: int, ctx, read: "_WatchedLines | None" = None) -> None:
    """Mark a complete run unfinished when VASP stopped it on request (its OUTCAR says
    "soft stop encountered": a STOPCAR with LSTOP = .TRUE., and not "reached required accuracy"),
    or when a relaxation (IBRION 1, 2, 3) ran all its NSW ionic steps and its OUTCAR does not say
    it converged ("reached required accuracy - stopping structural energy minimisation"; VASP's
    documentation: common practice); with EDIFFG = 0 (no criterion: NSW steps by design, as
    pymatgen's ``converged_ionic`` takes it) that is said, not marked. ``read``: the OUTCAR just
    read; otherwise the OUTCAR is this file or the same stage's beside it (a vasprun.xml has
    neither line)."""
    s = ctx.settings
    nsw, ibrion = s.get("NSW"), s.get("IBRION")
    at_limit = nsw is not None and ibrion in (1, 2, 3) and 0 < int(nsw) <= steps
    steps_planned = nsw is None or (int(nsw) > 0 and ibrion != -1)   # else no STOPCAR can act
    if read is None and (at_limit or steps_planned):
        outcar = path if strip_compression(path.name).startswith("OUTCAR") else \
            _sibling(path, "OUTCAR", ctx)
        read = _outcar_marks(outcar) if outcar is not None else None
    if read is not None and read.soft_stop and not read.converged:
        limit = f" of NSW = {int(nsw)}" if nsw is not None else ""
        ctx.unfinished = (f"stopped on request (VASP: '{_SOFT_STOP}' after {steps}{limit} ionic "
                          f"steps: a STOPCAR with LSTOP = .TRUE. in its folder, written by a user "
                          f"or by driftwatch's soft stop)")
    elif ibrion == 0 and nsw is not None and 0 < steps < int(nsw):
        ctx.warn(f"the molecular dynamics ran {steps} of its NSW = {int(nsw)} steps and ended "
                 f"cleanly: stopped early (a STOPCAR, a wall-time handler?)")
    elif at_limit and s.get("EDIFFG") == 0:
        ctx.warn(f"ran all NSW = {int(nsw)} ionic steps as set: EDIFFG = 0 gives VASP no "
                 f"convergence criterion (the run is meant to take NSW steps), so nothing says "
                 f"its final structure is a relaxed one")
    elif at_limit and not (read is not None and read.converged):
        ctx.unfinished = (f"stopped at its step limit (VASP ran all NSW = {int(nsw)} ionic steps"
                          + (f" and its OUTCAR does not say '{_CONVERGED}')" if read is not None
                             else "; no OUTCAR beside it says whether the last converged)"))


def _warn_at_end(fd, step, ctx):
    """A warning for a file without its closing timing section, or complete without a step; a
    complete one is marked unfinished where VASP stopped it early or at its step limit
    (:func:`_at_end`)."""
    if fd.ended and step:
        _at_end(Path(fd.name), step, ctx, read=fd)
    if not fd.ended:
        where = f"after step {step - 1} ({step} completed steps)" if step else \
            "before the first ionic step completed"
        extra = "; last line cut" if fd.cut else ""
        ctx.truncated(f"truncated {where}: no closing timing section{extra}; "
                 f"job killed or still running")
    elif not step:
        ctx.warn("the OUTCAR is complete but no ionic step has both a POSITION/TOTAL-FORCE "
                 "block and the free energy (a GW, response-function or force-less static run?)")


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


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
            ctx.truncated(f"truncated {w}: file ends inside {where}; job killed or still running")

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
                if ctx.species is None:
                    _type_species(list(np.repeat(symbols, counts)),
                                  list(np.repeat(np.arange(len(counts)), counts)), ctx)
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
                bad = next((k for k, r in enumerate(rows) if len(r) != 3 or not all(
                    _is_number(x) for x in r)), None)
                why = exc if bad is None else (
                    f"line {fh.lineno - total + bad + 1} holds {' '.join(rows[bad])!r}, not three "
                    f"numbers" + (" (two numbers run together?)" if len(rows[bad]) < 3 and
                                  any(x.count("-") > 1 or x[1:].count("-") for x in rows[bad])
                                  else ""))
                if n_done:           # the steps before it stand; the registry marks the damage
                    raise ValueError(f"bad coordinates in configuration {step + 1}: {why}") \
                        from None
                raise InputError(path, f"bad coordinates in configuration {step + 1}: {why}") \
                    from None
            direct = line.lstrip().lower().startswith("direct")
            cart = coords @ cell if direct else coords
            d = decimals(rows[0][0]) if rows and rows[0] else None
            if d is not None:
                ctx.round_to("fractional" if direct else "cartesian", 10.0 ** -d)
            yield Frame(cell=cell.copy(), positions=cart, numbers=numbers,
                        pbc=np.ones(3, bool), step=step)
            n_done, last_step = n_done + 1, step


# ---------------------------------------------------------------- POSCAR
def read_poscar(path, ctx: ReadContext):
    """A POSCAR/CONTCAR: one structure, not a trajectory (said in the warnings)."""
    import ase.io
    from ase.io import ParseError
    _merge_incar(path, ctx, {})
    with Lines(path) as fh:
        text = "".join(fh)
    if not text.strip():
        raise InputError(path, "empty file")
    lines = text.splitlines()
    if len(lines) < 8:
        raise InputError(path, f"{len(lines)} lines: too short for a POSCAR (a title, the scale, "
                               f"three cell vectors, the atom counts, the coordinate mode and a "
                               f"line per atom; a file cut while being written?)")
    counts_at = None
    for k, line in enumerate(lines[5:7], start=5):   # the atom counts (VASP 4 or 5 layout)
        lead = list(itertools.takewhile(str.isdigit, line.split()))
        if lead:                      # ASE reads leading integers as counts, and allocates for them
            total = sum(int(w) for w in lead)
            if not 0 < total <= len(lines):
                raise InputError(path, f"atom counts {line.strip()[:40]!r} out of range (the "
                                       f"file has {len(lines)} lines)")
            first = k + 2 + (lines[k + 1].strip()[:1] in ("S", "s"))   # Selective dynamics
            got = sum(1 for ln in lines[first:first + total] if len(ln.split()) >= 3)
            if got < total:
                raise InputError(path, f"ends after {got} of its {total} atom lines (a file cut "
                                       f"while being written?)")
            counts_at = k
            break
    vasp4 = counts_at == 5            # no species line: ASE takes the elements from elsewhere
    try:
        atoms = ase.io.read(path, format="vasp")   # a path: ASE may need POTCAR/OUTCAR beside it
    except ParseError as exc:
        if vasp4 and "chemical symbols" in str(exc):
            raise InputError(path, "VASP 4 layout (no line of element symbols above the atom "
                                   "counts) and no elements in its title line or a POTCAR or "
                                   "OUTCAR beside it: add the symbols as line 6") from None
        raise
    if vasp4:
        ctx.warn(f"VASP 4 layout (no line of element symbols): the elements "
                 f"{', '.join(dict.fromkeys(atoms.get_chemical_symbols()))} are ASE's reading of "
                 f"the title line ({lines[0].strip()[:60]!r}) or of a POTCAR or OUTCAR beside it: "
                 f"check them")
    elif counts_at == 6:
        names = lines[5].split()
        counts = [int(w) for w in lines[6].split()[:len(names)]]
        if len(names) == len(counts) and ctx.species is None:
            _type_species([n for n, c in zip(names, counts) for _ in range(c)],
                          [j for j, c in enumerate(counts) for _ in range(c)], ctx)
    ctx.title = text.splitlines()[0].strip() or None
    note_fix_symmetry(atoms, ctx.settings, ctx.warn)     # Selective dynamics: ASE's constraints
    if ctx.kind != "end-points":      # one structure alone (else one of a run's two end points):
        ctx.settings["single_structure"] = strip_compression(Path(path).name)  # warned as such
    yield frame_from_atoms(atoms, 0)


_READERS = {"vasp-xml": read_vasprun, "vasp-out": read_outcar, "vasp-xdatcar": read_xdatcar}
"""The trajectory readers by format: a stage read from an archive or a saved segment."""


# ---------------------------------------------------------------- custodian's error archives
_ARCHIVE = re.compile(r"^error\.(\d+)\.tar(?:\.gz|\.bz2|\.xz)?$")
_ARCHIVED = ("vasprun.xml", "OUTCAR", "XDATCAR", "INCAR")      # what a stage is read from
_TAR_ERRORS = (OSError, EOFError, zlib.error, lzma.LZMAError)   # and tarfile.TarError


def _error_archives(folder: Path, names) -> list[Path]:
    """custodian's backups of a job's earlier attempts in ``folder`` (``error.1.tar.gz``, ...,
    written by ``custodian.utils.backup`` before a correction and a rerun), in order."""
    got = sorted((int(m.group(1)), n) for n in names if (m := _ARCHIVE.match(n)))
    return [Path(folder) / n for _, n in got]


def _archived_bytes(tar, members: dict, name: str, limit: int = 1 << 26) -> bytes | None:
    m = members.get(name)
    if m is None or m.size > limit:
        return None
    fh = tar.extractfile(m)
    return None if fh is None else fh.read()


def _next_start(archive: Path) -> bytes | None:
    """The POSCAR the attempt after ``archive`` started from: the next archive's, else the
    folder's own (plain or compressed); None when there is none."""
    import tarfile
    later = [p for p in _error_archives(archive.parent, sorted(os.listdir(archive.parent)))
             if int(_ARCHIVE.match(p.name).group(1)) > int(_ARCHIVE.match(archive.name).group(1))]
    if later:
        try:
            with tarfile.open(later[0], "r:*") as tar:
                members = {m.name.rsplit("/", 1)[-1]: m for m in tar.getmembers() if m.isfile()}
                return _archived_bytes(tar, members, "POSCAR")
        except (tarfile.TarError, *_TAR_ERRORS):
            return None                     # (that archive's own read says what is wrong)
    for n in ("POSCAR", "POSCAR.gz", "POSCAR.bz2", "POSCAR.xz"):
        if (archive.parent / n).is_file():
            with open_bytes(archive.parent / n) as fh:
                return fh.read(1 << 26)
    return None


def _one_line(exc) -> str:
    text = str(exc).strip()
    return f"{type(exc).__name__}: {text.splitlines()[0]}" if text else type(exc).__name__


def read_error_archive(path, ctx: ReadContext):
    """The ionic steps of an earlier attempt of a VASP job that custodian archived
    (``error.N.tar.gz``: INCAR, POSCAR, CONTCAR, OUTCAR, vasprun.xml, ... of the attempt), read as a
    stage of the run when the attempt after it continued from it: custodian's correction copied
    its CONTCAR to POSCAR, so the next attempt's POSCAR holds the same bytes (custodian's handlers:
    ``{"file": "CONTCAR", "action": {"_file_copy": {"dest": "POSCAR"}}}``). An attempt that the
    next one started again from the same structure (a correction of the electronic settings
    only) is not part of the trajectory: no steps, and a warning says so; so is a damaged archive
    (the run's other stages are still read). Read alone (``FOLDER@error.1``, or ``-f``), its
    steps are read whatever came after it."""
    import tarfile
    import tempfile
    errors = (tarfile.TarError, *_TAR_ERRORS)
    path = Path(path)
    what = "an earlier attempt of this job (custodian's archive)"
    tar = None
    try:
        tar = tarfile.open(path, "r:*")
        members = {m.name.rsplit("/", 1)[-1]: m for m in tar.getmembers() if m.isfile()}
        contcar = _archived_bytes(tar, members, "CONTCAR")
        nxt = _next_start(path) if ctx.stage_count > 1 else None
    except errors as exc:
        if tar is not None:
            tar.close()
        ctx.warn(f"{what} not read: damaged or not a tar archive ({_one_line(exc)})")
        return
    with tar, tempfile.TemporaryDirectory(prefix="driftwatch-archive-") as tmp:
        if ctx.stage_count > 1 and (not contcar or nxt is None or contcar != nxt):
            why = ("the next attempt started from another structure than its CONTCAR (custodian "
                   "restarted it from the same input)" if contcar and nxt is not None else
                   "no CONTCAR in it, or no readable POSCAR after it, to tell whether the next "
                   "attempt continued from it")
            ctx.warn(f"{what} not read: {why}")
            return
        kinds = {}
        try:
            for name in _ARCHIVED:
                if name not in members:
                    continue
                if members[name].size > max_decompressed():
                    ctx.warn(f"{what} not read: its {name} holds {members[name].size} bytes, more "
                             f"than $DRIFTWATCH_MAX_DECOMPRESSED allows")
                    return
                dest = Path(tmp) / name
                with tar.extractfile(members[name]) as src, open(dest, "wb") as out:
                    shutil.copyfileobj(src, out)
                if name != "INCAR":
                    kinds[name] = [dest]
        except errors as exc:
            ctx.warn(f"{what} not read: damaged archive ({_one_line(exc)})")
            return
        got = _pick_stage(Path(tmp), kinds, None, ReadContext(path), staged=True) if kinds else None
        if got is None:
            ctx.warn(f"{what} not read: no VASP trajectory in it (vasprun.xml, OUTCAR, XDATCAR)")
            return
        inner, fmt, note = got
        if note:
            ctx.warn(note.split(": ", 1)[1])          # (names the scratch folder otherwise)
        reader = _READERS[fmt]
        try:
            yield from reader(inner, ctx)
        except InputError as exc:         # after the steps it gave, if any
            ctx.warn(f"{what}, {members[inner.name].name}: {exc.problem}")
        finally:                     # the cache keys on the archive, not on the scratch copies
            for key in [k for k in ctx.files if k.startswith(tmp)]:
                del ctx.files[key]
            for key in [k for k in ctx.folders if k.startswith(tmp)]:
                del ctx.folders[key]


# ---------------------------------------------------------------- saved segments
# A resubmitting job script's copies of a segment's files before the job continues in the same
# folder, named for the time they were saved: ``vasprun.xml_11_19_39on29_01_24`` (``date
# +%H_%M_%Son%d_%m_%y``; ShakeNBreak's resubmission script saves CONTCAR, OUTCAR, XDATCAR, POSCAR,
# INCAR, OSZICAR and vasprun.xml so, then copies CONTCAR to POSCAR).
_SEGMENT = re.compile(r"^(vasprun\.xml|OUTCAR|XDATCAR|CONTCAR|POSCAR|INCAR)"
                      r"_(\d\d)_(\d\d)_(\d\d)on(\d\d)_(\d\d)_(\d\d)$")
_SAME_PLACE = 1e-4      # Å: a segment's end and the next segment's start are the same structure


def _segments(folder: Path, names) -> list[tuple[str, dict]]:
    """``[(time, {kind: [paths]})]`` of the saved segments in ``folder``, in the order saved
    (``time`` as in the names, ``11_19_39on29_01_24``)."""
    got: dict = {}
    for n in names:
        m = _SEGMENT.match(strip_compression(n))
        if m and m.group(1) != "INCAR":
            when = strip_compression(n)[len(m.group(1)) + 1:]
            got.setdefault(when, {}).setdefault(m.group(1), []).append(Path(folder) / n)

    def saved(item):
        hour, minute, second, day, month, year = _SEGMENT.match("OUTCAR_" + item[0]).groups()[1:]
        return year, month, day, hour, minute, second
    return sorted(got.items(), key=saved)


def _segment_after(path: Path) -> tuple[Path, str] | None:
    """The output (and its format) of the segment that ran after the saved segment ``path``: the
    next saved one, else the folder's own outputs; None when there is none to read."""
    folder, names = path.parent, sorted(os.listdir(path.parent))
    when = _stage_of(path.name)[1:]
    saved = _segments(folder, names)
    order = [w for w, _ in saved]
    later = saved[order.index(when) + 1:] if when in order else []
    kinds = later[0][1] if later else _variants(folder, names).get("")
    got = _pick_stage(folder, kinds, None, ReadContext(folder), staged=True) if kinds else None
    return None if got is None or got[1] == "vasp-poscar" else got[:2]


def _same_structure(a: Frame, b: Frame) -> bool:
    """The same atoms at the same places in the same cell, to :data:`_SAME_PLACE` (Å; positions
    compared modulo the lattice)."""
    if a.numbers.shape != b.numbers.shape or (a.numbers != b.numbers).any() or \
            np.abs(a.cell - b.cell).max() > _SAME_PLACE:
        return False
    d = np.linalg.solve(a.cell.T, (a.positions - b.positions).T).T     # fractional
    return bool(np.linalg.norm((d - np.round(d)) @ a.cell, axis=1).max() <= _SAME_PLACE)


def read_segment(path, ctx: ReadContext):
    """The ionic steps of a saved segment of a resubmitted VASP job (:data:`_SEGMENT`), read as a
    stage of its run folder when the segment after it continued from where it ended: that
    segment's first structure is this one's last (or its saved CONTCAR) to 1e-4 Å. A segment the
    job started again from another structure is no part of the trajectory: no steps, and a
    warning says so. Read alone (``FOLDER@<time>``, or ``-f``), its steps are read whatever came
    after it."""
    path = Path(path)
    kind = _SEGMENT.match(strip_compression(path.name)).group(1)
    reader = _READERS[_KIND_FORMAT[kind]]
    if ctx.stage_count == 1:
        yield from reader(path, ctx)
        return
    said = len(ctx.warnings)
    frames = list(reader(path, ctx))
    cut = [w for w in ctx.warnings[said:] if "truncated after" in w or "is incomplete" in w]
    ctx.warnings[said:] = [w for w in ctx.warnings[said:] if w not in cut]
    after = _segment_after(path)
    start = None
    if after is not None and frames:
        nxt, fmt = after
        with contextlib.closing(_READERS[fmt](nxt, ReadContext(nxt))) as steps:
            start = next(steps, None)
    ends = frames[-1:]
    contcar = _sibling(path, "CONTCAR", ctx)
    if contcar is not None and _stage_of(contcar.name):
        ends += list(read_poscar(contcar, ReadContext(contcar)))
    what = "a saved segment of a resubmitted job"
    if start is None or not any(_same_structure(e, start) for e in ends):
        why = ("the segment after it started from another structure than its last one (the job "
               "started again)" if start is not None else "no segment after it to read, to tell "
               "whether the job continued from it")
        ctx.warn(f"{what} not read: {why}")
        return
    if cut:       # cut where the job stopped: the segment after it went on from its last step
        ctx.warn(f"{what}, cut where its job stopped after {len(frames)} complete ionic "
                 f"step{'s' if len(frames) != 1 else ''}: the segment after it continued from the "
                 f"last")
    yield from frames


# ---------------------------------------------------------------- folders
# stage suffixes: custodian's .relax1, numbered restarts .1, and a number with a word (dfttk's
# .1relax, .2relax, .3static)
_STAGED = re.compile(r"^(vasprun\.xml|OUTCAR|XDATCAR|CONTCAR|POSCAR)"
                     r"(?:\.(relax\d+|\d+|\d+[A-Za-z]\w*))?$")
_OUTPUT_KINDS = ("vasprun.xml", "OUTCAR", "XDATCAR")
# copies beside the outputs (OUTCAR.bak; vasprun.xml_<time>, a resubmitting job script's)
_OTHER_COPIES = tuple(f"{k}{sep}" for k in _OUTPUT_KINDS for sep in "._-")
_KIND_FORMAT = {"vasprun.xml": "vasp-xml", "OUTCAR": "vasp-out", "XDATCAR": "vasp-xdatcar",
                "CONTCAR": "vasp-poscar", "POSCAR": "vasp-poscar"}
# What a finished output ends with. VASP built with profiling prints a timing table of some
# 30 kB after "General timing and accounting", closed by "Profiling took N seconds" (the genuine
# atomate OUTCAR.relax1 of tests/data/public/atomate_double_relax: 33.7 kB after the first).
_PROFILED_END = b"Profiling took"
_MARKER = {"vasp-xml": (b"</modeling>",), "vasp-out": (_OUTCAR_END.encode(), _PROFILED_END)}


def _complete(path: Path, markers: tuple) -> bool:
    try:
        tail = tail_bytes(path, 16384)
    except (OSError, *STREAM_ERRORS):
        return False
    return any(m in tail for m in markers)


def _stage_order(stage: str):
    """'' (unsuffixed) last; relaxN and N by number."""
    if not stage:
        return (2, 0)
    digits = "".join(c for c in stage if c.isdigit())
    return (0 if stage.startswith("relax") else 1, int(digits or 0))


def _variants(folder: Path, names):
    """{stage: {kind: [paths]}} of the VASP files in ``names`` (plain and compressed variants)."""
    out: dict = {}
    for n in names:
        m = _STAGED.match(strip_compression(n))
        if m:
            p = folder / n
            out.setdefault(m.group(2) or "", {}).setdefault(m.group(1), []).append(p)
    return out


def _best_variant(paths, fmt, ctx):
    """Among plain and compressed copies of one file: a complete one, else the largest; then the
    newest. Empty files are never chosen."""
    def key(p):
        try:
            st = p.stat()
        except OSError:
            return (False, 0, 0)
        return (_complete(p, _MARKER[fmt]) if fmt in _MARKER and st.st_size else False,
                st.st_size > 0, st.st_mtime_ns)
    for p in paths:
        ctx.uses(p)
    ranked = sorted(paths, key=key, reverse=True)
    best = ranked[0]
    try:
        return best if best.stat().st_size > 0 else None
    except OSError:
        return None


def _pick_stage(folder: Path, kinds: dict, format, ctx, staged: bool):
    """(path, format, note) for one stage: complete vasprun.xml, complete OUTCAR, then OUTCAR,
    vasprun.xml, XDATCAR; CONTCAR/POSCAR alone (single structure) only for an unstaged folder."""
    found = {k: _best_variant(v, _KIND_FORMAT[k], ctx) for k, v in kinds.items()}
    xml, out, xdat = found.get("vasprun.xml"), found.get("OUTCAR"), found.get("XDATCAR")
    single = found.get("CONTCAR") or found.get("POSCAR")
    if format is not None:
        for k, path in found.items():
            if path is not None and _KIND_FORMAT[k] == format:
                return path, format, None
        return None
    if xml is not None and _complete(xml, _MARKER["vasp-xml"]):
        return xml, "vasp-xml", None
    if out is not None and _complete(out, _MARKER["vasp-out"]):
        note = f"{folder}: {xml.name} is incomplete; read {out.name} instead" if xml else None
        return out, "vasp-out", note
    for path, fmt in ((out, "vasp-out"), (xml, "vasp-xml"), (xdat, "vasp-xdatcar")):
        if path is not None:
            note = None if fmt == "vasp-xdatcar" and not (xml or out) else \
                f"{folder}: no complete VASP output; reading the incomplete {path.name}"
            return path, fmt, note
    if single is not None and not staged:
        return single, "vasp-poscar", f"{folder}: no VASP trajectory; read {single.name} alone"
    return None


def _end_points(folder: Path, kinds: dict, job: bool, ctx):
    """The pick of an unstaged folder with no VASP trajectory: POSCAR then a non-empty CONTCAR as
    two stages of an end-points run (``ReadContext.kind``); False for POSCAR alone in a job folder
    (``job``: an INCAR is there; the job's input, not a run); None otherwise (CONTCAR or POSCAR
    alone is read as one structure)."""
    from .registry import FolderPick
    contcar = _best_variant(kinds["CONTCAR"], "vasp-poscar", ctx) if "CONTCAR" in kinds else None
    poscar = _best_variant(kinds["POSCAR"], "vasp-poscar", ctx) if "POSCAR" in kinds else None
    if poscar is None or contcar is None:
        return False if job and contcar is None and poscar is not None else None
    if ctx is not None:
        ctx.kind = "end-points"
    return FolderPick([("POSCAR", poscar, "vasp-poscar"), ("CONTCAR", contcar, "vasp-poscar")],
                      (f"{folder}: no VASP trajectory (vasprun.xml, OUTCAR, XDATCAR); read "
                       f"{poscar.name} as the initial structure and {contcar.name} as the final: "
                       f"the steps between are not seen",))


_JOB_INPUTS = ("INCAR", "POSCAR", "KPOINTS", "POTCAR")


# ---------------------------------------------------------------- nudged-elastic-band folders
def _band(folder: Path) -> dict | None:
    """The nudged-elastic-band calculation ``folder`` is the parent of, else None.

    VASP's layout (its IMAGES tag; common practice): the parent holds the INCAR with IMAGES = N
    and the folders ``00`` to ``N+1``: ``00`` and ``N+1`` the fixed end points (POSCAR only),
    ``01`` to ``N`` the images, each run in its own folder with the parent's INCAR. Returns
    ``{"images": N, "incar": path, "tags": read_incar(path)}`` when the INCAR sets IMAGES >= 1
    and ``01/`` is a folder."""
    folder = Path(folder)
    if not (folder / "01").is_dir():
        return None
    incar = next((folder / n for n in ("INCAR", "INCAR.gz", "INCAR.bz2", "INCAR.xz")
                  if (folder / n).is_file()), None)
    try:
        tags = read_incar(incar) if incar is not None else {}
    except (OSError, *STREAM_ERRORS):
        return None
    n = tags.get("IMAGES")
    return {"images": int(n), "incar": incar, "tags": tags} if n and n >= 1 else None


def _band_member(folder: Path) -> tuple[dict, int] | None:
    """(band, index) when ``folder`` is one of a band's folders ``00`` .. ``N+1``, else None."""
    name = Path(folder).name
    if len(name) != 2 or not name.isdigit():
        return None
    band = _band(Path(folder).parent)
    return (band, int(name)) if band is not None and int(name) <= band["images"] + 1 else None


def band(folder: Path, names, ctx=None) -> tuple[str, list] | None:
    """(the problem, the band's end-point folders) when ``folder`` is the parent of a
    nudged-elastic-band calculation (:func:`_band`): not a run itself, its images are; the end
    points (POSCAR alone) are the band's fixed inputs, not runs. Else None."""
    got = _band(folder)
    if got is None:
        return None
    if ctx is not None:
        ctx.uses(got["incar"])
    n = got["images"]
    others = sorted(x for x in names if strip_compression(x) in _OUTPUT_KINDS)
    also = (f"; {', '.join(others)} here is not one image's output (the images write to it "
            f"together) and is not read") if others else ""
    what = (f"the parent folder of a nudged-elastic-band calculation ({got['incar'].name}: IMAGES "
            f"= {n}): its images 01 to {n:02d} are runs of their own (pass "
            f"{Path(folder) / '01'}){also}")
    return what, ["00", f"{n + 1:02d}"]




def inputs_only(folder: Path, names, ctx=None) -> tuple[str, list] | None:
    """(what the folder holds, those file names) for a folder of VASP job inputs (an INCAR, with
    POSCAR, KPOINTS, ...) and no VASP output: a job not run yet, or one that stopped before
    writing; else None. Called for folders :func:`pick_from_folder` did not take as a run; an
    empty CONTCAR (VASP stopped before its first ionic step) is among the files. A folder with
    no INCAR is no job folder (a structure folder): its POSCAR is read as one structure, as any
    structure file; except an image folder of a nudged-elastic-band calculation (``01/``, whose
    INCAR is its parent's) with no output: an image not run. A band's end points (``00/``) are
    none of these: :func:`band` names them."""
    got = [n for n in names if strip_compression(n) in _JOB_INPUTS]
    empty = [n for n in names
             if strip_compression(n) == "CONTCAR" and not file_size(Path(folder) / n)]
    no_output = "no VASP output (vasprun.xml, OUTCAR, XDATCAR or a non-empty CONTCAR)"
    said = _what_vasp_left(Path(folder), names)
    if said and any(strip_compression(n) == "INCAR" for n in got):     # it ran, and says so
        return f"VASP inputs ({', '.join(got)}) and no VASP output of structures: {said}", \
            got + empty, True
    if not any(strip_compression(n) == "INCAR" for n in got):
        member = _band_member(folder) if got else None
        if member is None or member[1] in (0, member[0]["images"] + 1):
            return None                     # a structure folder, or a band's end point
        incar = member[0]["incar"]
        return (f"image {Path(folder).name} of a nudged-elastic-band calculation (../{incar.name}: "
                f"IMAGES = {member[0]['images']}) with {', '.join(got)} and {no_output}",
                got + empty)
    return f"VASP inputs ({', '.join(got)}) and {no_output}", got + empty


_VASP_FAILED = re.compile(r"error|failed|bad news", re.I)


def _what_vasp_left(folder: Path, names) -> str | None:
    """What a folder with no VASP output of structures shows of a job that ran: an OSZICAR's
    ionic steps ("N F=" lines: energies, no structures) and the last error line of VASP's standard
    output (``vasp.out``: "LAPACK: Routine ZPOTRF failed!"), in words; None when neither."""
    parts = []
    oszicar = next((n for n in names if strip_compression(n) == "OSZICAR"), None)
    if oszicar is not None:
        try:
            with Lines(folder / oszicar) as fh:
                steps = sum(1 for line in fh if " F= " in line)
        except (OSError, *STREAM_ERRORS):
            steps = 0
        if steps:
            parts.append(f"its OSZICAR holds {steps} ionic step{'s' if steps > 1 else ''} (energies, "
                         f"not structures)")
    said = _stdout_error(folder, names)
    if said:
        parts.append(said)
    return "; ".join(parts) or None


_STDOUT_NAMES = ("vasp.out", "std_err.txt")
"""VASP's standard output as job scripts and custodian keep it, and custodian's standard error."""


def _stdout_error(folder: Path, names=None) -> str | None:
    """The last error line of VASP's standard output beside its files (``vasp.out``: "LAPACK:
    Routine ZPOTRF failed!"; custodian's ``std_err.txt``), in words; None when none."""
    if names is None:
        try:
            names = os.listdir(folder)
        except OSError:
            return None
    for log in sorted(n for n in names if strip_compression(n) in _STDOUT_NAMES):
        try:
            with Lines(folder / log) as fh:
                bad = [line.strip() for line in fh if _VASP_FAILED.search(line)]
        except (OSError, *STREAM_ERRORS):
            bad = []
        if bad:
            return f"{log} ends with {' '.join(bad[-1].split())[:160]!r}"
    return None


def pick_from_folder(folder: Path, names, format=None, ctx=None):
    """The VASP run of ``folder`` (a :class:`~driftwatch.adapters.registry.FolderPick`), or None.

    * Files are grouped by stage: custodian's ``.relax1``, ``.relax2`` suffixes, numbered
      restarts ``.1``, ``.2`` and numbered words (dfttk's ``.1relax``, ``.3static``) run in that
      order, unsuffixed files last; each name may carry
      ``.gz``/``.bz2``/``.xz`` (of plain and compressed copies, a complete one, else the largest).
    * Per stage: a complete vasprun.xml, then a complete OUTCAR; when neither is complete (killed
      job), OUTCAR first (VASP flushes it every ionic step, vasprun.xml lags behind a buffer), then
      vasprun.xml, then XDATCAR. CONTCAR or POSCAR alone give one structure (unstaged folders only).
    * Unsuffixed leftovers beside staged files (custodian does not rename XDATCAR) are not read
      when they hold no vasprun.xml or OUTCAR; a note says so.
    * A folder with no VASP output of its own whose subfolders ``relax1/``, ``relax2/`` (or
      ``stage1``, ``restart_2``, ...) are VASP run folders: those subfolders are its stages.
    * No trajectory (vasprun.xml, OUTCAR, XDATCAR), e.g. cleaned up after the run: POSCAR and a
      non-empty CONTCAR are the run's first and last structures (two stages, a warning says the
      steps between are not seen); CONTCAR alone is one structure. POSCAR alone beside an INCAR is
      a job's input, not a run (:func:`inputs_only` says so), unless ``format="vasp-poscar"`` asks
      for it; with no INCAR (a structure folder) it is one structure.
    * custodian's archives of earlier attempts (``error.1.tar.gz`` ...) in an unstaged folder are
      the run's first stages, named ``error.1`` ..., the last attempt ``final``, each read only
      when the attempt after it continued from it (:func:`read_error_archive`).
    * Nudged-elastic-band folders (:func:`band`): the parent (INCAR with IMAGES = N, folders ``00``
      to ``N+1``) is no run; an image ``01`` .. ``N`` is read with the parent's INCAR, and with no
      output it is an image not run; an end point with POSCAR alone is no run.
    * One single-point output (INCAR: NSW 0 or unset, or IBRION = -1; ASE's calculator) beside one
      trajectory of another format (``relax.traj``): that trajectory is the run, with a warning.
    """
    from .registry import FolderPick
    from .run import ReadContext
    ctx = ctx if ctx is not None else ReadContext(folder)
    if format is None and _band(folder) is not None:
        return None                         # the parent of a band: :func:`band` says so
    groups = _variants(folder, names)
    has_output = any(k in _OUTPUT_KINDS for g in groups.values() for k in g)
    if not has_output:
        sub = _stage_folders(folder, format, ctx)
        if sub is not None:
            return sub
        if not groups or format not in (None, "vasp-poscar"):
            return None
        if format is None and set(groups) == {""}:     # a band's folders: the parent's INCAR
            job = any(strip_compression(n) == "INCAR" for n in names) or \
                _band_member(folder) is not None
            ends = _end_points(folder, groups[""], job, ctx)
            if ends is not None:
                return ends if ends else None       # False: POSCAR alone, a job's input
    staged = any(st for st in groups)
    stages, notes = [], []
    for st in sorted(groups, key=_stage_order):
        kinds = groups[st]
        if staged and st == "" and not any(k in kinds for k in ("vasprun.xml", "OUTCAR")):
            left = ", ".join(p.name for v in kinds.values() for p in v)
            notes.append(f"{folder}: {left} not read (left beside the staged outputs, which are "
                         f"read instead)")
            continue
        got = _pick_stage(folder, kinds, format, ctx, staged)
        if got is None:
            continue
        path, fmt, note = got
        stages.append((st, path, fmt))
        if note:
            notes.append(note)
    if not stages:
        return None
    archived, saved, used = _error_archives(folder, names), [], set()
    unstaged = len(stages) == 1 and stages[0][0] in ("", None)
    if unstaged:
        stages = [("", stages[0][1], stages[0][2])]
        if format is None and stages[0][2] in ("vasp-xml", "vasp-out"):
            traj = _single_point_traj(folder, names, stages[0][1], ctx)
            if traj is not None:
                return traj
            for when, kinds in ([] if archived else _segments(folder, names)):
                got = _pick_stage(folder, kinds, None, ctx, staged=True)
                if got is not None:     # (a segment's own output is cut: read_segment says)
                    saved.append((when, got[0], "vasp-segment"))
                    used.update(p.name for paths in kinds.values() for p in paths)
            if archived or saved:           # earlier attempts first; the last one is "final"
                stages = [(p.name.split(".tar")[0], p, "vasp-error-archive") for p in archived] \
                    + saved + [("final", stages[0][1], stages[0][2])]
    others = [n for n in names if strip_compression(n).startswith(_OTHER_COPIES)
              and not _STAGED.match(strip_compression(n)) and n not in used]
    if others:       # OUTCAR.converged, vasprun.xml.bak, ...: no stage names VASP or custodian use
        notes.append(f"{folder}: {', '.join(others[:6])}{', ...' if len(others) > 6 else ''} not "
                     f"read (other copies beside the run's outputs, e.g. earlier segments of a "
                     f"resubmitted relaxation; pass one to read it, or lay the segments out as "
                     f"stage folders relax1/, relax2/, ... to read them as one run)")
    if archived and not unstaged:
        notes.append(f"{folder}: custodian's archives of earlier attempts "
                     f"({', '.join(p.name for p in archived)}) are not read "
                     f"beside staged outputs (which stage each belongs to is not recorded)")
    return FolderPick(stages, tuple(notes))


def _single_point_traj(folder: Path, names, out: Path, ctx):
    """The trajectory file beside a single-point VASP output (its INCAR: NSW 0 or unset, or
    IBRION = -1), as the folder's pick (see ``registry.beside_single_point``); else None."""
    from .registry import beside_single_point

    def single_point():
        incar = _sibling(out, "INCAR", ctx)
        try:
            tags = read_incar(incar) if incar is not None else None
        except (OSError, *STREAM_ERRORS):
            tags = None
        return None if tags is None else _single_point(tags, incar=True)
    return beside_single_point(folder, names, out, single_point, _CODE_FORMATS, ctx)


def _stage_folders(folder: Path, format, ctx):
    """Subfolders relax1/, relax2/ ... that are VASP run folders, as the stages of ``folder``."""
    from .registry import FolderPick
    subs = []
    for (word, number), d, names in stage_folders(folder) or ():
        if not any(_STAGED.match(strip_compression(n)) and
                   _STAGED.match(strip_compression(n)).group(1) in _OUTPUT_KINDS for n in names):
            continue
        ctx.lists(d)
        got = pick_from_folder(d, names, format, ctx)
        if got is None:
            continue
        for st, path, fmt in got.stages:
            subs.append(((word, number, st), f"{d.name}{'.' + st if st else ''}", path, fmt))
    if not subs:
        return None
    subs.sort(key=lambda x: (x[0][0], x[0][1], _stage_order(x[0][2])))
    atoms = [_first_numbers(path, fmt) for _, _, path, fmt in subs]
    if len(subs) > 1 and any(a is None or not np.array_equal(a, atoms[0]) for a in atoms):
        return None          # numbered folders of different structures: separate runs, not stages
    return FolderPick([(name, path, fmt) for _, name, path, fmt in subs])


def _first_numbers(path, fmt):
    """The atomic numbers of the first completed step of ``path`` (None when it has none): the
    readers stream, so this reads one ionic step."""
    from .registry import _formats
    from .run import ReadContext
    try:
        it = _formats[fmt].open(str(path), ReadContext(path))
        first = next(iter(it), None)
        close = getattr(it, "close", None)
        if close is not None:
            close()
    except Exception:  # noqa: BLE001 - an unreadable stage: let the reader say why, not discovery
        return None
    return None if first is None else np.asarray(first.numbers)


# ---------------------------------------------------------------- live: end, soft stop
END_MARKERS = {
    "vasp-out": ((re.compile(rb"General timing and accounting"), "General timing and accounting"),
                 (re.compile(_PROFILED_END + rb" +[\d.]+ +seconds"), "Profiling took ... seconds")),
    "vasp-xml": ((re.compile(rb"</modeling>"), "</modeling>"),),
}


def soft_stop(run_dir, *, reason: str, dry_run: bool = False, **_options) -> dict:
    """VASP's documented soft stop: ``STOPCAR`` with ``LSTOP = .TRUE.`` in the run folder (VASP
    finishes the ionic step, writes its outputs and stops), with a ``#`` line stating why.
    Returns ``{"target": Path, "text": str}``; the caller writes it (atomically, never over an
    existing file)."""
    return {"target": Path(run_dir) / "STOPCAR",
            "text": f"LSTOP = .TRUE.\n# driftwatch soft stop: {reason}\n"}


# ---------------------------------------------------------------- symmetry setting
def symmetry_setting(code_settings: dict, dimension: int = 3) -> dict | None:
    """VASP's own symmetry handling: on when ``ISYM`` > 0 (VASP symmetrises charge density and
    forces with the operations it found; ``nsym``: "Found N space group operations" in OUTCAR);
    None when ISYM <= 0 (off) or unknown (no ISYM reported or set).

    ``dimension`` (2 for a layer, 3 for bulk) only changes the wording: VASP always looks for the
    operations of the 3D cell.
    """
    s = code_settings or {}
    isym = s.get("ISYM")
    if isym is None or int(isym) <= 0:
        return None
    n = s.get("nsym")
    prec = s.get("SYMPREC")
    what = ("1 symmetry operation (the identity only)" if n == 1 else
           f"{n} symmetry operations" if n else "the symmetry operations it found")
    cell = " of the slab's 3D cell" if dimension == 2 else ""
    tol = f", SYMPREC = {prec:g} Å" if prec is not None else ""
    return {"operations": None if n is None else int(n),
            "how": f"VASP kept {what}{cell} (ISYM = {int(isym)}{tol})",
            "undo": "ISYM = 0"}


def _single_point(tags: dict, incar: bool = False) -> str | None:
    """How VASP settings make a run one structure, in words ("NSW = 0", "NSW unset" in an INCAR,
    where VASP's default is 0, "IBRION = -1", or both), else None (VASP's documentation of NSW
    and IBRION: common practice)."""
    nsw = tags.get("NSW", 0 if incar else None)
    still = nsw is not None and int(nsw) <= 0
    fixed = tags.get("IBRION") is not None and int(tags["IBRION"]) == -1
    if not (still or fixed):
        return None
    parts = [f"NSW = {int(tags['NSW'])}" if "NSW" in tags else "NSW unset"] if still else []
    return ", ".join(parts + (["IBRION = -1"] if fixed else []))


# IBRION values whose ionic steps are no relaxation (VASP's documentation of IBRION: common practice)
_NOT_RELAXING = {0: "molecular dynamics (IBRION = 0)",
                 5: "finite differences (IBRION = 5): displaced copies of one structure",
                 6: "finite differences (IBRION = 6): displaced copies of one structure",
                 7: "linear response (IBRION = 7)", 8: "linear response (IBRION = 8)",
                 44: "a saddle-point search (IBRION = 44, improved dimer method)"}


def run_kind(code_settings: dict) -> str | None:
    """What a VASP run's ionic steps are when they are no relaxation, from IBRION and NSW (a
    single point: NSW <= 0 or IBRION = -1, VASP's documentation; common practice); else None (a
    band's image is named by ``registry.run_kind`` from ``neb_image``)."""
    s = code_settings or {}
    what = _single_point(s)
    if what and s.get("ICHARG") is not None and int(s["ICHARG"]) >= 10:
        return (f"a non-self-consistent run (ICHARG = {int(s['ICHARG'])}, {what}: bands or "
                f"densities on a fixed charge density): one structure, no ionic steps")
    if what:
        return f"a single-point calculation ({what}): one structure, no ionic steps"
    return None if s.get("IBRION") is None else _NOT_RELAXING.get(int(s["IBRION"]))


def cell_free(code_settings: dict) -> str | None:
    """``"ISIF = n"`` when ISIF >= 3 let the cell change (shape, volume or both; VASP's
    documentation of ISIF: common practice), else None."""
    isif = (code_settings or {}).get("ISIF")
    return f"ISIF = {int(isif)}" if isif is not None and int(isif) >= 3 else None


# ---------------------------------------------------------------- registration
_CODE_FORMATS = ("vasp-xml", "vasp-out", "vasp-xdatcar", "vasp-poscar")


def register_all(register, register_code) -> None:
    """The VASP rows of the format table and the VASP entry of the code table."""
    from .registry import Code
    register("vasp-xml", __name__ + ":read_vasprun", globs=("*vasprun*.xml",), magic=rb"<modeling>",
             description="VASP vasprun.xml")
    register("vasp-out", __name__ + ":read_outcar", globs=("*OUTCAR*",), magic=rb"\A\s*vasp\.\d",
             description="VASP OUTCAR")
    register("vasp-xdatcar", __name__ + ":read_xdatcar", globs=("*XDATCAR*",),
             magic=rb"^[ \t]*(Direct|Cartesian) configuration=", description="VASP XDATCAR")
    register("vasp-segment", __name__ + ":read_segment",
             description="a saved segment of a resubmitted VASP job (vasprun.xml_<time>, "
                         "OUTCAR_<time>: a job script's copies, <time> as "
                         "date +%H_%M_%Son%d_%m_%y; read as a stage of its run folder, or given "
                         "with -f)")
    register("vasp-error-archive", __name__ + ":read_error_archive",
             description="custodian's archive of an earlier VASP attempt (error.N.tar.gz; read "
                         "as a stage of its run folder, or given with -f)")
    register_code(Code(
        name="vasp", label="VASP", aliases=("vasp5", "vasp6"), formats=_CODE_FORMATS,
        folder=__name__ + ":pick_from_folder",
        run_files=("vasprun*.xml*", "OUTCAR*", "XDATCAR*", "CONTCAR*", "POSCAR*", "INCAR*"),
        settings_files=("INCAR", "INCAR.*"),
        end_markers=END_MARKERS, soft_stop=__name__ + ":soft_stop",
        symmetry_setting=__name__ + ":symmetry_setting", run_kind=__name__ + ":run_kind",
        cell_free=__name__ + ":cell_free",
        inputs_only=__name__ + ":inputs_only", band=__name__ + ":band"),
        replace=True)
