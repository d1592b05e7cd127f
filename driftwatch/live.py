"""Live monitoring: an ASE optimizer observer, a follower for running VASP / pw.x jobs, the codes'
documented soft stop, and a pass/fail check for job scripts.

* :class:`SymmetryWatch` -- attach to any ASE optimizer (``opt.attach(watch, interval=n)``); it
  records each observed step, runs the rules, rewrites the run record atomically, and, by choice,
  only records, warns (:class:`SymmetryDriftWarning`) or stops the optimisation by raising
  :class:`SymmetryCollapse` when a chosen flag is raised.
* :func:`follow` -- follow a growing pw.x / VASP output (or any format the adapters read): one line
  per *completed* ionic step, ending at the code's end marker or after ``idle`` seconds without
  growth; optionally requests the code's soft stop when a chosen flag is raised.
* :func:`request_stop` -- VASP: ``STOPCAR`` with ``LSTOP = .TRUE.`` in the run folder; pw.x:
  ``<prefix>.EXIT`` in its ``outdir``. Never kills a process; writes only inside the run folder.
* :func:`check_run` -- ``(passed, record)`` for a finished run, for job scripts and workflow tools.

The live record is the same record :func:`driftwatch.track.analyze` builds (schema
``driftwatch/run-2``), plus a ``live`` section (how following ended, the soft stop requested, the
flags raised). While a run goes on, a change of symmetry counts only once it has held for
``rules.persistence.steps`` consecutive ionic steps (a relaxation passing through a type is not
stopped there); when the run has ended, its end counts. A flag is a diagnostic that asks for a
look, not a proof that a structure is (un)stable or that a phase is real: stopping on one is the
user's call.
"""

from __future__ import annotations

import dataclasses
import os
import sys
import time
import warnings
from pathlib import Path

import numpy as np

from . import config as _config, geometry, records, rules, track
from .adapters import ReadContext, iter_frames
from .adapters._io import tail_bytes
from .adapters.registry import not_relaxation_note, run_kind
from .adapters.run import (Frame, cell_jumps, collect, folder_listing, frame_from_atoms,
                           note_calculator, note_fix_symmetry, position_precision)
from .errors import (ConfigError, DriftwatchError, GeometryError, InputError, NotAnalysed,
                     NotARunError, OutputError, UnknownFormatError)

__all__ = ["SymmetryWatch", "SymmetryCollapse", "SymmetryDriftWarning", "Tracker", "follow",
           "request_stop", "check_run", "qe_stop_settings", "code_of_format", "END_MARKERS",
           "SPECTRUM_FLAGS"]

#: Flags whose rules read spglib on the newest frame (the others use invariants only).
SPECTRUM_FLAGS = frozenset({"symprec-dependent", "loose-symprec", "atoms-break-lattice",
                            "group-gained", "group-lost", "group-changed", "held-by-code"})

#: Text the codes print once, when a run ends (searched in the last 8 kB of the output), by format:
#: collected from the code table (each code's module defines its own: pw.x ``JOB DONE.`` and its
#: error banner; VASP OUTCAR's timing block, vasprun.xml's closing tag).
def _end_markers() -> dict:
    from .adapters.registry import codes
    out = {}
    for c in codes().values():
        out.update(c.end_markers)
    return out


END_MARKERS = _end_markers()


class SymmetryDriftWarning(UserWarning):
    """Issued by :class:`SymmetryWatch` in mode ``"warn"``, once per newly fired flag.

    ``.flag`` holds the flag dict (``code``, ``concerns``, ``frame``, ``step``, ``type``, ``message``).
    """

    def __init__(self, message, flag=None):
        super().__init__(message)
        self.flag = flag


class SymmetryCollapse(DriftwatchError, RuntimeError):
    """Raised by :class:`SymmetryWatch` in mode ``"stop"`` from inside the optimizer's observer call.

    ``.record`` is the run record at that step (already written to the watch's ``output``);
    ``.flags`` the flags raised.
    """

    def __init__(self, record: dict, flags: list[dict]):
        self.record = record
        self.flags = list(flags)
        f = self.flags[0]
        more = f" (+{len(self.flags) - 1} more)" if len(self.flags) > 1 else ""
        super().__init__(f"{f['code']} at step {f['step']}: {f['message']}{more}")


# ---------------------------------------------------------------- helpers
def _codes(codes, what="stop_on") -> list[str]:
    """Flag codes (or what they concern) from a comma-separated string or an iterable."""
    if codes is None:
        return []
    if isinstance(codes, str):
        codes = codes.split(",")
    return rules.check_codes([str(c) for c in codes], what)


def _needs_spectra(codes) -> bool:
    """True when a watched code can only be raised with spglib run on the newest frame."""
    return any(c in SPECTRUM_FLAGS or c == "any" or any(rules.FLAGS[s] == c for s in SPECTRUM_FLAGS)
               for c in codes)


def _key(flag) -> tuple:
    return flag["code"], flag["type"]


def code_of_format(fmt: str | None) -> str | None:
    """The code table's name (``"espresso"``, ``"vasp"``, ...) of the code whose outputs ``fmt``
    reads, when that code has a soft stop; None otherwise."""
    from .adapters.registry import code_of_format as _code
    code = _code(fmt)
    return code.name if code is not None and code.soft_stop is not None else None


def _same_frame(a: Frame, b: Frame) -> bool:
    """The same structure at the same step (its energy may arrive later: a LAMMPS log flushed
    after its dump)."""
    return (a.step == b.step and np.array_equal(a.cell, b.cell)
            and np.array_equal(a.positions, b.positions))


def _same_energy(a, b) -> bool:
    if a is None or b is None:
        return a is b
    return a == b or (a != a and b != b)           # NaN: no energy printed, both times


# ---------------------------------------------------------------- incremental record
class Tracker:
    """The record of a growing run: each frame's invariants, spglib spectra and groups computed once.

    ``record(newest=True)`` equals :func:`driftwatch.track.analyze` of the frames so far (same
    frames, flags and summary): each frame's invariants, each spectrum and each group spglib gave
    are computed once and reused while their frame stays the same. ``newest=False`` is the cheap
    record between the steps spglib is asked about: no tolerance spectra, and the structure level
    judged up to the newest frame where the lattice moved (:func:`driftwatch.track.select_frames`:
    spglib runs there, once); the flags in :data:`SPECTRUM_FLAGS` wait for a record with the
    newest frame.

    Args:
        config: preset name, YAML path, mapping or loaded config.
        source, format, run_dir: what the record's ``run`` section names.
        layer: None decides from the cell (:func:`driftwatch.geometry.classify`); True requires a
            layer (``GeometryError`` otherwise); False analyses the 3D cell even of a slab.
    """

    def __init__(self, config=None, *, source="<live>", format="live", run_dir=None, layer=None):
        self.cfg = _config.coerce(config)
        self.source, self.format = str(source), format
        self.run_dir = None if run_dir is None else str(run_dir)
        self.layer = layer
        self.frames: list[Frame] = []
        self.warnings: list[str] = []
        self.code_settings: dict = {}
        self.title: str | None = None
        self.rounding: tuple | None = None      # the reader's printed precision of positions
        self.not_relaxation: str | None = None  # what the reader says the steps are, if no relaxation
        self.unfinished: str | None = None      # why the run ended early (the reader's word)
        self.species: tuple | None = None       # the code's labels telling one element's atoms
        #                                         apart (pw.x's Fe1, Fe2)
        self.file_stages: list = []             # the reader's runs of one file (restarts appended)
        self._layer = None                      # track.in_layer_basis's answer on frame 0
        self._flipped = False                   # a box flip was re-based (and is said): collect
        #                                         all frames each time
        self._spectra: dict[tuple, dict] = {}     # (frame, bracketed) -> spectrum
        self._groups: dict[tuple, dict] = {}      # (frame, symprec) -> spglib's group
        self._table = track.FrameTable()          # each frame's invariants
        self._gaps = np.zeros((0, 3))             # each frame's vacuum gaps (Å, bulk-or-layer test)
        self._stacked: dict | None = None         # the frames' arrays (see _collect)
        self._spectra_for = None
        self._geo = None                          # the geometry decided on frame 0 (lattice_flags)

    def __len__(self) -> int:
        return len(self.frames)

    def append(self, frame: Frame) -> None:
        self.frames.append(frame)

    def replace(self, frames) -> int:
        """Set all frames read so far; returns how many leading frames were unchanged.

        A frame that differs from the one held before (a rewritten or restarted output) drops the
        cached spectra from there on.
        """
        frames = list(frames)
        k = 0
        for old, new in zip(self.frames, frames):
            if not _same_frame(old, new):
                break
            k += 1
        e = next((j for j, (a, b) in enumerate(zip(self.frames[:k], frames[:k]))
                  if not _same_energy(a.energy, b.energy)), None)
        if e is not None:   # energies arrived or changed: the frames' table and arrays again
            self._table.truncate(e)      # from there; the structures' spectra and groups kept
            self._stacked = None
        if k < len(self.frames):
            self._geo = self._geo if k else None
            self._layer = self._layer if k else None
            self._spectra = {key: s for key, s in self._spectra.items() if key[0] < k}
            self._groups = {key: g for key, g in self._groups.items() if key[0] < k}
            self._table.truncate(k)
            self._gaps = self._gaps[:k]
            if self._stacked and k:
                self._stacked = {n: (v[:k] if v is not None and n in self._ARRAYS else v)
                                 for n, v in self._stacked.items()}
            else:
                self._stacked = None
        self.frames = frames
        return k

    _ARRAYS = ("cells", "positions", "steps", "energies", "forces", "stress")

    def _collect(self, ctx):
        """``adapters.collect`` of all frames, stacking only the frames new since the last call
        onto the arrays kept from it (the same arrays, without a Python loop over every frame)."""
        k = len(self._stacked["cells"]) if self._stacked else 0
        flip = 0 < k < len(self.frames) and bool(cell_jumps(
            self._stacked["cells"][-1:], np.asarray(self.frames[k].cell, float)[None])[0])
        if len(ctx.file_stages) > 1 or k > len(self.frames) or flip or self._flipped:
            # stages, and a box flip's one basis (adapters.run.continuous_basis) and its warning:
            # collect decides them over all frames
            k, self._stacked = 0, None
        if k < len(self.frames):
            new = collect(self.frames[k:], path=self.source, fmt=self.format, ctx=ctx,
                          run_dir=self.run_dir)
            self._flipped = self._flipped or bool(ctx.carry.get("basis_flips"))
            if not k:
                self._stacked = {n: getattr(new, n) for n in self._ARRAYS} | {"run": new}
            else:
                for n in self._ARRAYS:
                    a, b = self._stacked[n], getattr(new, n)
                    if a is None and b is None:
                        continue
                    tail = (a if a is not None else b).shape[1:]
                    a = np.full((k,) + tail, np.nan) if a is None else a
                    b = np.full((len(new.cells),) + tail, np.nan) if b is None else b
                    self._stacked[n] = np.concatenate([a, b])
        st = self._stacked
        return dataclasses.replace(
            st["run"], **{n: st[n] for n in self._ARRAYS}, source=str(self.source),
            format=self.format, warnings=tuple(ctx.warnings), code_settings=dict(ctx.settings),
            title=ctx.title, run_dir=None if self.run_dir is None else str(self.run_dir),
            position_precision=position_precision(ctx.rounding, st["cells"]), inputs=ctx.inputs(),
            not_relaxation=ctx.not_relaxation, unfinished=ctx.unfinished, species=ctx.species)

    def take_notes(self, ctx) -> None:
        """Keep what a reader noted besides the frames (its ``ReadContext``): the source, warnings,
        settings, title, printed precision of positions, the code's species labels, and why the
        steps are no relaxation or the run ended early."""
        self.source, self.warnings, self.code_settings = ctx.path, list(ctx.warnings), \
            dict(ctx.settings)
        self.title, self.rounding, self.species = ctx.title, ctx.rounding, ctx.species
        self.not_relaxation, self.unfinished = ctx.not_relaxation, ctx.unfinished
        self.file_stages = list(ctx.file_stages)

    def _run(self):
        """The frames so far as a Run, with what the reader noted (:meth:`take_notes`)."""
        ctx = ReadContext(self.source)
        ctx.warnings, ctx.settings, ctx.title = list(self.warnings), dict(self.code_settings), self.title
        ctx.rounding, ctx.not_relaxation = self.rounding, self.not_relaxation
        ctx.unfinished, ctx.species = self.unfinished, self.species
        ctx.file_stages = list(self.file_stages)
        run = self._collect(ctx)
        if self._layer is None:               # decided on the first frame, kept for the rest
            run, found = track.in_layer_basis(run, self.cfg["geometry"]["vacuum_gap"])
            self._layer = found or False
        elif self._layer:
            run, _ = track.in_layer_basis(run, self.cfg["geometry"]["vacuum_gap"], self._layer)
        return run

    def _geometry(self, run):
        cfg = self.cfg
        gaps = None
        if run.pbc.all():                       # each frame's vacuum gaps, computed once
            k = len(self._gaps)
            if k < len(run.cells):
                self._gaps = np.concatenate([self._gaps, geometry.vacuum_gaps(run.cells[k:],
                                                                              run.positions[k:])])
            gaps = self._gaps[:len(run.cells)]
        geo = geometry.classify(run.cells, run.pbc, run.positions, gap=cfg["geometry"]["vacuum_gap"],
                                gaps=gaps)
        if (cfg["geometry"]["require_layer"] or self.layer is True) and geo.dimension != 2:
            raise GeometryError(f"{self.source}: not a layer ({geo.reason}); a layer was required")
        if self.layer is False and geo.dimension == 2:
            geo = geometry.Geometry(3, None, None, f"{geo.reason}; analysed as bulk (layer=False)")
        return geo

    def lattice_flags(self, *, complete: bool = False) -> list[dict]:
        """The flags about the lattice (:func:`driftwatch.rules.lattice_flags`) of the frames so
        far, from the invariants alone: each new frame's invariants are computed once (kept for
        the next record), spglib is not run, and the geometry is the one decided on the first
        frame (the later frames' vacuum gaps, which only add a note to it, wait for
        :meth:`record`). The same flags as the record's at this step."""
        if not self.frames:
            raise InputError(self.source, "no completed ionic step yet")
        metric = self.cfg["lattice"]["metric"]
        if self._geo is None or self._geo.dimension == 2:
            run = self._run()
            self._geo = self._geo or self._geometry(run)
        geo = self._geo
        if geo.dimension == 3:
            self._table.add_deformation(self.frames, metric)
        else:                                 # (a layer's full invariants cost as much)
            self._table.update(run, geo, metric)
        return rules.lattice_flags(self._table.entries, geo.dimension, self.cfg, complete=complete,
                                   series=self._table.deformation)

    def record(self, *, newest: bool = True, complete: bool = False) -> dict:
        """The run record of the frames so far (see the class docstring). ``complete``: the run has
        ended (its end counts); otherwise a change counts once it held for
        ``rules.persistence.steps`` steps."""
        if not self.frames:
            raise InputError(self.source, "no completed ionic step yet")
        t0 = time.perf_counter()
        cfg = self.cfg
        run = self._run()
        geo = self._geo = self._geometry(run)
        if self._spectra_for != (geo.dimension, geo.vacuum_axis):
            self._spectra, self._groups = {}, {}
            self._spectra_for = (geo.dimension, geo.vacuum_axis)
        # a spectrum with brackets is the last frame's; once a newer frame came, the frame
        # needs its spectrum without them (kept while it may still be asked for)
        n = len(self.frames)
        self._spectra = {key: v for key, v in self._spectra.items() if key[1] is False
                         or key[0] >= n - 1}
        record = track.record_from_run(run, cfg, geo=geo, spectra=self._spectra,
                                       groups=self._groups, table=self._table,
                                       skip_newest=not newest, complete=complete)
        record["timing"]["total_s"] = time.perf_counter() - t0
        return record


# ---------------------------------------------------------------- ASE observer
def _check_record_file(output: Path | None) -> None:
    """Refuse a record file that cannot be written now, not hours into the run it records."""
    if output is None:
        return
    records.check_target(output)
    folder = output.parent
    if not folder.is_dir() or not os.access(folder, os.W_OK | os.X_OK):
        raise OutputError(f"{output}: cannot write the record there (its folder "
                          f"{'is not writable' if folder.is_dir() else 'does not exist'})")


class SymmetryWatch:
    """ASE optimizer observer: per-step invariants, rules, and the run record as the run goes.

    Usage::

        watch = SymmetryWatch(atoms, mode="stop", stop_on=("lattice-gained",), output="record.json")
        opt = BFGS(FrechetCellFilter(atoms, mask=[1, 1, 0, 0, 0, 1]), trajectory="relax.traj")
        opt.attach(watch, interval=1)          # or interval=n, optimizer=opt (see below)
        try:
            opt.run(fmax=0.01)
        except SymmetryCollapse as exc:
            print(exc, exc.record["summary"]["verdict"]["text"])

    Give the *real* ``Atoms`` (not the filter): with a filter the optimizer's ``atoms`` is the filter
    (a filter passed here is unwrapped to its ``.atoms``). ASE calls observers with no arguments
    (step 0 = the starting structure, then every ``interval`` steps); frames are numbered by call
    unless the optimizer is known: pass ``optimizer=opt`` here or through
    ``opt.attach(watch, interval=n, optimizer=opt)`` to number them by ``opt.nsteps``.

    Modes (what happens when a flag matching ``stop_on`` -- flag codes, or what they concern:
    ``lattice``, ``structure``, ``tolerance``, ``code`` -- is raised for the first time). While the
    optimizer runs, a change counts only once it held for ``rules.persistence.steps`` consecutive
    steps (default 10), so a relaxation that passes through a type on its way to a higher one is not
    stopped on the way; :meth:`finish` judges the finished run on its end:

    * ``"record"``: nothing besides ``watch.fired`` and the record;
    * ``"warn"``: ``warnings.warn(SymmetryDriftWarning(...))``, once per new flag;
    * ``"stop"``: raise :class:`SymmetryCollapse` (carrying ``.record`` and ``.flags``) from inside
      the observer call. ASE does not catch it, so it propagates out of ``opt.run()`` /
      ``opt.irun()``: ``run()`` returns nothing, ``opt.nsteps`` is the step that fired, the
      trajectory already holds that step (ASE's writer runs before later-attached observers),
      the atoms keep that step's structure, and ``output`` holds the record up to that step.

    A softer stop needs no exception: use mode ``"record"`` and drive the generator yourself::

        for converged in opt.irun(fmax=0.01):
            if watch.fired:
                break

    Cost: every call computes the new frame's lattice invariants and the lattice flags (they are
    current at every step). When every ``stop_on`` code is about the lattice (the default) and
    there is no ``output``, that is all a call does (a bulk frame gets only its deformation; its
    other invariants are computed with the next record): the record is built when
    ``watch.record`` is read, when a flag is raised, or at :meth:`finish`. Otherwise every call
    builds the record. Building it runs spglib on the first frame and on frames where the lattice
    moved (``selection.on_change``: the structure level is judged up to there), each once, and on
    the newest frame only when asked: when a ``stop_on`` code needs it (:data:`SPECTRUM_FLAGS`),
    when a ``stop_on`` flag is raised (the record that warns or stops is complete), at
    :meth:`finish`, or with ``lazy=False`` at every call (one tolerance spectrum per call:
    measured here ~0.05 s for a 1-atom layer, ~0.3 s for a 27-atom bulk cell). ``bench/run.py``
    measures the cost per step (0.9-1.5 ms at 48 atoms in the default mode; the spglib work
    moves to the first read of the record or to :meth:`finish`).
    ``watch.record`` is the current record; after :meth:`finish` (or a raised flag) it has the
    same content as :func:`driftwatch.track.analyze` of the observed steps. ``output`` is rewritten
    atomically on every call (rank 0 only
    under MPI; every rank computes, so every rank raises together). An analysis error
    (e.g. a molecule, which is neither layer nor bulk) never stops the relaxation: it is issued once
    as a ``RuntimeWarning`` and kept in ``watch.error``.
    """

    MODES = ("record", "warn", "stop")

    def _write(self, rec: dict, stacklevel: int) -> None:
        """The record file, rewritten; a failure (a full disk) is warned once and tried again at
        the next step: the watch never stops the relaxation for its own file."""
        try:
            records.write_json(rec, self.output)
        except OutputError as exc:
            if self._unwritten is None:
                warnings.warn(f"driftwatch: {exc}; the relaxation goes on, the record is tried "
                              f"again at each step", RuntimeWarning, stacklevel=stacklevel + 1)
            self._unwritten = str(exc)
        else:
            self._unwritten = None

    def __init__(self, atoms, *, config=None, mode="record", stop_on=("lattice-gained",), output=None,
                 layer=None, optimizer=None, lazy=True):
        if mode not in self.MODES:
            raise ConfigError(f"mode: must be one of {', '.join(self.MODES)}, got {mode!r}")
        inner = getattr(atoms, "atoms", None)
        if inner is not None and hasattr(inner, "cell") and not hasattr(atoms, "cell"):
            atoms = inner                      # an ASE filter: watch the real Atoms
        if not hasattr(atoms, "cell") or not hasattr(atoms, "positions"):
            raise TypeError(f"SymmetryWatch needs an ase.Atoms, got {type(atoms).__name__}")
        self.atoms = atoms
        self.mode = mode
        self.stop_on = _codes(stop_on)
        self.output = None if output is None else Path(output)
        _check_record_file(self.output)
        self._unwritten: str | None = None      # why the record file was last not written
        self.optimizer = optimizer
        self.lazy = bool(lazy)
        self._needs_newest = _needs_spectra(self.stop_on)
        # every watched code is about the lattice, and no file wants each step's record: a step
        # checks the lattice flags alone, the record is built when read
        self._lattice_steps = self.lazy and self.output is None and all(
            rules.FLAGS.get(c, c) == "lattice" for c in self.stop_on)
        self._stale = False
        self.fired: list[dict] = []
        self._record: dict | None = None
        self.error: DriftwatchError | None = None
        self._seen: set = set()
        self._calls = 0
        self._tracker = Tracker(config, source=f"ase-observer:{atoms.get_chemical_formula()}",
                                format="ase-observer", layer=layer)

    def __call__(self, optimizer=None):
        opt = optimizer if optimizer is not None else self.optimizer
        step = int(opt.nsteps) if opt is not None and hasattr(opt, "nsteps") else self._calls
        if self._calls == 0:
            t = self._tracker
            note_fix_symmetry(self.atoms, t.code_settings,
                              lambda w: t.warnings.append(f"{t.source}: {w}"))
            note_calculator(self.atoms, t.code_settings)
            if opt is not None:
                self._note_dynamics(opt)
        self._calls += 1
        self._tracker.append(frame_from_atoms(self.atoms, step))
        if self._lattice_steps:
            self._check_lattice(stacklevel=3)
        else:
            self._update(newest=not self.lazy or self._needs_newest, stacklevel=3)

    def _note_dynamics(self, opt) -> None:
        """What ASE's dynamics object is, as it writes into a trajectory's description (its
        ``todict()``) and an audit of that trajectory records it: an optimizer is named; molecular
        dynamics makes the record no relaxation, said in a warning as the audit says it."""
        try:
            d = opt.todict()
        except Exception:  # noqa: BLE001 - an optimizer without todict: nothing to note
            return
        t = self._tracker
        if isinstance(d, dict) and d.get("type") == "optimization":
            t.code_settings.update({"code": "ase", "optimizer": d.get("optimizer")})
        elif isinstance(d, dict) and d.get("type") == "molecular-dynamics":
            t.code_settings.update({"code": "ase", "dynamics": str(d.get("md-type") or "?")})
            t.not_relaxation = run_kind(t.code_settings)
            t.warnings.append(f"{t.source}: {not_relaxation_note(t.not_relaxation)}")

    @property
    def record(self) -> dict | None:
        """The current record (None before the first step or after an analysis error). When every
        ``stop_on`` code is about the lattice and there is no ``output``, a step only checks the
        lattice flags and the record of the steps so far is built here, when read."""
        if self._stale:
            self._update(newest=not self.lazy or self._needs_newest, stacklevel=3)
        return self._record

    def _check_lattice(self, stacklevel: int) -> None:
        """One step when only lattice flags are watched: the new frame's invariants and the
        lattice flags (the record's own, :meth:`Tracker.lattice_flags`); a new flag gets the
        complete record, warned or raised as in :meth:`_update`."""
        try:
            flags = self._tracker.lattice_flags()
        except DriftwatchError as exc:
            return self._failed(exc, stacklevel + 1)
        if any(_key(f) not in self._seen for f in rules.select(flags, self.stop_on)):
            return self._update(newest=True, stacklevel=stacklevel + 1)
        self._stale = True

    def _failed(self, exc: DriftwatchError, stacklevel: int) -> None:
        if self.error is None:
            warnings.warn(f"driftwatch: cannot analyse the relaxation ({exc}); it continues "
                          f"unwatched", RuntimeWarning, stacklevel=stacklevel)
        self.error = exc
        self._stale = False

    def finish(self) -> dict | None:
        """The complete record (spglib on the newest frame too), written to ``output``.

        Call it when the optimizer has finished: the run's end counts from here (a change need not
        have held ``rules.persistence.steps`` steps), and with ``lazy=True`` the flags that only the
        newest frame's spectrum reveals are raised here. It never raises ``SymmetryCollapse``: the
        run has ended, so a ``stop_on`` flag that holds only now is warned (mode ``stop`` and
        ``warn``), also after a stop was caught.
        """
        if len(self._tracker):
            self._update(newest=True, stacklevel=3, complete=True)
        return self._record

    def _update(self, newest: bool, stacklevel: int, complete: bool = False) -> None:
        self._stale = False
        try:
            rec = self._tracker.record(newest=newest, complete=complete)
        except DriftwatchError as exc:
            return self._failed(exc, stacklevel + 1)
        new = [f for f in rules.select(rec["flags"], self.stop_on) if _key(f) not in self._seen]
        if new and not newest:
            # a flag is raised: the record that warns, stops or is kept is the complete one
            # (spglib on the newest frame too; its spectrum is cached for the next calls)
            return self._update(newest=True, stacklevel=stacklevel + 1, complete=complete)
        self._seen.update(_key(f) for f in new)
        self.fired.extend(new)
        rec["live"] = {"observer": {"mode": self.mode, "stop_on": self.stop_on,
                                    "calls": self._calls, "complete": complete},
                       "fired": [dict(f) for f in self.fired]}
        self._record = rec
        if self.output is not None and _rank() == 0:
            self._write(rec, stacklevel + 1)
        if not new:
            return
        if self.mode == "warn" or (self.mode == "stop" and complete):   # ended: nothing to stop
            for f in new:
                warnings.warn(SymmetryDriftWarning(
                    f"driftwatch: {f['code']} at step {f['step']}: {f['message']}"
                    + ("; it holds once the run's end counts, after the run ended: no stop"
                       if self.mode == "stop" else ""), f), stacklevel=stacklevel)
        elif self.mode == "stop":
            raise SymmetryCollapse(rec, new)


def _rank() -> int:
    try:
        from ase.parallel import world
        return int(world.rank)
    except Exception:  # no ase.parallel: serial
        return 0


# ---------------------------------------------------------------- soft stop
def qe_stop_settings(run_dir, prefix=None, outdir=None) -> dict:
    """``{"prefix", "outdir", "from"}`` of a pw.x run folder, for the ``<prefix>.EXIT`` file
    (:func:`driftwatch.adapters.espresso.stop_settings`)."""
    from .adapters.espresso import stop_settings
    return stop_settings(run_dir, prefix, outdir)


def _inside(path: Path, folder: Path) -> bool:
    try:
        path.relative_to(folder)
        return True
    except ValueError:
        return False


def request_stop(run_dir, code, *, reason, dry_run=False, prefix=None, outdir=None) -> dict:
    """Ask a running VASP or pw.x job to stop cleanly, through the code's documented file.

    * VASP (``code="vasp"``): ``STOPCAR`` in ``run_dir`` with ``LSTOP = .TRUE.`` (stop after the
      current ionic step, writing the usual outputs) and a ``#`` comment line stating why.
    * pw.x (``code="espresso"`` or ``"qe"``): ``<prefix>.EXIT`` in the run's ``outdir`` (read from
      the folder's pw.x input, see :func:`qe_stop_settings`), holding the reason. pw.x 6.7 checks
      for it at each SCF iteration, stops, writes its data and deletes the file.

    Never kills a process. Writes atomically, only inside ``run_dir`` (paths resolved, symlinks
    followed): an ``outdir`` outside it raises ``OutputError`` (pw.x 6.7 also reads the file from
    its working directory: pass ``outdir="."`` to write it there). An existing stop file is left
    as it is (``action: "exists"``). ``dry_run`` writes nothing and returns what it would write.

    Returns:
        ``{"action": "wrote" | "dry-run" | "exists", "path", "text", "code", "reason"}``.
    """
    from .adapters.registry import _code_named, codes
    folder = Path(run_dir).resolve()
    if not folder.is_dir():
        raise OutputError(f"{run_dir}: not a run folder (no such directory)")
    why = " ".join(str(reason).split()) or "no reason given"
    entry = _code_named(code)
    fn = entry.function("soft_stop") if entry is not None else None
    if fn is None:
        known = ", ".join(c.name for c in codes().values() if c.soft_stop is not None)
        raise ConfigError(f"code: no soft stop for {code!r} (known: {known})")
    name = entry.name
    plan = fn(folder, reason=why, dry_run=dry_run, prefix=prefix, outdir=outdir)
    target, text = Path(plan["target"]), plan["text"]
    resolved = target.resolve()
    if not _inside(resolved, folder):
        raise OutputError(f"{folder}: the stop file would be {resolved}, outside the run folder "
                          f"(pw.x 6.7 also reads <prefix>.EXIT from its working directory: "
                          f"create {target.name} in the run folder yourself, or pass outdir='.' "
                          f"to driftwatch.live.follow / request_stop)")
    out = {"action": "dry-run", "path": str(resolved), "text": text, "code": name, "reason": why}
    if resolved.exists():
        out["action"] = "exists"
        return out
    if dry_run:
        return out
    records.write_text_atomic(resolved, text)
    out["action"] = "wrote"
    return out


# ---------------------------------------------------------------- follower
def _end_marker(source, fmt) -> str | None:
    if not source or not Path(source).is_file():
        return None
    from .adapters.registry import code_of_format as code_reading
    code = code_reading(fmt)
    fn = code.function("ended") if code is not None else None
    if fn is not None:                     # a file beside the output says the job ended
        return fn(source)
    markers = END_MARKERS.get(fmt)
    if not markers:
        return None
    tail = tail_bytes(source, 8192)
    for pattern, label in markers:
        if pattern.search(tail):
            return label
    return None


def _output_of(folder: Path, fmt=None) -> Path | None:
    """The output file a run folder's reader would read (None while there is none)."""
    from .adapters.registry import _resolve
    try:
        src = Path(_resolve(folder, fmt).source)
    except (DriftwatchError, OSError):
        return None
    return src if src.is_file() else None


def _folder_stamps(path: Path) -> tuple:
    """(name, size, mtime) of a followed folder's regular files, () for a file: the folder's run
    can move to a file that grows beside the one read so far (a script's start.xyz, then the
    trajectory its optimiser writes)."""
    try:
        with os.scandir(path) as it:
            return tuple(sorted((e.name, _signature(Path(e.path)))
                                for e in it if e.is_file() and not e.name.startswith(".")))
    except (NotADirectoryError, OSError):
        return ()


def _signature(path: Path):
    try:
        st = path.stat()
    except OSError:
        return None
    return st.st_size, st.st_mtime_ns


def _read(path, format):
    """(frames, ctx, error): every completed step readable now, or the InputError why not (a
    :class:`NotARunError` is raised: waiting would not change it)."""
    ctx = ReadContext(path)
    try:
        return list(iter_frames(path, format, context=ctx)), ctx, None
    except NotARunError:
        raise
    except InputError as exc:
        p = Path(path)
        if p.exists() and not os.access(p, os.R_OK | (os.X_OK if p.is_dir() else 0)):
            raise                                   # no permission: waiting will not give it
        return [], ctx, exc


def _fmt(x, spec=".3g"):
    return "-" if x is None else format(x, spec)


def _step_line(f: dict, dim: int, within: float) -> str:
    """``step  energy  at TYPE  nearest T1 d1, T2 d2  [sign  chiral]`` for one frame entry
    (chiral: :func:`driftwatch.records.chiral_deformation`)."""
    dfm = {t: v for t, v in f["deformation"].items() if t != "mirror"}
    at = [t for t, v in dfm.items() if v <= within]
    at_type = max(at, key=lambda t: rules.ORDER[t]) if at else ("mp" if dim == 2 else "aP")
    near = sorted((t for t in dfm if dfm[t] > within), key=lambda t: dfm[t])[:2]
    nearest = ", ".join(f"{t} {dfm[t]:.3g}" for t in near) or "-"
    line = (f"step {f['step']:>4}  E {_fmt(f['energy'], '.6f'):>14} eV  at {at_type:<2}  "
            f"nearest {nearest} Å")
    if dim == 2:
        sign = f"{f['sign']:+d}" if f["sign"] else " 0"
        line += f"  sign {sign}  chiral_def {records.chiral_deformation(f):+.3g} Å"
    return line


def _flag_text(f: dict) -> str:
    return f"{f['code']}" + (f"({f['type']})" if f["type"] else "")


class _Printer:
    def __init__(self, stream, quiet):
        self.stream, self.quiet = stream, quiet

    def __call__(self, text: str) -> None:
        if not self.quiet:       # file names in the lines are shown escaped (records.shown)
            self.stream.write(records.shown_lines(text) + "\n")
            self.stream.flush()


def follow(path, *, config=None, format=None, stop_on=(), dry_run=False, idle=300.0, poll=2.0,
           output=None, quiet=False, stream=None, prefix=None, outdir=None) -> dict:
    """Follow a running job's output until it ends; return the final run record.

    Prints one line per completed ionic step (step, energy in eV, the most specific Bravais type the
    lattice is at, the two nearest types it is not at with their deformation in Å, and for layers
    the sign and signed chiral deformation), then the flags new at that step. Only completed steps
    are read (the adapters never yield a step still being written). Ends at the code's end marker
    (:data:`END_MARKERS`: pw.x ``JOB DONE.``, VASP OUTCAR's timing block), when the reader says the
    run stopped at its step limit, or after ``idle`` seconds without growth; while no step is
    complete it waits (``idle`` bounds that too).

    Args:
        path: output file or run folder (re-resolved while the job writes).
        config: preset, YAML path, mapping or loaded config.
        format: adapter name, overriding detection.
        stop_on: flag codes (or what they concern); when one is raised (a change that held for
            ``rules.persistence.steps`` steps), request the code's soft stop once
            (:func:`request_stop`; VASP and pw.x runs only). The job then stops by itself.
        dry_run: say what the soft stop would write, write nothing.
        idle: seconds without growth after which following ends.
        poll: seconds between checks.
        output: record path, rewritten atomically after each new step and at the end.
        quiet: print nothing.
        stream: where lines go (default ``sys.stdout``).
        prefix, outdir: pw.x settings for the ``.EXIT`` file when the input is not in the folder.

    Returns:
        The final record (``track.analyze`` content of all completed steps) with a ``live``
        section: ``ended`` (why following stopped), ``stop`` (the soft-stop request or None),
        ``stop_on``, ``dry_run``, ``fired`` (the ``stop_on`` flags raised).

    Raises:
        InputError: no completed step appeared within ``idle`` seconds (names the last problem), or
            ``stop_on`` was given for a format with no soft stop.
    """
    f = _Follower(path, _config.coerce(config), format, _codes(stop_on), dry_run, output,
                  _Printer(sys.stdout if stream is None else stream, quiet), prefix, outdir)
    try:
        return f.run(idle, poll)
    except KeyboardInterrupt:
        if f.tracker is not None and len(f.tracker):
            f.ended = "interrupted"
            f.finish()
        raise


class _Follower:
    """State of one :func:`follow` call."""

    def __init__(self, path, cfg, format, stop_codes, dry_run, output, say, prefix, outdir):
        self.path, self.cfg, self.format = Path(path), cfg, format
        self.stop_codes, self.dry_run, self.say = stop_codes, dry_run, say
        self.output = None if output is None else Path(output)
        _check_record_file(self.output)
        self.prefix, self.outdir = prefix, outdir
        self.newest = _needs_spectra(stop_codes)
        self.tracker: Tracker | None = None
        self.source: Path | None = None          # the output file, once known
        self.folders: list = []                  # folders whose listing the last read depended on
        self.printed = 0
        self.seen: set = set()                   # flags printed (code, type)
        self.holding: set = set()                # of those, the ones the newest record still has
        self.warned: set = set()                 # reader warnings printed
        self.fired: list[dict] = []
        self.stop_info = None
        self.ended = None
        self.error = None

    def live_section(self) -> dict:
        return {"following": str(self.path), "ended": self.ended, "stop_on": self.stop_codes,
                "dry_run": self.dry_run, "stop": self.stop_info,
                "fired": [dict(x) for x in self.fired]}

    def run(self, idle: float, poll: float) -> dict:
        last_sig, last_growth, waited, hushed = None, time.monotonic(), False, False
        while True:
            now = time.monotonic()
            if self.source is None and self.path.is_dir():   # a run folder: its output, so that
                self.source = _output_of(self.path, self.format)   # a finished job's end shows
            sig = (_signature(self.source or self.path),
                   tuple(folder_listing(f) for f in self.folders),   # files that appear (a dump
                   _folder_stamps(self.path))                          # written one file a frame;
            #                                      a folder's other files: a run moving to another)
            changed = sig != last_sig
            if changed:
                last_sig, last_growth = sig, now
            # the end marker is looked for every poll (a LAMMPS job's log may print it after the
            # dump's last frame, the dump unchanged) and *before* reading: every step written
            # before it is read
            end = _end_marker(self.source or self.path, self._format())
            if self.tracker is not None and not changed and not end and self._moved():
                continue
            if changed or self.tracker is None or end:
                if not self.read(ended=bool(end)) and not waited:
                    why = str(self.error or "")            # a job just started: no reason to say
                    plain = not why or "no completed ionic step" in why or "no such file" in why
                    if isinstance(self.error, UnknownFormatError) and \
                            not isinstance(self.error, NotAnalysed):  # a batch log's prologue,
                        why = "no code's output in it yet"            # or a file of no format
                    self.say(f"driftwatch: waiting for the first completed ionic step in "
                             f"{self.path}" + ("" if plain else f" ({why})"))
                    waited = True
                # (an end marker written after it was looked for waits for the next poll: a read
                # of the job's last steps may have come before them)
                if end and self.tracker is None:
                    raise InputError(self.source or self.path, f"the job ended ({end}) with no "
                                                               f"completed ionic step")
                if end:
                    self.ended = f"end marker: {end}"
                    return self.finish()
                limit = str(self.tracker.unfinished or "") if self.tracker is not None else ""
                if limit.startswith("stopped at its step limit"):   # the reader saw the job end
                    self.ended = "end marker: the run stopped at its step limit, as its reader says"
                    return self.finish()
            quiet = time.monotonic() - last_growth
            if changed:
                hushed = False
            elif self.tracker is not None and not hushed and idle >= 20 and quiet > idle / 2:
                hushed = True                     # said once a quiet spell: a killed job looks so
                self.say(f"driftwatch: no growth for {quiet:.0f} s (the job may have been "
                         f"killed); following ends after {idle:g} s without growth (--idle)")
            if quiet > idle:
                if self.tracker is None:
                    raise InputError(self.path, f"no completed ionic step after {idle:g} s without "
                                                f"growth ({self.error or 'nothing to read'})")
                self.ended = f"idle: no growth for {idle:g} s"
                return self.finish()
            time.sleep(poll)

    def _moved(self) -> bool:
        """The followed file is gone (a job script compressing its output at the end: ``pw.out``
        -> ``pw.out.gz``): follow the compressed file beside it, said, and True; False otherwise
        (also when nothing took its place: its end is then said by ``--idle``)."""
        if self.path.is_dir() or self.path.exists():
            return False
        for ext in (".gz", ".xz", ".bz2"):
            beside = self.path.with_name(self.path.name + ext)
            if beside.is_file():
                self.say(f"driftwatch: {self.path} was removed and {beside.name} written beside "
                         f"it (compressed at the job's end?): following {beside}")
                self.path = self.source = beside
                return True
        return False

    def _format(self) -> str | None:
        if self.tracker is not None:
            return self.tracker.format
        if self.format or not (self.source or self.path).is_file():
            return self.format
        from .adapters import detect
        try:
            return detect(self.source or self.path)
        except DriftwatchError:
            return None

    def read(self, ended: bool = False) -> bool:
        """Re-read the completed steps; print, check and write what is new. False: none yet.

        ``ended``: the end marker was already there, so no soft stop is requested (a stop file
        left for a finished job would stop its restart at once).
        """
        try:
            frames, ctx, self.error = _read(self.path, self.format)
        except NotARunError as exc:
            if self.tracker is None or not self.path.is_dir():
                raise
            self.error = exc      # a file appearing beside the run while the job writes it (the
            return False          # trajectory an optimiser just opened): asked again next poll
        if Path(ctx.path).is_file():
            self.source = Path(ctx.path)
        self.folders = sorted(ctx.folders)
        if not frames:
            return False
        if self.tracker is None:
            self.tracker = self._start(ctx)
        self.source = Path(ctx.path)
        t = self.tracker
        was = Path(t.source)
        t.take_notes(ctx)
        k = t.replace(frames)
        if self.printed and was != self.source and self.path.is_dir() and \
                self._format_now() != t.format:
            # the folder's run is another file now (a script's start.xyz, then the trajectory
            # its optimiser writes): that run, read as its own format
            self.say(f"driftwatch: {self.path}'s run is now {self.source.name} (was "
                     f"{was.name}), " + ("from its first step" if not k else
                                            f"which starts with the {k} step{'s' if k > 1 else ''} "
                                            f"shown") + ": following it")
            self.tracker = t = self._start(ctx)
            t.take_notes(ctx)
            t.replace(frames)
            self.printed = min(self.printed, k)
        elif k < self.printed:
            self.say(f"driftwatch: {ctx.path} was rewritten; re-reading from frame {k}")
            self.printed = k
        if len(frames) <= self.printed:
            return True
        rec = t.record(newest=self.newest)
        if self.printed == 0:
            self.say(_header(rec))
        self.report(rec)
        self.say_warnings(ctx.warnings, final=False)
        hits = rules.select(rec["flags"], self.stop_codes)
        for fl in hits:
            if _key(fl) not in {_key(x) for x in self.fired}:
                self.fired.append(fl)
        if hits and self.stop_info is None and not ended:
            self.stop_info = _soft_stop(t, hits[0], self.dry_run, self.prefix, self.outdir, self.say)
        if self.output is not None:
            rec["live"] = self.live_section()
            records.write_json(rec, self.output)
        return True

    def say_warnings(self, warnings, final: bool) -> None:
        """Print the reader's warnings not printed yet (an SCF at NELM, pw.x stopping itself, a
        run that is no relaxation). While the job runs its output is cut by nature: a truncation
        warning, or any that says the job may be still running (an ASE optimiser not converged
        yet, a calculator's log inside a calculation), is printed only once it has ended."""
        for w in warnings:
            live = w.split(": ", 1)[-1].startswith("truncated") or "still running" in w
            if w in self.warned or (not final and live):
                continue
            self.warned.add(w)
            self.say(f"  warning: {w}")

    def report(self, rec: dict) -> None:
        new = [fl for fl in rec["flags"] if _key(fl) not in self.seen]
        self.seen.update(_key(fl) for fl in new)
        _print_steps(self.say, rec, self.printed, new, self.cfg)
        self.printed = len(rec["frames"])
        now = {_key(fl) for fl in rec["flags"]}
        gone = self.holding - now
        for code, kind in sorted(gone, key=str):      # said when it came, said when it went
            named = sorted(str(k) for c, k in now if c == code and k)
            if kind and named:                         # the same flag, about another type
                self.say(f"  {code} now names {', '.join(named)} (was {kind}; as the run "
                         f"now reads)")
                continue
            self.say(f"  no longer holds: {code}{'(' + kind + ')' if kind else ''} (the newest "
                     f"steps judge it otherwise)")
        self.seen -= gone                             # announced again if it comes back
        self.holding = (self.holding & now) | {_key(fl) for fl in new}

    def _format_now(self) -> str | None:
        """The format the followed folder's run is read as now (None: not known)."""
        from .adapters import detect
        try:
            return self.format or detect(self.path)
        except DriftwatchError:
            return None

    def _start(self, ctx) -> Tracker:
        from .adapters import detect
        fmt = self.format or detect(self.path)
        run_dir = self.path if self.path.is_dir() else Path(ctx.path).parent
        if self.stop_codes and code_of_format(fmt) is None:
            raise InputError(ctx.path, f"cannot soft-stop a {fmt!r} run: the soft stop exists for "
                                       f"VASP (STOPCAR) and pw.x (<prefix>.EXIT) outputs")
        return Tracker(self.cfg, source=ctx.path, format=fmt, run_dir=run_dir)

    def finish(self) -> dict:
        frames, ctx, _ = _read(self.path, self.format)          # everything up to the end
        t = self.tracker
        if frames:
            t.replace(frames)
            t.take_notes(ctx)
        final = t.record(newest=True, complete=self.ended.startswith("end marker"))
        self.report(final)
        self.say_warnings(t.warnings, final=True)
        late = [fl for fl in rules.select(final["flags"], self.stop_codes)
                if _key(fl) not in {_key(x) for x in self.fired}]
        self.fired += late
        if late and self.stop_info is None:        # held only with the job's end counted
            names = ", ".join(f"{fl['code']} (from step {fl['step']})" for fl in late)
            steps = self.cfg["rules"]["persistence"]["steps"]
            self.say(f"driftwatch: {names} holds once the job's end counts, not for the {steps} "
                     f"steps a change must hold while it runs (rules.persistence.steps): no stop "
                     f"was requested")
        if self.ended.startswith("end marker") and self.stop_info:
            self._tidy_stop_file()
        elif self.stop_info and self.stop_info["action"] == "wrote" and \
                Path(self.stop_info["path"]).is_file():
            self.say(f"driftwatch: the stop file {self.stop_info['path']} is still there, not yet "
                     f"acted on: it stops the job at its next step; if the job is not running "
                     f"(killed), delete it, or the next run started in this folder stops at once")
        final["live"] = self.live_section()
        if self.output is not None:
            records.write_json(final, self.output)
        gone = not Path(self.path).exists()
        still = "" if self.ended.startswith("end marker") else (
            " (judged as a run still going: no end marker was seen; "
            + (f"{self.path} was removed" if gone else
               f"if the job has ended, `driftwatch inspect {self.path}` judges it finished") + ")")
        why = final["run"].get("unfinished")
        self.say(f"driftwatch: {self.ended}; {final['run']['n_frames']} completed steps"
                 + (f" (unfinished: {why})" if why and self.ended.startswith("end marker")
                    else "") + f"; {final['summary']['verdict']['text']}{still}"
                 + (f"; record {self.output}" if self.output is not None else ""))
        self.say(records.DIAGNOSTICS)
        return final


    def _tidy_stop_file(self) -> None:
        """After the job ended: remove our own stop file if the code left it (pw.x deletes the
        ``.EXIT`` file it acts on; VASP does not always delete STOPCAR), so a restart in this folder
        does not stop at once. A file whose content is not ours is left alone."""
        info = self.stop_info
        info["left_by_code"] = False
        if info["action"] != "wrote" or not Path(info["path"]).is_file():
            return
        p = Path(info["path"])
        try:
            if p.read_text(encoding="utf-8") == info["text"]:
                p.unlink()
                info["left_by_code"] = True
                self.say(f"driftwatch: the job ended and left {p}; removed it so a restart here "
                         f"does not stop at once")
        except OSError:
            pass


def _header(rec: dict) -> str:
    g = rec["geometry"]
    kind = "layer, 2D lattice" if g["dimension"] == 2 else "bulk, 3D lattice"
    return (f"driftwatch: following {rec['run']['source']} ({rec['run']['format']}; {kind}); "
            f"deformations are Å on spglib's symprec scale"
            + (f"; {records.CHIRAL_WORDS}" if g["dimension"] == 2 else ""))


def _print_steps(say, rec: dict, start: int, new: list[dict], cfg) -> None:
    frames, dim = rec["frames"], rec["geometry"]["dimension"]
    within = cfg["rules"]["lattice"]["within"]
    last = len(frames) - 1
    by_frame: dict[int, list] = {}
    for f in new:
        at = f["frame"] if start <= f["frame"] <= last else last
        by_frame.setdefault(at, []).append(f)
    for i in range(start, len(frames)):
        line = _step_line(frames[i], dim, within)
        if i in by_frame:
            line += "  new: " + " ".join(_flag_text(f) for f in by_frame[i])
        say(line)
    # each flag in full after the newest step read: its words judge the run as read so far ("ends
    # without reaching it ... -> 0.0029 Å"), which the line of the step it dates from does not show
    for i in sorted(by_frame):
        for f in by_frame[i]:
            say(f"  flag {f['code']} (step {f['step']}): {f['message']}")


def stop_reason(tracker: Tracker, flag: dict) -> str:
    """Why a stop is asked, as the stop file states it: the flag, the step its change holds from
    and the newest step read (where it was seen to have lasted), the file, the flag's message."""
    newest = tracker.frames[-1].step if tracker.frames else flag["step"]
    return (f"flag {_flag_text(flag)} holds from ionic step {flag['step']} (seen at step "
            f"{newest}) of {Path(tracker.source).name}: {flag['message']}")


def _soft_stop(tracker: Tracker, flag: dict, dry_run, prefix, outdir, say) -> dict:
    code = code_of_format(tracker.format)
    reason = stop_reason(tracker, flag)
    try:
        info = request_stop(tracker.run_dir, code, reason=reason, dry_run=dry_run, prefix=prefix,
                            outdir=outdir)
    except OutputError as exc:          # a read-only run folder, a full disk: keep watching
        say(f"driftwatch: cannot request a soft stop: {exc}; following on (the job keeps "
            f"running: stop it yourself)")
        return {"action": "failed", "error": str(exc), "reason": reason, "flag": dict(flag)}
    info["flag"] = dict(flag)
    verb = {"wrote": "soft stop requested: wrote", "dry-run": "dry run: would write",
            "exists": "soft stop already requested:"}[info["action"]]
    say(f"driftwatch: {verb} {info['path']} ({reason})")
    return info


# ---------------------------------------------------------------- job scripts
def check_run(path, *, config=None, reject_on=("lattice-gained",), format=None) -> tuple[bool, dict]:
    """Pass/fail of a finished run (file or run folder) and its record.

    ``passed`` is False when a flag listed in ``reject_on`` (codes, or what flags concern:
    ``lattice``, ``structure``, ``tolerance``, ``code``, or ``any``) was raised. For job scripts and
    workflow managers, after a relaxation::

        ok, record = check_run("relax/", reject_on=("lattice-gained", "handedness-flip"))
        if not ok or record["run"]["unfinished"]:      # a job killed or at its step limit too
            sys.exit(3)

    A pass is not a proof of stability: it only says none of the chosen diagnostics was raised.
    Nor does it say the job finished: a job killed mid-run passes on the steps it wrote, and
    ``record["run"]["unfinished"]`` says why it did not finish (cut short, at its step limit).
    Raises ``InputError`` when the run cannot be read.
    """
    codes = _codes(reject_on, "reject_on")
    record = track.analyze(path, _config.coerce(config), format=format)
    return not rules.select(record["flags"], codes), record
