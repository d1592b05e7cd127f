#!/usr/bin/env python3
"""Regenerate driftwatch's real relaxation data: the pw.x fixtures and the demo campaign.

Everything this script writes is produced here by real programs:

* Quantum ESPRESSO ``pw.x`` (Debian's package, LDA pseudopotentials from
  ``quantum-espresso-data``) for the ``pw.in`` + ``pw.out`` folders;
* ASE optimizers (BFGS / FIRE, optionally on a ``FrechetCellFilter``) driving ASE's own
  ``EMT`` calculator for the ``.traj`` and extended-XYZ runs.

All cells and compound labels are invented (demo campaign "Saltmarsh-12", see
``example_runs/README.md``); only the elements and their shipped pseudopotentials are real.

Outputs (relative to ``--out``, default: the repository root)::

    tests/data/qe/<name>/pw.in, pw.out[.gz]        small pw.x fixtures for the adapter tests
    tests/data/qe/pseudo/*.UPF                      pseudopotentials those inputs use
    tests/data/qe/restart_numbered/                 pw.out.1 (stopped at nstep) + pw.out (restart)
    tests/data/qe/restart_appended/                 the same, the restart appended to one pw.out
    tests/data/qe/restart_stage_folders/relax1|2/   soft-stopped run + new run from its last structure
    tests/data/batch/                               EMT batch: relaxations.extxyz.gz, relaxations.db,
                                                    pairs.extxyz.gz, pairs.db (--only batch)
    example_runs/<name>/pw.in, pw.out[.gz]          pw.x runs of the demo campaign
    example_runs/<name>.traj, <name>.extxyz         ASE runs of the demo campaign
    example_runs/pseudo/*.UPF

Inputs use ``pseudo_dir='../pseudo'`` and a scratch ``outdir`` that is deleted after each run,
so no absolute machine path lands in a committed file (checked after every run).

Usage::

    python scripts/make_runs.py                     # everything: ~7-8 min of pw.x CPU time, about
                                                    # 4-5 min wall on 2 idle cores (12 min 45 s measured
                                                    # with the cores shared); the ASE runs take ~2 s
    python scripts/make_runs.py --only L01_qe_vcrelax --only qe-fixtures
    python scripts/make_runs.py --only ase          # groups: qe-fixtures, examples, qe, ase,
                                                    # qe-restarts (multi-stage pw.x runs)
    python scripts/make_runs.py --list
    python scripts/make_runs.py --out /tmp/regen    # write somewhere else

pw.x is run as ``OMP_NUM_THREADS=1 mpirun --allow-run-as-root -np 2 pw.x -nk 2`` (``--np 1`` for
a single process), one run at a time.
"""
from __future__ import annotations

import argparse
import gzip
import os
import re
import shutil
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

PSEUDO_SRC = Path("/usr/share/espresso/pseudo")
REPO = Path(__file__).resolve().parent.parent
GZIP_ABOVE = 300_000  # bytes: pw.out files larger than this are committed gzipped

MASSES = {"Al": 26.9815, "Si": 28.0855}
PSEUDO = {"Al": "Al.pz-vbc.UPF", "Si": "Si.pz-vbc.UPF"}  # shipped by quantum-espresso-data


# --------------------------------------------------------------------------------------
# small geometry helpers
# --------------------------------------------------------------------------------------
def layer_cell(a: float, b: float, gamma_deg: float, c: float) -> np.ndarray:
    """In-plane vectors a (along x) and b at angle gamma, c along z (Å)."""
    g = np.radians(gamma_deg)
    return np.array([[a, 0.0, 0.0], [b * np.cos(g), b * np.sin(g), 0.0], [0.0, 0.0, c]])


def fcc_primitive(a: float, c: float | None = None) -> np.ndarray:
    """fcc primitive vectors of a conventional a x a x c cell (c != a: body-centred tetragonal)."""
    c = a if c is None else c
    return np.array([[0.0, a / 2, c / 2], [a / 2, 0.0, c / 2], [a / 2, a / 2, 0.0]])


def bcc_primitive(a: float, c: float | None = None) -> np.ndarray:
    c = a if c is None else c
    return np.array([[-a / 2, a / 2, c / 2], [a / 2, -a / 2, c / 2], [a / 2, a / 2, -c / 2]])


# --------------------------------------------------------------------------------------
# pw.x runs
# --------------------------------------------------------------------------------------
@dataclass
class QERun:
    name: str
    tree: str                      # "tests/data/qe" or "example_runs"
    calculation: str               # "vc-relax" | "relax"
    cell: np.ndarray               # (3, 3) Å, rows
    symbols: list[str]
    frac: np.ndarray               # (N, 3) crystal coordinates
    kpts: tuple = (6, 6, 1, 0, 0, 0)
    ecutwfc: float = 20.0
    system: dict = field(default_factory=dict)    # extra &system entries
    control: dict = field(default_factory=dict)   # extra &control entries
    ions: dict = field(default_factory=dict)
    cellnl: dict = field(default_factory=dict)
    fix: list | None = None        # per-atom (fx, fy, fz) 0/1 if_pos flags
    truncate: dict | None = None   # cut the finished pw.out like a killed job (see cut_like_killed)
    note: str = ""


def _fmt(v) -> str:
    if isinstance(v, bool):
        return ".true." if v else ".false."
    if isinstance(v, str):
        return f"'{v}'"
    if isinstance(v, float):
        return repr(v)
    return str(v)


def _namelist(name: str, entries: dict) -> str:
    body = "".join(f"  {k} = {_fmt(v)}\n" for k, v in entries.items())
    return f"&{name}\n{body}/\n"


def pw_input(run: QERun) -> str:
    control = {
        "calculation": run.calculation,
        "prefix": "pw",
        "pseudo_dir": "../pseudo",
        "outdir": "./scratch",
        "disk_io": "none",
        "tprnfor": True,
        "tstress": True,
        "etot_conv_thr": 1.0e-6,
        "forc_conv_thr": 1.0e-4,
        "nstep": 80,
    }
    control.update(run.control)
    species = sorted(set(run.symbols), key=run.symbols.index)
    system = {
        "ibrav": 0,
        "nat": len(run.symbols),
        "ntyp": len(species),
        "ecutwfc": run.ecutwfc,
        "occupations": "smearing",
        "smearing": "mv",
        "degauss": 0.02,
    }
    system.update(run.system)
    if system["occupations"] != "smearing":
        system.pop("smearing")
        system.pop("degauss")
    electrons = {"conv_thr": 1.0e-9, "mixing_beta": 0.5}
    text = _namelist("control", control) + _namelist("system", system) + _namelist("electrons", electrons)
    text += _namelist("ions", {"ion_dynamics": "bfgs", **run.ions})
    if run.calculation in ("vc-relax", "vc-md"):
        text += _namelist("cell", {"cell_dynamics": "bfgs", "press_conv_thr": 0.05, **run.cellnl})
    text += "ATOMIC_SPECIES\n"
    for s in species:
        text += f"  {s} {MASSES[s]} {PSEUDO[s]}\n"
    text += "CELL_PARAMETERS angstrom\n"
    for row in run.cell:
        text += "  " + " ".join(f"{x:15.10f}" for x in row) + "\n"
    text += "ATOMIC_POSITIONS crystal\n"
    for i, (s, p) in enumerate(zip(run.symbols, run.frac)):
        line = f"  {s} " + " ".join(f"{x:15.10f}" for x in p)
        if run.fix is not None:
            line += " " + " ".join(str(int(f)) for f in run.fix[i])
        text += line + "\n"
    text += "K_POINTS automatic\n  " + " ".join(str(k) for k in run.kpts) + "\n"
    return text


def cut_like_killed(text: str, step: int, scf_iteration: int) -> str:
    """Cut a finished pw.out inside SCF iteration ``scf_iteration`` of ionic step ``step``.

    This is what a job killed by the queue leaves behind: everything pw.x flushed up to the
    middle of an SCF cycle, no final summary, no JOB DONE.  Steps count from 0 (the first SCF).
    """
    lines = text.splitlines(keepends=True)
    seen_step = -1
    for i, line in enumerate(lines):
        if "Self-consistent Calculation" in line:
            seen_step += 1
        if seen_step == step and re.match(rf"\s+iteration #\s*{scf_iteration}\s", line):
            # keep the iteration header and a few lines of its output, then stop mid-line
            keep = "".join(lines[: i + 3])
            return keep + lines[i + 3][: len(lines[i + 3]) // 2]
    raise RuntimeError(f"could not find step {step} iteration {scf_iteration} to cut at")


def _check_no_abs_paths(path: Path) -> None:
    opener = gzip.open if path.suffix == ".gz" else open
    with opener(path, "rt", errors="replace") as fh:
        text = fh.read()
    machine_dirs = ["/" + d + "/" for d in ("work", "tmp", "root", "home")]  # no machine paths
    for bad in (str(REPO), *machine_dirs, "/usr/share/espresso"):
        if bad in text:
            raise RuntimeError(f"{path}: absolute path {bad!r} found in output")


def run_qe(run: QERun, out_root: Path, np_: int) -> dict:
    tree = out_root / run.tree
    pseudo_dir = tree / "pseudo"
    pseudo_dir.mkdir(parents=True, exist_ok=True)
    for s in set(run.symbols):
        dst = pseudo_dir / PSEUDO[s]
        if not dst.exists():
            shutil.copy2(PSEUDO_SRC / PSEUDO[s], dst)
    final_dir = tree / run.name
    rundir = tree / f".{run.name}.partial"   # built aside, swapped in only when complete
    if rundir.exists():
        shutil.rmtree(rundir)
    rundir.mkdir(parents=True)
    (rundir / "pw.in").write_text(pw_input(run))
    env = dict(os.environ, OMP_NUM_THREADS="1")
    if np_ > 1:
        cmd = ["mpirun", "--allow-run-as-root", "-np", str(np_), "pw.x", "-nk", str(np_), "-in", "pw.in"]
    else:
        cmd = ["pw.x", "-in", "pw.in"]
    t0 = time.time()
    with open(rundir / "pw.out.partial", "w") as fh:
        proc = subprocess.run(cmd, cwd=rundir, stdout=fh, stderr=subprocess.PIPE, env=env, text=True)
    wall = time.time() - t0
    shutil.rmtree(rundir / "scratch", ignore_errors=True)
    text = (rundir / "pw.out.partial").read_text()
    (rundir / "pw.out.partial").unlink()
    if proc.returncode != 0 and run.truncate is None:
        raise RuntimeError(f"pw.x failed for {run.name} (rc {proc.returncode}): {proc.stderr[-2000:]}")
    if "JOB DONE" not in text:
        raise RuntimeError(f"pw.x did not finish for {run.name}")
    if run.truncate is not None:
        text = cut_like_killed(text, **run.truncate)
    # leave only pw.in and pw.out in the folder
    for extra in rundir.iterdir():
        if extra.name not in ("pw.in",):
            if extra.is_dir():
                shutil.rmtree(extra)
            else:
                extra.unlink()
    data = text.encode()
    if len(data) > GZIP_ABOVE:
        target = rundir / "pw.out.gz"
        with gzip.GzipFile(target, "wb", mtime=0) as gz:
            gz.write(data)
    else:
        target = rundir / "pw.out"
        target.write_bytes(data)
    _check_no_abs_paths(rundir / "pw.in")
    _check_no_abs_paths(target)
    if final_dir.exists():
        shutil.rmtree(final_dir)
    os.replace(rundir, final_dir)
    target = final_dir / target.name
    return {"name": run.name, "wall_s": round(wall, 1), "file": str(target.relative_to(out_root)),
            "bytes": target.stat().st_size}


# --------------------------------------------------------------------------------------
# run catalogue
# --------------------------------------------------------------------------------------
# Constant-cutoff modified kinetic functional: keeps the plane-wave basis from freezing the
# starting cell's anisotropy into the relaxed lattice (see shared qe-notes).
CONSTANT_CUTOFF = {"ecfixed": 16.0, "qcutz": 150.0, "q2sigma": 2.0}

QE_RUNS: list[QERun] = [
    # ---- fixtures for the adapter tests (tests/data/qe) -------------------------------
    QERun(
        name="layer_oblique_to_hex", tree="tests/data/qe", calculation="vc-relax",
        cell=layer_cell(3.78, 3.92, 116.0, 16.0), symbols=["Si", "Si"],
        frac=np.array([[0.0, 0.0, 0.5], [0.35, 0.64, 0.53]]),
        system={**CONSTANT_CUTOFF, "degauss": 0.01}, cellnl={"cell_dofree": "2Dxy"},
        note="buckled two-atom Si layer, oblique start, relaxes onto the hexagonal lattice",
    ),
    QERun(
        name="bulk_tetragonal_to_cubic", tree="tests/data/qe", calculation="vc-relax",
        cell=fcc_primitive(4.00, 4.16), symbols=["Al"], frac=np.array([[0.0, 0.0, 0.0]]),
        kpts=(8, 8, 8, 0, 0, 0), system={**CONSTANT_CUTOFF},
        note="one-atom fcc-type Al cell strained 4% along c (body-centred tetragonal), relaxes to cubic",
    ),
    QERun(
        name="relax_atoms_to_sites", tree="tests/data/qe", calculation="relax",
        cell=fcc_primitive(5.40), symbols=["Si", "Si"],
        frac=np.array([[0.0, 0.0, 0.0], [0.25, 0.25, 0.25]]) + np.array([[0.0, 0.0, 0.0], [0.028, -0.017, 0.009]]),
        kpts=(4, 4, 4, 0, 0, 0), ecutwfc=18.0, system={"occupations": "fixed"},
        note="two-atom diamond-type Si cell, one atom pushed off its site, fixed cell: atoms return",
    ),
    # ---- demo campaign "Saltmarsh-12" (example_runs) --------------------------------------
    QERun(
        name="L01_qe_vcrelax", tree="example_runs", calculation="vc-relax",
        cell=layer_cell(3.70, 3.98, 113.0, 16.0), symbols=["Si", "Si"],
        frac=np.array([[0.0, 0.0, 0.5], [0.36, 0.65, 0.528]]),
        system={**CONSTANT_CUTOFF, "degauss": 0.01}, cellnl={"cell_dofree": "2Dxy", "press_conv_thr": 0.01},
        control={"etot_conv_thr": 1.0e-8, "forc_conv_thr": 2.0e-5},
        note="SM-L01, buckled Si2 layer from an oblique start, constant-cutoff functional",
    ),
    QERun(
        name="L02_qe_vcrelax", tree="example_runs", calculation="vc-relax",
        cell=layer_cell(3.70, 3.98, 113.0, 16.0), symbols=["Si", "Si"],
        frac=np.array([[0.0, 0.0, 0.5], [0.36, 0.65, 0.528]]),
        system={"degauss": 0.01}, cellnl={"cell_dofree": "2Dxy", "press_conv_thr": 0.02},
        note="SM-L02, same start as SM-L01 with a plain fixed plane-wave basis",
    ),
    QERun(
        name="L03_qe_vcrelax", tree="example_runs", calculation="vc-relax",
        cell=layer_cell(2.70, 2.85, 112.0, 14.0), symbols=["Al"], frac=np.array([[0.0, 0.0, 0.5]]),
        system={**CONSTANT_CUTOFF}, cellnl={"cell_dofree": "2Dxy"},
        note="SM-L03, one-atom Al layer from an oblique start",
    ),
    QERun(
        name="L04_qe_relax", tree="example_runs", calculation="relax",
        cell=layer_cell(3.846, 3.846, 120.0, 16.0), symbols=["Si", "Si"],
        frac=np.array([[0.0, 0.0, 0.5], [0.372, 0.641, 0.531]]),
        system={"degauss": 0.01},
        note="SM-L04, Si2 layer in a fixed hexagonal cell, second atom off its site",
    ),
    QERun(
        name="L05_qe_killed", tree="example_runs", calculation="vc-relax",
        cell=layer_cell(2.62, 2.80, 106.0, 14.0), symbols=["Al"], frac=np.array([[0.0, 0.0, 0.5]]),
        system={**CONSTANT_CUTOFF}, cellnl={"cell_dofree": "2Dxy"},
        truncate={"step": 6, "scf_iteration": 3},
        note="SM-L05, one-atom Al layer; pw.out cut inside the SCF of ionic step 6 (killed job)",
    ),
    QERun(
        name="B01_qe_vcrelax", tree="example_runs", calculation="vc-relax",
        cell=np.array([[0.0, 4.04 / 2, 4.12 / 2], [3.96 / 2, 0.0, 4.12 / 2], [3.96 / 2, 4.04 / 2, 0.0]]),
        symbols=["Al"], frac=np.array([[0.0, 0.0, 0.0]]),
        kpts=(8, 8, 8, 0, 0, 0), system={**CONSTANT_CUTOFF},
        note="SM-B01, one-atom face-centred orthorhombic Al cell (a, b, c = 3.96, 4.04, 4.12)",
    ),
    QERun(
        name="B02_qe_vcrelax_sym", tree="example_runs", calculation="vc-relax",
        cell=bcc_primitive(3.20), symbols=["Al"], frac=np.array([[0.0, 0.0, 0.0]]),
        kpts=(7, 8, 9, 0, 0, 0), system={**CONSTANT_CUTOFF},
        note="SM-B02, one-atom body-centred cubic Al cell, symmetry detection on, uneven 7x8x9 mesh",
    ),
    QERun(
        name="B03_qe_vcrelax_nosym", tree="example_runs", calculation="vc-relax",
        cell=bcc_primitive(3.20), symbols=["Al"], frac=np.array([[0.0, 0.0, 0.0]]),
        kpts=(7, 8, 9, 0, 0, 0), system={**CONSTANT_CUTOFF, "nosym": True},
        note="SM-B03, same start and mesh as SM-B02 with nosym=.true.",
    ),
]


# --------------------------------------------------------------------------------------
# ASE runs (EMT, shipped with ASE)
# --------------------------------------------------------------------------------------
@dataclass
class ASERun:
    name: str
    fmt: str                       # "traj" (the optimizer's own file) or "extxyz" (written from it)
    build: object                  # () -> ase.Atoms
    optimizer: str = "BFGS"        # "BFGS" | "FIRE" | "MDMin"
    cell_mask: list | None = None  # FrechetCellFilter mask (Voigt xx yy zz yz xz xy); None = fixed cell
    fmax: float = 1e-3             # eV/Å (on the filter: forces and scaled stress)
    steps: int = 400
    note: str = ""
    opt_kwargs: dict | None = None  # extra optimizer arguments (time step, step cap)


def _flat_layer(symbols, frac2d, a, b, gamma_deg, c=14.0):
    from ase import Atoms
    frac = np.array([[x, y, 0.5] for x, y in frac2d])
    return Atoms(symbols, scaled_positions=frac, cell=layer_cell(a, b, gamma_deg, c), pbc=True)


def _hex_net_2x2(symbols, a, b, gamma_deg):
    """Four-site decoration of a triangular net in a 2x2 cell (all four species distinct: layer group p2)."""
    return _flat_layer(symbols, [(0, 0), (0.5, 0), (0, 0.5), (0.5, 0.5)], a, b, gamma_deg)


def _hex_net_2x3(symbols, a, b, gamma_deg):
    """Six-site decoration of a triangular net in a 2a1 x 3a2 cell (an oblique supercell)."""
    sites = [(i / 2, j / 3) for i in range(2) for j in range(3)]
    return _flat_layer(symbols, sites, a, b, gamma_deg)


def _build_l06():
    return _hex_net_2x2(["Ni", "Cu", "Ag", "Pt"], 5.16, 5.26, 58.77)


def _build_l10():
    return _hex_net_2x2(["Ni", "Cu", "Ag", "Pt"], 5.16, 5.26, 61.5)


def _build_l07():
    return _hex_net_2x3(["Au", "Cu", "Cu", "Cu", "Cu", "Cu"], 5.16, 7.62, 61.5)


def _build_l08():
    return _flat_layer(["Ni", "Au"], [(0.0, 0.0), (0.5, 0.5)], 4.40, 2.62, 100.0)


def _build_l09():
    # fixed 5.2 Å square cell, three atoms in general positions (an asymmetric motif)
    return _flat_layer(["Cu", "Cu", "Au"], [(0.05, 0.10), (0.52, 0.18), (0.30, 0.62)], 5.2, 5.2, 90.0)


def _build_b04():
    from ase.build import bulk
    at = bulk("Cu", "fcc", a=3.66, cubic=True) * (1, 1, 2)
    at.rattle(stdev=0.06, seed=7)
    return at


def _build_b06():
    # one-atom Cu cell 0.02 % off body-centred cubic along c (bcc is a saddle of EMT copper)
    from ase import Atoms
    return Atoms("Cu", cell=bcc_primitive(2.87, 2.87 * 1.0002), pbc=True)


def _build_b07():
    # 4-atom Cu cell with an orthorhombic strain and a small a-b shear
    from ase.build import bulk
    at = bulk("Cu", "fcc", a=3.61, cubic=True)
    F = np.eye(3) + np.diag([0.0012, 0.045, -0.0356])
    F[0, 1] = F[1, 0] = 0.019
    at.set_cell(at.cell.array @ F, scale_atoms=True)
    return at


def _build_b05():
    from ase.build import bulk
    at = bulk("Pd", "fcc", a=3.9, cubic=True)
    at.set_cell(np.diag([3.78, 3.92, 4.06]), scale_atoms=True)
    return at


INPLANE = [1, 1, 0, 0, 0, 1]   # xx, yy, xy: in-plane cell only, vacuum axis fixed
ASE_RUNS: list[ASERun] = [
    ASERun("L06_emt_bfgs", "traj", _build_l06, "BFGS", INPLANE, 1e-3,
           note="SM-L06, four-species triangular net (Ni Cu Ag Pt) in a 2x2 cell, start sheared the other way"),
    ASERun("L07_emt_fire", "traj", _build_l07, "FIRE", INPLANE, 1e-3,
           note="SM-L07, Cu5Au triangular net in an oblique 2x3 cell"),
    ASERun("L08_emt_fire_loose", "extxyz", _build_l08, "FIRE", INPLANE, 0.05,
           note="SM-L08, Ni-Au two-atom layer from a 100 deg start, loosely converged (fmax 0.05 eV/A)"),
    ASERun("L09_emt_fixed_square", "traj", _build_l09, "BFGS", None, 1e-4,
           note="SM-L09, three-atom motif relaxed in a fixed square cell"),
    ASERun("B04_emt_fire_loose", "extxyz", _build_b04, "FIRE", [1, 1, 1, 1, 1, 1], 0.05,
           note="SM-B04, rattled 8-atom fcc-type Cu cell, loosely converged (fmax 0.05 eV/A)"),
    ASERun("B05_emt_bfgs", "extxyz", _build_b05, "BFGS", [1, 1, 1, 1, 1, 1], 1e-4,
           note="SM-B05, 4-atom Pd cell strained orthorhombically (3.78 x 3.92 x 4.06 A)"),
    ASERun("L10_emt_bfgs_flip", "traj", _build_l10, "BFGS", INPLANE, 1e-3,
           opt_kwargs={"maxstep": 0.01},
           note="SM-L10, the SM-L06 net from 61.5 deg, small BFGS steps: the flip crosses a mirror "
                "lattice on a frame"),
    ASERun("B06_emt_bain", "traj", _build_b06, "FIRE", [1, 1, 1, 1, 1, 1], 1e-6, steps=1000,
           note="SM-B06, one-atom Cu cell 0.02 % off bcc, slides along the Bain path"),
    ASERun("B07_emt_fire_path", "traj", _build_b07, "FIRE", [1, 1, 1, 1, 1, 1], 1e-4, steps=400,
           note="SM-B07, sheared 4-atom Cu cell; FIRE touches oP, oS, tP and leaves them before ending cP"),
]


def run_ase(run: ASERun, out_root: Path) -> dict:
    from ase.calculators.emt import EMT
    from ase.filters import FrechetCellFilter
    from ase.io import read, write
    from ase.optimize import BFGS, FIRE, MDMin

    tree = out_root / "example_runs"
    tree.mkdir(parents=True, exist_ok=True)
    atoms = run.build()
    atoms.calc = EMT()
    target = tree / f"{run.name}.{run.fmt}"
    tmp_traj = tree / f".{run.name}.traj.partial"
    opt_cls = {"BFGS": BFGS, "FIRE": FIRE, "MDMin": MDMin}[run.optimizer]
    obj = atoms if run.cell_mask is None else FrechetCellFilter(atoms, mask=run.cell_mask)
    t0 = time.time()
    with opt_cls(obj, logfile=None, trajectory=str(tmp_traj), **(run.opt_kwargs or {})) as opt:
        converged = opt.run(fmax=run.fmax, steps=run.steps)
    wall = time.time() - t0
    if not converged:
        raise RuntimeError(f"{run.name}: optimizer did not reach fmax {run.fmax} in {run.steps} steps")
    if run.fmt == "traj":
        os.replace(tmp_traj, target)
    else:
        frames = read(str(tmp_traj), ":")
        part = tree / f".{run.name}.{run.fmt}.partial"
        write(str(part), frames, format="extxyz")
        os.replace(part, target)
        tmp_traj.unlink()
    return {"name": run.name, "wall_s": round(wall, 1), "file": str(target.relative_to(out_root)),
            "bytes": target.stat().st_size}


# --------------------------------------------------------------------------------------
# multi-stage pw.x runs (restarts), tests/data/qe/restart_*
# --------------------------------------------------------------------------------------
def _pw(rundir: Path, inp: str, out: str, np_: int, stop_after_bfgs: int | None = None) -> str:
    """Run pw.x on ``rundir/inp`` writing ``rundir/out``; with ``stop_after_bfgs``, ask it to stop
    with driftwatch's own soft stop (``<prefix>.EXIT`` in its outdir) once that many BFGS steps are
    printed. Returns the output text."""
    from driftwatch.adapters.espresso import soft_stop
    env = dict(os.environ, OMP_NUM_THREADS="1")
    cmd = (["mpirun", "--allow-run-as-root", "-np", str(np_), "pw.x", "-nk", str(np_), "-in", inp]
           if np_ > 1 else ["pw.x", "-in", inp])
    with open(rundir / out, "w") as fh:
        proc = subprocess.Popen(cmd, cwd=rundir, stdout=fh, stderr=subprocess.PIPE, env=env,
                                text=True)
        asked = False
        while proc.poll() is None:
            time.sleep(0.2)
            text = (rundir / out).read_text(errors="replace")
            if stop_after_bfgs and not asked and \
                    text.count("number of bfgs steps") >= stop_after_bfgs:
                req = soft_stop(rundir, reason=f"fixture: stop after {stop_after_bfgs} BFGS steps")
                req["target"].parent.mkdir(parents=True, exist_ok=True)
                req["target"].write_text(req["text"])
                asked = True
        err = proc.stderr.read()
    text = (rundir / out).read_text()
    if "JOB DONE" not in text:
        raise RuntimeError(f"pw.x did not finish in {rundir} ({proc.returncode}): {err[-2000:]}")
    return text


def _last_structure(text: str):
    """The last CELL_PARAMETERS (Å) and ATOMIC_POSITIONS (crystal) cards a vc-relax output printed."""
    cell = text.rsplit("CELL_PARAMETERS (angstrom)\n", 1)[1].splitlines()[:3]
    pos = text.rsplit("ATOMIC_POSITIONS (crystal)\n", 1)[1].splitlines()
    cell = np.array([[float(x) for x in r.split()] for r in cell])
    n = next(i for i, r in enumerate(pos) if len(r.split()) != 4)
    rows = [r.split() for r in pos[:n]]
    return cell, [r[0] for r in rows], np.array([[float(x) for x in r[1:]] for r in rows])


def _finish_tree(rundir: Path, final_dir: Path) -> list[Path]:
    shutil.rmtree(rundir / "scratch", ignore_errors=True)
    for sub in [rundir, *[d for d in rundir.iterdir() if d.is_dir()]]:
        shutil.rmtree(sub / "scratch", ignore_errors=True)
    files = sorted(p for p in rundir.rglob("*") if p.is_file())
    for f in files:
        _check_no_abs_paths(f)
        if f.stat().st_size > 100_000:          # committed gzipped (the reader takes both)
            with gzip.GzipFile(f.with_name(f.name + ".gz"), "wb", mtime=0) as gz:
                gz.write(f.read_bytes())
            f.unlink()
    if final_dir.exists():
        shutil.rmtree(final_dir)
    os.replace(rundir, final_dir)
    return sorted(p for p in final_dir.rglob("*") if p.is_file())


def _al_restart(out_root: Path, np_: int, name: str, appended: bool) -> dict:
    """An Al vc-relax (bct start, c/a 1.08) stopped after 3 ionic steps (nstep = 3), then continued
    with restart_mode='restart'; ``pw.in`` is the restart input as the user left it. The first
    output is kept as ``pw.out.1`` beside the restart's ``pw.out`` (a job script's numbered copy),
    or, ``appended``, the restart is appended to it (``pw.x < pw.in >> pw.out``)."""
    tree = out_root / "tests/data/qe"
    run = QERun(name=name, tree="tests/data/qe", calculation="vc-relax",
                cell=fcc_primitive(4.00, 4.32), symbols=["Al"], frac=np.array([[0.0, 0.0, 0.0]]),
                kpts=(8, 8, 8, 0, 0, 0), system={**CONSTANT_CUTOFF},
                control={"nstep": 3, "disk_io": "low"})
    rundir = tree / f".{name}.partial"
    shutil.rmtree(rundir, ignore_errors=True)
    rundir.mkdir(parents=True)
    t0 = time.time()
    (rundir / "pw.in").write_text(pw_input(run))
    first = _pw(rundir, "pw.in", "pw.out" if appended else "pw.out.1", np_)
    if "The maximum number of steps has been reached" not in first:
        raise RuntimeError(f"{name}: the first run was meant to stop at nstep")
    run.control = {"nstep": 80, "disk_io": "low", "restart_mode": "restart"}
    (rundir / "pw.in").write_text(pw_input(run))
    time.sleep(1.1)                    # a later start time, to the second pw.x prints
    second = _pw(rundir, "pw.in", "pw.out.2" if appended else "pw.out", np_)
    if appended:
        (rundir / "pw.out").write_text(first + second)
        (rundir / "pw.out.2").unlink()
    files = _finish_tree(rundir, tree / name)
    return {"name": name, "wall_s": round(time.time() - t0, 1),
            "file": str((tree / name).relative_to(out_root)),
            "bytes": sum(f.stat().st_size for f in files)}


def make_restart_numbered(out_root: Path, np_: int) -> dict:
    """:func:`_al_restart` into two outputs, ``pw.out.1`` and ``pw.out``."""
    return _al_restart(out_root, np_, "restart_numbered", appended=False)


def make_restart_appended(out_root: Path, np_: int) -> dict:
    """:func:`_al_restart` into one ``pw.out`` holding both runs."""
    return _al_restart(out_root, np_, "restart_appended", appended=True)


def make_restart_stage_folders(out_root: Path, np_: int) -> dict:
    """A two-atom Si vc-relax (fcc lattice stretched 5 % along c, one atom off its site) stopped by
    driftwatch's soft stop (pw.EXIT) after 2 BFGS steps in ``relax1/``; ``relax2/`` is a new run
    from the last structure relax1 printed (restart_mode='from_scratch')."""
    tree = out_root / "tests/data/qe"
    pseudo = tree / "pseudo"
    rundir = tree / ".restart_stage_folders.partial"
    shutil.rmtree(rundir, ignore_errors=True)
    (rundir / "relax1").mkdir(parents=True)
    (rundir / "relax2").mkdir()
    base = dict(name="restart_stage_folders", tree="tests/data/qe", calculation="vc-relax",
                kpts=(4, 4, 4, 0, 0, 0), ecutwfc=18.0,
                system={**CONSTANT_CUTOFF, "occupations": "fixed"},
                control={"pseudo_dir": "../../pseudo", "disk_io": "low"})
    one = QERun(cell=fcc_primitive(5.40, 5.67), symbols=["Si", "Si"],
                frac=np.array([[0.0, 0.0, 0.0], [0.25, 0.25, 0.25]]) + np.array([[0, 0, 0],
                                                                               [0.02, -0.01, 0.0]]),
                **base)
    t0 = time.time()
    (rundir / "relax1" / "pw.in").write_text(pw_input(one))
    text = _pw(rundir / "relax1", "pw.in", "pw.out", np_, stop_after_bfgs=2)
    if "Program stopped by user request" not in text:
        raise RuntimeError("restart_stage_folders: relax1 was meant to stop on pw.EXIT")
    cell, symbols, frac = _last_structure(text)
    two = QERun(cell=cell, symbols=symbols, frac=frac, **base)
    (rundir / "relax2" / "pw.in").write_text(pw_input(two))
    _pw(rundir / "relax2", "pw.in", "pw.out", np_)
    files = _finish_tree(rundir, tree / "restart_stage_folders")
    assert pseudo.is_dir()
    return {"name": "restart_stage_folders", "wall_s": round(time.time() - t0, 1),
            "file": str((tree / "restart_stage_folders").relative_to(out_root)),
            "bytes": sum(f.stat().st_size for f in files)}


def make_nscf_after_scf(out_root: Path, np_: int) -> dict:
    """A non-self-consistent pw.x run (calculation='nscf', the 'Band Structure Calculation' that
    band structures and densities of states start from) on the charge density of a two-atom Si
    scf run; only the nscf run is kept (``pw.in``, ``pw.out``): an output with no ionic step. It
    goes to ``tests/data/qe_nscf`` (the tests take every folder of tests/data/qe as a relaxation)."""
    tree = out_root / "tests/data/qe"
    rundir = tree / ".nscf_after_scf.partial"
    shutil.rmtree(rundir, ignore_errors=True)
    rundir.mkdir(parents=True)
    base = dict(name="nscf_after_scf", tree="tests/data/qe", cell=fcc_primitive(5.43),
                symbols=["Si", "Si"], frac=np.array([[0.0, 0.0, 0.0], [0.25, 0.25, 0.25]]),
                kpts=(4, 4, 4, 0, 0, 0), ecutwfc=16.0, system={"occupations": "fixed"},
                control={"disk_io": "low"})          # the scf run's charge density is kept
    t0 = time.time()
    (rundir / "scf.in").write_text(pw_input(QERun(calculation="scf", **base)))
    _pw(rundir, "scf.in", "scf.out", np_)
    nscf = QERun(calculation="nscf", **{**base, "kpts": (6, 6, 6, 0, 0, 0),
                                         "system": {"occupations": "fixed", "nbnd": 8}})
    (rundir / "pw.in").write_text(pw_input(nscf))
    text = _pw(rundir, "pw.in", "pw.out", np_)
    if "Band Structure Calculation" not in text:
        raise RuntimeError("nscf_after_scf: pw.x did not run a band structure calculation")
    for name in ("scf.in", "scf.out"):
        (rundir / name).unlink()
    final = out_root / STAGED_RUNS["nscf_after_scf"][0]
    files = _finish_tree(rundir, final)
    return {"name": "nscf_after_scf", "wall_s": round(time.time() - t0, 1),
            "file": str(final.relative_to(out_root)),
            "bytes": sum(f.stat().st_size for f in files)}


def make_cell_dynamics(out_root: Path, np_: int) -> dict:
    """Two variable-cell pw.x runs of an invented two-atom Al cell that use pw.x's cell dynamics
    instead of BFGS: ``vc_md/`` (calculation='vc-md', Wentzcovitch dynamics, 4 steps; no relaxation)
    and ``vc_relax_damped/`` (calculation='vc-relax', damped Wentzcovitch dynamics, 3 steps). Their
    outputs say which they are only in the lines pw.x prints (read without the input). They go to
    ``tests/data/qe_dynamics`` (not tests/data/qe, whose folders the tests take as relaxations)."""
    final = out_root / STAGED_RUNS["cell_dynamics"][0]
    rundir = final.parent / ".qe_dynamics.partial"
    shutil.rmtree(rundir, ignore_errors=True)
    base = dict(tree="tests/data/qe_dynamics", symbols=["Al", "Al"], kpts=(4, 4, 3, 0, 0, 0),
                cell=np.diag([2.90, 2.85, 4.10]), ecutwfc=15.0,
                frac=np.array([[0.0, 0.0, 0.0], [0.52, 0.49, 0.50]]))
    runs = {"vc_md": QERun(name="vc_md", calculation="vc-md", control={"nstep": 4, "dt": 20},
                           ions={"ion_dynamics": "beeman"}, cellnl={"cell_dynamics": "w",
                                                                    "press": 10.0}, **base),
            "vc_relax_damped": QERun(name="vc_relax_damped", calculation="vc-relax",
                                     control={"nstep": 3, "dt": 20}, ions={"ion_dynamics": "damp"},
                                     cellnl={"cell_dynamics": "damp-w", "press": 10.0}, **base)}
    t0 = time.time()
    for name, run in runs.items():
        (rundir / name).mkdir(parents=True)
        shutil.copy(out_root / "tests/data/qe/pseudo" / PSEUDO["Al"], rundir / name)
        (rundir / name / "pw.in").write_text(pw_input(run).replace("'../pseudo'", "'./'"))
        _pw(rundir / name, "pw.in", "pw.out", 1)
        for f in (rundir / name).iterdir():      # vc-md also writes pw.e, pw.tv, ... (averages)
            if f.is_file() and f.name not in ("pw.in", "pw.out"):
                f.unlink()
    files = _finish_tree(rundir, final)
    return {"name": "cell_dynamics", "wall_s": round(time.time() - t0, 1),
            "file": str(final.relative_to(out_root)), "bytes": sum(f.stat().st_size for f in files)}


@dataclass
class _Named:
    name: str
    tree: str
    note: str


STAGED_RUNS = {"restart_numbered": ("tests/data/qe", make_restart_numbered),
               "restart_appended": ("tests/data/qe", make_restart_appended),
               "restart_stage_folders": ("tests/data/qe", make_restart_stage_folders),
               "nscf_after_scf": ("tests/data/qe_nscf", make_nscf_after_scf),
               "cell_dynamics": ("tests/data/qe_dynamics", make_cell_dynamics)}
"""name -> (the folder it goes to, its maker)."""


# --------------------------------------------------------------------------------------
# many relaxations in one file (tests/data/batch): ASE EMT as a stand-in ML potential
# --------------------------------------------------------------------------------------
def _batch_starts():
    """Invented starting cells of the batch "Ridgeback-6" (ids are ours): bulk cells off a cubic
    lattice and layers off a hexagonal one."""
    from ase import Atoms
    from ase.build import bulk
    starts = {}
    starts["Cu-bct-07"] = Atoms("Cu", cell=bcc_primitive(3.10, 3.10 * 1.30), pbc=True)
    starts["Al-fco-02"] = Atoms("Al", cell=np.array([[0.0, 4.04 / 2, 4.12 / 2], [3.96 / 2, 0.0, 4.12 / 2],
                                                    [3.96 / 2, 4.04 / 2, 0.0]]), pbc=True)
    ni = bulk("Ni", "fcc", a=3.52)
    F = np.eye(3) + 0.02 * (np.ones((3, 3)) - np.eye(3))          # a trigonal strain: hR
    ni.set_cell(ni.cell.array @ F, scale_atoms=True)
    starts["Ni-rhombo-03"] = ni
    cuni = Atoms("CuNi", scaled_positions=[[0, 0, 0], [0.5, 0.5, 0.5]],
                 cell=np.diag([2.52, 2.52, 3.70]), pbc=True)      # an L1_0-type tP cell
    starts["CuNi-tP-04"] = cuni
    starts["Cu-layer-05"] = _flat_layer(["Cu", "Cu"], [(0.0, 0.0), (0.5, 0.5)], 4.30, 2.62, 96.0)
    starts["Al-layer-06"] = _flat_layer(["Al"], [(0.0, 0.0)], 2.80, 2.95, 84.0)
    return starts


def _batch_mask(atoms):
    """In-plane cell only for layers (vacuum along c), the whole cell for bulk."""
    return INPLANE if atoms.cell.lengths()[2] > 10 else [1, 1, 1, 1, 1, 1]


BATCH_README = """# Batch "Ridgeback-6": many relaxations in one file (made here)

Invented starting cells (the ids Cu-bct-07 ... Al-layer-06 and the batch name are ours): bulk cells
off a cubic lattice (body-centred tetragonal Cu, face-centred orthorhombic Al, rhombohedral Ni), a
tetragonal CuNi cell, and two layers (Cu2, Al) from oblique starts. Each was relaxed with ASE's own
EMT calculator (a stand-in for an ML potential) on a `FrechetCellFilter` (in-plane mask for layers)
with BFGS to fmax {fmax} eV/A, as an ML-potential batch workflow relaxes and writes them:

* `relaxations.extxyz.gz`: every frame of every relaxation, one relaxation after the other, with
  `structure_id` and `step` in each frame's info (and ASE's energy, forces, stress);
* `relaxations.db`: the same relaxations run batched (one optimizer step of each structure in turn)
  into one ase.db (SQLite), `relax_id` and `step` as key-value pairs, rows interleaved;
* `pairs.extxyz.gz`: the first and last frame of each relaxation, `state=initial` / `final`;
* `pairs.db`: the same pairs in an ase.db, `system_name` and `relaxed` = False / True, the relaxed
  row written first.

Frames per relaxation: {counts}. Regenerate with `python scripts/make_runs.py --only batch` (about
half a minute, mostly ase.db commits). EMT is a toy potential: these files show how a batch is
read, not physics of any material.
Licence: BSD-3-Clause, as the project.
"""


def make_batch(out_root: Path) -> dict:
    """Six EMT relaxations (FrechetCellFilter + BFGS) written as an ML-potential batch workflow
    writes them: every frame of every relaxation appended to one extended XYZ with ``structure_id``
    and ``step`` in the frame's info (relaxations one after the other); the same relaxations run
    batched (one optimizer step of each structure in turn) into one ase.db with ``relax_id`` and
    ``step`` key-value pairs (rows interleaved); and two files of initial/final pairs (the first
    and last frames): ``pairs.extxyz`` (``state=initial/final``) and ``pairs.db`` (``relaxed =
    False/True``, the relaxed row written first, as databases keep the result first)."""
    from ase.calculators.emt import EMT
    from ase.calculators.singlepoint import SinglePointCalculator
    from ase.db import connect
    from ase.filters import FrechetCellFilter
    from ase.io import write
    from ase.optimize import BFGS

    tree = out_root / "tests/data/batch"
    part = out_root / "tests/data/.batch.partial"
    shutil.rmtree(part, ignore_errors=True)
    part.mkdir(parents=True)
    t0 = time.time()
    fmax, steps = 2e-3, 300

    def relaxer(name, atoms):
        atoms = atoms.copy()
        atoms.calc = EMT()
        opt = BFGS(FrechetCellFilter(atoms, mask=_batch_mask(atoms)), logfile=None)
        return atoms, opt

    # 1. one after the other, every step appended to one extended XYZ
    xyz = part / "relaxations.extxyz"
    trajectories = {}
    for name, start in _batch_starts().items():
        atoms, opt = relaxer(name, start)
        frames = []

        def keep(atoms=atoms, opt=opt, name=name, frames=frames):
            at = atoms.copy()                         # the step's results, kept with the frame
            at.calc = SinglePointCalculator(at, energy=atoms.get_potential_energy(),
                                            forces=atoms.get_forces(), stress=atoms.get_stress())
            at.info.update({"structure_id": name, "step": opt.nsteps})
            frames.append(at)
            write(xyz, at, format="extxyz", append=True)
        opt.attach(keep)
        if not opt.run(fmax=fmax, steps=steps):
            raise RuntimeError(f"batch: {name} did not converge in {steps} steps")
        trajectories[name] = frames

    # 2. batched: one step of each structure in turn, every step a row of one ase.db
    db_path = part / "relaxations.db"
    with connect(db_path, use_lock_file=False) as db:
        runs = []
        for name, start in _batch_starts().items():
            atoms, opt = relaxer(name, start)
            opt.attach(lambda atoms=atoms, opt=opt, name=name:
                       db.write(atoms, relax_id=name, step=opt.nsteps))
            runs.append(opt.irun(fmax=fmax, steps=steps))
        while runs:
            for it in list(runs):
                try:
                    if next(it):
                        runs.remove(it)
                except StopIteration:
                    runs.remove(it)

    # 3. initial/final pairs
    pairs_xyz = part / "pairs.extxyz"
    with connect(part / "pairs.db", use_lock_file=False) as db:
        for name, frames in trajectories.items():
            first, last = frames[0].copy(), frames[-1].copy()
            for at, state, src in ((first, "initial", frames[0]), (last, "final", frames[-1])):
                at.calc = src.calc
                at.info = {"structure_id": name, "state": state}
                write(pairs_xyz, at, format="extxyz", append=True)
            db.write(frames[-1], system_name=name, relaxed=True)
            db.write(frames[0], system_name=name, relaxed=False)
    for f in (xyz, pairs_xyz):
        with gzip.GzipFile(f.with_name(f.name + ".gz"), "wb", mtime=0) as gz:
            gz.write(f.read_bytes())
        f.unlink()
    counts = ", ".join(f"{k} {len(v)}" for k, v in trajectories.items())
    (part / "README.md").write_text(BATCH_README.format(counts=counts, fmax=fmax))
    if tree.exists():
        shutil.rmtree(tree)
    os.replace(part, tree)
    files = sorted(tree.iterdir())
    return {"name": "batch", "wall_s": round(time.time() - t0, 1), "file": str(tree.relative_to(out_root)),
            "bytes": sum(f.stat().st_size for f in files),
            "frames": {k: len(v) for k, v in trajectories.items()}}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--only", action="append", default=[],
                    help="run name, or a group: qe-fixtures, qe, qe-restarts, ase, batch, "
                         "examples (repeatable)")
    ap.add_argument("--out", type=Path, default=REPO, help="output root (default: repository root)")
    ap.add_argument("--np", type=int, default=2, help="MPI processes for pw.x (1 or 2; default 2)")
    ap.add_argument("--list", action="store_true", help="list the runs and exit")
    args = ap.parse_args(argv)
    if args.np not in (1, 2):
        ap.error("--np must be 1 or 2 (the machine is shared)")
    runs = [("qe", r) for r in QE_RUNS] + [("ase", r) for r in ASE_RUNS] + \
        [("qe-restarts", _Named(n, tree, (f.__doc__ or "").split("\n")[0]))
         for n, (tree, f) in STAGED_RUNS.items()] + \
        [("batch", _Named("batch", "tests/data/batch", "six EMT relaxations in one extxyz and one "
                                                        "ase.db, and initial/final pairs"))]
    if args.list:
        for kind, r in runs:
            print(f"{r.name:32s} {kind:4s} {getattr(r, 'tree', 'example_runs')}  {r.note}")
        return 0
    selected = []
    for kind, r in runs:
        tree = getattr(r, "tree", "example_runs")
        groups = {r.name, kind, "qe-fixtures" if tree.startswith("tests") else "examples"}
        if kind == "qe-restarts":
            groups.add("qe")
        if not args.only or groups & set(args.only):
            selected.append((kind, r))
    known = {r.name for _, r in runs} | {"qe", "ase", "qe-fixtures", "examples", "qe-restarts",
                                          "batch"}
    unknown = set(args.only) - known
    if unknown:
        ap.error(f"unknown run name(s): {', '.join(sorted(unknown))} (see --list)")
    t0 = time.time()
    for kind, r in selected:
        if kind == "qe":
            res = run_qe(r, args.out, args.np)
        elif kind == "qe-restarts":
            res = STAGED_RUNS[r.name][1](args.out, args.np)
        elif kind == "batch":
            res = make_batch(args.out)
            print(f"  frames per relaxation: {res['frames']}")
        else:
            res = run_ase(r, args.out)
        print(f"{res['name']:32s} {res['wall_s']:7.1f} s  {res['bytes']:8d} B  {res['file']}", flush=True)
    print(f"total {time.time() - t0:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
