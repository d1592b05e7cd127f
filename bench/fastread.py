"""Focused line scanners for cells, positions, forces and energies (the reference scanners).

The OUTCAR one went into ``driftwatch/adapters/vasp.py`` (``_scan_outcar_steps``, reading ASE's
own chunks). ``driftwatch/adapters/espresso.py`` took the pw.x one's marker idea
(``Lines.skip_to``) and per-block conversion; this scanner is still ~2x faster (it reads no header
through ASE and checks nothing).

ASE's OUTCAR reader parses every line of every ionic step with a chain of chunk parsers; the
scanners here look only for the few markers that carry the per-step structure and results and
read the lines after them with ``numpy`` (one ``np.array(..., float)`` per block). They stream
(one line at a time, memory flat in the number of steps) and are checked frame by frame against
ASE (``check_against_ase``) on every file the benchmark reads. Everything else (species,
settings, constraints, magnetic moments...) is still for ASE / the adapters to read.

* ``outcar(path)``: VASP OUTCAR. Markers: ``POTCAR:`` / ``ions per type`` (species, header),
  ``direct lattice vectors`` (cell), ``POSITION ... TOTAL-FORCE`` (positions and forces),
  ``free  energy   TOTEN`` (free energy, ASE's ``free_energy``) and ``energy(sigma->0)``
  (ASE's ``energy``). A step is complete at its TOTEN line.
* ``pwout(path)``: pw.x output. Markers: the header (``lattice parameter (alat)``,
  ``crystal axes``, ``site n.`` positions), ``CELL_PARAMETERS`` / ``ATOMIC_POSITIONS`` cards,
  ``!    total energy``, ``Forces acting on atoms``. A step is complete at its forces block
  (the same rule as ASE's ``results_required``, for runs that print forces).
"""
from __future__ import annotations

import numpy as np

__all__ = ["outcar", "pwout", "READERS", "check_against_ase"]


def _species_counts(potcars, counts):
    from ase.data import atomic_numbers
    syms = []
    for p in potcars:
        s = p.split()[1].split("_")[0]
        syms.append(s if s in atomic_numbers else s[:1])
    return np.repeat([atomic_numbers[s] for s in syms], counts)


def outcar(path):
    """Stream an OUTCAR: dict of ``cells`` (n,3,3) Å, ``positions`` (n,N,3) Å, ``forces`` eV/Å,
    ``free_energy`` and ``energy`` (n,) eV, ``numbers`` (N,)."""
    potcars, counts, nions = [], None, None
    cells, pos, frc, efree, e0 = [], [], [], [], []
    cell = p = f = None
    with open(path, "r", errors="replace") as fh:
        for line in fh:
            if nions is None:
                if "POTCAR:" in line:
                    potcars.append(line.split(":", 1)[1])
                elif "ions per type" in line:
                    counts = [int(x) for x in line.split("=")[1].split()]
                    nions = sum(counts)
                    potcars = potcars[:len(counts)]
                continue
            if "direct lattice vectors" in line:
                cell = np.array([fh.readline().split()[:3] for _ in range(3)], float)
            elif "POSITION" in line and "TOTAL-FORCE" in line:
                fh.readline()
                block = np.array([fh.readline().split()[:6] for _ in range(nions)], float)
                p, f = block[:, :3], block[:, 3:6]
            elif "free  energy   TOTEN" in line:
                efree.append(float(line.split("=")[1].split()[0]))
                cells.append(cell)
                pos.append(p)
                frc.append(f)
            elif "energy(sigma->0)" in line and len(e0) < len(efree):
                e0.append(float(line.split("=")[-1]))
    n = len(efree)
    return {"cells": np.array(cells), "positions": np.array(pos), "forces": np.array(frc),
            "free_energy": np.array(efree), "energy": np.array(e0[:n]),
            "numbers": _species_counts(potcars, counts)}


def pwout(path):
    """Stream a pw.x relax/vc-relax output: dict of ``cells``, ``positions`` (Å), ``forces``
    (eV/Å), ``energy`` (eV, the ``!`` total energy), ``numbers``."""
    from ase.data import atomic_numbers
    from ase.io.espresso import units
    bohr, ry = units["Bohr"], units["Ry"]
    alat = nat = None
    cell = pos = syms = None
    cells, positions, forces, energies = [], [], [], []
    energy = None
    with open(path, "r", errors="replace") as fh:
        for line in fh:
            if "lattice parameter (alat)" in line:
                alat = float(line.split("=")[1].split()[0]) * bohr
            elif "celldm(1)=" in line:            # more digits than the alat line (as ASE reads)
                alat = float(line.split("=")[1].split()[0]) * bohr
            elif "number of atoms/cell" in line:
                nat = int(line.split("=")[1])
            elif "crystal axes: (cart. coord. in units of alat)" in line:
                cell = np.array([fh.readline().split("(")[2].split(")")[0].split()
                                 for _ in range(3)], float) * alat
            elif "site n." in line and "positions (alat units)" in line:
                rows = [fh.readline() for _ in range(nat)]
                syms = [r.split()[1] for r in rows]
                pos = np.array([r.split("(")[2].split(")")[0].split() for r in rows],
                               float) * alat
            elif line.startswith("CELL_PARAMETERS"):
                c = np.array([fh.readline().split()[:3] for _ in range(3)], float)
                if "alat" in line:
                    a = float(line.split("=")[1].strip(" )\n")) * bohr if "=" in line else alat
                    c = c * a
                elif "bohr" in line:
                    c = c * bohr
                cell = c
            elif line.startswith("ATOMIC_POSITIONS"):
                rows = [fh.readline().split() for _ in range(nat)]
                syms = [r[0] for r in rows]
                xyz = np.array([r[1:4] for r in rows], float)
                if "crystal" in line:
                    pos = xyz @ cell
                elif "bohr" in line:
                    pos = xyz * bohr
                elif "alat" in line:
                    pos = xyz * alat
                else:
                    pos = xyz
            elif line.startswith("!    total energy"):
                energy = float(line.split("=")[1].split()[0]) * ry
            elif "Forces acting on atoms" in line and energy is not None:
                fh.readline()
                f = np.array([fh.readline().split()[-3:] for _ in range(nat)], float) * (ry / bohr)
                cells.append(cell.copy())
                positions.append(pos.copy())
                forces.append(f)
                energies.append(energy)
                energy = None
    return {"cells": np.array(cells), "positions": np.array(positions), "forces": np.array(forces),
            "energy": np.array(energies),
            "numbers": np.array([atomic_numbers[s] for s in syms], int)}


READERS = {"outcar": outcar, "pwx": pwout}


def check_against_ase(path, got: dict, ase_frames, tol=1e-8):
    """Assert that a scanner's frames equal ASE's (cell, positions, forces, energies, numbers)."""
    assert len(got["cells"]) == len(ase_frames), \
        f"{path}: scanner read {len(got['cells'])} frames, ASE {len(ase_frames)}"
    for k, a in enumerate(ase_frames):
        assert np.array_equal(a.numbers, got["numbers"]), f"{path}: species differ"
        for name, ref, val in (("cell", a.cell.array, got["cells"][k]),
                               ("positions", a.positions, got["positions"][k]),
                               ("forces", a.get_forces(), got["forces"][k])):
            d = np.abs(ref - val).max()
            assert d <= tol * max(1.0, np.abs(ref).max()), f"{path} frame {k}: {name} differs by {d:.3g}"
        e_ref = a.get_potential_energy(force_consistent="free_energy" in got)
        e = got["free_energy"][k] if "free_energy" in got else got["energy"][k]
        assert abs(e - e_ref) <= 1e-8 * max(1.0, abs(e_ref)), f"{path} frame {k}: energy differs"
