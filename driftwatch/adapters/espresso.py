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
* its results are the ``!`` total energy (eV; pw.x's F = E - TS), the forces and
  the stress that follow it;
* it is complete when a line that pw.x prints only after all results of a step
  appears (``number of scf cycles``, ``BFGS Geometry Optimization``, ``End of BFGS``,
  ``Writing output data``, the next configuration, ``JOB DONE``...), or, at the end of
  a cut file, when it has every kind of result the previous steps had.

A step whose SCF did not converge has no ``!`` energy and is not a completed
ionic step (ASE would return it without results).

Settings: ``calculation``, ``nosym``, ``noinv``, ``cell_dofree`` from the pw.x input
next to the output; ``nsym``, the number of symmetry operations pw.x reports at the start
(``No symmetry found`` = 1, the identity), and ``nsym_final`` when pw.x reports them again
later (the final scf of a vc-relax re-detects symmetry on the relaxed cell).
"""
from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from ..errors import InputError
from ._io import Lines, peek, strip_compression, tail_bytes
from .run import Frame, ReadContext

__all__ = ["read_pw_out", "read_pw_in_settings", "pick_from_folder"]

_START = "Program PWSCF"
_SCF_START = ("Self-consistent Calculation", "iteration #", "!    total energy")
_CLOSERS = ("number of scf cycles", "BFGS Geometry Optimization", "End of BFGS",
            "bfgs converged", "Writing output data", "JOB DONE", "init_run     :",
            "Begin final coordinates", "The maximum number of steps")
_CLOSER = re.compile("|".join(map(re.escape, _CLOSERS)))
_NSYM = re.compile(r"^\s*(\d+)\s+Sym\.\s*Ops\.")


class _Config:
    """One configuration of a pw.x output and the results printed after it."""

    def __init__(self, cell, positions, numbers, index):
        self.cell, self.positions, self.numbers = cell, positions, numbers
        self.index = index          # position among the configurations of the file, 0-based
        self.energy = self.forces = self.stress = None
        self.closed = False
        self.emitted = False

    def kinds(self):
        return {k for k in ("energy", "forces", "stress") if getattr(self, k) is not None}


def _units():
    """Bohr and Rydberg as ASE's espresso reader uses them (CODATA 2006), so values agree."""
    from ase.io.espresso import units
    return units["Bohr"], units["Ry"]


def _header_info(lines):
    from ase.data import atomic_numbers
    from ase.io.espresso import parse_pwo_start
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


def _read_block(fh, n):
    """The next n lines, or None if the file ends first."""
    out = []
    for _ in range(n):
        ln = fh.readline()
        if not ln:
            return None
        out.append(ln)
    return out


def _read_forces(fh, natoms):
    Bohr, Ry = _units()
    rows = []
    while len(rows) < natoms:
        ln = fh.readline()
        if not ln:
            return None
        if "force =" in ln:
            rows.append([float(x) for x in ln.split()[-3:]])
        elif ln.strip() and rows:          # something else interrupted the block
            return None
    return np.array(rows) * Ry / Bohr


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

    Same unit rules and the same per-atom ``np.dot``, but ``float`` instead of ASE's
    ``infix_float`` (which returns ``float(text)`` for text without brackets, through a slow
    expression evaluator: half of this reader's time on large cells). Returns None for anything
    else (expressions, ``crystal_sg``, missing alat, malformed rows) so that ASE reads it.
    """
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
    out = []
    try:
        for row in rows:
            f = row.split()
            if len(f) > 4:
                int(f[4]), int(f[5]), int(f[6])     # ASE reads the if_pos flags and can fail
            out.append(np.dot((float(f[1]), float(f[2]), float(f[3])), m))
    except (ValueError, IndexError):
        return None
    return np.array(out, float)


def read_pw_out(path, ctx: ReadContext):
    """Stream the completed ionic steps of a pw.x output (plain or compressed)."""
    from ase.io.espresso import get_atomic_positions, get_cell_parameters
    _, Ry = _units()

    _settings_from_input(path, ctx)
    step = 0            # completed steps emitted
    nconf = 0           # configurations seen (the step index of a frame)
    last_index = None
    prev_kinds: set | None = None
    done = False
    cur: _Config | None = None
    alat = natoms = None
    pending_cell = None
    seen_start = False

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
        return fr

    def ready(cfg):
        return cfg is not None and not cfg.emitted and cfg.energy is not None

    def dropped(cfg):
        """A configuration left behind with results but no converged ('!') energy."""
        if cfg is not None and not cfg.emitted and cfg.energy is None and cfg.kinds():
            ctx.warn(f"step {cfg.index} has forces but no converged SCF energy ('!' line); "
                     f"it is not counted as a completed ionic step")

    with Lines(path) as fh:
        while True:
            line = fh.readline()
            if not line:
                break
            if _START in line:
                if ready(cur):
                    yield emit(cur)
                seen_start = True
                header = [line]
                while True:
                    ln = fh.readline()
                    if not ln:
                        header = None
                        break
                    if any(m in ln for m in _SCF_START):
                        break
                    header.append(ln)
                if header is None:
                    cur = None
                    break
                try:
                    cell, pos, numbers, alat, nsym = _header_info(header)
                except (KeyError, ValueError, IndexError) as exc:
                    raise InputError(path, f"not a complete pw.x header: {exc}") from None
                natoms = len(numbers)
                if nsym is not None:
                    ctx.settings.setdefault("code", "espresso")
                    if "nsym" in ctx.settings and ctx.settings["nsym"] != nsym:
                        ctx.warn(f"pw.x reports {nsym} symmetry operations in a later run "
                                 f"(first run: {ctx.settings['nsym']})")
                    ctx.settings.setdefault("nsym", nsym)
                cur, pending_cell = _Config(cell, pos, numbers, nconf), None
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
            if line.startswith("!    total energy"):
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
            elif line.startswith("CELL_PARAMETERS"):
                block = _read_block(fh, 3)
                if block is None:
                    break
                if ready(cur):
                    yield emit(cur)
                pending_cell, _ = get_cell_parameters([line] + block)
            elif line.startswith("ATOMIC_POSITIONS"):
                if ready(cur):
                    yield emit(cur)
                dropped(cur)
                block = []
                while len(block) < natoms:
                    ln = fh.readline()
                    if not ln:
                        block = None
                        break
                    if ln.strip() and not ln.startswith("#"):
                        block.append(ln)
                if block is None:
                    break
                cell = pending_cell if pending_cell is not None else cur.cell
                pos = _plain_positions(line, block, cell, alat)
                if pos is None:     # expressions, odd units, damaged rows: ASE decides
                    card = get_atomic_positions([line] + block, n_atoms=natoms, cell=cell,
                                                alat=alat)
                    pos = np.array([c[1] for c in card], float)
                cur = _Config(np.array(cell, float), pos, cur.numbers, nconf)
                nconf += 1
                pending_cell = None
            elif _CLOSER.search(line):
                if "JOB DONE" in line:
                    done = True
                if ready(cur):
                    yield emit(cur)
        if ready(cur) and prev_kinds is not None and cur.kinds() >= prev_kinds:
            yield emit(cur)
        if not seen_start:
            raise InputError(path, "no completed ionic step (no 'Program PWSCF' line: not a "
                                   "pw.x output, or cut before its header)")
        if not done:
            where = f"after step {last_index} ({step} completed steps)" if step else \
                "before the first ionic step completed"
            ctx.warn(f"truncated {where}: no JOB DONE; job killed or still running")


# ---------------------------------------------------------------- settings
def read_pw_in_settings(path) -> dict:
    """calculation, nosym, noinv, cell_dofree from a pw.x input file (defaults filled)."""
    from ase.io.espresso import read_fortran_namelist
    with Lines(path) as fh:
        import io
        data, _ = read_fortran_namelist(io.StringIO("".join(fh)))
    control, system, cell = (data.get(k, {}) for k in ("control", "system", "cell"))
    out = {"code": "espresso",
           "calculation": str(control.get("calculation", "scf")).strip().lower(),
           "nosym": bool(system.get("nosym", False)),
           "noinv": bool(system.get("noinv", False))}
    if out["calculation"] == "vc-relax" or "cell_dofree" in cell:
        out["cell_dofree"] = str(cell.get("cell_dofree", "all")).strip()
    return out


def _input_for(out_path: Path):
    folder = out_path.parent
    stem = strip_compression(out_path.name).rsplit(".", 1)[0]
    for name in (stem + ".in", stem + ".pwi", "pw.in"):
        p = folder / name
        if p.is_file():
            return p
    ins = [p for p in folder.glob("*.in") if _looks_like_pw_in(p)]
    return ins[0] if len(ins) == 1 else None


def _looks_like_pw_in(p: Path) -> bool:
    head = peek(p, 20000).lower()
    return b"&control" in head or b"&system" in head


def _settings_from_input(path, ctx: ReadContext) -> None:
    pin = _input_for(Path(path))
    if pin is None:
        return
    try:
        got = read_pw_in_settings(pin)
    except Exception as exc:  # a broken input must not stop reading the output
        ctx.warn(f"cannot read the pw.x input {pin.name}: {type(exc).__name__}: {exc}")
        return
    ctx.settings.update(got)
    ctx.settings["settings_from"] = pin.name


# ---------------------------------------------------------------- folders
def _is_pw_out(p: Path) -> bool:
    return p.is_file() and b"Program PWSCF" in peek(p, 4000)


def pick_from_folder(folder: Path, format=None):
    """The pw.x output of a QE run folder (None if there is none).

    Candidates: ``*.out``, ``*.pwo``, ``*.log`` (optionally compressed) that start
    like a pw.x output. With several, the complete ones (JOB DONE) win, then the
    newest; the others are named in a warning.
    """
    if format is not None and format != "espresso-out":
        return None
    cands = []
    for pat in ("*.out", "*.pwo", "*.log", "*.out.gz", "*.pwo.gz", "*.out.bz2", "*.out.xz"):
        cands += [p for p in folder.glob(pat) if _is_pw_out(p)]
    cands = sorted(set(cands))
    if not cands:
        return None
    if len(cands) == 1:
        return cands[0], "espresso-out", ()
    ranked = sorted(cands, key=lambda p: (b"JOB DONE" in tail_bytes(p, 4096),
                                          p.stat().st_mtime), reverse=True)
    others = ", ".join(p.name for p in ranked[1:])
    return ranked[0], "espresso-out", (f"{folder}: {len(cands)} pw.x outputs; read "
                                       f"{ranked[0].name} (also there: {others})",)
