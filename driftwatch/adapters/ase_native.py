"""ASE's own containers: trajectory (.traj), extended XYZ, and rows of an ASE database.

All through ASE's readers. ``.traj`` and extended XYZ stream (``ase.io.iread``);
extended XYZ is handed only complete lines, so a frame cut in the middle of a
number is never parsed. A cut ``.traj`` gives the frames ASE can still read plus
a warning from the registry.
"""
from __future__ import annotations

import re

from ..errors import InputError
from ._io import Lines
from .run import ReadContext, frame_from_atoms

__all__ = ["read_traj", "read_extxyz", "read_db", "MAX_ATOMS"]

MAX_ATOMS = 10_000_000
"""A frame header announcing more atoms is refused (a damaged count must not make the reader
allocate or loop without end)."""


def _step(atoms, i):
    """The optimizer's step counter when the writer stored one, else the frame index."""
    info = getattr(atoms, "info", {}) or {}
    for key in ("step", "nsteps", "ionic_step"):
        if isinstance(info.get(key), (int,)) and not isinstance(info.get(key), bool):
            return int(info[key])
    return i


def _check_ulm_header(path) -> None:
    """Refuse a ULM header whose item count or offset table lies beyond the file: ASE would
    allocate the (damaged) count first and exhaust memory."""
    import os
    import numpy as np
    size = os.path.getsize(path)
    with open(path, "rb") as fh:
        head = fh.read(48)
    if len(head) < 48 or head[:8] not in (b"- of Ulm", b"AFFormat"):
        return                               # ASE reports a cut or foreign header itself
    version, nitems, pos0 = (int(x) for x in np.frombuffer(head[24:48], "<i8"))
    if not (0 <= nitems <= size // 8 and 0 <= pos0 <= size - 8 * nitems):
        raise InputError(path, f"damaged ASE trajectory header ({nitems} frames, offset table "
                               f"at byte {pos0}, file of {size} bytes)")


def read_traj(path, ctx: ReadContext):
    """An ASE trajectory file (ULM format), frame by frame."""
    from ase.io.trajectory import Trajectory
    _check_ulm_header(path)
    traj = Trajectory(path, "r")
    try:
        desc = getattr(traj, "description", None) or {}
        if isinstance(desc, dict) and desc.get("type") == "optimization":
            ctx.settings.update({"code": "ase", "optimizer": desc.get("optimizer")})
        n = len(traj)
        for i in range(n):
            yield frame_from_atoms(traj[i], i)
    finally:
        traj.close()


def read_extxyz(path, ctx: ReadContext):
    """Extended XYZ (or plain XYZ: then the cell is zero and pbc False), one frame at a time.

    Each frame's lines are cut out here and parsed by ASE's extxyz reader, so memory
    holds one frame and a frame cut short is dropped with a warning.
    """
    import io
    import ase.io
    n = 0
    with Lines(path) as fh:
        while True:
            first = fh.readline()
            if not first.strip():
                if first:          # blank line between frames
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
            for _ in range(natoms + 1):      # stops at the end of the file (a cut frame)
                ln = fh.readline()
                if not ln:
                    break
                block.append(ln)
            if len(block) < natoms + 2:
                where = f"after frame {n - 1} ({n} frames)" if n else "inside the first frame"
                ctx.warn(f"truncated {where}: the file ends inside frame {n}; "
                         f"still being written or cut")
                return
            _check_properties(block[1], path, fh.lineno - natoms)
            atoms = ase.io.read(io.StringIO("".join(block)), format="extxyz")
            yield frame_from_atoms(atoms, _step(atoms, n))
            n += 1
        if fh.cut:
            where = f"after frame {n - 1} ({n} frames)" if n else "inside the first frame"
            ctx.warn(f"truncated {where}: the last line is cut; still being written or cut")


_PROPERTIES = re.compile(r"(?i)\bproperties=(\"[^\"]*\"|\S+)")


def _check_properties(comment: str, path, lineno) -> None:
    """Refuse a ``Properties=`` spec whose column counts are not small integers: ASE's parser
    builds one entry per declared column, so a damaged count (``R:99999999999``) exhausts memory."""
    m = _PROPERTIES.search(comment)
    if not m:
        return
    fields = m.group(1).strip('"').split(":")
    counts = fields[2::3]
    if len(fields) % 3 or not all(c.isdigit() and 0 < int(c) <= 1000 for c in counts):
        raise InputError(path, f"extended XYZ comment line {lineno}: malformed Properties= "
                               f"({m.group(1)[:60]!r}; expected name:type:count with counts "
                               f"1..1000)")


def read_db(path, ctx: ReadContext):
    """Rows of an ASE database in id order; ``file.db@selection`` picks rows (ASE query syntax)."""
    import ase.db
    from pathlib import Path
    path = str(path)
    selection = None
    if not Path(path).exists() and "@" in path:
        path, _, selection = path.rpartition("@")
    with ase.db.connect(path, create_indices=False, use_lock_file=False) as db:
        for i, row in enumerate(db.select(selection, sort="id")):
            atoms = row.toatoms()
            step = row.get("step", i)
            yield frame_from_atoms(atoms, int(step) if isinstance(step, (int, float)) else i)
