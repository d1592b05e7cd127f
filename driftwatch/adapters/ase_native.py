"""ASE's own containers: trajectory (.traj), extended XYZ, and rows of an ASE database.

All through ASE's readers. ``.traj`` and extended XYZ stream (``ase.io.iread``);
extended XYZ is handed only complete lines, so a frame cut in the middle of a
number is never parsed. A cut ``.traj`` gives the frames ASE can still read plus
a warning from the registry.
"""
from __future__ import annotations

from ..errors import InputError
from ._io import Lines
from .run import ReadContext, frame_from_atoms

__all__ = ["read_traj", "read_extxyz", "read_db"]


def _step(atoms, i):
    """The optimizer's step counter when the writer stored one, else the frame index."""
    info = getattr(atoms, "info", {}) or {}
    for key in ("step", "nsteps", "ionic_step"):
        if isinstance(info.get(key), (int,)) and not isinstance(info.get(key), bool):
            return int(info[key])
    return i


def read_traj(path, ctx: ReadContext):
    """An ASE trajectory file (ULM format), frame by frame."""
    from ase.io.trajectory import Trajectory
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
            block = [first] + [fh.readline() for _ in range(natoms + 1)]
            if not all(block):
                where = f"after frame {n - 1} ({n} frames)" if n else "inside the first frame"
                ctx.warn(f"truncated {where}: the file ends inside frame {n}; "
                         f"still being written or cut")
                return
            atoms = ase.io.read(io.StringIO("".join(block)), format="extxyz")
            yield frame_from_atoms(atoms, _step(atoms, n))
            n += 1
        if fh.cut:
            where = f"after frame {n - 1} ({n} frames)" if n else "inside the first frame"
            ctx.warn(f"truncated {where}: the last line is cut; still being written or cut")


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
