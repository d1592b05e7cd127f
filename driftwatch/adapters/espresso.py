"""Quantum ESPRESSO pw.x output (relax / vc-relax / scf), and QE run folders.

ASE's ``read_espresso_out`` reads the whole file into memory and fails on killed
jobs in several ways (IndexError inside the stress block, forces of the wrong
shape when cut inside the forces block, no forces/stress when cut right after an
energy, StopIteration before the first energy). This module scans the output one
complete line at a time, uses ASE's own block parsers (``parse_pwo_start``,
``get_cell_parameters``, ``get_atomic_positions``; plain-number position cards are read by
``_plain_positions``, bit-identical to ASE and ~1.5x faster at 192 atoms) and ASE's unit
conventions, and
yields a step only when it is complete:

* a configuration starts at the header of a pw.x run or at an ``ATOMIC_POSITIONS``
  card (with the ``CELL_PARAMETERS`` card printed just before it, in vc-relax);
* its results are the ``!`` total energy (eV; pw.x's F = E - TS; with a hybrid functional
  the ``!!`` one its EXX loop ends on), the forces and
  the stress that follow it;
* it is complete when a line that pw.x prints only after all results of a step
  appears (``number of scf cycles``, ``BFGS Geometry Optimization``, ``End of BFGS``,
  ``Writing output data``, the next configuration, ``JOB DONE``...), or, at the end of
  a cut file, when it has every kind of result the previous steps had.

A step whose SCF did not converge has no ``!`` energy and is not a completed
ionic step (ASE would return it without results).

Restarts (``restart_mode='restart'``): pw.x prints the *input* structure in the header of the new
run, but its first SCF is on the structure it restored from its restart files (the last one the
previous run printed, never evaluated there); the BFGS step counter goes on (``number of bfgs
steps`` > 0 on the first step). A header configuration followed by such a count is therefore not
emitted with the header's structure: read with the previous stage (a run folder of stages), the
first step takes the structure the previous stage printed last (``ReadContext.carry``); read alone,
that step is left out with a warning. Several runs appended to one output are stages of the file
(``run1``, ``run2``, ...).

Settings: ``calculation``, ``nosym``, ``noinv``, ``cell_dofree`` from the pw.x input
next to the output; ``nsym``, the number of symmetry operations pw.x reports at the start
(``No symmetry found`` = 1, the identity), and ``nsym_final`` when pw.x reports them again
later (the final scf of a vc-relax re-detects symmetry on the relaxed cell).
"""
from __future__ import annotations

import os
import re
from pathlib import Path

import numpy as np

from ..errors import InputError, NoIonicStepError, NotPeriodicError
from ._io import Lines, job_log_name, line_offsets, peek, strip_compression, tail_bytes
from .run import Frame, ReadContext, decimals

__all__ = ["read_pw_out", "read_pw_input", "read_pw_in_settings", "pick_from_folder",
           "stop_settings", "symmetry_setting", "END_MARKERS", "pw_run_names"]

_START = "Program PWSCF"
# how every pw.x (4.1 to 7.4 here) starts its output: the banner as a line of its own ("     Program
# PWSCF v.6.7MaX starts on ..."), not the words quoted in a note
_BANNER = re.compile(rb"^[ \t]*Program PWSCF\s+v\.", re.M)
_SCF_START = ("Self-consistent Calculation", "iteration #", "!    total energy")
_NSCF_START = "Band Structure Calculation"
_HEADER_END = (*_SCF_START, _NSCF_START)     # where a run's header ends (an nscf run has no SCF)
# printed in the header of a run with assume_isolated = 'martyna-tuckerman' (PW/src/summary.f90 of
# QE's sources): pw.x's own word that the cell holds an isolated system (a molecule, a cluster)
_ISOLATED = "Assuming isolated system, Martyna-Tuckerman method"
# printed after each SCF of a run with assume_isolated = 'makov-payne' (a charged or polar molecule
# or cluster in a cubic box; QE's test-suite pw_cluster): the same word, said later
_MAKOV_PAYNE = "MAKOV-PAYNE CORRECTION"
# pw.x's total time, printed once as a run ends (print_clock's layout: "PWSCF", padded, " :"); pw.x
# before 6 ends with it and no JOB DONE (pwtools' genuine 4.1.2 vc-relax, tests/data/public)
_CLOCK = "PWSCF        :"
# pw.x at nstep without convergence (PW/src/move_ions.f90 of QE's sources): BFGS and damped ions;
# variable-cell dynamics (damped Wentzcovitch, and vc-md, for which it is the normal end)
_LIMITS = ("The maximum number of steps has been reached", "Maximum number of iterations reached")
_CLOSERS = ("number of scf cycles", "BFGS Geometry Optimization", "End of BFGS",
            "bfgs converged", "Writing output data", "JOB DONE", "init_run     :",
            "Begin final coordinates", *_LIMITS, _CLOCK)
_CLOSER = re.compile("|".join(map(re.escape, _CLOSERS)))
# pw.x run with --ipi (i-PI's socket protocol; ASE's Espresso(...).socketio): it prints these
# lines, computes each structure a driver sends and prints none of them (pw.x 6.7 here)
_DRIVER = "@ DRIVER MODE:"
_DRIVER_SAYS = ("pw.x in i-PI driver mode ('@ DRIVER MODE' lines): it computed the structures a "
                "driver sent over a socket, and prints none of them")
# pw.x found its <prefix>.EXIT file (driftwatch's soft stop, or the user's): it stops cleanly
_ON_REQUEST = "Program stopped by user request"
# pw.x's BFGS gave up (Modules/bfgs_module.f90: the trust radius fell below its minimum twice); it
# then prints "bfgs converged" although its thresholds were not met
_GAVE_UP = "history already reset at previous step"
# the errors pw.x's BFGS prints each step, and the thresholds it prints with "bfgs converged"
_ERRORS = ("Energy error", "Gradient error", "Cell gradient error")
_CRITERIA = "(criteria: energy"
_NUMBER = re.compile(r"[-+]?\d*\.?\d+(?:[EeDd][-+]?\d+)?")
# pw.x's own reasons for stopping early (quoted in a warning: "no completed ionic step" says why)
# (and a hybrid functional's EXX loop cut at exx_maxstep: PW/src/electrons.f90, pw.x 6-7)
_STOPS = ("Maximum CPU time exceeded", "convergence NOT achieved",
          "Calculation (EXX) stopped after iteration")
# the total energy of a step: "!" after each SCF; "!!" once a hybrid functional's EXX loop converged
_ENERGY = ("!    total energy", "!!   total energy")
# pw.x's error banner (Modules/error_handler.f90): "Error in routine NAME (N):", the message, a
# line of %, "stopping ..."; it ends the output without JOB DONE (a CRASH file may lie beside it)
_ERROR = "Error in routine"
# how pw.x announces its dynamics (PW/src/dynamics_module.f90 and vcsmd.f90 of QE's sources): the
# run's calculation when no input says it. A variable-cell run prints "Entering Dynamics;" each
# step, after "... Damped ... Minimization:" on its first step when it is a vc-relax; its first
# step with no such line before it is vc-md (a restart's first step, it > 1, decides nothing).
_DYNAMICS = {"Molecular Dynamics Calculation": "md",
             "Over-damped Langevin Dynamics Calculation": "md",
             "Dynamics Minimization:": "vc-relax", "Entering Dynamics;": "vc-md"}
_VC_FIRST = re.compile(r"Entering Dynamics;\s+it\s*=\s*1\s")
_NSYM = re.compile(r"^\s*(\d+)\s+Sym\.\s*Ops\.")
_BFGS_STEPS = re.compile(r"^\s*number of bfgs steps\s*=\s*(\d+)")
_NEW_VOLUME = re.compile(r"new unit-cell volume =.*\(\s*([\d.]+)\s*Ang\^3")
# every line the step loop of read_pw_out acts on contains one of these (the loop tests again)
_FINAL_SCF = "inal scf calculation at the relaxed structure"     # ("A final scf", "Final scf")
_MARKS = (_START, _FINAL_SCF, "Sym. Ops.", "No symmetry found", *_ENERGY, "Forces acting on atoms",
          "total   stress", "CELL_PARAMETERS", "ATOMIC_POSITIONS", "number of bfgs steps",
          "new unit-cell volume", _MAKOV_PAYNE,
          *_CLOSERS, *_STOPS, *_DYNAMICS, _ON_REQUEST, _GAVE_UP, *_ERRORS, _CRITERIA, _ERROR)


class _Config:
    """One configuration of a pw.x output and the results printed after it."""

    def __init__(self, cell, positions, numbers, index):
        self.cell, self.positions, self.numbers = cell, positions, numbers
        self.index = index          # position among the configurations of the file, 0-based
        self.energy = self.forces = self.stress = None
        self.closed = False
        self.emitted = False
        self.from_header = False    # printed in a run's header (pw.x prints the input structure)
        self.restored = None        # header configs: the previous run's last unevaluated config
        self.restored_index = None  # ... and its index, when that run is in the same file
        self.bfgs_seen = False      # header configs: the first 'number of bfgs steps' line was read

    def kinds(self):
        return {k for k in ("energy", "forces", "stress") if getattr(self, k) is not None}


def _units():
    """Bohr and Rydberg as ASE's espresso reader uses them (CODATA 2006), so values agree."""
    from ase.io.espresso import units
    return units["Bohr"], units["Ry"]


# what ASE's header parser misses, by the key it fails on
_HEADER_PARTS = {"celldm(1)": "no 'celldm(1)' line", "nat": "no 'number of atoms/cell' line",
                 "cell": "no 'crystal axes' block",
                 "symbols": "no 'site n. ... positions (alat units)' block"}


def _header_info(lines):
    """(cell Å, positions Å, numbers, alat Å, nsym) of a pw.x run's header, read by ASE's
    ``parse_pwo_start``. pw.x before 5.0 prints ``positions (a_0 units)`` where later versions
    print ``(alat units)``: the same unit, celldm(1) (its ``lattice parameter (a_0)`` line equals
    celldm(1) in the genuine 4.0.1 and 4.1.2 outputs of ``tests/data/public``)."""
    from ase.data import atomic_numbers
    from ase.io.espresso import parse_pwo_start
    lines = [ln.replace("positions (a_0 units)", "positions (alat units)") for ln in lines]
    info = parse_pwo_start(lines, 0)
    atoms = info["atoms"]
    nsym = None
    for ln in lines:
        m = _NSYM.match(ln)
        if m:
            nsym = int(m.group(1))
        elif "No symmetry found" in ln:
            nsym = 1
    numbers = np.array([atomic_numbers[s] for s in atoms.get_chemical_symbols()], int)
    return atoms.cell.array.copy(), atoms.positions.copy(), numbers, info["alat"], nsym


_SITE = re.compile(r"^\s*\d+\s+(\S+)\s+tau\(")


def _species(header, numbers, ctx=None) -> tuple | None:
    """The header's species label of each atom ("3  Fe1  tau( 3) = ...") when the run tells atoms
    of one element apart (two labels of one element: Fe1 and Fe2), else None. Labels whose
    settings the header prints alike (the pseudopotential's checksum, valence, mass, starting
    magnetisation) are one species here: pw.x keeps them apart in its symmetry search, but the
    structure it computes does not (with DFT+U or a noncollinear run they stay apart: those
    settings are not all compared). Said in a warning (``ctx``) either way."""
    from ase.data import chemical_symbols
    labels = [m.group(1) for ln in header if (m := _SITE.match(ln))]
    if len(labels) != len(numbers):
        return None
    per_element: dict = {}
    for z, label in zip(numbers, labels):
        per_element.setdefault(int(z), {})[label] = None         # labels in order of first site
    split = {z: list(ls) for z, ls in per_element.items() if len(ls) > 1}
    if not split:
        return None
    sig = _species_settings(header, labels)
    alike = {}
    if sig is not None:
        for ls in split.values():
            for label in ls:
                alike[label] = next(k for k in ls if sig[k] == sig[label])
    same = sorted(k for k, v in alike.items() if v != k)
    out = tuple(alike.get(label, label) for label in labels)
    kept = {z: sorted({alike.get(k, k) for k in ls}) for z, ls in split.items()}
    apart = {z: ls for z, ls in kept.items() if len(ls) > 1}
    if ctx is not None and same:
        ctx.warn(f"pw.x species {', '.join(same)} {'has' if len(same) == 1 else 'have'} the "
                 f"pseudopotential, mass and starting magnetisation of "
                 f"{', '.join(sorted({alike[k] for k in same}))}: spglib is given them as one "
                 f"type (the structure pw.x computed does not tell them apart, though pw.x's own "
                 f"symmetry search does)")
    if not apart:
        return None
    if ctx is not None:
        ctx.warn("pw.x tells " + ", ".join(f"{chemical_symbols[z]} apart as species "
                                           f"{', '.join(ls)}" for z, ls in apart.items())
                 + ": spglib is given one type per species, as pw.x computes them (by element "
                   "alone a group can be higher)")
    return out


def _species_settings(header, labels) -> dict | None:
    """{label: the rows of the header's species tables that start with it (valence, mass,
    pseudopotential's element; starting magnetisation), with its pseudopotential's checksum, or
    file name when none is printed}; None when the run has settings per species that are not all
    printed per label (DFT+U, noncollinear magnetism): then no two labels are taken as alike."""
    text = "\n".join(header)
    if re.search(r"(?i)hubbard|lda\+u|dft\+u|noncollinear|spin-orbit", text):
        return None
    order = [m.group(1) for ln in header
             if (m := re.match(r"^\s+(\S+)\s+[\d.]+\s+[\d.]+\s+\S+\s*\(\s*[\d.]+\)", ln))]
    pseudo = {}
    for i, ln in enumerate(header):
        m = re.match(r"^\s*PseudoPot\. #\s*(\d+) for", ln)
        if m:
            k = int(m.group(1)) - 1            # its checksum, else its file name
            got = [x.strip() for x in header[i + 1:i + 3]]
            pseudo[k] = next((x for x in got if x.startswith("MD5")), got[0] if got else None)
    out = {}
    for label in set(labels):            # the rows of the header's tables that start with it
        lines = tuple(tuple(ln.split()[1:]) for ln in header if ln.split()[:1] == [label])
        k = order.index(label) if label in order else None
        out[label] = (lines, pseudo.get(k) if k is not None else None)
    return out


def _note_nsym(reported: list, ctx) -> None:
    """The symmetry operations pw.x reported (``nsym``), from the first run of the file that gave
    a step (a start that stopped before its first step gives none: its count is not the run's);
    a later run's other count is said."""
    if not reported:
        return
    if any(n != reported[0] for n in reported):
        other = next(n for n in reported if n != reported[0])
        ctx.warn(f"pw.x reports {other} symmetry operations in a later run (first run: "
                 f"{reported[0]})")
    ctx.settings.setdefault("nsym", reported[0])


def _read_block(fh, n):
    """The next n lines, or None if the file ends first."""
    out = fh.read_lines(n)
    return out if len(out) == n else None


def _read_rows(fh, n, is_row, interruptible=False):
    """The next ``n`` lines that ``is_row`` accepts (other lines are passed over), reading no line
    past the n-th row; None if the file ends first or, when ``interruptible``, a non-blank line
    that is not a row comes after the first row."""
    rows = []
    while len(rows) < n:
        want = n - len(rows)           # each line adds at most one row: never past the block
        lines = fh.read_lines(want)
        for ln in lines:
            if is_row(ln):
                rows.append(ln)
            elif interruptible and rows and ln.strip():
                return None
        if len(lines) < want:
            return None
    return rows


def _unitless_cell(block, alat, volume, ctx: ReadContext, lineno: int) -> np.ndarray:
    """A ``CELL_PARAMETERS`` card printed with no unit (pw.x prints one; an edited output may not):
    Å from the unit whose volume matches the "new unit-cell volume" printed before it, alat (the
    header's, as pw.x reads an input card with celldm(1) set) or bohr; said either way."""
    Bohr, _ = _units()
    rows = np.array([r.split()[:3] for r in block], float)
    units = {"alat": alat, "bohr": Bohr} if alat else {"bohr": Bohr}
    fits = {u: abs(abs(np.linalg.det(rows * f)) / volume - 1) < 1e-3 for u, f in units.items()} \
        if volume else {}
    unit = next((u for u, ok in fits.items() if ok), "alat" if alat else "bohr")
    if fits.get(unit):                         # said once a file (warn keeps one of each)
        ctx.warn(f"CELL_PARAMETERS without a unit (an edited output?): read in units of {unit}, "
                 f"whose volume matches the new unit-cell volume printed before each")
    else:
        ctx.warn(f"line {lineno}: CELL_PARAMETERS without a unit (an edited output?): read in "
                 f"units of {unit}; " + (f"the new unit-cell volume printed before it "
                                         f"({volume:g} Å^3) matches no unit: check this output"
                                         if volume else "no volume printed before it to check"))
    return rows * units[unit]


def _read_forces(fh, natoms):
    Bohr, Ry = _units()
    rows = _read_rows(fh, natoms, lambda ln: "force =" in ln, interruptible=True)
    if rows is None:
        return None
    return np.array([r.split()[-3:] for r in rows], float) * Ry / Bohr


def _read_stress(fh):
    Bohr, Ry = _units()
    block = _read_block(fh, 3)
    if block is None:
        return None
    m = np.array([[float(x) for x in ln.split()[:3]] for ln in block])
    voigt = np.array([m[0, 0], m[1, 1], m[2, 2], m[1, 2], m[0, 2], m[0, 1]])
    return voigt * (-Ry / Bohr ** 3)      # pw.x's sign is opposite to ASE's


def _plain_positions(header, rows, cell, alat):
    """ASE's ``get_atomic_positions`` for an ATOMIC_POSITIONS card of plain numbers, bit for bit.

    Same unit rules; the card's numbers converted in one block instead of ASE's ``infix_float``
    (``float(text)`` for text without brackets, through a slow expression evaluator), and ASE's
    per-atom ``np.dot(row, m)`` done for all rows in one product (the same bits with the numpy
    of the test run: ``tests/test_adapters.py`` compares with ASE bit for bit). Returns None for
    anything else (expressions, ``crystal_sg``, missing alat, malformed rows) so that ASE reads it.
    """
    starred = next((r for r in rows if "**" in r), None)
    if starred is not None:          # Fortran's overflow of a field: no number to read
        raise ValueError(f"ATOMIC_POSITIONS row {starred.strip()[:80]!r} holds no number")
    low = header.lower()
    if "crystal_sg" in low:
        return None
    if "crystal" in low:
        m = cell
    elif "bohr" in low:
        m = np.identity(3) * _units()[0]
    elif "angstrom" in low:
        m = np.identity(3)
    elif alat is None:
        return None
    else:
        m = np.identity(3) * alat
    try:
        fields = [row.split() for row in rows]
        for f in fields:
            if len(f) > 4:
                int(f[4]), int(f[5]), int(f[6])     # ASE reads the if_pos flags and can fail
        c = np.array([f[1:4] for f in fields], float)
    except (ValueError, IndexError):
        return None
    if c.shape != (len(rows), 3):
        return None
    # ASE's per-row np.dot(row, m) as one product: numpy rounds both alike (numpy 2.4; older
    # numpy summed a vector-matrix dot left to right, one ulp away from this)
    return c @ np.asarray(m, float)


def _banner_said(line: str, fh) -> str:
    """pw.x's error banner in one line: its "Error in routine NAME (N):" ``line`` and the message
    on the line after it (read from ``fh``)."""
    return " ".join(f"{line.strip()} {fh.readline().strip()}".split())[:200]


def _if_pos(rows) -> np.ndarray | None:
    """(N, 3) the ``if_pos`` flags of an ATOMIC_POSITIONS card's rows (0: that Cartesian
    component is held; 1 where a row has none), or None when a row's flags are not integers."""
    out = []
    for row in rows:
        f = row.split()
        try:
            out.append([int(x) for x in f[4:7]] if len(f) >= 7 else [1, 1, 1])
        except ValueError:
            return None
    return np.array(out)


def _note_rounding(ctx: ReadContext, header: str, row: str, alat) -> None:
    """The last printed digit of an ATOMIC_POSITIONS card, in its units (see Run.position_precision)."""
    f = row.split()
    d = decimals(f[1]) if len(f) > 1 else None
    if d is None:
        return
    low = header.lower()
    step = 10.0 ** -d
    if "crystal" in low:
        ctx.round_to("fractional", step)
    elif "bohr" in low:
        ctx.round_to("cartesian", step * _units()[0])
    elif "angstrom" in low:
        ctx.round_to("cartesian", step)
    elif alat is not None:
        ctx.round_to("cartesian", step * alat)


def _isolated(path, said: str) -> NotPeriodicError:
    return NotPeriodicError(f"a molecule or cluster: pw.x computed it as an isolated system "
                            f"({said})", "a periodic calculation of it (no assume_isolated)", path)


def read_pw_out(path, ctx: ReadContext):
    """Stream the completed ionic steps of a pw.x output (plain or compressed). An output holding
    several pw.x runs that do not continue one another (a job script's loop writing into one
    log, :func:`pw_runs`) holds several runs, ``FILE::run1``, ``FILE::run3``, ...; read whole, it
    gives its last one, with a warning naming the others."""
    from .batch import SEPARATOR, listing, split
    base, name = split(str(path))
    runs = pw_runs(base)
    if runs is None:
        if name is not None:
            raise InputError(base, f"this pw.x output holds one run (runs appended to it "
                                   f"continue one another); '{SEPARATOR}{name}' names one of "
                                   f"several")
        yield from _read_pw(base, ctx)
        return
    names = [n for n, _, _ in runs]
    if name is None:
        name = names[-1]
        ctx.warn(f"it holds {len(runs)} pw.x runs that do not continue one another "
                 f"({listing(names)}): read here is the last, {name}; each is a run of its own, "
                 f"read as FILE{SEPARATOR}NAME (an audit lists each)")
    elif name not in names:
        raise InputError(base, f"no pw.x run {name!r} in it (its runs: {listing(names)})")
    _, start, end = runs[names.index(name)]
    ctx.structure = {"key": "pw.x run", "value": name}
    yield from _read_pw(base, ctx, (start, end), int(name[3:]) - 1)


def _read_pw(path, ctx: ReadContext, window: tuple | None = None, first_run: int = 0):
    """The steps of the pw.x runs of an output, or of the part ``window`` (decompressed bytes
    ``(start, end)``) that holds runs ``first_run + 1``, ... of it. Leaves in ``ctx.carry
    ["espresso-runs"]`` what :func:`pw_runs` needs of each run: its header structure, its first
    BFGS step, where it ended."""
    from ase.io.espresso import get_atomic_positions, get_cell_parameters
    _, Ry = _units()

    taken = given = _settings_from_input(path, ctx, None if window is None else window[0])
    shown = None        # the calculation pw.x's own dynamics lines show (_DYNAMICS), or None
    cell_moved = False  # pw.x printed a new unit-cell volume or variable-cell dynamics
    bfgs = False        # pw.x printed its BFGS geometry optimisation
    step = 0            # completed steps emitted
    nconf = 0           # configurations seen (the step index of a frame)
    last_index = None
    prev_kinds: set | None = None
    done = False
    ionic = False       # BFGS or dynamics lines seen: pw.x moved atoms or cell
    at_limit = False    # the last run stopped at nstep ("The maximum number of steps ...")
    on_request = False  # the last run stopped on request (its .EXIT file)
    gave_up = False     # the last run's BFGS gave up (its "bfgs converged" met no threshold)
    halted = None       # pw.x's own early stop (_STOPS) with no converged SCF after it
    final_from = None   # steps emitted when the last run began its final scf (vc-relax)
    stops: list = []    # what each of those lines says, and where
    error = None        # the last run's error banner, in one line
    errors: list = []   # the last BFGS step's errors (energy, gradient[, cell])
    cur: _Config | None = None
    alat = natoms = None
    pending_cell = None
    volume = None       # Å^3: the "new unit-cell volume" printed before a CELL_PARAMETERS card
    seen_start = False
    nscf = False        # a run of this file was 'Band Structure Calculation'
    per_run: list[int] = []     # frames emitted per pw.x run (header) in this file
    run_nsym: list = []         # the symmetry operations each run reported (None: not said)
    infos: list[dict] = []      # each run: header structure, first BFGS step, where it ended
    carried = ctx.carry.pop("espresso-unevaluated", None)

    def emit(cfg):
        nonlocal step, prev_kinds
        nonlocal last_index
        cfg.emitted = True
        last_index = cfg.index
        prev_kinds = cfg.kinds()
        fr = Frame(cell=cfg.cell, positions=cfg.positions, numbers=cfg.numbers,
                   pbc=np.ones(3, bool), step=cfg.index, energy=cfg.energy, forces=cfg.forces,
                   stress=cfg.stress)
        step += 1
        per_run[-1] += 1
        infos[-1]["last"] = (cfg.cell, cfg.positions, cfg.numbers)
        return fr

    def ready(cfg):
        return cfg is not None and not cfg.emitted and cfg.energy is not None

    def dropped(cfg):
        """A configuration left behind with results but no converged ('!') energy."""
        if cfg is not None and not cfg.emitted and cfg.energy is None and cfg.kinds():
            ctx.warn(f"step {cfg.index} has forces but no converged SCF energy ('!' line); "
                     f"it is not counted as a completed ionic step")

    def unevaluated(cfg):
        """The structure of a configuration printed but never evaluated, or None."""
        if cfg is None or cfg.emitted or cfg.energy is not None or cfg.from_header:
            return None
        return cfg.cell, cfg.positions, cfg.numbers

    def restarted(cfg, nbfgs):
        """A header configuration whose first step is BFGS step ``nbfgs`` > 0: a restart. Its
        first SCF ran on the configuration the previous run printed last and never evaluated:
        the same step (in one file, the same index; pw.x's own count agrees)."""
        nonlocal nconf
        prev = cfg.restored
        if prev is not None and np.array_equal(prev[2], cfg.numbers):
            cfg.cell, cfg.positions = np.array(prev[0], float), np.array(prev[1], float)
            if cfg.restored_index is not None:
                cfg.index, nconf = cfg.restored_index, cfg.restored_index + 1
            return True
        cfg.emitted = True            # never emitted: its structure is not printed here
        ctx.warn(f"a restart (restart_mode='restart': the first step is BFGS step {nbfgs}): its "
                 f"first SCF ran on the structure pw.x restored from its restart files, which "
                 f"this output does not print (its header shows the input structure); that step "
                 f"is left out (read the run folder with the previous stage to include it)")
        return False

    with Lines(path, window=window) as fh:
        while True:
            line = fh.skip_to(_MARKS)
            if not line:
                break
            if _START in line:
                if ready(cur):
                    yield emit(cur)
                at_limit = on_request = gave_up = False     # a new run: its own end decides
                halted = error = final_from = None
                restored = unevaluated(cur) if cur is not None else carried
                if infos:
                    infos[-1]["next"] = restored
                restored_index = cur.index if cur is not None and restored is not None else None
                seen_start = True
                header, ended = [line], False
                while True:
                    ln = fh.readline()
                    if not ln:
                        ended = True
                        break
                    if any(m in ln for m in _HEADER_END):
                        break
                    if ln.lstrip().startswith(_ERROR):     # an input pw.x refused
                        error = _banner_said(ln, fh)
                    header.append(ln)
                if any(_DRIVER in ln for ln in header):
                    raise NoIonicStepError(path, _DRIVER_SAYS, "audit the driver's trajectory "
                                           "(an ASE optimiser's, its trajectory= file)")
                if any(_ON_REQUEST in ln for ln in header):    # its .EXIT file was there at start
                    if not step:
                        raise InputError(path, f"no ionic step: pw.x stopped on request before "
                                               f"its first step ('{_ON_REQUEST}': its "
                                               f"<prefix>.EXIT stop file was there when it "
                                               f"started; delete it to run)")
                    on_request = done = True
                    cur = None
                    break
                if ended:
                    cur = None
                    break
                try:
                    cell, pos, numbers, alat, nsym = _header_info(header)
                except KeyError as exc:
                    raise InputError(path, "not a complete pw.x header: " + _HEADER_PARTS.get(
                        exc.args[0], f"no {exc}")) from None
                except (ValueError, IndexError) as exc:
                    raise InputError(path, f"not a complete pw.x header: {exc}") from None
                natoms = len(numbers)
                if ctx.species is None:
                    ctx.species = _species(header, numbers, ctx)
                _check_input(taken, header, ctx)
                taken = None                      # the first header decides
                if nsym is not None and nsym > 1 and ctx.settings.get("nosym") and \
                        ctx.settings.get("settings_from"):
                    ctx.warn(f"the pw.x input {ctx.settings['settings_from']} says nosym = "
                             f".true., but this output found {nsym} symmetry operations (pw.x "
                             f"with nosym prints 'No symmetry found'): the input is not the one "
                             f"this run read (edited since?); its nosym is not used")
                    ctx.settings["nosym"] = False
                if nsym is not None:
                    ctx.settings.setdefault("code", "espresso")
                run_nsym.append(nsym)
                # a run appended after a structure pw.x printed but never evaluated (its step
                # limit, a relax's final coordinates) takes that structure's place in the
                # numbering, as the next file of a restart written apart does
                if restored_index is not None:
                    nconf = restored_index
                cur, pending_cell = _Config(cell, pos, numbers, nconf), None
                cur.from_header, cur.restored = True, restored
                cur.restored_index = restored_index
                if _ISOLATED in "".join(header):
                    raise _isolated(path, f"'{_ISOLATED}'")
                if _NSCF_START in ln:
                    nscf = True
                per_run.append(0)
                infos.append({"header": (cell, pos, numbers), "bfgs": None, "last": None,
                              "next": None})
                nconf += 1
                if "!    total energy" in ln:
                    cur.energy = float(ln.split()[-2]) * Ry
                continue
            if cur is None:
                continue
            if "Sym. Ops." in line or "No symmetry found" in line:   # re-detected (final scf)
                m = _NSYM.match(line)
                if m or "No symmetry found" in line:
                    ctx.settings["nsym_final"] = int(m.group(1)) if m else 1
                    continue
            if line.startswith(_ENERGY):
                halted = None                               # it went on after a stop line
                if not cur.emitted:
                    cur.energy = float(line.split()[-2]) * Ry
            elif "Forces acting on atoms" in line:
                f = _read_forces(fh, natoms)
                if f is None:
                    break
                if not cur.emitted:
                    cur.forces = f
            elif "total   stress" in line:
                s = _read_stress(fh)
                if s is None:
                    break
                if not cur.emitted:
                    cur.stress = s
            elif _MAKOV_PAYNE in line:
                raise _isolated(path, f"assume_isolated = 'makov-payne': '{_MAKOV_PAYNE}'")
            elif "new unit-cell volume" in line:
                cell_moved = True
                m = _NEW_VOLUME.search(line)
                volume = float(m.group(1)) if m else None
            elif line.startswith("CELL_PARAMETERS"):
                block = _read_block(fh, 3)
                if block is None:
                    break
                if ready(cur):
                    yield emit(cur)
                # "(alat)" with no value (pw.x before 5.0): in units of the header's alat
                bare = "alat" in line.lower() and "=" not in line
                pending_cell, _ = get_cell_parameters([line] + block, alat if bare else None)
                if "(" not in line:              # no unit (an edited output): the printed volume
                    pending_cell = _unitless_cell(block, alat, volume, ctx, fh.lineno - 3)
                volume = None
            elif line.startswith("ATOMIC_POSITIONS"):
                if ready(cur):
                    yield emit(cur)
                dropped(cur)
                block = _read_rows(fh, natoms, lambda ln: ln.strip() and not ln.startswith("#"))
                if block is None:
                    break
                cell = pending_cell if pending_cell is not None else cur.cell
                _note_rounding(ctx, line, block[0], alat)
                if ctx.held is None:
                    flags = _if_pos(block)
                    if flags is not None:
                        ctx.hold(flags == 0, "pw.x's if_pos flags")
                pos = _plain_positions(line, block, cell, alat)
                if pos is None:     # expressions, odd units, damaged rows: ASE decides
                    card = get_atomic_positions([line] + block, n_atoms=natoms, cell=cell,
                                                alat=alat)
                    pos = np.array([c[1] for c in card], float)
                cur = _Config(np.array(cell, float), pos, cur.numbers, nconf)
                nconf += 1
                pending_cell = None
            elif _BFGS_STEPS.match(line):
                if infos[-1]["bfgs"] is None:
                    infos[-1]["bfgs"] = int(_BFGS_STEPS.match(line).group(1))
                if cur.from_header and not cur.bfgs_seen:
                    cur.bfgs_seen = True
                    n = int(_BFGS_STEPS.match(line).group(1))
                    if ready(cur) and (n == 0 or restarted(cur, n)):
                        yield emit(cur)
            elif _FINAL_SCF in line:
                final_from = step
            elif line.lstrip().startswith(_ERROR):
                error = _banner_said(line, fh)
            elif any(m in line for m in _STOPS):
                halted = line.strip()
                stops.append(f"pw.x stopped early: '{halted}' (line {fh.lineno})")
            elif _ON_REQUEST in line:
                on_request = True
            elif _GAVE_UP in line:
                gave_up = True
            elif any(line.lstrip().startswith(m) for m in _ERRORS):
                if line.lstrip().startswith("Energy error"):
                    errors = []
                errors += _NUMBER.findall(line.split("=", 1)[-1])[:1]
            elif _CRITERIA in line and gave_up:   # gave up, yet within every threshold?
                limits = _NUMBER.findall(line.replace("D", "E"))
                try:
                    gave_up = not all(float(e.replace("D", "E")) < float(t)
                                      for e, t in zip(errors, limits)) or not errors
                except ValueError:
                    pass
            elif any(m in line for m in _DYNAMICS):
                ionic = True
                said = next(v for m, v in _DYNAMICS.items() if m in line)
                cell_moved = cell_moved or said.startswith("vc-")
                if shown is None and ("Entering Dynamics;" not in line or _VC_FIRST.search(line)):
                    shown = said
                    ctx.settings.setdefault("calculation", said)
            elif _CLOSER.search(line):
                if "JOB DONE" in line or _CLOCK in line:
                    done = True
                elif "BFGS Geometry Optimization" in line or "number of scf cycles" in line:
                    ionic = True
                    bfgs = bfgs or "BFGS Geometry Optimization" in line
                elif any(m in line for m in _LIMITS):
                    at_limit = line.strip()
                elif "bfgs converged" in line:
                    at_limit = False
                if cur.from_header and not cur.bfgs_seen and "number of scf cycles" in line:
                    continue          # a restart shows in the BFGS step count on the next line
                if ready(cur):
                    yield emit(cur)
        if ready(cur) and prev_kinds is not None and cur.kinds() >= prev_kinds:
            yield emit(cur)
        if not seen_start:
            if not peek(path, 1):
                raise InputError(path, "empty file (a job that has not written yet, or an "
                                       "output a rerun emptied)")
            raise InputError(path, "no completed ionic step (no 'Program PWSCF' line: not a "
                                   "pw.x output, or cut before its header)")
        if nscf and not step:
            raise NoIonicStepError(path, "a non-self-consistent run ('Band Structure "
                                         "Calculation': calculation = 'nscf' or 'bands'): no SCF "
                                         "energy, no ionic step",
                                   "its structure is the one of the run it follows: audit that")
        _note_nsym([m for m, n in zip(run_nsym, per_run) if n and m is not None], ctx)
        contradiction = _input_contradicted(ctx.settings, given, ionic, cell_moved,
                                            "bfgs" if bfgs else shown,
                                            done and not (stops or on_request or error), step)
        if contradiction:
            _undo_input(given, ctx, contradiction, len(per_run) > 1)
            if shown is not None:
                ctx.settings["calculation"] = shown
        if final_from is not None and step > final_from:
            ctx.settings["final_scf"] = True      # the last frame: pw.x's final scf (a vc-relax)
        ctx.carry["espresso-unevaluated"] = unevaluated(cur)
        if infos:
            infos[-1]["next"] = unevaluated(cur)
        ctx.carry["espresso-runs"] = infos
        runs = [(f"run{first_run + k + 1}", n) for k, n in enumerate(per_run) if n]
        if len(per_run) > 1 and len(runs) > 1:
            ctx.file_stages = runs
        if done and not ionic and step == len(runs) and max(per_run, default=0) == 1 and \
                "calculation" not in ctx.settings:
            ctx.settings["calculation"] = "scf"   # one SCF per run, no ionic step: as it shows
            ctx.settings["calculation_from"] = "the output: an SCF and no ionic step"
        if halted and step:     # the run's end: said once, as why it is unfinished
            ctx.unfinished = (f"stopped at its time limit (pw.x: '{halted}': max_seconds)"
                              if _STOPS[0] in halted else
                              f"stopped without converging (pw.x: '{halted}')")
        else:                   # no step to judge (the error quotes it), or it went on after
            for said in stops:
                ctx.warn(said)
        if at_limit and ctx.settings.get("calculation") not in ("md", "vc-md"):
            ctx.unfinished = f"stopped at its step limit (pw.x: '{at_limit}')"
        if gave_up:
            ctx.unfinished = (f"stopped without converging (pw.x's BFGS: '{_GAVE_UP}': its trust "
                              f"radius fell below the minimum twice; its 'bfgs converged' does "
                              f"not mean its thresholds were met)")
        if on_request:
            ctx.unfinished = (f"stopped on request (pw.x: '{_ON_REQUEST}': its <prefix>.EXIT "
                              f"stop file, written by a user or by driftwatch's soft stop)")
        if not done and error:      # pw.x ended on its own error: no killed job
            if step:
                ctx.unfinished = f"stopped on a pw.x error ('{error}')"
            else:
                ctx.warn(f"pw.x stopped on an error: '{error}'")
        elif not done:
            where = f"after step {last_index} ({step} completed steps)" if step else \
                "before the first ionic step completed"
            beside = Path(path).parent
            crash = crash_message(beside, ["CRASH"] if (beside / "CRASH").is_file() else [], ctx,
                                  subject="pw.x's CRASH file beside it")
            ctx.truncated(f"truncated {where}: no JOB DONE (nor pw.x's closing timing); "
                          + (crash or "job killed or still running"))


# ---------------------------------------------------------------- settings
def read_pw_input(path) -> dict:
    """The pw.x input's namelists as ASE's namelist reader reads them (plain or compressed), with
    pw.x's defaults for what driftwatch uses: ``nat``, ``ntyp`` (None when absent), ``calculation``,
    ``nosym``, ``noinv``,
    ``cell_dofree`` (vc-relax or when given), ``prefix`` ("pwscf") and ``outdir`` ("./")."""
    import io
    from ase.io.espresso import read_fortran_namelist
    with Lines(path) as fh:
        data, _ = read_fortran_namelist(io.StringIO("".join(fh)))
    control, system, cell = (data.get(k, {}) for k in ("control", "system", "cell"))
    out = {"code": "espresso",
           # with space_group, nat counts the inequivalent atoms only (pw.x expands them)
           "nat": None if "space_group" in system else _int(system.get("nat")),
           "ntyp": _int(system.get("ntyp")),
           "calculation": _text(control.get("calculation", "scf")).lower(),
           "nosym": bool(system.get("nosym", False)),
           "noinv": bool(system.get("noinv", False)),
           "prefix": _text(control.get("prefix", "pwscf")),
           "outdir": _text(control.get("outdir", "./"))}
    if out["calculation"] == "vc-relax" or "cell_dofree" in cell:
        out["cell_dofree"] = _text(cell.get("cell_dofree", "all"))
        out["ibrav"] = _int(system.get("ibrav"))
    return out


def _int(value) -> int | None:
    try:
        return int(value)
    except (TypeError, ValueError):
        return None


def _text(value) -> str:
    """A namelist string without its delimiters: Fortran takes 'x' and "x" alike, and ASE's
    namelist reader keeps double quotes (``calculation = "relax"`` gives '"relax"')."""
    return str(value).strip().strip("'\"").strip()


def read_pw_in_settings(path) -> dict:
    """The symmetry-related settings of a pw.x input (``read_pw_input`` without prefix/outdir)."""
    got = read_pw_input(path)
    got.pop("prefix")
    got.pop("outdir")
    return got


_READS = re.compile(rb"Reading input from (\S+)[ \t]*\r?$", re.M)


def _input_for(out_path: Path, ctx: ReadContext | None = None, start: int | None = None):
    """The pw.x input of an output: the file its header names ("Reading input from NAME", when it
    lies beside it; the header of the run at ``start``, the first by default), else
    ``<stem>.in``, ``<stem>.pwi``, ``pw.in`` (any compression), else the only ``*.in`` in the
    folder that holds ``&control`` or ``&system``."""
    folder = out_path.parent
    if ctx is not None:
        ctx.lists(folder)
    named = _READS.search(peek(out_path, 8000, _banner_at(out_path) if start is None else start))
    if named:
        p = folder / os.path.basename(named.group(1).decode(errors="replace"))
        if p.is_file() and not _same_file(p, out_path):
            return p
    stem = strip_compression(out_path.name).rsplit(".", 1)[0]
    for name in (stem + ".in", stem + ".pwi", "pw.in"):
        for ext in ("", ".gz", ".bz2", ".xz"):
            p = folder / (name + ext)
            if p.is_file() and not _same_file(p, out_path):   # an output named x.in is no input
                return p
    ins = [p for p in sorted(folder.iterdir()) if _is_input_name(p.name) and p.is_file()
           and not _same_file(p, out_path) and _looks_like_pw_in(p, ctx)]
    return ins[0] if len(ins) == 1 else None


def _same_file(a: Path, b: Path) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


def _is_input_name(name: str) -> bool:
    return strip_compression(name).endswith((".in", ".pwi", ".inp"))


def _looks_like_pw_in(p: Path, ctx: ReadContext | None = None) -> bool:
    if ctx is not None:
        ctx.uses(p)
    head = peek(p, 20000).lower()
    return b"&control" in head or b"&system" in head


def _settings_from_input(path, ctx: ReadContext, start: int | None = None):
    """Put the settings of the output's pw.x input into ``ctx.settings``; return (input name,
    settings, its (nat, ntyp)) for :func:`_check_input` to undo, or None. ``start``: where the
    run read begins in the output (decompressed bytes), the first banner's by default."""
    pin = _input_for(Path(path), ctx, start)
    if pin is None:
        return None
    ctx.uses(pin)
    try:
        got = read_pw_in_settings(pin)
    except Exception as exc:  # a broken input must not stop reading the output
        why = exc.strerror if isinstance(exc, OSError) and exc.strerror else \
            f"{type(exc).__name__}: {exc}"
        ctx.warn(f"cannot read the pw.x input {pin.name}: {why}")
        return None
    size = got.pop("nat", None), got.pop("ntyp", None)
    ctx.settings.update(got)
    ctx.settings["settings_from"] = pin.name
    return pin.name, got, size


_SIZE = {"nat": re.compile(r"number of atoms/cell\s*=\s*(\d+)"),
         "ntyp": re.compile(r"number of atomic types\s*=\s*(\d+)")}


def _check_input(taken, header, ctx: ReadContext) -> None:
    """Undo the input's settings when its ``nat`` or ``ntyp`` differ from the output header's: an
    input of another calculation that lies beside the output (taken by its name)."""
    if taken is None:
        return
    _, _, size = taken
    text = "".join(header)
    seen = [(k, int(m.group(1)), want) for (k, rx), want in zip(_SIZE.items(), size)
            if want is not None and (m := rx.search(text))]
    wrong = [f"{k} = {want}, the output {n}" for k, n, want in seen if n != want]
    if wrong:
        _undo_input(taken, ctx, "; ".join(wrong))


def _input_contradicted(settings: dict, taken, ionic: bool, cell_moved: bool,
                        how: str | None, clean: bool, steps: int) -> str | None:
    """Why the input's ``calculation`` cannot be this output's, or None: a single point whose
    output shows ionic steps, or the reverse in an output that ended cleanly (``clean``: JOB DONE,
    no stop line of pw.x's own, no error); a fixed cell whose output shows
    the cell move, or the reverse; a relaxation whose output shows molecular dynamics, or the
    reverse (``how``: "bfgs" when pw.x printed its BFGS optimisation, else the calculation its
    dynamics lines show, :data:`_DYNAMICS`). Such an input is another run's: a workflow's next
    step, an nscf after a vc-relax, left beside the output under the name it would take."""
    if taken is None or settings.get("settings_from") != taken[0]:
        return None                        # no input, or undone already
    calc = settings.get("calculation")
    if calc in ("scf", "nscf", "bands") and ionic:
        return f"calculation = '{calc}', the output shows ionic steps"
    if calc in ("relax", "vc-relax", "md", "vc-md") and clean and not ionic:
        return f"calculation = '{calc}', the output shows one SCF and no ionic step"
    if calc == "vc-relax" and how == "bfgs" and not cell_moved and steps > 1:
        return f"calculation = '{calc}', the output shows a fixed cell"
    if calc in ("relax", "md") and cell_moved:
        return f"calculation = '{calc}', the output shows the cell move"
    if calc in ("relax", "vc-relax") and how in ("md", "vc-md"):
        return f"calculation = '{calc}', the output shows molecular dynamics"
    if calc in ("md", "vc-md") and how in ("bfgs", "vc-relax"):
        return f"calculation = '{calc}', the output shows a geometry optimisation"
    return None


def _undo_input(taken, ctx: ReadContext, why: str, several: bool = False) -> None:
    """Drop the settings taken from the input ``taken`` and say ``why``; ``several``: the run
    read is several pw.x runs of one output (a restart, a vc-relax after a relax), the input
    the first one's."""
    name, got, _ = taken
    for key in (*got, "settings_from"):
        ctx.settings.pop(key, None)
    if "nsym" in ctx.settings:                     # as an output read alone says it
        ctx.settings["code"] = "espresso"
    whose = (f"the pw.x input {name} of its first pw.x run does not hold for the runs after it"
             if several else f"the pw.x input {name} beside it is not this output's")
    ctx.warn(f"{whose} ({why}): its settings are not used")


# ---------------------------------------------------------------- folders
_OUT_SUFFIXES = (".out", ".pwo", ".log")
_NUMBERED = re.compile(r"^(.*)\.(\d+)$")
_STARTS = re.compile(rb"starts on\s+(\d{1,2})([A-Za-z]{3})(\d{4}) at\s*(\d{1,2}):\s*(\d{1,2}):\s*(\d{1,2})")
_MONTHS = {m: k for k, m in enumerate(("Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug",
                                      "Sep", "Oct", "Nov", "Dec"), 1)}


_SCAN_LIMIT = 1 << 20
"""Bytes: how far into a batch job's log (:func:`job_log_name`) pw.x's banner is looked for: its
site's prologue comes first (module lists, an environment dump: 50-200 kB in real logs); another
output's first 50 kB, as detection peeks."""


def _first_banner(path) -> list[int]:
    """[the decompressed byte offset of the first pw.x banner line], or [] (none within
    :data:`_SCAN_LIMIT` of a batch job's log, or the first 50 kB of another file)."""
    limit = _SCAN_LIMIT if job_log_name(str(path)) else 50_000     # (what detection peeks)
    return line_offsets(path, _BANNER, limit, _START.encode())


def _banner_at(path) -> int:
    """The offset of the first pw.x banner line (:func:`_first_banner`), 0 when there is none."""
    return (_first_banner(path) or [0])[0]


def _is_pw_out(p: Path, ctx: ReadContext | None = None) -> bool:
    if ctx is not None:
        ctx.uses(p)
    try:
        return p.is_file() and bool(_first_banner(p))
    except OSError:
        return False


def _output_name(name: str) -> bool:
    """``*.out``, ``*.pwo``, ``*.log``, also numbered (``pw.out.1``), any compression."""
    base = strip_compression(name)
    m = _NUMBERED.match(base)
    return base.endswith(_OUT_SUFFIXES) or bool(m and m.group(1).endswith(_OUT_SUFFIXES))


def pw_outputs(folder: Path, names, ctx: ReadContext | None = None) -> list[Path]:
    """The files of ``folder`` named ``*.out``, ``*.pwo``, ``*.log`` (also numbered copies such as
    ``pw.out.1``; any compression) that start like a pw.x output."""
    return [folder / n for n in names if _output_name(n) and _is_pw_out(folder / n, ctx)]


def started(path) -> tuple | None:
    """(year, month, day, hour, minute, second) of pw.x's ``starts on 3Dec2026 at 12:39:11`` line,
    or None."""
    m = _STARTS.search(peek(path, 4000, _banner_at(path)))
    if not m or m.group(2).decode().title() not in _MONTHS:
        return None
    d, mon, y, hh, mm, ss = m.groups()
    return int(y), _MONTHS[mon.decode().title()], int(d), int(hh), int(mm), int(ss)


def first_bfgs_step(path) -> int | None:
    """The first ``number of bfgs steps = N`` of a pw.x output (N > 0: a restart), None when the
    output has none (not a BFGS relaxation, or no step finished)."""
    with Lines(path) as fh:
        for line in fh:
            m = _BFGS_STEPS.match(line)
            if m:
                return int(m.group(1))
    return None


def _header_structure(path):
    """(cell, positions, numbers) pw.x prints in a run's header (the input structure), or None."""
    lines = []
    with Lines(path) as fh:
        for line in fh:
            if any(m in line for m in _HEADER_END):
                break
            lines.append(line)
    try:
        cell, pos, numbers, _, _ = _header_info(lines)
    except Exception:  # noqa: BLE001 - not a complete header: continues nothing
        return None
    return cell, pos, numbers


def _end_structures(path) -> list:
    """The structures a later run may start from: the last completed step of a pw.x output and
    the configuration it printed last without evaluating it (a stopped relaxation's next step)."""
    ctx = ReadContext(path)
    last = None
    try:
        for fr in read_pw_out(path, ctx):
            last = fr
    except Exception:  # noqa: BLE001 - an unreadable output continues into nothing
        return []
    ends = [] if last is None else [(last.cell, last.positions, last.numbers)]
    if ctx.carry.get("espresso-unevaluated") is not None:
        ends.append(ctx.carry["espresso-unevaluated"])
    return ends


CONTINUES_TOL = 1e-4
"""Å: a run whose header structure is this close to where another ended continues it (pw.x prints
the header cell in alat units with 6 decimals and positions with 7)."""


def _same_structure(a, b, tol=CONTINUES_TOL) -> bool:
    (ca, pa, za), (cb, pb, zb) = a, b
    if len(za) != len(zb) or not np.array_equal(za, zb) or np.abs(ca - cb).max() > tol:
        return False
    frac = (pa - pb) @ np.linalg.inv(cb)
    frac -= np.round(frac)                    # the same site one lattice vector away
    return bool(np.abs(frac @ cb).max() <= tol)


def continues(prev: Path, nxt: Path) -> bool:
    """True when pw.x output ``nxt`` continues ``prev``: a BFGS restart (its first step is BFGS step
    > 0) holding the same atoms, or a new run whose header structure is where ``prev`` ended (its
    last step, or the next configuration it printed and did not evaluate), within
    :data:`CONTINUES_TOL`. A run that moved nothing (a single point: it ended where it started)
    is continued by no new run: two calculations on one structure (an scf and a bands run, a
    k-point convergence series) are separate runs."""
    head = _header_structure(nxt)
    ends = _end_structures(prev)
    if head is None or not ends:
        return False
    return _continues(_header_structure(prev), ends, head, first_bfgs_step(nxt))


def _continues(start, ends: list, head, bfgs: int | None) -> bool:
    """A run that started at ``start`` and ended at ``ends`` (its last step, and the next
    configuration it printed unevaluated) is continued by one whose header is ``head`` and whose
    first BFGS step is ``bfgs``: the rule of :func:`continues`."""
    if (bfgs or 0) > 0:
        return np.array_equal(head[2], ends[0][2])
    if start is not None and all(_same_structure(start, end) for end in ends):
        return False
    return any(_same_structure(head, end) for end in ends)


def _run_continues(a: dict, b: dict) -> bool:
    """Run ``b`` of an output continues run ``a`` before it (their ``_read_pw`` notes): by
    :func:`continues`' rule; as single points one after another on structures that moved (a
    driver outside pw.x computing its steps: nomad-coe's genuine three appended SCFs,
    tests/data/public_more), which are one run of single points, as they always were; or as the
    same job started again after a start that stopped before its first step (phonopy's genuine
    supercell output there)."""
    ends = [e for e in (a["last"], a["next"]) if e is not None]
    if not ends:          # a start cut before its first step, retried on the same structure
        return _same_structure(a["header"], b["header"])        # (phonopy's genuine example)
    if _continues(a["header"], ends, b["header"], b["bfgs"]):
        return True
    b_ends = [e for e in (b["last"], b["next"]) if e is not None]
    single = all(_same_structure(a["header"], e) for e in ends) and b_ends and \
        all(_same_structure(b["header"], e) for e in b_ends)
    return bool(single) and np.array_equal(a["header"][2], b["header"][2]) and \
        not _same_structure(a["header"], b["header"])


_RUNS: dict = {}
""":func:`pw_runs` of the outputs seen: real path -> (its stamp, the runs). Kept between audits of
one output folder (:func:`memo`, :func:`remember`): an output of several pw.x runs is parsed whole
to find them, once, not at each audit's discovery."""


def memo() -> dict:
    """:func:`pw_runs`' answers, as JSON values (``{real path: [stamp, runs or None]}``)."""
    return {real: [stamp, got] for real, (stamp, got) in _RUNS.items()}


def remember(saved: dict) -> None:
    """Take back answers :func:`memo` gave (a malformed entry is ignored: asked again)."""
    for real, entry in (saved or {}).items():
        try:
            stamp, got = entry
            stamp = [int(x) for x in stamp]
            got = None if got is None else [(str(n), int(a), None if b is None else int(b))
                                            for n, a, b in got]
        except (TypeError, ValueError):
            continue
        if len(stamp) == 4:
            _RUNS.setdefault(str(real), (stamp, got))


def pw_runs(path) -> list | None:
    """``[(name, start, end)]``: the runs of a pw.x output that holds several pw.x runs not
    continuing one another (a job script's loop: an scf then a relax of the same structure, one
    relaxation at two cutoffs, two structures), each one or more pw.x runs (a restart appended to
    the same output continues it: :func:`continues`' rule), named by its first pw.x run
    (``run1``, ``run3``), with its decompressed bytes ``[start, end)``; None when the output is
    one run."""
    from .run import file_stamp
    real = os.path.realpath(path)
    stamp = file_stamp(real)
    if stamp is None:
        raise FileNotFoundError(path)
    hit = _RUNS.get(real)
    if hit is not None and hit[0] == stamp:
        return hit[1]
    offsets, got = line_offsets(path, _BANNER, key=_START.encode()), None
    if len(offsets) > 1:
        ctx = ReadContext(path)
        try:
            for _ in _read_pw(path, ctx):
                pass
            infos = ctx.carry.get("espresso-runs") or []
        except Exception:  # noqa: BLE001 - an output that cannot be read whole is one run
            infos = []
        if len(infos) == len(offsets):
            groups = [[0]]
            for k in range(1, len(infos)):
                if _run_continues(infos[k - 1], infos[k]):
                    groups[-1].append(k)
                else:
                    groups.append([k])
            if len(groups) > 1:
                bounds = offsets + [None]
                got = [(f"run{g[0] + 1}", offsets[g[0]], bounds[g[-1] + 1]) for g in groups]
    if file_stamp(real) == stamp:            # (not an answer about a file that changed meanwhile)
        _RUNS[real] = (stamp, got)
    return got


def pw_run_names(path, structure_keys=()) -> list[str]:
    """The runs of a pw.x output of several (:func:`pw_runs`; discovery lists ``FILE::run1``,
    ...), [] for an output of one run."""
    return [name for name, _, _ in pw_runs(path) or ()]


def _as_stages(outs: list[Path], ctx) -> list | None:
    """Several pw.x outputs as the stages of one run, in the order they ran, or None (separate
    runs). Order: the start time each output prints (``starts on 3Dec2026 at 12:39:11``), then the
    number of a numbered copy (``pw.out.1``), then the name. They are stages when each continues the
    one before it (:func:`continues`): numbered copies of a rerun from the input, or unrelated runs
    side by side, stay separate runs."""
    def order(p):
        t = started(p)
        m = _NUMBERED.match(strip_compression(p.name))
        return (t is None, t or (), int(m.group(2)) if m else -1, p.name)
    ranked = sorted(outs, key=order)
    if not all(continues(a, b) for a, b in zip(ranked, ranked[1:])):
        return None
    return [(p.name, p, "espresso-out") for p in ranked]


def _stage_folders(folder: Path, ctx) -> list | None:
    """Subfolders ``relax1/``, ``relax2/`` (any :data:`~driftwatch.adapters.run.STAGE_DIR` name)
    that each hold the pw.x output(s) of one stage, in their numbered order."""
    from .run import stage_folders
    found = []
    for (word, number), d, names in stage_folders(folder) or ():
        outs = pw_outputs(d, names, ctx)
        if not outs:
            continue
        if ctx is not None:
            ctx.lists(d)
        inner = [(f"{d.name}", outs[0], "espresso-out")] if len(outs) == 1 else _as_stages(outs, ctx)
        if inner is None:
            continue                 # several separate runs in one stage folder: not a stage
        for k, (name, path, fmt) in enumerate(inner):
            label = d.name if len(inner) == 1 else f"{d.name}/{name}"
            found.append(((word, number, k), label, path, fmt))
    if not found:
        return None
    found.sort(key=lambda x: x[0])
    paths = [path for _, _, path, _ in found]
    if not all(continues(a, b) for a, b in zip(paths, paths[1:])):
        return None                  # separate runs in numbered folders, not stages of one
    return [(label, path, fmt) for _, label, path, fmt in found]


_STATIC = ("scf", "nscf", "bands")


def _single_point_traj(folder: Path, names, out: Path, ctx):
    """The trajectory file beside a single-point pw.x output (``calculation`` scf, nscf or bands in
    its input), as the folder's pick (see ``registry.beside_single_point``); else None."""
    from .registry import beside_single_point

    def single_point():
        if _DRIVER.encode() in peek(out, 20_000, _banner_at(out)):
            return ("pw.x in i-PI driver mode",
                    "its output prints none of the structures it computed")
        pin = _input_for(out, ctx)
        try:
            calc = read_pw_input(pin)["calculation"] if pin is not None else None
        except Exception:  # noqa: BLE001 - an unreadable input: the output is read, as without one
            return None
        return f"calculation = '{calc}'" if calc in _STATIC else None
    return beside_single_point(folder, names, out, single_point, ("espresso-out",), ctx)


def pick_from_folder(folder: Path, names, format=None, ctx=None):
    """A QE run folder: exactly one pw.x output (``*.out``, ``*.pwo``, ``*.log``, any compression),
    whose ``pw.in`` (or ``<stem>.in``) gives the settings; or the stages of one multi-stage run:
    outputs that each continue the one before (restarts, numbered copies, new runs from the last
    structure; :func:`_as_stages`), side by side or in stage subfolders ``relax1/``, ``relax2/``
    with no pw.x output in the folder itself. Other folders with several pw.x outputs are not one
    run: each output is a run of its own (discovery lists them all). A single-point output (an
    ASE calculator's) beside one trajectory of another format: that trajectory is the run."""
    from .registry import FolderPick
    if format is not None and format != "espresso-out":
        return None
    outs = pw_outputs(folder, names, ctx)
    if len(outs) == 1:
        if pw_runs(outs[0]) is not None:     # a log of several runs: each is listed (FILE::run1)
            return None
        return _single_point_traj(folder, names, outs[0], ctx) or \
            FolderPick([("", outs[0], "espresso-out")])
    if not outs:                  # an output emptied by a rerun (`pw.x < pw.in > pw.out` just
        empty = _emptied_output(folder, names, ctx)        # started): the folder is still the
        if empty is not None:                              # run, failing as "empty file"
            return FolderPick([("", empty, "espresso-out")])
    stages = _as_stages(outs, ctx) if outs else _stage_folders(Path(folder), ctx)
    return FolderPick(stages) if stages else None


def _emptied_output(folder: Path, names, ctx=None) -> Path | None:
    """The one empty file named as a pw.x input's output (``pw.in`` -> ``pw.out``, ``x.pwi`` ->
    ``x.pwo``: the same stem) in a folder that holds that input, or None (an empty log of a
    script or a scheduler beside a template input is no run)."""
    stems = {strip_compression(n).rsplit(".", 1)[0] for n in names
             if _is_input_name(n) and _looks_like_pw_in(Path(folder) / n, ctx)}
    empty = [Path(folder) / n for n in names if _output_name(n)
             and strip_compression(n).rsplit(".", 1)[0] in stems
             and (Path(folder) / n).is_file() and (Path(folder) / n).stat().st_size == 0]
    if len(empty) != 1:
        return None
    if ctx is not None:
        ctx.uses(empty[0])
    return empty[0]


def inputs_only(folder: Path, names, ctx=None) -> tuple[str, list] | None:
    """(what the folder holds, those file names) for a folder of pw.x inputs (``*.in``, ``*.pwi``,
    ``*.inp`` holding ``&control`` or ``&system``) and no pw.x output: a job not run yet, or one
    that stopped before writing; else None. Called for folders :func:`pick_from_folder` did not
    take as a run."""
    if pw_outputs(folder, names, ctx):      # (a log of several runs, listed one by one)
        return None
    got = [n for n in names if _is_input_name(n) and _looks_like_pw_in(Path(folder) / n, ctx)]
    crash = crash_message(folder, names, ctx)
    if crash:          # pw.x wrote its CRASH file, and no output holds an ionic step
        return (f"pw.x crashed ({crash}) and left no pw.x output with an ionic step",
                got + ["CRASH"], True)
    if not got:
        return None
    what = "a pw.x input" if len(got) == 1 else "pw.x inputs"
    return f"{what} ({', '.join(got)}) and no pw.x output", got


def crash_message(folder: Path, names, ctx=None, subject: str = "CRASH") -> str | None:
    """What pw.x wrote in its ``CRASH`` file in ``folder``, in words: "``subject`` says 'Error in
    routine NAME (N): message'" (one line), or that it is empty or unreadable; None when there is
    no CRASH file."""
    if "CRASH" not in names:
        return None
    path = Path(folder) / "CRASH"
    if ctx is not None:
        ctx.uses(path)
    try:
        with open(path, "rb") as fh:
            text = fh.read(4096).decode("utf-8", "replace")
    except OSError:
        return f"{subject} is unreadable"
    lines = [" ".join(ln.split()) for ln in text.splitlines()
             if ln.strip() and not set(ln.strip()) <= {"%"} and not ln.strip().startswith("task #")]
    said = " ".join(lines[:2])[:200]         # "Error in routine NAME (N):" and the message
    return f"{subject} says {said!r}" if said else f"{subject} is empty"


# ---------------------------------------------------------------- live: end, soft stop
# each only when no run starts after it: a restart appended to the same output (pw.x -in ... >>
# pw.out) is running, though the tail still holds the ending of the run before it
_NO_RUN_AFTER = rb"(?![\s\S]*" + _BANNER.pattern + rb")"
END_MARKERS = {
    "espresso-out": ((re.compile(rb"JOB DONE\." + _NO_RUN_AFTER, re.M), "JOB DONE."),
                     # the whole line: a job's last write may stop inside it (the reader,
                     # rightly, takes a line without its end as cut)
                     (re.compile(_CLOCK.encode() + rb"[^\n]*(CPU|WALL)[^\n]*\n" + _NO_RUN_AFTER,
                                 re.M), "pw.x's closing timing"),
                     (re.compile(rb"Error in routine[\s\S]*stopping \.\.\." + _NO_RUN_AFTER, re.M),
                      "pw.x error banner")),
}
_SAVE_DIR = re.compile(rb"Writing output data file (\S*?)([^/\s]+)\.save/?\s*$", re.M)


def stop_settings(run_dir, prefix=None, outdir=None) -> dict:
    """``{"prefix", "outdir", "from"}`` of a pw.x run folder, for the ``<prefix>.EXIT`` file.

    Explicit arguments win; then the folder's pw.x inputs (``pw.in``, ``*.pwi``, ``*.in``,
    ``*.inp`` holding ``&control``, read by :func:`read_pw_input`); then the output's ``Writing
    output data file OUTDIR/PREFIX.save/`` line; then pw.x's defaults ``pwscf`` and ``./``.
    Several inputs with different prefix/outdir raise ``OutputError``.
    """
    from ..errors import OutputError
    run_dir = Path(run_dir)
    found: dict = {}
    where = "pw.x defaults"
    if prefix is None or outdir is None:
        sets = {}
        for p in sorted(run_dir.iterdir()):
            if not (p.is_file() and _is_input_name(p.name)) or b"&control" not in \
                    peek(p, 50_000).lower():
                continue
            try:
                got = read_pw_input(p)
            except Exception:  # noqa: BLE001 - not a pw.x input after all
                continue
            sets[p.name] = (got["prefix"], got["outdir"])
        if len(set(sets.values())) > 1:
            raise OutputError(f"{run_dir}: several pw.x inputs with different prefix/outdir "
                              f"({', '.join(sets)}); pass prefix= and outdir=")
        if sets:
            name, (pf, od) = next(iter(sets.items()))
            found, where = {"prefix": pf, "outdir": od}, name
        else:
            for out in sorted(run_dir.glob("*.out")) + sorted(run_dir.glob("*.pwo")):
                m = None
                for m in _SAVE_DIR.finditer(tail_bytes(out, 200_000)):
                    pass
                if m:
                    od = m.group(1).decode(errors="replace").rstrip("/") or "."
                    found, where = {"prefix": m.group(2).decode(errors="replace"), "outdir": od}, \
                        out.name
                    break
    return {"prefix": prefix if prefix is not None else found.get("prefix", "pwscf"),
            "outdir": outdir if outdir is not None else found.get("outdir", "./"),
            "from": "arguments" if prefix is not None and outdir is not None else where}


def soft_stop(run_dir, *, reason: str, dry_run: bool = False, prefix=None, outdir=None,
              **_options) -> dict:
    """pw.x's documented soft stop: ``<prefix>.EXIT`` in its ``outdir`` (from the folder's input,
    :func:`stop_settings`), holding the reason. pw.x 6.7 checks for it at each SCF iteration,
    stops, writes its data and deletes the file. Returns ``{"target", "text"}``."""
    from ..errors import OutputError
    s = stop_settings(run_dir, prefix, outdir)
    if not re.fullmatch(r"[\w.+-]+", s["prefix"]) or s["prefix"] in (".", ".."):
        raise OutputError(f"{run_dir}: pw.x prefix {s['prefix']!r} is not a plain file name")
    return {"target": Path(run_dir) / s["outdir"] / f"{s['prefix']}.EXIT",
            "text": f"driftwatch soft stop: {reason}\n"}


# ---------------------------------------------------------------- symmetry setting
def symmetry_setting(code_settings: dict, dimension: int = 3) -> dict | None:
    """pw.x's own symmetry handling: on unless ``nosym = .true.`` (pw.x then symmetrises forces,
    stress and charge density with the ``nsym`` operations it kept, and keeps them through a
    relaxation); None when nosym is set or nothing is known (no input read, no count printed)."""
    s = code_settings or {}
    if s.get("nosym") is True:
        return None
    n = s.get("nsym")
    if n is None and "nosym" not in s:
        return None
    kept = ("1 symmetry operation (the identity only)" if n == 1 else
           f"{n} symmetry operations" if n else "the symmetry operations it found")
    extra = "" if dimension != 2 else " of the slab's 3D cell"
    return {"operations": None if n is None else int(n),
            "how": f"pw.x kept {kept}{extra} (nosym=.false.)",
            "undo": "nosym=.true."}


def run_kind(code_settings: dict) -> str | None:
    """What a pw.x run's ionic steps are when they are no relaxation (``calculation``); else None."""
    calc = (code_settings or {}).get("calculation")
    if calc in _STATIC and code_settings.get("calculation_from"):     # no input: what it shows
        return (f"a single-point calculation ({code_settings['calculation_from']}): one "
                f"structure, no ionic steps")
    if calc in _STATIC:
        return f"a single-point calculation (calculation = '{calc}'): one structure, no ionic steps"
    return f"molecular dynamics (calculation = '{calc}')" if calc in ("md", "vc-md") else None


def cell_free(code_settings: dict) -> str | None:
    """``"calculation = 'vc-relax'"`` (or 'vc-md') when pw.x let the cell change, else None."""
    calc = (code_settings or {}).get("calculation")
    return f"calculation = '{calc}'" if calc in ("vc-relax", "vc-md") else None


# what each cell_dofree of pw.x's input documentation (INPUT_PW, from memory) leaves held
_DOFREE_HELD = {
    "ibrav": "moved only the lattice parameters of its ibrav: the cell could not fall below "
             "that Bravais type (reaching a higher one is possible)",
    "volume": "only rescaled the cell: its shape, and so its Bravais type, were held",
    **{f"epitaxial_{v}": f"held the cell vectors {v[0]} and {v[1]}" for v in ("ab", "ac", "bc")},
    **{k: f"moved only the cell's {', '.join(f'{c}{c}' for c in k[:-1])}"
          f"{' and ' if len(k) > 1 else ''}{k[-1] * 2} component"
          f"{'s' if len(k) > 1 else ''} (the others held)"
       for k in ("x", "y", "z", "xy", "xz", "yz", "xyz")},
}


_DOFREE_HELD_IN_BULK = {      # a layer's settings: for a layer they hold only the vacuum vector
    "2dxy": "moved only the x and y components of the cell vectors a and b (the third vector "
            "and their z components held, as for a layer)",
    "2dshape": "moved only the x and y components of the cell vectors a and b, at a fixed area "
               "(the third vector and their z components held, as for a layer)",
}


def cell_held(code_settings: dict, dimension: int = 3) -> str | None:
    """What pw.x's ``cell_dofree`` held of a cell it let change, in words, or None (``dimension``:
    the run's, 2 for a layer, whose 2D lattice '2Dxy' and '2Dshape' leave free)."""
    s = code_settings or {}
    dofree = str(s.get("cell_dofree") or "").lower()
    held = dict(_DOFREE_HELD, **(_DOFREE_HELD_IN_BULK if dimension == 3 else {}))
    if cell_free(s) is None or dofree not in held:
        return None
    if dofree == "ibrav" and s.get("ibrav") in (0, 14):   # pw.x: "does not have any effect"
        return None                                          # at 0; 14 (triclinic) holds nothing
    said = held[dofree]
    if dofree == "ibrav" and s.get("ibrav") in IBRAV_TYPES:
        t = IBRAV_TYPES[s["ibrav"]]
        said = (f"moved only the lattice parameters of its ibrav ({s['ibrav']}, {t}): the cell "
                f"could not fall below {t} (reaching a higher type is possible; a starting cell "
                f"of a higher type than {t} means parameters on its boundary)")
    return (f"pw.x's cell_dofree = '{s.get('cell_dofree')}' {said}; the lattice verdict "
            f"does not test what the code held")


IBRAV_TYPES = {1: "cP", 2: "cF", 3: "cI", -3: "cI", 4: "hP", 5: "hR", -5: "hR", 6: "tP", 7: "tI",
               8: "oP", 9: "oS", -9: "oS", 91: "oS", 10: "oF", 11: "oI", 12: "mP", -12: "mP",
               13: "mS", -13: "mS", 14: "aP"}
"""pw.x's ibrav -> Bravais type (Pearson symbol; INPUT_PW's table of ibrav, its A-centred 91 and
C-centred 9, 13 as the one-face-centred oS, mS), checked on real pw.x runs of every ibrav
(tests/data/ibrav_trials: ASE and spglib agree on each first frame)."""


# ---------------------------------------------------------------- registration
def register_all(register, register_code) -> None:
    """The pw.x row of the format table and the pw.x entry of the code table."""
    from .registry import Code
    register("espresso-out", __name__ + ":read_pw_out", globs=("*.pwo", "*pw*.out"),
             magic=_BANNER, description="Quantum ESPRESSO pw.x output (a log of several pw.x "
                                        "runs that do not continue one another: file::run1 one)",
             members=__name__ + ":pw_run_names")
    register_code(Code(
        name="espresso", label="Quantum ESPRESSO pw.x",
        aliases=("qe", "pw.x", "pwscf", "quantum-espresso"),
        formats=("espresso-out",), folder=__name__ + ":pick_from_folder",
        run_files=("*.out*", "*.pwo*", "*.log*", "*.in*", "*.pwi*"),
        settings_files=("*.in", "*.pwi", "*.inp"),
        end_markers=END_MARKERS, soft_stop=__name__ + ":soft_stop",
        symmetry_setting=__name__ + ":symmetry_setting", run_kind=__name__ + ":run_kind",
        cell_free=__name__ + ":cell_free", cell_held=__name__ + ":cell_held",
        inputs_only=__name__ + ":inputs_only"),
        replace=True)
