"""Frames, runs and the read context shared by every adapter.

A reader yields :class:`Frame` objects, one per *completed* ionic step. It may
also take a :class:`ReadContext` to report warnings (a truncated file, a single
structure where a trajectory was expected) and the DFT code's own settings
(symmetry switches). :func:`collect` stacks frames into a frozen :class:`Run`.

Units: lengths Å, energies eV, forces eV/Å, stress eV/Å³ (Voigt order
xx yy zz yz xz xy, ASE's sign convention: positive = tensile).
"""
from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable, Iterator

import numpy as np

from ..errors import AtomsChangeError, DamagedFrameError, InputError

__all__ = ["Frame", "Run", "ReadContext", "frame_from_atoms", "collect", "checked", "file_stamp",
           "folder_listing", "position_precision", "decimals"]


@dataclass(frozen=True, eq=False)
class Frame:
    """One completed ionic step."""

    cell: np.ndarray
    """(3, 3) float, rows are the cell vectors, Å."""
    positions: np.ndarray
    """(N, 3) float, cartesian, Å."""
    numbers: np.ndarray
    """(N,) int, atomic numbers."""
    pbc: np.ndarray
    """(3,) bool, periodic along each cell vector."""
    step: int
    """Ionic step index as the code counts it, 0-based."""
    energy: float | None = None
    """Total energy, eV (the code's force-consistent energy where it has one)."""
    forces: np.ndarray | None = None
    """(N, 3) eV/Å."""
    stress: np.ndarray | None = None
    """(6,) eV/Å³, Voigt (xx, yy, zz, yz, xz, xy), ASE sign convention."""


@dataclass(frozen=True, eq=False, repr=False)
class Run:
    """A whole relaxation, frames stacked along a leading axis of length n."""

    source: str
    """The file actually read."""
    format: str
    """Registry name of the adapter that read it."""
    cells: np.ndarray
    """(n, 3, 3) Å."""
    positions: np.ndarray
    """(n, N, 3) Å, cartesian."""
    numbers: np.ndarray
    """(N,) int."""
    pbc: np.ndarray
    """(3,) bool (of the first frame)."""
    steps: np.ndarray
    """(n,) int, ionic step index as the code counts it, 0-based."""
    energies: np.ndarray | None = None
    """(n,) eV, NaN where a frame has none; None when no frame has one."""
    forces: np.ndarray | None = None
    """(n, N, 3) eV/Å, NaN where missing; None when no frame has them."""
    stress: np.ndarray | None = None
    """(n, 6) eV/Å³ Voigt, NaN where missing; None when no frame has it."""
    warnings: tuple = ()
    """Human-readable warnings, each naming the file (truncation, single structure, ...)."""
    code_settings: dict = field(default_factory=dict)
    """The DFT code's own settings that bear on symmetry, e.g.
    ``{"code": "vasp", "ISYM": 2, "SYMPREC": 1e-5, "ISIF": 3, "IBRION": 2}`` or
    ``{"code": "espresso", "calculation": "vc-relax", "nosym": False, "noinv": False,
    "cell_dofree": "2Dxy", "nsym": 8}``; ``{}`` when unknown."""
    title: str | None = None
    """A title found in the file (POSCAR comment, system name), else None."""
    run_dir: str | None = None
    """The folder, for folder runs; None when a single file was given."""
    stages: tuple = ()
    """Multi-stage runs (custodian ``.relaxN`` files, stage folders, the calculations of a task
    document): one dict per stage in the order they ran, ``{"name", "source", "format",
    "first_frame", "n_frames", "step_offset"}`` (frame indices into this run; the code's own step
    number of a frame is ``steps[i] - step_offset``). Empty for a single-stage run."""
    position_precision: float | None = None
    """Å: the largest rounding error of one atom's cartesian position as the file prints it (the
    Euclidean norm of the error vector: ``sqrt(3) * 0.5 * 10**-d`` for cartesian coordinates with
    ``d`` decimals, ``0.5 * 10**-d * (|a| + |b| + |c|)`` (largest over frames) for fractional ones).
    None when unknown or when the file holds binary doubles (``.traj``, ase.db)."""
    kind: str = "trajectory"
    """``"trajectory"`` (ionic steps as the code wrote them) or ``"end-points"`` (only the initial
    and the final structure of a relaxation, as databases of initial/final pairs store them: steps
    0 and 1 are those two structures, not ionic steps)."""
    unfinished: str | None = None
    """Why the run's last stage ended before the code finished it, in words (cut short: a job
    killed or still running; or stopped at its step limit: pw.x's nstep, VASP's NSW), else None.
    Its final structure is then not a relaxed one."""
    not_relaxation: str | None = None
    """What the ionic steps are when they are no relaxation, in words (``"molecular dynamics
    (IBRION = 0)"``, an image of a nudged elastic band, ...; the code's ``run_kind``); None for a
    relaxation or when unknown. The verdict then compares how the structure moved, first to last."""
    structure_key: dict | None = None
    """For one structure of a many-structure file (``FILE::NAME``): ``{"key": info or key-value name,
    "value": NAME}``; None otherwise. (How many structures the file holds is no field: the
    campaign cache serves a structure's result while others are appended to the file.)"""
    species: tuple | None = None
    """(N,) the code's own species labels where it tells atoms of one element apart (pw.x's
    ATOMIC_SPECIES ``Fe1``, ``Fe2``: other starting magnetisations or Hubbard U), else None. spglib
    is given one type per label (:attr:`symmetry_types`): the structure the code computed."""
    inputs: tuple = ()
    """What the read depended on, for caches: ``(kind, path, stamp)`` with kind ``"file"`` (stamp
    = ``[size, mtime_ns, ctime_ns, inode]`` when the reader opened it, None if it was missing) or
    ``"folder"`` (stamp = sha256 of the sorted entry names it listed)."""

    def __len__(self) -> int:
        return len(self.cells)

    @property
    def natoms(self) -> int:
        return len(self.numbers)

    @property
    def symmetry_types(self) -> np.ndarray:
        """(N,) int: the atom types spglib is given: the atomic numbers, told apart further by
        :attr:`species` when the code's labels tell atoms of one element apart."""
        if self.species is None:
            return self.numbers
        _, index = np.unique(np.array(self.species, dtype=str), return_inverse=True)
        return self.numbers * 1000 + index.astype(int)

    def __repr__(self) -> str:
        from collections import Counter

        from ase.data import chemical_symbols
        counts = Counter(int(z) for z in self.numbers)
        formula = "".join(f"{chemical_symbols[z] if 0 < z < len(chemical_symbols) else z}"
                          f"{n if n > 1 else ''}" for z, n in sorted(counts.items()))
        extra = f", {len(self.stages)} stages" if self.stages else ""
        extra += (f", {len(self.warnings)} warning{'s' if len(self.warnings) != 1 else ''}"
                  if self.warnings else "")
        return (f"<Run {self.source!r} ({self.format}): {len(self)} "
                f"frame{'s' if len(self) != 1 else ''}, {formula}, "
                f"steps {int(self.steps[0])}..{int(self.steps[-1])}{extra}>")

    def _index(self, i: int) -> int:
        n = len(self)
        k = int(i) + n if int(i) < 0 else int(i)
        if not 0 <= k < n:
            raise IndexError(f"frame {i} out of range: the run has {n} frames")
        return k

    def to_atoms(self, i: int = -1):
        """Frame ``i`` as an ``ase.Atoms`` (cell, positions, numbers, pbc), with its energy, forces
        and stress as a single-point calculator when the file had them."""
        from ase import Atoms
        k = self._index(i)
        atoms = Atoms(numbers=self.numbers, positions=self.positions[k], cell=self.cells[k],
                      pbc=self.pbc)
        results = {}
        if self.energies is not None and np.isfinite(self.energies[k]):
            results["energy"] = float(self.energies[k])
        if self.forces is not None and np.all(np.isfinite(self.forces[k])):
            results["forces"] = np.array(self.forces[k])
        if self.stress is not None and np.all(np.isfinite(self.stress[k])):
            results["stress"] = np.array(self.stress[k])
        if results:
            from ase.calculators.singlepoint import SinglePointCalculator
            atoms.calc = SinglePointCalculator(atoms, **results)
        atoms.info["step"] = int(self.steps[k])
        return atoms

    def to_structure(self, i: int = -1):
        """Frame ``i`` as a pymatgen ``Structure`` (needs pymatgen; periodic cells only)."""
        from pymatgen.core import Lattice, Structure
        k = self._index(i)
        return Structure(Lattice(self.cells[k], pbc=tuple(bool(p) for p in self.pbc)),
                         [int(z) for z in self.numbers], self.positions[k],
                         coords_are_cartesian=True)


STAGE_DIR = re.compile(r"^(relax|stage|restart)[-_.]?(\d+)$", re.I)
MAX_STAGES = 20
"""Stage folders: ``relax1/ relax2/`` (workflow managers' double relaxations), ``stage_1/``,
``restart-2/``, numbered consecutively from 0 or 1 with one name, at most :data:`MAX_STAGES`. A
folder of ``run-0001/ run-0002/ ...`` (or of 500 ``relaxN/``) is a campaign of runs, not the stages
of one (see :func:`stage_sequence`)."""


def stage_sequence(names) -> bool:
    """True when stage-folder names (``STAGE_DIR`` matches) form one run's stages: one word, numbers
    consecutive from 0 or 1, at most :data:`MAX_STAGES` of them."""
    got = sorted({(m.group(1).lower(), int(m.group(2))) for m in map(STAGE_DIR.match, names) if m})
    seq = [n for _, n in got]
    return (bool(seq) and len({w for w, _ in got}) == 1 and len(seq) <= MAX_STAGES
            and seq[0] in (0, 1) and seq == list(range(seq[0], seq[0] + len(seq))))


def stage_folders(folder) -> list[tuple[tuple[str, int], Path, list[str]]] | None:
    """The stage subfolders of ``folder`` (``STAGE_DIR`` names forming one :func:`stage_sequence`)
    as ``((word, number), subfolder, sorted names of its visible files)``, in name order; an
    unlistable subfolder is left out. None when ``folder`` cannot be listed or its stage-named
    subfolders are not one run's stages (a campaign of ``run-0001/ run-0002/ ...``). Each code's
    adapter decides which of them hold a stage of its run."""
    try:
        subs = sorted(d for d in Path(folder).iterdir() if d.is_dir() and STAGE_DIR.match(d.name))
    except OSError:
        return None
    if not stage_sequence({d.name for d in subs}):
        return None
    out = []
    for d in subs:
        try:
            names = sorted(p.name for p in d.iterdir() if p.is_file() and not p.name.startswith("."))
        except OSError:
            continue
        m = STAGE_DIR.match(d.name)
        out.append(((m.group(1).lower(), int(m.group(2))), d, names))
    return out


def file_stamp(path) -> list | None:
    """``[size, mtime_ns, ctime_ns, inode]`` of a file (symlinks followed), None if it is missing.

    The ctime cannot be set back by user tools, so an unchanged stamp means unchanged bytes."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    return [st.st_size, st.st_mtime_ns, st.st_ctime_ns, st.st_ino]


def folder_listing(folder) -> str | None:
    """sha256 of the sorted names of a folder's entries (hidden ones included), None if unlistable."""
    import hashlib
    try:
        names = sorted(os.listdir(folder))
    except OSError:
        return None
    h = hashlib.sha256()
    for n in names:
        h.update(n.encode("utf-8", "surrogateescape") + b"\0")
    return h.hexdigest()


class ReadContext:
    """What a reader reports besides frames: warnings, code settings, a title, the files it used.

    Readers call :meth:`uses` for every file they open besides the one they were given (an INCAR,
    a pw.x input) and :meth:`lists` for every folder whose listing decides what they read; the
    campaign cache keys a run on exactly these (``Run.inputs``).
    """

    def __init__(self, path):
        self.path = str(path)
        self.warnings: list[str] = []
        self.settings: dict = {}
        self.title: str | None = None
        self.files: dict[str, list | None] = {}
        self.folders: dict[str, str | None] = {}
        self.parts: dict[str, tuple] = {}
        self.rounding: tuple | None = None
        """``("cartesian", step_Å)`` or ``("fractional", step)``: the last printed digit of the
        positions (see :attr:`Run.position_precision`); None when unknown."""
        self.file_stages: list = []
        """``[(name, n_frames), ...]`` when one file holds several stages (a task document's
        calculations, pw.x runs appended to one output), in the order they ran."""
        from .batch import STRUCTURE_KEYS
        self.structure_keys: tuple = STRUCTURE_KEYS
        """Keys naming the structure a frame belongs to in many-structure files (``inputs.
        structure_keys``; :mod:`driftwatch.adapters.batch`)."""
        self.kind: str = "trajectory"
        """``"trajectory"`` or ``"end-points"`` (only an initial and a final structure)."""
        self.structure: dict | None = None
        """``{"key", "value"}`` for one structure of a many-structure file."""
        self.not_relaxation: str | None = None
        """What the steps are when they are no relaxation (:attr:`Run.not_relaxation`)."""
        self.unfinished: str | None = None
        """Why the stage being read ended early (:attr:`Run.unfinished`; :meth:`truncated`)."""
        self.stage_count: int = 1
        """How many stages are read together (a reader whose file may not belong to the stages
        after it, an archived attempt, checks that only when there are several)."""
        self.species: tuple | None = None
        """Species labels per atom when the code tells atoms of one element apart
        (:attr:`Run.species`)."""
        self.held: np.ndarray | None = None
        """(N, 3) bool: the force components the code's own constraints hold (pw.x's ``if_pos``,
        VASP's selective dynamics); :func:`collect` zeroes them and says so (:meth:`hold`)."""
        self.held_by: str = ""
        self.held_zero: np.ndarray | None = None
        self.carry: dict = {}
        """What a reader leaves for the reader of the next stage of the same run (pw.x: the last
        configuration it printed but never evaluated, which a ``restart_mode='restart'`` run
        continues from without printing it)."""

    def uses(self, path) -> None:
        """Record that the read depends on ``path`` (stamped now; first use wins)."""
        key = str(path)
        if key not in self.files:
            self.files[key] = file_stamp(key)

    def lists(self, folder) -> None:
        """Record that the read depends on the names in ``folder``."""
        key = str(folder)
        if key not in self.folders:
            self.folders[key] = folder_listing(key)

    def part(self, path, fmt: str, name: str) -> None:
        """Record that the read depends only on structure ``name`` of the many-structure file
        ``path`` (a format of :data:`~driftwatch.adapters.batch.PART_FORMATS`), not on the rest.
        An ase.db in WAL mode (its log beside it), whose new rows leave the file's stamp alone, has
        the structure's digest taken now, so that the cache can tell a change during the read."""
        import sqlite3

        from .batch import member_digest, wal_of
        self.uses(path)
        now = None
        if os.path.exists(wal_of(path)):
            try:
                now = member_digest(path, fmt, tuple(self.structure_keys), name)
            except (sqlite3.Error, OSError, ValueError):     # the reader says what is wrong
                now = None
        self.parts[str(path)] = (fmt, name, now)

    def inputs(self) -> tuple:
        """``(kind, path, stamp)`` of every input: ``("file", path, stamp)``, ``("folder", path,
        listing digest)`` and, for one structure of a many-structure file, ``("part", (path,
        format, structure keys, name, its digest when read or None), stamp)``."""
        def file(p, s):
            if p in self.parts:
                fmt, name, now = self.parts[p]
                return "part", (p, fmt, tuple(self.structure_keys), name, now), s
            return "file", p, s
        return tuple([file(p, s) for p, s in sorted(self.files.items())]
                     + [("folder", p, s) for p, s in sorted(self.folders.items())])

    def round_to(self, kind: str, step: float) -> None:
        """Positions are printed to ``step`` (Å for "cartesian", unitless for "fractional");
        the coarsest seen wins."""
        if self.rounding is None or (self.rounding[0] == kind and step > self.rounding[1]):
            self.rounding = (kind, float(step))

    def truncated(self, message: str) -> None:
        """Warn that the file is cut short (``message`` starts "truncated ...") and mark the run
        unfinished."""
        from ._io import CUT_COPY, cut_stream
        if cut_stream(self.path.split("::")[0]):   # a compressed copy cut, not a killed job
            killed = "job killed or still running"
            message = message.replace(killed, CUT_COPY) if killed in message \
                else f"{message} ({CUT_COPY})"
            self.warn(message)
            self.unfinished = f"cut short: {CUT_COPY}"
            return
        self.warn(message)
        self.unfinished = "cut short: job killed or still running"

    def hold(self, mask, by: str, zero=None) -> None:
        """The code's constraints held the components ``mask`` ((N, 3) bool; ``by``: whose flags)
        fixed; ``zero``: the Cartesian force components that makes zero (default ``mask``)."""
        mask = np.asarray(mask, bool)
        if mask.any() and self.held is None:
            self.held, self.held_by = mask, by
            self.held_zero = mask if zero is None else np.asarray(zero, bool)

    def warn(self, message: str) -> None:
        """Record a warning, prefixed with the file name unless it starts with a path already."""
        head = message.split(": ", 1)[0]
        if head != self.path and not (len(head) < 4096 and os.path.exists(head)):
            message = f"{self.path}: {message}"
        if message not in self.warnings:
            self.warnings.append(message)


def frame_from_atoms(atoms, step: int) -> Frame:
    """Convert an ``ase.Atoms`` (with an optional single-point calculator) to a Frame.

    Forces are those ``atoms.get_forces()`` gives (what ASE's optimisers converge on): the file's
    constraints applied, so an atom ``FixAtoms`` holds (a slab's fixed layers; extended XYZ
    ``move_mask``) has zero force and does not count in ``fmax``."""
    energy = forces = stress = None
    calc = atoms.calc
    if calc is not None:
        res = getattr(calc, "results", {}) or {}
        energy = res.get("free_energy", res.get("energy"))
        energy = None if energy is None else float(energy)
        forces = res.get("forces")
        if forces is not None and atoms.constraints:
            forces = np.array(forces, float)
            for c in atoms.constraints:     # as Atoms.get_forces: not the potential-energy terms
                if not hasattr(c, "adjust_potential_energy"):
                    c.adjust_forces(atoms, forces)
        stress = res.get("stress")
        if stress is not None:
            stress = np.asarray(stress, float)
            if stress.shape in ((3, 3), (9,)):       # ase.db keeps a 3x3 stress flattened
                stress = stress.reshape(9)[[0, 4, 8, 5, 2, 1]]
    return Frame(
        cell=np.array(atoms.cell.array, float),
        positions=np.array(atoms.positions, float),
        numbers=np.array(atoms.numbers, int),
        pbc=np.array(atoms.pbc, bool),
        step=int(step),
        energy=energy,
        forces=None if forces is None else np.array(forces, float),
        stress=stress,
    )


class StraightLine:
    """Whether the frames seen so far (:meth:`add`) are three or more of one cell, each the one
    before moved by the same nonzero displacement (Å, to ``tol``): a linear interpolation (a
    band's images, as NEB set-ups write them), never the steps of a code, whose forces change from
    step to step."""

    BAND = "its structures are equally spaced on one straight line: images interpolated between " \
           "two end points"

    def __init__(self, tol: float = 1e-8):
        self.tol, self.n, self.holds = tol, 0, True
        self._cell = self._last = self._move = None

    def add(self, frame) -> None:
        if not self.holds:
            return
        pos = np.asarray(frame.positions, float)
        if self.n == 0:
            self._cell = np.asarray(frame.cell, float)
        elif np.shape(pos) != np.shape(self._last) or \
                np.abs(np.asarray(frame.cell, float) - self._cell).max() > self.tol:
            self.holds = False
        else:
            move = pos - self._last
            if self._move is None:
                self.holds = np.abs(move).max() > 1e3 * self.tol
                self._move = move
            elif np.abs(move - self._move).max() > self.tol:
                self.holds = False
        self.n += 1
        self._last = pos

    @property
    def band(self) -> bool:
        return self.holds and self.n >= 3


def constrained_note(k: int, n: int, by: str, zeroed: bool) -> str:
    """The warning for a run of ``n`` atoms, ``k`` of them held (in part or whole) by ``by``."""
    return (f"{k} of {n} atoms are held (in part or whole) by {by}: a group the structure lost, "
            f"or did not gain, may be the constraint's doing rather than the relaxation's"
            + ("; fmax counts their free force components only" if zeroed else ""))


def note_fix_symmetry(atoms, settings: dict, warn=None) -> None:
    """Record ASE's constraints on ``atoms`` (a run's first frame) in its code settings:
    ``FixSymmetry``'s operations (spglib's, at its own symprec, on the structure it was made
    with), which the relaxation cannot lower (:func:`driftwatch.adapters.registry.
    symmetry_setting`), and how many atoms the other constraints hold (``FixAtoms``,
    ``FixCartesian``, extended XYZ's ``move_mask``, ...), said through ``warn`` (the frames'
    forces already have those constraints applied: :func:`frame_from_atoms`)."""
    held, whole, names = np.zeros(len(atoms), bool), np.zeros(len(atoms), bool), []
    for c in getattr(atoms, "constraints", None) or ():
        name = type(c).__name__
        if name == "FixSymmetry" and hasattr(c, "rotations"):
            settings.setdefault("code", "ase")
            prec = getattr(c, "symprec", None)        # ASE before 3.23 did not keep it
            settings["fix_symmetry"] = {"operations": int(len(c.rotations)),
                                        "symprec": None if prec is None else float(prec)}
        elif hasattr(c, "adjust_forces") and not hasattr(c, "adjust_potential_energy"):
            probe = np.random.default_rng(0).normal(size=(len(atoms), 3))
            moved = probe.copy()
            try:
                c.adjust_forces(atoms, moved)
            except Exception:            # a constraint that cannot act on this frame: unsaid
                continue
            now = np.abs(moved - probe) > 1e-12
            if now.any():
                held |= now.any(axis=1)
                whole |= now.all(axis=1)
                names.append(name)
    if held.any():
        settings["constrained_atoms"] = int(held.sum())
        if whole.any():
            settings["fixed_atoms"] = int(whole.sum())
        if warn is not None:
            warn(constrained_note(int(held.sum()), len(atoms), "the file's constraints (ASE's "
                                  + " and ".join(dict.fromkeys(names)) + ", as ASE reads them)",
                                  True))


def note_calculator(atoms, settings: dict) -> None:
    """Record the calculator that computed ``atoms`` (a run's first frame; a trajectory or an
    ase.db stores its name and the parameters not at their defaults) in its code settings:
    ``calculator`` (its name) and, for GPAW, its ``symmetry`` parameter when set, which
    :func:`driftwatch.adapters.registry.symmetry_setting` reads."""
    calc = getattr(atoms, "calc", None)
    name = str(getattr(calc, "name", "") or "").lower()
    if not name or name in ("unknown", "singlepointcalculator"):
        return
    settings["calculator"] = name
    params = getattr(calc, "parameters", None) or {}
    if name == "gpaw" and params.get("symmetry") is not None:
        sym = params["symmetry"]
        settings["symmetry"] = dict(sym) if isinstance(sym, dict) else str(sym)


def checked(frames: Iterable, path) -> Iterator[Frame]:
    """Validate a stream of frames: same atoms throughout, finite numbers, sane shapes.

    ``ase.Atoms`` items are converted (step = running index), so a third-party
    reader may simply yield Atoms.
    """
    first = None
    for i, fr in enumerate(frames):
        if not isinstance(fr, Frame):
            fr = frame_from_atoms(fr, i)
        step = fr.step
        if not -2**62 < int(step) < 2**62:
            raise InputError(path, f"ionic step number {str(step)[:30]} out of range")
        cell = np.asarray(fr.cell, float)
        pos = np.asarray(fr.positions, float)
        if cell.shape != (3, 3):
            raise InputError(path, f"cell of shape {cell.shape} at step {step}")
        if pos.ndim != 2 or pos.shape[1] != 3:
            raise InputError(path, f"positions of shape {pos.shape} at step {step}")
        if first is None:
            first = fr
            if len(pos) == 0:
                raise InputError(path, f"no atoms at step {step}")
        else:
            if len(pos) != len(first.positions):
                raise AtomsChangeError(path, f"atoms count changes at step {step} "
                                             f"({len(first.positions)} -> {len(pos)})")
            if fr.numbers is not first.numbers and not np.array_equal(fr.numbers, first.numbers):
                raise AtomsChangeError(path, f"atomic numbers change at step {step}")
        if not np.isfinite(cell).all():
            raise DamagedFrameError(path, f"non-finite cell at step {step}")
        if not np.isfinite(pos).all():
            raise DamagedFrameError(path, f"non-finite positions at step {step}")
        _check_cell(cell, fr.pbc, path, step)
        if np.abs(pos).max() > POSITION_LIMIT:
            raise DamagedFrameError(path, f"a position {np.abs(pos).max():.3g} Å from the origin "
                                          f"at step {step}")
        if fr.forces is not None and np.shape(fr.forces) != pos.shape:
            raise InputError(path, f"forces of shape {np.shape(fr.forces)} at step {step}")
        if fr.stress is not None and np.shape(fr.stress) != (6,):
            raise InputError(path, f"stress of shape {np.shape(fr.stress)} at step {step}")
        yield fr


POSITION_LIMIT = 1e7
"""Å (a millimetre). A cartesian coordinate beyond it is no atom of a simulation cell: a run that
blew up, or a damaged number (a finite 1e300 had made a group change out of one corrupt value)."""

CELL_LENGTH_RANGE = (0.1, 1e5)
"""Å. A periodic cell vector outside this range is refused as implausible (usually a wrong length
unit, e.g. metres or Bohr x 1e10): the Å tolerances of spglib and of the vacuum test would not mean
what they say. The lattice mathematics itself is scale-covariant far beyond this range."""


def _check_cell(cell, pbc, path, step) -> None:
    """Refuse singular and implausibly sized cells (along periodic axes) with a one-line reason."""
    pbc = np.broadcast_to(np.asarray(pbc, bool), (3,)).tolist()
    a, b, c = cell.tolist()          # Python floats: a 3x3 check costs microseconds per frame
    lengths = [math.sqrt(x * x + y * y + z * z) for x, y, z in (a, b, c)]
    lo, hi = CELL_LENGTH_RANGE
    for k in range(3):
        if not pbc[k]:
            continue
        if lengths[k] == 0:
            raise InputError(path, f"cell vector {k} is zero at step {step} (a periodic axis)")
        if not lo <= lengths[k] <= hi:
            raise InputError(path, f"cell vector {k} is {lengths[k]:.3g} Å long at step {step}: "
                                   f"implausible for a crystal (allowed {lo:g}..{hi:g} Å; a wrong "
                                   f"length unit?)")
    per = [k for k in range(3) if pbc[k]]
    if len(per) == 3:
        vol = abs(a[0] * (b[1] * c[2] - b[2] * c[1]) - a[1] * (b[0] * c[2] - b[2] * c[0])
                  + a[2] * (b[0] * c[1] - b[1] * c[0]))
        if vol <= 1e-10 * lengths[0] * lengths[1] * lengths[2]:
            raise InputError(path, f"singular cell at step {step}: the cell vectors are coplanar "
                                   f"(volume {vol:.3g} Å^3)")
    elif len(per) == 2:
        (x1, y1, z1), (x2, y2, z2) = (a, b, c)[per[0]], (a, b, c)[per[1]]
        area = math.hypot(y1 * z2 - z1 * y2, z1 * x2 - x1 * z2, x1 * y2 - y1 * x2)
        if area <= 1e-10 * lengths[per[0]] * lengths[per[1]]:
            raise InputError(path, f"degenerate layer cell at step {step}: the two periodic cell "
                                   f"vectors are parallel (area {area:.3g} Å^2)")


def position_precision(rounding, cells) -> float | None:
    """Å, from a reader's ``ctx.rounding`` and the run's cells (see Run.position_precision)."""
    if rounding is None:
        return None
    kind, step = rounding
    if kind == "cartesian":
        return float(np.sqrt(3.0) * 0.5 * step)
    lengths = np.sqrt((np.asarray(cells, float) ** 2).sum(-1)).sum(-1)      # (n,)
    return float(0.5 * step * lengths.max())


def decimals(text: str) -> int | None:
    """Digits after the decimal point of a printed number (``"0.25000000"`` -> 8); None for
    exponent notation or no point."""
    t = text.strip()
    if "." not in t or any(c in t for c in "eEdD"):
        return None
    return len(t.rsplit(".", 1)[1])


def collect(frames: Iterable[Frame], *, path, fmt: str, ctx: ReadContext,
            run_dir=None, stages=()) -> Run:
    """Stack validated frames into a Run. Zero frames is an InputError.

    Frames are copied into fixed-size numpy blocks as they arrive (no per-frame Python
    objects are kept), so peak memory is about twice the arrays of the finished Run
    (the blocks plus the final concatenation), whatever the size of the file.
    """
    blocks, cur, first, n = [], None, None, 0
    have = {"energy": False, "forces": False, "stress": False}
    for fr in frames:
        if first is None:
            first = fr
        if cur is None or cur.full:
            cur = _Block(len(first.positions))
            blocks.append(cur)
        cur.add(fr, have)
        n += 1
    if first is None:
        detail = f" ({ctx.warnings[-1].split(': ', 1)[-1]})" if ctx.warnings else ""
        raise InputError(path, "no completed ionic step" + detail)

    def cat(name, wanted=True):
        if not wanted:
            return None
        return np.concatenate([b.get(name) for b in blocks])

    cells = cat("cells")
    steps = cat("steps")
    flips = continuous_basis(cells, first.pbc)
    if flips:
        ctx.carry["basis_flips"] = len(flips)    # (a live tracker then collects all frames anew)
        at = ", ".join(str(int(steps[k])) for k in flips[:5])
        ctx.warn(f"the cell's basis jumps without the lattice changing at step"
                 f"{'s' if len(flips) > 1 else ''} {at}"
                 f"{', ...' if len(flips) > 5 else ''} (a box flip, as LAMMPS makes one: an "
                 f"integer change of basis): those frames are read in a basis continuous with "
                 f"the step before, the atoms where the file puts them")
    if not stages and len(ctx.file_stages) > 1:
        stages, start = [], 0
        for name, count in ctx.file_stages:
            count = min(count, n - start)
            if count <= 0:
                break
            stages.append({"name": name, "source": str(path), "format": fmt, "first_frame": start,
                           "n_frames": count, "step_offset": int(steps[start]) if start else 0})
            start += count
    arrays = dict(cells=cells, positions=cat("positions"), steps=steps,
                  energies=cat("energies", have["energy"]), forces=cat("forces", have["forces"]),
                  stress=cat("stress", have["stress"]))
    held = ctx.held
    if held is not None and held.shape == (len(first.positions), 3):
        if arrays["forces"] is not None:     # what the code's optimiser converges on
            arrays["forces"][:, ctx.held_zero] = 0.0
        ctx.settings["constrained_atoms"] = int(held.any(axis=1).sum())
        if held.all(axis=1).any():
            ctx.settings["fixed_atoms"] = int(held.all(axis=1).sum())
        ctx.warn(constrained_note(int(held.any(axis=1).sum()), len(held), ctx.held_by, True))
    blocks.clear()          # freed before anything else is computed: the peak stays at twice
    cur = None              # the arrays
    return Run(
        source=str(path), format=fmt, **arrays,
        numbers=np.array(first.numbers, int), pbc=np.array(first.pbc, bool),
        warnings=tuple(ctx.warnings), code_settings=dict(ctx.settings), title=ctx.title,
        run_dir=None if run_dir is None else str(run_dir),
        stages=tuple(stages), position_precision=position_precision(ctx.rounding, cells),
        kind=ctx.kind, structure_key=ctx.structure, inputs=ctx.inputs(),
        not_relaxation=ctx.not_relaxation, unfinished=ctx.unfinished, species=ctx.species,
    )


def continuous_basis(cells: np.ndarray, pbc) -> list[int]:
    """Make a trajectory's cell basis continuous, in place: where frame k's cell is another basis
    of about the lattice of frame k-1 (an integer matrix M of determinant +-1, not the identity,
    brings it within a quarter of the change it shows: a box flip, which LAMMPS makes when a tilt
    passes half a box length), that frame and every later one are multiplied by M. Cartesian
    positions are untouched, so the structure is the same. The comparisons of the first and last
    frames read operations as integer matrices in the run's one basis (``symmetry.relation``).
    Returns the frames where a jump was undone. Cells (n, 3, 3), Å; only fully periodic cells."""
    if len(cells) < 2 or not np.all(pbc):
        return []
    cand = np.flatnonzero(cell_jumps(cells[:-1], cells[1:]))
    if not len(cand):
        return []
    cand = set(cand.tolist())
    flips, T = [], None
    for k in range(min(cand) + 1, len(cells)):
        if T is not None:                   # the flips before: every later frame in one basis
            cells[k] = T @ cells[k]
        if k - 1 not in cand:
            continue
        a, b = cells[k - 1], cells[k]
        try:
            M = np.rint(a @ np.linalg.inv(b))
        except np.linalg.LinAlgError:       # a singular cell: no basis to re-base onto (the
            continue                        # analysis refuses it, naming its frame)
        if np.array_equal(M, np.eye(3)) or round(abs(np.linalg.det(M))) != 1:
            continue
        if np.abs(M @ b - a).max() < 0.25 * np.abs(b - a).max():
            cells[k] = M @ b
            T = M if T is None else M @ T
            flips.append(k)
    return flips


def cell_jumps(before: np.ndarray, after: np.ndarray) -> np.ndarray:
    """Per pair of cells (n, 3, 3), Å: True where a vector moved by more than a quarter of the
    shortest one of ``before`` in one step, as a box flip moves one by a whole other vector."""
    size = np.sqrt(np.einsum("nij,nij->ni", before, before).min(axis=1))
    return np.abs(after - before).max(axis=(1, 2)) > 0.25 * size


class _Block:
    """Up to SIZE frames in preallocated arrays; result arrays are allocated on first use
    (NaN where a frame lacks the result)."""

    SIZE = 64

    def __init__(self, natoms):
        m = self.SIZE
        self.n = 0
        self.natoms = natoms
        self.cells = np.empty((m, 3, 3))
        self.positions = np.empty((m, natoms, 3))
        self.steps = np.empty(m, int)
        self.energies = self.forces = self.stress = None

    @property
    def full(self):
        return self.n == self.SIZE

    def _shape(self, name):
        return {"energies": (), "forces": (self.natoms, 3), "stress": (6,)}[name]

    def _put(self, name, value):
        arr = getattr(self, name)
        if arr is None:
            arr = np.full((self.SIZE,) + self._shape(name), np.nan)
            setattr(self, name, arr)
        arr[self.n] = value

    def get(self, name):
        arr = getattr(self, name)
        if arr is None:
            return np.full((self.n,) + self._shape(name), np.nan)
        return arr[: self.n]

    def add(self, fr: Frame, have: dict):
        i = self.n
        self.cells[i] = fr.cell
        self.positions[i] = fr.positions
        self.steps[i] = fr.step
        for key, name, value in (("energy", "energies", fr.energy),
                                 ("forces", "forces", fr.forces),
                                 ("stress", "stress", fr.stress)):
            if value is not None:
                self._put(name, value)
                have[key] = True
        self.n += 1
