"""ASE's own containers (trajectory, extended XYZ, ASE database rows) and other codes' outputs that
ASE reads (FHI-aims, CASTEP, GPAW; LAMMPS dumps have their module): the generic reader path.

All through ASE's readers. ``.traj`` and extended XYZ stream (``ase.io.iread``);
extended XYZ is handed only complete lines, so a frame cut in the middle of a
number is never parsed. A cut ``.traj`` gives the frames ASE can still read plus
a warning from the registry.
"""
from __future__ import annotations

import functools
import io
import os
import re
from pathlib import Path

import numpy as np

from ..errors import DriftwatchError, ForeignOutputError, InputError, NoIonicStepError
from ._io import Lines, check_readable, peek, strip_compression, tail_bytes
from .run import ReadContext, frame_from_atoms, note_calculator, note_fix_symmetry

__all__ = ["read_traj", "read_extxyz", "read_db", "read_aims",
           "read_castep", "read_castep_geom", "read_gpaw", "MAX_ATOMS"]

MAX_ATOMS = 10_000_000
"""A frame header announcing more atoms is refused (a damaged count must not make the reader
allocate or loop without end)."""


def _step(atoms, i):
    """The optimizer's step counter when the writer stored one, else the frame index."""
    import numbers
    info = getattr(atoms, "info", {}) or {}
    for key in ("step", "nsteps", "ionic_step"):         # ASE's extxyz parser gives numpy ints
        if isinstance(info.get(key), numbers.Integral) and not isinstance(info.get(key), bool):
            return int(info[key])
    return i


# what a file named .traj may be instead (its first bytes; common practice for the compressors)
_NOT_ULM = (
    (b"PickleTrajectory", "ASE's old pickle trajectory; read it with ASE and write it again as a "
                          "trajectory to audit it"),
    (b"\x1f\x8b", "gzip-compressed; ASE reads trajectories uncompressed: gunzip it"),
    (b"BZh", "bzip2-compressed; ASE reads trajectories uncompressed: bunzip2 it"),
    (b"\xfd7zXZ\x00", "xz-compressed; ASE reads trajectories uncompressed: unxz it"),
    (b"\x80", "a Python pickle (another program's record of a run), not ASE's trajectory"),
)


def _check_ulm_header(path) -> None:
    """Refuse a ULM header whose item count or offset table lies beyond the file: ASE would
    allocate the (damaged) count first and exhaust memory."""
    import os
    import numpy as np
    size = os.path.getsize(path)
    with open(path, "rb") as fh:
        head = fh.read(48)
    for magic, what in _NOT_ULM:
        if head.startswith(magic):
            raise InputError(path, f"not an ASE trajectory of the current (ULM) format: {what}")
    if len(head) < 48 or head[:8] not in (b"- of Ulm", b"AFFormat"):
        return                               # ASE reports a cut or foreign header itself
    version, nitems, pos0 = (int(x) for x in np.frombuffer(head[24:48], "<i8"))
    if 0 <= nitems <= pos0 and size < pos0 + 8 * nitems:
        raise InputError(path, f"cut short: its header lists {nitems} frames whose offset table "
                               f"is at byte {pos0}, past the file's end ({size} bytes): a copy "
                               f"or a write that stopped early")
    if not (0 <= nitems <= size // 8 and 0 <= pos0 <= size - 8 * nitems):
        raise InputError(path, f"damaged ASE trajectory header ({nitems} frames, offset table "
                               f"at byte {pos0}, file of {size} bytes)")


MAX_BAND = 34
"""The most frames per optimiser step looked for in an ASE NEB trajectory (32 moving images and
the two end points)."""
_BANDS: dict = {}         # (path, stamp) -> frames per optimiser step of a band, or None
_BANDS_KEPT = 1 << 16     # answers kept (tens of bytes each): a campaign's trajectories, so that
#                           an audit of a selection, which walks the tree twice, opens each once


def _band_period(backend, n: int) -> int | None:
    """Frames per optimiser step when ``backend`` (ULM, ``n`` frames) is an ASE NEB trajectory.

    ASE's trajectory writes every image of a band at each optimiser step, its fixed end points
    included (``Trajectory.write`` -> ``atoms.iterimages()``), so frames 0, p, 2p, ... are the same
    initial image and p - 1, 2p - 1, ... the same final one, bit for bit, the two different. A
    relaxation does not come back to its first frame's exact positions. Needs two full steps;
    reads one positions array per frame tried (no Atoms built)."""
    if n < 6:
        return None
    pos = {}

    def at(i):                                   # None: beyond the frames a cut file still has
        if i not in pos:
            try:
                pos[i] = np.asarray(backend[i].get("positions"))
            except Exception:  # noqa: BLE001 - ULM raises ValueError/OSError/... on a cut frame
                pos[i] = None
        return pos[i]

    def same(i, k):
        return at(i) is not None and at(k) is not None and np.array_equal(at(i), at(k))
    for p in range(3, min(MAX_BAND, n // 2) + 1):
        if not same(p, 0):
            continue
        if same(p - 1, 0):
            return None                          # frames that do not move: no band
        for j in range(1, n // p):
            if at(j * p) is None or at(j * p + p - 1) is None:
                break                            # a cut file: the frames it has decide
            if not (same(j * p, 0) and same(j * p + p - 1, p - 1)):
                return None
        return p
    return None


def band_period(path) -> int | None:
    """:func:`_band_period` of a trajectory file, remembered for its current stamp; the file's
    ULM header is checked (:func:`_check_ulm_header`) when it is computed."""
    from ase.io import ulm
    from .run import file_stamp
    stamp = file_stamp(path)
    key = None if stamp is None else (str(path), tuple(stamp))
    if key in _BANDS:
        return _BANDS[key]
    _check_ulm_header(path)
    with ulm.Reader(str(path)) as backend:
        got = _band_period(backend, len(backend))
    if key is not None:
        _BANDS[key] = got
        while len(_BANDS) > _BANDS_KEPT:
            _BANDS.pop(next(iter(_BANDS)))
    return got


def _image_names(p: int) -> list[str]:
    return [f"image{k:02d}" for k in range(1, p - 1)]


def traj_names(path, keys=None) -> list[str]:
    """The moving images of an ASE NEB trajectory (``image01`` ...: one run each), else []."""
    try:
        p = band_period(path)
    except Exception:  # noqa: BLE001 - a file that cannot be indexed is one (failing) run
        return []
    return _image_names(p) if p else []


def read_traj(path, ctx: ReadContext):
    """An ASE trajectory file (ULM format), frame by frame. An ASE NEB band's trajectory
    (:func:`band_period`) holds its images written in turn: ``FILE::image01`` reads one moving
    image (its frame of each optimiser step, numbered by step); the file alone is refused with the
    images it holds."""
    from ase.io.trajectory import Trajectory
    from . import batch
    path, name = batch.split(path)
    p = band_period(path)                    # (checks the ULM header of this file stamp)
    names = _image_names(p) if p else []
    if name is not None and name not in names:
        raise InputError(path, f"no structure {name!r}: " + (
            f"the band's moving images are {batch.listing(names)}" if names else
            "the file is one trajectory (only an ASE NEB band's file holds images)"))
    if names and name is None:
        batch.refuse_many(path, names, f"moving images of a nudged-elastic-band calculation, "
                                       f"written in turn with its two fixed end points ({p} frames "
                                       f"per optimiser step: ASE's NEB)")
    traj = Trajectory(path, "r")
    try:
        desc = getattr(traj, "description", None) or {}     # what ASE's dynamics wrote
        if isinstance(desc, dict) and desc.get("type") == "optimization":
            ctx.settings.update({"code": "ase", "optimizer": desc.get("optimizer")})
        elif isinstance(desc, dict) and desc.get("type") == "molecular-dynamics":
            ctx.settings.update({"code": "ase", "dynamics": str(desc.get("md-type") or "?")})
        n = len(traj)
        if name is None:
            said = _FramesSay(path, ctx, described=bool(desc))
            first = atoms = None
            cells = []
            for i in range(n):
                atoms = traj[i]
                first = atoms if first is None else first
                fr = frame_from_atoms(atoms, i)
                cells.append(fr.cell)
                said.see(atoms, fr)
                yield fr
            said.end()
            if isinstance(desc, dict) and desc.get("type") == "optimization" and n:
                _optimiser_stopped(desc, cells, first, atoms, ctx)
            return
        k = names.index(name) + 1
        ctx.settings["neb_image"] = f"{name} of {p - 2} in an ASE NEB trajectory"
        ctx.structure = {"key": "NEB image", "value": name}
        for j, i in enumerate(range(k, n, p)):
            yield frame_from_atoms(traj[i], j)
    finally:
        traj.close()


def _optimiser_stopped(desc: dict, cells: list, first, last, ctx: ReadContext) -> None:
    """An ASE optimiser's trajectory records its ``fmax`` and ``max_steps`` (ASE 3.23 on; with
    the file's first frame, so those of its first ``run``). Its last frame's atomic forces above
    ``fmax`` mean the optimiser had not converged there: it stopped at ``max_steps`` (the file
    holds ``max_steps + 1`` frames), or the job was killed, stopped early (an exception:
    driftwatch's observer in mode "stop" raises one) or is still running.

    The forces as the optimiser saw them: the constraints applied (``atoms.get_forces()``), and
    only atoms that moved (an atom an ASE ``Filter`` hid, or one a ``StrainFilter`` carried with
    the cell, is none of its concern). A cell filter (not recorded) turns an atom's force F by
    the deformation gradient D from the cell it was made with, one of the frames': |F D| >=
    |F| sigma_min(first -> last) / max_k sigma_max(first -> frame k), which is compared, so a
    force above that proves it. Not judged: a file written every n-th step (``interval``: the
    final step may be missing), one holding more frames than ``max_steps`` allows (runs appended
    to it, perhaps with another fmax), and the cell's own convergence (the filter's cell factor
    and mask are not recorded): a run whose atoms converged and cell did not is not caught."""
    fmax, limit, every = desc.get("fmax"), desc.get("max_steps"), desc.get("interval", 1)
    if isinstance(fmax, bool) or not isinstance(fmax, (int, float)) or not fmax > 0:
        return
    n = len(cells)
    limit = limit if isinstance(limit, int) and not isinstance(limit, bool) and limit > 0 else None
    if isinstance(every, int) and not isinstance(every, bool) and every > 1:
        ctx.warn(f"the optimiser wrote every {every}th step to its trajectory (its description's "
                 f"interval): the last frame need not be its final structure; whether it "
                 f"converged is not judged")
        return
    if limit is not None and n > limit + 1:
        return                            # several runs appended: the fmax may not be the last's
    try:
        forces = last.get_forces()
        moved = np.abs(last.get_scaled_positions(wrap=False)
                       - first.get_scaled_positions(wrap=False)).max(axis=1) > 1e-12
        turn = np.linalg.svd(np.linalg.solve(cells[0], np.asarray(cells)), compute_uv=False)
    except Exception:  # noqa: BLE001 - no forces stored, or a cell without volume: nothing said
        return
    if not moved.any():
        return
    worst = float(np.sqrt((forces[moved] ** 2).sum(axis=1)).max())
    if not worst * turn[-1].min() / turn.max() > fmax * (1 + 1e-9):
        return
    said = (f"its last step's atomic forces reach {worst:.3g} eV/Å, above the fmax {fmax:g} "
            f"eV/Å its trajectory records")
    if limit is not None and n == limit + 1:
        ctx.unfinished = (f"stopped at its step limit (the ASE optimiser's max_steps = {limit}; "
                          f"{said})")
        return
    ctx.unfinished = ctx.unfinished or (
        f"stopped without converging (the ASE optimiser: {said}, after {n - 1} of "
        f"{'its max_steps ' + str(limit) if limit else 'its'} steps; killed, stopped early or "
        f"still running)")


_MOMENTA = "no class named; the frames' atomic momenta change"   # what tells MD with no description


def _moving(a, b) -> bool:
    """True when two frames carry atomic momenta that differ: the atoms moved with velocities
    (dynamics). An ASE optimiser leaves momenta untouched (FIRE and MDMin keep their velocities to
    themselves), so a relaxation's frames carry none, or the same stale ones throughout."""
    import numpy as np
    pa, pb = a.arrays.get("momenta"), b.arrays.get("momenta")
    return pa is not None and pb is not None and pa.shape == pb.shape and \
        bool(np.any(pa != pb))


class _FramesSay:
    """What the frames of a run read through ASE say it is, where nothing else does (no trajectory
    description of the optimiser or dynamics that wrote it; an extended XYZ file): molecular
    dynamics when its first two frames carry atomic momenta that differ; a path of images written
    whole when its end points carry no energy and every image between them does; a single
    structure when it has one frame. Also notes ASE's FixSymmetry on its first frame."""

    def __init__(self, path, ctx: ReadContext, described: bool = False):
        self.name, self.ctx, self.described = os.path.basename(path), ctx, described
        self.first, self.energies = None, []

    def see(self, atoms, frame) -> None:
        if self.first is None:
            self.first = atoms
            note_fix_symmetry(atoms, self.ctx.settings, self.ctx.warn)
            note_calculator(atoms, self.ctx.settings)
        elif len(self.energies) == 1 and not {"optimizer", "dynamics"} & set(self.ctx.settings) \
                and _moving(self.first, atoms):
            self.ctx.settings.update({"code": "ase", "dynamics_seen": _MOMENTA})
        self.energies.append(frame.energy)

    def end(self) -> None:
        e = self.energies
        if self.described:
            return
        if len(e) >= 3 and e[0] is None and e[-1] is None and None not in e[1:-1]:
            self.ctx.settings["band_path"] = ("its end points carry no energy, the images between "
                                              "them do: a path of images written whole")
        if len(e) == 1:                     # no optimiser wrote it: nothing says it relaxed
            self.ctx.settings["single_structure"] = f"{self.name}, one frame"


# the file atomate2's ASE and force-field jobs append their final structure to
# (``final_atoms_object_file`` of atomate2 0.1.5's ``AseRelaxer.relax``; tests/data/atomate2_ff)
FINAL_STRUCTURES = "final_atoms_object.xyz"


def read_extxyz(path, ctx: ReadContext):
    """Extended XYZ (or plain XYZ: then the cell is zero and pbc False), one frame at a time.

    Each frame's lines are cut out here and parsed by ASE's extxyz reader, so memory
    holds one frame and a frame cut short is dropped with a warning. A file of many structures
    (a structure key in the frames' info, :mod:`driftwatch.adapters.batch`) is read one structure
    at a time (``FILE::NAME``); reading it whole is refused with the names it holds.
    """
    import io
    import ase.io
    from . import batch
    path, name = batch.split(path)
    index = batch.index_extxyz(path, ctx.structure_keys)
    chosen, kind = _chosen(index, name, ctx)

    def parse(block, lineno, first):
        _check_properties(block[1], path, lineno)
        if first:
            _note_xyz_rounding(block, ctx)
        return ase.io.read(io.StringIO("".join(block)), format="extxyz")

    def truncated(n, how):
        where = f"after frame {n - 1} ({n} frames)" if n else "inside the first frame"
        ctx.truncated(f"truncated {where}: " + (f"the file ends inside frame {n}"
                                                if how == "frame" else "the last line is cut")
                      + "; still being written or cut")

    # batch.extxyz_frames yields (n, comment, line number, lines) per complete frame, then
    # (None, frames read, "frame" | "line", None) when the file ends abnormally
    said = _FramesSay(path, ctx)
    finals = strip_compression(os.path.basename(path)) == FINAL_STRUCTURES
    if chosen is None:                       # the whole file is one run: stream it
        for n, a, b, block in batch.extxyz_frames(path):
            if n is None:
                truncated(a, b)
                return
            if n == 1 and finals:
                raise NoIonicStepError(path, f"atomate2's {FINAL_STRUCTURES} of several jobs "
                                             f"(each appends its final structure, with nothing "
                                             f"saying which job wrote it): no relaxation's steps",
                                       "audit the jobs' task documents or trajectories")
            atoms = parse(block, b, n == 0)
            fr = frame_from_atoms(atoms, _step(atoms, n))
            said.see(atoms, fr)
            yield fr
        said.end()
        return
    wanted = {m.pos: k for k, m in enumerate(chosen)}
    got: dict = {}
    # a cut last frame is this structure's only when it names no other (a batch writer still
    # writing another's frame leaves this one whole)
    cut = index.cut if index.cut and index.cut_name in (None, (ctx.structure or {}).get(
        "value")) else None
    _, kept = batch.index_extxyz(path, ctx.structure_keys, keep_lines=True)
    if kept is not None:                     # the lines are in memory: no second pass
        for pos, k in sorted(wanted.items(), key=lambda x: x[1]):
            if pos in kept:
                got[k] = parse(kept[pos][1], kept[pos][0], not got)
    else:
        try:
            for n, _, b, block in batch.extxyz_frames(path):
                if n is None:
                    break
                if n in wanted:
                    got[wanted[n]] = parse(block, b, not got)
        except InputError:
            pass                             # the damaged header the index met, said below
    if cut:
        truncated(*cut)
    if index.damaged:                        # the frames after it may be any structure's
        ctx.warn(f"{index.damaged}: the frames after it are not read, of any structure")
        ctx.unfinished = f"damaged: {index.damaged}"
    for k, m in enumerate(chosen):
        if k in got:
            fr = frame_from_atoms(got[k], _member_step(m, k, kind))
            said.see(got[k], fr)
            yield fr
    if kind != "end-points" and not cut and not index.damaged:
        said.end()


def _member_step(m, k: int, kind: str) -> int:
    """Step of the ``k``-th frame of a structure: 0/1 for end points, else its step counter, else k."""
    if kind == "end-points":
        return k
    return m.step if m.step is not None else k


def _chosen(index, name, ctx: ReadContext):
    """(members to read in order, kind) for ``FILE::NAME`` or a one-structure file; (None, kind)
    when the whole file is one trajectory in file order. Notes the kind and the structure in ctx."""
    if name is not None and index.key is None:
        raise InputError(index.path, f"no structure {name!r}: the file names no structures (none "
                                     f"of the keys {', '.join(ctx.structure_keys)} in its first "
                                     f"{index.kind})")
    if name is None and index.many():
        index.refuse_many()
    if index.key is None:
        members, kind = index.structure(None)
        ctx.kind = kind
        return (members if kind == "end-points" else None), kind
    names = index.names()
    name = names[0] if name is None else name
    members, kind = index.structure(name)
    ctx.kind = kind
    ctx.structure = {"key": index.key, "value": name}
    return members, kind


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
    """Rows of an ASE database in id order; ``file.db@selection`` picks rows (ASE query syntax).
    Rows of many structures (a structure key among the key-value pairs,
    :mod:`driftwatch.adapters.batch`) are read one structure at a time (``file.db::NAME``)."""
    from pathlib import Path
    from . import batch
    path, name = batch.split(str(path))
    selection = None
    if not Path(path).exists() and "@" in path:
        path, _, selection = path.rpartition("@")
    index = batch.index_db(path, ctx.structure_keys, selection)
    chosen, kind = _chosen(index, name, ctx)
    said = _FramesSay(path, ctx)
    with batch.connect(path) as db:
        if chosen is None:
            for i, row in enumerate(db.select(selection, sort="id")):
                atoms = row.toatoms()
                step = row.get("step", i)
                fr = frame_from_atoms(atoms, int(step) if isinstance(step, (int, float)) else i)
                said.see(atoms, fr)
                yield fr
        else:
            for k, m in enumerate(chosen):
                atoms = db.get(id=m.pos).toatoms()
                fr = frame_from_atoms(atoms, _member_step(m, k, kind))
                said.see(atoms, fr)
                yield fr
    if kind != "end-points":
        said.end()


def _note_xyz_rounding(block, ctx: ReadContext) -> None:
    """Cartesian columns 2-4 of the first atom line: their printed decimals."""
    from .run import decimals
    f = block[2].split() if len(block) > 2 else []
    d = decimals(f[1]) if len(f) > 3 else None
    if d is not None:
        ctx.round_to("cartesian", 10.0 ** -d)


# ---------------------------------------------------------------- generic path: through ASE
def _through_ase(path, ctx: ReadContext, ase_format: str, steps=None, adjust=None, **kwargs):
    """Every image ASE's reader returns for ``ase_format`` (a plain or compressed file), as Frames.

    ASE's readers of these formats read the whole file; a truncated file is ASE's to judge.
    ``steps``: (pattern with one match per ionic step the code prints, the code's name, what the
    matches are in words); fewer images than matches is said in a warning (the steps between are
    not seen). ``adjust(text, images, ctx)``: the images that are ionic steps (the code's own
    reading of its file: settings and how it ended go in ``ctx``)."""
    import io
    import warnings as _w

    import ase.io
    from ase.io.formats import ioformats
    with Lines(path) as fh:
        text = "".join(fh)
        cut = fh.cut
    with _w.catch_warnings():
        _w.simplefilter("ignore")                # ASE's notes on plugins and code warnings
        if ioformats[ase_format].acceptsfd:
            fd = io.StringIO(text)
            fd.name = str(path)                  # ASE's messages name the file they read
            images = ase.io.read(fd, ":", format=ase_format, **kwargs)
        else:                                    # a reader that opens paths only: the complete
            import os                            # lines, decompressed, in a private temp file
            import tempfile
            fd, tmp = tempfile.mkstemp(prefix="driftwatch-", suffix=".txt")
            try:
                with os.fdopen(fd, "w", encoding="utf-8") as out:
                    out.write(text)
                images = ase.io.read(tmp, ":", format=ase_format, **kwargs)
            finally:
                os.unlink(tmp)
    if not isinstance(images, list):
        images = [images]
    if adjust is not None:
        images = adjust(text, images, ctx)
    if cut:
        ctx.warn(f"the last line is cut ({len(images)} steps read); job killed or still running")
    listed = len(steps[0].findall(text)) if steps is not None else 0
    last_only = len(images) == 1 and listed > 1     # ASE gave the last step alone: say its number
    if len(images) < listed:
        n = len(images)
        ctx.warn(f"ASE's {steps[1]} reader returned {n} structure{'s' if n != 1 else ''} of the "
                 f"{listed} ionic steps the file lists ({steps[2]}): the steps between are not "
                 f"seen" + (f"; the one read is the last, step {listed - 1}" if last_only else ""))
    for i, atoms in enumerate(images):
        if i == 0:
            note_fix_symmetry(atoms, ctx.settings, ctx.warn)
        yield frame_from_atoms(atoms, listed - 1 if last_only else _step(atoms, i))


_AIMS_MD = re.compile(r"^ *MD_run +(\S.*?) *$", re.M)             # control.in's echo
_AIMS_LATTICE = re.compile(r"^ *lattice_vector +(\S+) +(\S+) +(\S+)", re.M)   # geometry.in's


def _aims_steps(text: str, images: list, ctx: ReadContext) -> list:
    """FHI-aims' kind of run (``MD_run`` in its control.in echo: molecular dynamics; "Geometry
    relaxation not requested" and no MD: a single point), and the cell of frames ASE's reader
    gives none in a periodic run (ASE 3.29 attaches the cell only where the output prints a
    whole updated geometry: 4 of 5 frames of a periodic MD lacked it): the frame before's, else
    the ``lattice_vector`` lines of the geometry.in echo."""
    md = _AIMS_MD.search(text)
    if md:
        ctx.settings["calculation"] = f"molecular dynamics (FHI-aims: MD_run {md.group(1)})"
    elif "Geometry relaxation not requested" in text:
        ctx.settings["calculation"] = ("a single-point calculation (FHI-aims: \"Geometry "
                                       "relaxation not requested\"): one structure, no ionic steps")
    has = [a.pbc.all() and a.cell.rank == 3 for a in images]
    vectors = _AIMS_LATTICE.findall(text)[:3]
    if all(has) or not (any(has) or len(vectors) == 3):
        return images
    cell = np.array(vectors, float) if len(vectors) == 3 else None
    lacked = []
    for k, atoms in enumerate(images):
        if has[k]:
            cell = atoms.cell.array
        elif cell is not None:
            atoms.set_cell(cell)
            atoms.pbc = True
            lacked.append(k)
    if lacked:
        ctx.warn(f"ASE's FHI-aims reader gave no cell for {len(lacked)} of {len(images)} frames; "
                 f"each has the cell before it (the first, geometry.in's lattice_vector lines "
                 f"as the output echoes them)")
    return images


def read_aims(path, ctx: ReadContext):
    """FHI-aims standard output through ASE (every relaxation step; :func:`_aims_steps`)."""
    ctx.settings.update({"code": "aims"})
    ctx.round_to("cartesian", 1e-8)              # aims prints 'atom' lines with %.8f (Å)
    yield from _through_ase(path, ctx, "aims-output", adjust=_aims_steps)


# one per ionic step of a geometry optimisation ("BFGS: finished iteration 3 with enthalpy= ...",
# "DMD: finished iteration", ...) or of MD ("finished MD iteration"), as CASTEP prints them
_CASTEP_STEP = re.compile(r"^ *\w+: finished (?:MD )?iteration", re.M)


# ASE's CASTEP reader (ase.io.castep.castep_reader, read_castep_castep) reads the file's last run
# (from its last "Welcome ... CASTEP" line to "Finalisation time   =") and ends an image at each
# line holding one of these, and at the end; an image ended by "improving iteration" is a line
# minimisation's trial configuration, not the configuration an iteration finished on
_CASTEP_IMAGE_END = re.compile(r"BFGS: starting iteration|BFGS: (improving) iteration|"
                               r"Starting MD iteration")
_CASTEP_KIND = re.compile(r"^ *type of calculation +: *(.+?) *$", re.M)
_CASTEP_LIMIT = re.compile(r"Geometry optimization failed to converge after +(\d+) steps")
_CASTEP_DONE = re.compile(r"Geometry optimization completed successfully")


def _castep_run(text: str) -> str:
    """The last run of a .castep file, as ASE's reader delimits it."""
    lines = text.splitlines()
    start = max((i for i, line in enumerate(lines)
                 if ("Welcome" in line or "Materials Studio" in line) and "CASTEP" in line),
                default=0)
    end = next((i for i in range(start, len(lines)) if "Finalisation time   =" in lines[i]),
               len(lines) - 1)
    return "\n".join(lines[start:end + 1])


def _castep_steps(text: str, images: list, ctx: ReadContext) -> list:
    """The images that are CASTEP's iterations (line-minimisation trials left out: a file of 31
    BFGS iterations gives ASE 91 images), CASTEP's type of calculation, and a stop at the step
    limit."""
    run = _castep_run(text)
    kind = _CASTEP_KIND.search(run)
    if kind:
        ctx.settings["calculation"] = kind.group(1)
    limit = _CASTEP_LIMIT.search(run)
    if limit:
        ctx.unfinished = f"stopped at its step limit (CASTEP: '{' '.join(limit.group(0).split())}')"
    elif _CASTEP_DONE.search(run):
        ctx.settings["converged"] = "CASTEP: 'Geometry optimization completed successfully'"
    trial = [bool(m.group(1)) for m in _CASTEP_IMAGE_END.finditer(run)] + [False]
    if len(trial) != len(images) or not any(trial):
        return images
    ctx.warn(f"{sum(trial)} line-minimisation trial configuration{'s' if sum(trial) != 1 else ''} "
             f"of CASTEP's optimiser left out (ASE's reader returns them among the iterations)")
    return [atoms for atoms, t in zip(images, trial) if not t]


def read_castep(path, ctx: ReadContext):
    """CASTEP .castep output through ASE, one frame per iteration (:func:`_castep_steps`); said
    when ASE returns fewer structures than the ionic steps CASTEP lists (ASE 3.29 returns only
    the last of a damped-MD optimisation's)."""
    ctx.settings.update({"code": "castep"})
    yield from _through_ase(path, ctx, "castep-castep", adjust=_castep_steps,
                            steps=(_CASTEP_STEP, "CASTEP", "'finished iteration' lines"))


def run_kind(code_settings: dict) -> str | None:
    """What the steps of a run read through ASE are when they are no relaxation, else None: a
    CASTEP run's ``type of calculation`` (geometry optimization is one; a single point or a band
    structure has no ionic steps), FHI-aims' in words (:func:`_aims_steps`), an atomate2
    task document's (:mod:`driftwatch.adapters.pymatgen_json`)."""
    s = code_settings or {}
    what = s.get("calculation")
    if what is None or what == "geometry optimization":
        return None
    if s.get("code") in ("aims", "atomate2"):
        return what
    said = f"CASTEP: type of calculation : {what}"
    if what in ("single point energy", "band structure"):
        return f"a single-point calculation ({said}): one structure, no ionic steps"
    return f"{what} ({said})"


def read_castep_geom(path, ctx: ReadContext):
    """CASTEP .geom (geometry optimisation) through ASE."""
    ctx.settings.update({"code": "castep"})
    yield from _through_ase(path, ctx, "castep-geom")


def _cif_structure(text: str, images: list, ctx: ReadContext) -> list:
    """A CIF's one structure; several data blocks, or partial occupancy, refused."""
    if len(images) != 1:
        raise InputError(ctx.path, f"a CIF of {len(images)} structures (data blocks): driftwatch "
                                   f"reads one structure from a CIF; give each its own file")
    occupancy = images[0].info.get("occupancy") or {}
    if any(len(site) > 1 or sum(site.values()) < 1 - 1e-3 for site in occupancy.values()):
        raise InputError(ctx.path, "partial occupancy (a disordered structure) has no single "
                                   "lattice of atoms to analyse")
    ctx.settings["single_structure"] = strip_compression(os.path.basename(str(ctx.path)))
    return images


def read_cif(path, ctx: ReadContext):
    """A CIF: one structure, its sites expanded by the CIF's symmetry operations (ASE's reader,
    which also takes the space group from the CIF when no operations are listed)."""
    yield from _through_ase(path, ctx, "cif", adjust=_cif_structure)


# GPAW's text log: a "Positions:" line opens each configuration it calculates (ASE's reader splits
# the log there); "Symmetries present (total): N" the operations it found for each
_GPAW_CONFIG = re.compile(r"^Positions:[ \t]*$", re.M)
_GPAW_SYMMETRIES = re.compile(r"^Symmetries present \(total\): *(\d+)", re.M)


def _gpaw_steps(text: str, images: list, ctx: ReadContext) -> list:
    """GPAW's log: one structure per configuration GPAW calculated, its energy the free energy
    GPAW prints (``Free energy:``, the energy its forces belong to; ASE's reader gives the energy
    extrapolated to zero smearing), the operations GPAW found for the last (``nsym``), and a log
    that ends inside a configuration's calculation (ASE's reader stops before it) cut short."""
    found = _GPAW_SYMMETRIES.findall(text)
    if found:
        ctx.settings["nsym"] = int(found[-1])
    for atoms in images:
        calc = atoms.calc
        free = (getattr(calc, "energy_contributions", None) or {}).get("free energy")
        if free is not None and "uncorrected_energy" not in (calc.parameters or {}):
            calc.results["free_energy"] = float(free)    # ASE keeps each line's contribution
    ctx.warn("a GPAW log holds one structure per configuration GPAW calculated: an ASE "
             "line-search optimiser's trial configurations are among them (the trajectory the "
             "optimiser wrote holds its steps alone)")
    started = len(_GPAW_CONFIG.findall(text))
    done = len(images)                       # ASE keeps a first configuration with no energy
    if images and (images[-1].calc is None or images[-1].calc.results.get("energy") is None):
        done -= 1
    if started > done:
        where = f"after step {done - 1} ({done} completed steps)" if done else "in its first step"
        ctx.truncated(f"truncated {where}: GPAW's log ends inside the calculation of "
                      f"configuration {done + 1}; job killed or still running")
        return images[:done] if done else images
    return images


def read_gpaw(path, ctx: ReadContext):
    """GPAW text output through ASE (:func:`_gpaw_steps`)."""
    ctx.settings.update({"code": "gpaw"})
    yield from _through_ase(path, ctx, "gpaw-out", adjust=_gpaw_steps)


# GPAW prints positions and cell vectors with 6 decimals (Å): equal to this, one structure
_GPAW_PRINTED = 1e-5


def _same_structure(a, b) -> bool:
    """Two structures (``ase.Atoms`` or Frames) equal to GPAW's printed digits."""
    na, nb = np.asarray(a.numbers), np.asarray(b.numbers)
    return na.shape == nb.shape and bool(np.array_equal(na, nb)) and \
        bool(np.allclose(np.asarray(a.cell), np.asarray(b.cell), rtol=0, atol=_GPAW_PRINTED)) and \
        bool(np.allclose(a.positions, b.positions, rtol=0, atol=_GPAW_PRINTED))


# outputs of codes with no reader here (registry's banners) that an ASE calculator of that code
# leaves beside the optimiser's trajectory: the code -> (ASE's calculator name, the line the code
# prints when it ends, whether the calculator runs the code anew for each step, so that an output
# without that line was cut by a kill: ABINIT's and NWChem's file-I/O calculators; ASE's CP2K keeps
# one cp2k_shell for the whole run, which prints it when the calculator is closed). The lines as
# Debian's CP2K 2023.1, ABINIT 9.6.2 and NWChem 7.0.2 print them (tests/data/ase_calc_trials).
_CALCULATOR_OUTPUTS = {
    "CP2K": ("cp2k", re.compile(rb"PROGRAM ENDED AT"), "'PROGRAM ENDED AT'", False),
    "ABINIT": ("abinit", re.compile(rb"^ Calculation completed\.", re.M),
               "'Calculation completed.'", True),
    "NWChem": ("nwchem", re.compile(rb"^ Total times", re.M), "'Total times'", True),
}
CLOSING_LINES = {code: (line, said) for code, (_, line, said, _) in _CALCULATOR_OUTPUTS.items()}
"""The line each of those codes prints as it ends, and it in words (an output without it was
cut short: the registry says so of such an output listed alone)."""


def calculator_folder(folder, names, format, ctx):
    """The folder of a relaxation an ASE optimiser drove: one ASE trajectory of its steps and,
    beside it, what the calculator left of the same relaxation:

    * a GPAW log that starts at the trajectory's first frame and holds its last
      (:func:`_gpaw_log_of`; GPAW's log also holds a line-search optimiser's trials);
    * the output of a code driftwatch has no reader for (CP2K, ABINIT, NWChem) when the
      trajectory's calculator is that code;
    * a one-frame trajectory equal to its last frame, with no calculator or the same one at the
      same energy (a calculator's restart file: ASE's CP2K calculator writes
      ``cp2k_restart.traj``; :func:`_restart_of`);
    * one-frame structure files (extended XYZ, POSCAR) equal to its first frame (the start a
      script wrote beside it: ``start.xyz``) or its last (``final.xyz``, atomate2's
      ``final_atoms_object.xyz``, :data:`FINAL_STRUCTURES`): :func:`_copy_of`.

    The trajectory is read and those are named in its warnings; after the steps, what only they
    say is taken (:func:`_calculator_files_say`). None when the folder holds nothing of these, or
    anything else that could be another run's (a second trajectory of several frames, a log or
    output of another relaxation or code): each file is then read as a run of its own."""
    from .registry import FolderPick, detect, output_code
    if format not in (None, "traj"):
        return None
    trajs = [n for n in names if strip_compression(n).lower().endswith(".traj")]
    if not trajs or len(trajs) == len(names) == 1:      # nothing beside a lone trajectory
        return None
    folder = Path(folder)
    logs, outputs = [], []               # what beside the trajectories could be the calculator's
    copies = {}                          # one-structure files: their format
    for n in names:
        if n in trajs:
            continue
        path = folder / n
        try:
            fmt = detect(path)
            if fmt == "gpaw-out":
                logs.append(n)
            elif fmt in _COPY_FORMATS:
                copies[n] = fmt
        except ForeignOutputError:              # an output of a code with no reader here
            code = output_code(path)
            if code is not None:
                outputs.append((n, code[0]))
        except (DriftwatchError, OSError):
            pass
    if len(logs) > 1 or not (logs or outputs or copies or len(trajs) > 1):
        return None                      # (no trajectory opened: discovery stays cheap)
    opened, main, single = {}, None, None
    for n in trajs:
        got = _ends_of(folder / n)
        if got is None:
            return None                  # a trajectory ASE cannot open: a (failing) run of its own
        if got[0] > 1:
            if main is not None:
                return None              # two of several frames: two runs (a folder of many)
            main = n
        elif single is None:
            single = got[1]
        elif not _same_structure(single, got[1]):
            return None                  # one-frame files of two structures: no restart copies
        opened[n] = got
    if main is None:
        return None
    _, first, last, described = opened[main]
    restarts = [n for n in trajs if n != main and _restart_of(opened[n][1], last)]
    ends = {n: _copy_of(folder / n, fmt, first, last) for n, fmt in copies.items()}
    others = tuple(n for n, what in ends.items() if not what)   # runs of their own, said
    ends = {n: what for n, what in ends.items() if what}
    if len(restarts) != len(trajs) - 1:
        return None
    calculator = str(getattr(first.calc, "name", "") or "").lower()
    if any(_CALCULATOR_OUTPUTS.get(code, ("",))[0] != calculator for _, code in outputs):
        return None                      # another code's output: a run of its own
    if not (logs or outputs or restarts or ends):
        return None
    for n in trajs + logs + [n for n, _ in outputs] + list(copies):
        ctx.uses(folder / n)
    told = [_gpaw_log_of(folder / n, first, last) for n in logs]
    if None in told:
        return None
    traj = folder / main
    notes = [f"{n} beside it is this relaxation's GPAW log (it starts at the trajectory's first "
             f"frame and holds its last): read {main}, the optimiser's steps (the log holds every "
             f"configuration GPAW calculated, a line-search optimiser's trials among them)"
             for n in logs]
    notes += [f"{n} beside it is {code}'s output of this relaxation (the trajectory's calculator "
              f"is {code}): read {main}, the optimiser's steps" for n, code in outputs]
    notes += [f"{n} beside it is a one-frame copy of the trajectory's last frame (a calculator's "
              f"restart file), not a run of its own" for n in restarts]
    notes += [f"{n} beside it is atomate2's copy of the trajectory's last frame, not a run of "
              f"its own" + ("" if described else "; the trajectory records no optimiser "
                            "settings (as atomate2 writes it), so whether the relaxation "
                            "converged is said only by the job's task document (its state)")
              if strip_compression(n) == FINAL_STRUCTURES else
              f"{n} beside it holds the trajectory's {which}, not a run of its own"
              for n, which in ends.items()]
    return FolderPick([("", traj, "traj")], tuple(notes), also=tuple(logs + restarts) + tuple(
        n for n, _ in outputs) + tuple(ends), others=others, after=functools.partial(
            _calculator_files_say, [(folder / n, *t) for n, t in zip(logs, told)],
            [(folder / n, code) for n, code in outputs]))


def _gpaw_log_of(log: Path, first, last):
    """(its configurations' count, the log's own ReadContext) when a GPAW log is the log of the
    relaxation whose trajectory runs from ``first`` to ``last``: its first configuration is
    ``first`` and it holds ``last`` (a log of another relaxation from the same start, with other
    settings, ends elsewhere: a run of its own); else None."""
    from .registry import iter_frames
    said = ReadContext(log)
    try:
        frames = list(iter_frames(log, "gpaw-out", context=said))
    except Exception:  # noqa: BLE001 - a log that cannot be read here is a run of its own
        return None
    if not (_same_structure(frames[0], first) and any(_same_structure(fr, last)
                                                      for fr in frames)):
        return None
    return len(frames), said


def _restart_of(frame, last) -> bool:
    """A one-frame trajectory is a calculator's restart file of the relaxation that ended at
    ``last``: the same structure, and no calculator, or the same one with the same energy (a
    single point of the final structure with another calculator is a run of its own)."""
    if not _same_structure(frame, last):
        return False
    calc = getattr(frame, "calc", None)
    if calc is None:
        return True
    mine = getattr(last, "calc", None)
    try:
        return mine is not None and str(calc.name) == str(mine.name) and abs(
            frame.get_potential_energy() - last.get_potential_energy()) <= 1e-6
    except Exception:  # noqa: BLE001 - no energy to compare: not the same calculation
        return False


_COPY_FORMATS = {"extxyz": "extxyz", "vasp-poscar": "vasp"}
"""Formats of one-structure files :func:`calculator_folder` takes for copies of a trajectory's
first or last frame (driftwatch's name -> ASE's)."""


COPY_BYTES = 1 << 20
"""A one-structure copy is read only when it fits in this many (decompressed) bytes: a larger
file beside a trajectory is not opened whole at each discovery, and is a run of its own."""


def _copy_of(path: Path, fmt: str, first, last) -> str | None:
    """What a one-structure file beside an ASE trajectory holds of it: "first frame (its start)",
    "last frame" (atomate2's ``final_atoms_object.xyz``, a script's ``final.xyz``) or "first and
    last frames" (a relaxation that did not move); None when it holds anything else (another
    structure, several: atomate2's final structures of several jobs, :func:`read_extxyz`; the
    same structure with another energy: a single point of another calculator)."""
    import ase.io
    try:
        check_readable(path)
        text = peek(path, COPY_BYTES + 1)
        if len(text) > COPY_BYTES:
            return None
        if fmt == "extxyz":               # one frame: nothing after its natoms + 2 lines
            lines = text.splitlines()
            if any(ln.strip() for ln in lines[int(lines[0].split()[0]) + 2:]):
                return None
        frame = ase.io.read(io.StringIO(text.decode("utf-8", "replace")),   # (read once,
                            format=_COPY_FORMATS[fmt])                       # decompressed)
    except Exception:  # noqa: BLE001 - a file ASE cannot read is a run (a failing one) of its own
        return None
    at_start, at_end = (_same_structure(frame, ref) and _same_energy(frame, ref)
                        for ref in (first, last))
    return ("first and last frames" if at_start and at_end else "first frame (its start)"
            if at_start else "last frame" if at_end else None)


def _same_energy(copy, frame) -> bool:
    """A structure file's energy is the trajectory frame's, to 1e-5 eV (extended XYZ prints 8
    decimals or more), when both carry one (either without: nothing to compare)."""
    energies = []
    for atoms in (copy, frame):
        try:
            energies.append(atoms.get_potential_energy() if atoms.calc is not None else None)
        except Exception:  # noqa: BLE001 - a calculator with no energy
            energies.append(None)
    return None in energies or abs(energies[0] - energies[1]) <= 1e-5


def _ends_of(path: Path):
    """(frames, first, last, whether an ASE optimiser or dynamics described itself in it) of an
    ASE trajectory that is a regular file ASE can open, else None (a FIFO is never opened: it
    would block)."""
    from ase.io.trajectory import Trajectory
    try:
        check_readable(path)
        with Trajectory(str(path), "r") as t:
            n = len(t)
            return (n, t[0], t[-1], bool(getattr(t, "description", None))) if n else None
    except Exception:  # noqa: BLE001 - anything ASE cannot read is left to its own run
        return None


def _calculator_files_say(logs: list, outputs: list, ctx: ReadContext, last) -> None:
    """After the trajectory's steps (``last``: its last frame): what the calculator's files beside
    it say of the run (see :func:`calculator_folder`): a GPAW log (``(path, configurations, its
    ReadContext)``, read when the folder was picked), :func:`_gpaw_log_says`; an output of a code
    with no reader, that it ends without the code's closing line."""
    for log, n, said in logs:
        _gpaw_log_says(log, n, said, ctx)
    for path, code in outputs:
        _, ended, line, per_step = _CALCULATOR_OUTPUTS[code]
        if code == "ABINIT":
            found = _ABINIT_NSYM.findall(peek_text(path, 1 << 22))
            if found:
                ctx.settings.setdefault("nsym", int(found[-1]))
        if ended.search(tail_bytes(path, 16_384)):
            continue
        if per_step:
            why = "job killed or still running"
            ctx.warn(f"{path.name} beside it, {code}'s output of this relaxation's last "
                     f"calculation, ends without {code}'s closing line ({line}): the calculation "
                     f"after the trajectory's last step was cut ({why})")
            if not ctx.unfinished or ctx.unfinished.startswith("stopped without converging"):
                ctx.unfinished = f"cut short: {why}"        # (the more specific reason)
        else:
            ctx.warn(f"{path.name} beside it, {code}'s output of this relaxation, ends without "
                     f"{code}'s closing line ({line}): the job was killed, is still running, or "
                     f"its calculator was never closed")


def _gpaw_log_says(log: Path, n: int, said: ReadContext, ctx: ReadContext) -> None:
    """What a relaxation's GPAW log (``n`` configurations; ``said``: what reading it noted) says
    that its trajectory does not: the operations GPAW found (``nsym``) and a log that ends inside
    a configuration's calculation (a job killed or still running)."""
    if "nsym" in said.settings:
        ctx.settings.setdefault("nsym", said.settings["nsym"])
    if said.unfinished and not ctx.unfinished:
        why = said.unfinished.split(": ", 1)[-1]
        ctx.warn(f"{log.name} beside it, this relaxation's GPAW log, ends inside the calculation "
                 f"of configuration {n + 1} ({why}): the trajectory's last step is the last one "
                 f"GPAW completed")
        ctx.unfinished = said.unfinished


def no_folder(folder, names, format, ctx):
    """A row of the code table that claims no folder: GPAW's log is read as a file, ABINIT has no
    reader (beside the ASE trajectory of the same relaxation, :func:`calculator_folder` claims
    the folder)."""
    return None


# the operations ABINIT used, as its main output echoes its variables ("nsym 48")
_ABINIT_NSYM = re.compile(r"^ +nsym +(\d+) *$", re.M)


def abinit_symmetry(code_settings: dict, dimension: int = 3) -> dict | None:
    """ABINIT's own symmetry handling, known only from its main output beside an ASE run
    (``nsym``: the operations it used; ASE's trajectory stores none of its parameters): by
    default ABINIT finds the structure's operations within its ``tolsym`` and symmetrises
    density, forces and stress with them (ABINIT's documentation of nsym and tolsym, from
    memory; its log says it symmetrised the atomic coordinates). Off with ``nsym 1``."""
    n = (code_settings or {}).get("nsym")
    if not n or int(n) == 1:
        return None
    cell = " of the slab's 3D cell" if dimension == 2 else ""
    return {"operations": int(n),
            "how": f"ABINIT symmetrised forces and stress with the {int(n)} symmetry operations"
                   f"{cell} it found (its output: nsym {int(n)}; ASE runs ABINIT anew at each "
                   f"step, which finds them again)",
            "undo": "nsym 1"}


def gpaw_symmetry(code_settings: dict, dimension: int = 3) -> dict | None:
    """GPAW's own symmetry handling: on unless its ``symmetry`` parameter is 'off' or sets
    ``point_group`` False (GPAW then symmetrises forces and stress with the operations it found,
    by default those without a fractional translation); ``nsym``: its log's "Symmetries present
    (total): N". From a trajectory, the calculator's stored parameters (ASE stores those not at
    their defaults)."""
    s = code_settings or {}
    sym = s.get("symmetry")
    if sym == "off" or (isinstance(sym, dict) and sym.get("point_group") is False):
        return None
    n = s.get("nsym")
    what = ("1 symmetry operation (the identity only)" if n == 1 else
            f"{n} symmetry operations" if n else "the symmetry operations it found")
    cell = " of the slab's 3D cell" if dimension == 2 else ""
    setting = ("its default symmetry setting: the operations without a fractional translation"
               if sym is None else f"symmetry={sym!r}")
    return {"operations": None if n is None else int(n),
            "how": f"GPAW symmetrised forces and stress with {what}{cell} ({setting})",
            "undo": "symmetry='off'"}


def peek_text(path, size: int) -> str:
    return peek(path, size).decode("utf-8", "replace")
