"""Generator of multi-step VASP fixtures (vasprun.xml, OUTCAR, XDATCAR, INCAR, POSCAR, CONTCAR).

The trajectories are invented (an invented three-atom layer in a slab cell whose
oblique lattice drifts toward a rectangular one); only the file *layouts* follow
VASP. The layouts were modelled on the genuine VASP 5.3/6.3 files shipped in ASE's
test data (``ase/test/testdata/vasp/``: ``vasprun_pstress.xml``, ``OUTCAR_example_1``),
keeping the lines that ASE's and pymatgen's readers use. The tests check that
ASE, pymatgen's ``Vasprun``/``Xdatcar`` and driftwatch read the same cells.

Usage: ``python tests/vasp_gen.py OUTDIR [NSTEPS]`` writes a run folder.
"""
from __future__ import annotations

import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ase.data import atomic_masses, atomic_numbers

__all__ = ["Trajectory", "drifting_layer", "write_vasprun", "write_outcar", "write_xdatcar",
           "write_poscar", "write_incar", "write_run_folder"]


@dataclass
class Trajectory:
    """An invented relaxation: cells (n,3,3) Å, fractional positions (n,N,3), per-step results."""

    symbols: list
    cells: np.ndarray
    frac: np.ndarray
    energies: np.ndarray          # eV (free energy, e_fr_energy)
    forces: np.ndarray            # eV/Å
    stress_kb: np.ndarray         # (n, 3, 3) kBar, VASP's sign (positive = compressive)

    @property
    def positions(self):
        return np.einsum("nij,njk->nik", self.frac, self.cells)

    @property
    def numbers(self):
        return np.array([atomic_numbers[s] for s in self.symbols])

    def repeat(self, n1: int, n2: int) -> "Trajectory":
        """The same relaxation in an n1 x n2 in-plane supercell (more atoms per frame)."""
        shifts = np.array([[i, j, 0] for i in range(n1) for j in range(n2)], float)
        m = len(shifts)
        frac = (self.frac[:, None, :, :] + shifts[None, :, None, :]) / np.array([n1, n2, 1.0])
        nat = self.frac.shape[1]
        order = np.argsort(np.tile(np.arange(nat), m), kind="stable")   # keep species grouped
        frac = frac.reshape(len(self.cells), m * nat, 3)[:, order]
        cells = self.cells * np.array([n1, n2, 1.0])[None, :, None]
        forces = np.tile(self.forces, (1, m, 1))[:, order]
        symbols = list(np.array(self.symbols * m)[order])
        return Trajectory(symbols, cells, frac, self.energies * m, forces, self.stress_kb)

    def species(self):
        """[(symbol, count)] in order of first appearance (VASP groups atoms by species)."""
        out = []
        for s in self.symbols:
            if out and out[-1][0] == s:
                out[-1][1] += 1
            else:
                out.append([s, 1])
        return [tuple(x) for x in out]


def drifting_layer(nsteps: int = 8, seed: int = 7, vacuum: float = 18.0) -> Trajectory:
    """An invented SnS2-like three-atom layer (cell and atoms invented) relaxing from an
    oblique lattice (gamma = 97°) toward a rectangular one, in a slab cell with c = ``vacuum`` Å."""
    rng = np.random.default_rng(seed)
    t = np.linspace(0.0, 1.0, nsteps)
    a = 3.62 + 0.05 * t
    b = 3.95 - 0.03 * t
    gamma = np.radians(97.0 - 6.5 * (1 - np.exp(-3 * t)))
    cells = np.zeros((nsteps, 3, 3))
    cells[:, 0, 0] = a
    cells[:, 1, 0] = b * np.cos(gamma)
    cells[:, 1, 1] = b * np.sin(gamma)
    cells[:, 2, 2] = vacuum
    base = np.array([[0.0, 0.0, 0.50], [0.34, 0.31, 0.58], [0.66, 0.71, 0.42]])
    frac = base[None] + 0.004 * rng.standard_normal((nsteps, 3, 3)) * (1 - t)[:, None, None]
    energies = -15.2 - 0.4 * (1 - np.exp(-4 * t)) + 1e-4 * rng.standard_normal(nsteps)
    forces = 0.3 * rng.standard_normal((nsteps, 3, 3)) * (1 - t)[:, None, None]
    forces -= forces.mean(axis=1, keepdims=True)
    s = 8.0 * rng.standard_normal((nsteps, 3, 3)) * (1 - t)[:, None, None]
    stress = (s + np.transpose(s, (0, 2, 1))) / 2
    return Trajectory(["Sn", "S", "S"], cells, frac, energies, forces, stress)


def _v(row, fmt="%18.10f"):
    return " ".join(fmt % x for x in row)


def _structure_xml(cell, frac, name=None):
    attr = f' name="{name}" ' if name else ""
    vol = abs(np.linalg.det(cell))
    rec = np.linalg.inv(cell).T
    lines = [f"  <structure{attr}>", "   <crystal>", '    <varray name="basis" >']
    lines += [f"     <v>{_v(r)} </v>" for r in cell]
    lines += ["    </varray>", f'    <i name="volume">{vol:18.10f} </i>',
              '    <varray name="rec_basis" >']
    lines += [f"     <v>{_v(r)} </v>" for r in rec]
    lines += ["    </varray>", "   </crystal>", '   <varray name="positions" >']
    lines += [f"    <v>{_v(r)} </v>" for r in frac]
    lines += ["   </varray>", "  </structure>"]
    return "\n".join(lines)


def write_vasprun(path, traj: Trajectory, *, isym=2, symprec=1e-5, isif=3, ibrion=2,
                  system="invented drifting layer") -> Path:
    """A vasprun.xml with one <calculation> per step (no eigenvalues/DOS: not needed here)."""
    n, nat = traj.frac.shape[:2]
    spec = traj.species()
    out = ['<?xml version="1.0" encoding="ISO-8859-1"?>', "<modeling>", " <generator>",
           '  <i name="program" type="string">vasp </i>',
           '  <i name="version" type="string">6.3.0  </i>',
           '  <i name="subversion" type="string">generated by driftwatch tests/vasp_gen.py </i>',
           '  <i name="platform" type="string">LinuxIFC </i>',
           '  <i name="date" type="string">2026 01 01 </i>',
           '  <i name="time" type="string">00:00:00 </i>', " </generator>", " <incar>",
           f'  <i type="string" name="SYSTEM">{system}</i>',
           f'  <i type="int" name="IBRION">{ibrion:6d}</i>',
           f'  <i type="int" name="ISIF">{isif:6d}</i>',
           f'  <i type="int" name="NSW">{n:6d}</i>',
           f'  <i type="int" name="ISYM">{isym:6d}</i>',
           f'  <i name="SYMPREC">{symprec:16.8f}</i>', " </incar>",
           " <kpoints>", '  <generation param="Gamma">',
           '   <v type="int" name="divisions">       4        4        1 </v>',
           '   <v name="usershift">      0.00000000       0.00000000       0.00000000 </v>',
           "  </generation>", '  <varray name="kpointlist" >',
           "   <v>       0.00000000       0.00000000       0.00000000 </v>", "  </varray>",
           '  <varray name="weights" >', "   <v>       1.00000000 </v>", "  </varray>",
           " </kpoints>", " <parameters>", '  <separator name="general" >',
           '   <i type="string" name="SYSTEM">invented</i>', "  </separator>",
           '  <separator name="ionic" >',
           f'   <i type="int" name="NSW">{n:6d}</i>',
           f'   <i type="int" name="IBRION">{ibrion:6d}</i>',
           f'   <i type="int" name="ISIF">{isif:6d}</i>',
           '   <i name="PSTRESS">      0.00000000</i>', "  </separator>",
           '  <separator name="symmetry" >',
           f'   <i type="int" name="ISYM">{isym:6d}</i>',
           f'   <i name="SYMPREC">{symprec:16.8f}</i>', "  </separator>",
           '  <separator name="electronic" >', '   <i type="int" name="ISPIN">     1</i>',
           '   <i type="int" name="NELM">    60</i>', '   <i name="EDIFF">      0.00000100</i>',
           '   <i name="NELECT">     26.00000000</i>', "  </separator>",
           " </parameters>", " <atominfo>", f"  <atoms>{nat:8d} </atoms>",
           f"  <types>{len(spec):8d} </types>", '  <array name="atoms" >',
           '   <dimension dim="1">ion</dimension>', '   <field type="string">element</field>',
           '   <field type="int">atomtype</field>', "   <set>"]
    for it, (s, c) in enumerate(spec, 1):
        out += [f"    <rc><c>{s:2s}</c><c>{it:4d}</c></rc>"] * c
    out += ["   </set>", "  </array>", '  <array name="atomtypes" >',
            '   <dimension dim="1">type</dimension>',
            '   <field type="int">atomspertype</field>', '   <field type="string">element</field>',
            "   <field>mass</field>", "   <field>valence</field>",
            '   <field type="string">pseudopotential</field>', "   <set>"]
    for s, c in spec:
        z = atomic_numbers[s]
        out.append(f"    <rc><c>{c:4d}</c><c>{s:2s}</c><c>{atomic_masses[z]:16.8f}</c>"
                   f"<c>      4.00000000</c><c>  PAW_PBE {s} 01Jan2000 </c></rc>")
    out += ["   </set>", "  </array>", " </atominfo>",
            _structure_xml(traj.cells[0], traj.frac[0], "initialpos")]
    for k in range(n):
        e = traj.energies[k]
        e0 = e + 2e-4
        out += [" <calculation>"]
        for de in (0.5, 0.01, 0.0):
            out += ["  <scstep>", '   <time name="total">    0.01    0.01</time>', "   <energy>",
                    f'    <i name="e_fr_energy">{e + de:18.8f} </i>',
                    f'    <i name="e_wo_entrp">{e0 + de + 2e-4:18.8f} </i>',
                    f'    <i name="e_0_energy">{e0 + de:18.8f} </i>', "   </energy>", "  </scstep>"]
        out.append(_structure_xml(traj.cells[k], traj.frac[k]))
        out += ['  <varray name="forces" >'] + \
            [f"   <v>{_v(r, '%16.8f')} </v>" for r in traj.forces[k]] + ["  </varray>"]
        out += ['  <varray name="stress" >'] + \
            [f"   <v>{_v(r, '%16.8f')} </v>" for r in traj.stress_kb[k]] + ["  </varray>"]
        out += ["  <energy>", f'   <i name="e_fr_energy">{e:18.8f} </i>',
                f'   <i name="e_wo_entrp">{e0 + 2e-4:18.8f} </i>',
                f'   <i name="e_0_energy">{e0:18.8f} </i>', "  </energy>",
                '  <time name="totalsc">    0.05    0.05</time>', " </calculation>"]
    out += [_structure_xml(traj.cells[-1], traj.frac[-1], "finalpos"), "</modeling>", ""]
    path = Path(path)
    path.write_text("\n".join(out), encoding="ISO-8859-1")
    return path


def write_outcar(path, traj: Trajectory, *, isym=2, isif=3, ibrion=2, finished=True) -> Path:
    """An OUTCAR with the header lines and per-step blocks that VASP prints and readers use."""
    n, nat = traj.frac.shape[:2]
    spec = traj.species()
    out = [" vasp.6.3.0 20Jan22 (generated by driftwatch tests/vasp_gen.py: invented data)",
           " executed on             LinuxIFC date 2026.01.01  00:00:00", ""]
    out += [f" POTCAR:    PAW_PBE {s} 01Jan2000" for s, _ in spec] * 2
    out += ["", " Dimension of arrays:",
            "   k-points           NKPTS =      1   k-points in BZ     NKDIM =      1"
            "   number of bands    NBANDS=     16",
            f"   number of dos      NEDOS =    301   number of ions     NIONS = {nat:6d}",
            "   ions per type =      " + "".join(f"{c:4d}" for _, c in spec), "",
            " SYSTEM =  invented drifting layer",
            "   ISPIN  =      1    spin polarized calculation?",
            f"   NSW    = {n:6d}    number of steps for IOM",
            f"   IBRION = {ibrion:6d}    ionic relax: 0-MD 1-quasi-New 2-CG",
            f"   ISIF   = {isif:6d}    stress and relaxation",
            f"   ISYM   = {isym:6d}    0-nonsym 1-usesym 2-fastsym", "",
            " k-points in reciprocal lattice and weights: Gamma",
            "   0.00000000  0.00000000  0.00000000       1.000", ""]
    for k in range(n):
        s = traj.stress_kb[k]
        cell = traj.cells[k]
        rec = np.linalg.inv(cell).T
        pos = traj.frac[k] @ cell
        out += [f"--------------------------------------- Iteration {k + 1:6d}(   1)  "
                "---------------------------------------", "",
                "    POTLOK:  cpu time      0.01: real time      0.01", "",
                "  FORCE on cell =-STRESS in cart. coord.  units (eV):",
                "  Direction    XX          YY          ZZ          XY          YZ          ZX",
                "  " + "-" * 86,
                "  in kB  " + " ".join(f"{x:14.8f}" for x in
                                      (s[0, 0], s[1, 1], s[2, 2], s[0, 1], s[1, 2], s[0, 2])),
                "  external pressure =        0.00 kB  Pullay stress =        0.00 kB", "",
                " VOLUME and BASIS-vectors are now :",
                " " + "-" * 77,
                "  energy-cutoff  :      400.00",
                f"  volume of cell : {abs(np.linalg.det(cell)):12.4f}",
                "      direct lattice vectors                 reciprocal lattice vectors"]
        out += [f"  {_v(cell[i], '%16.10f')}  {_v(rec[i], '%14.9f')}" for i in range(3)]
        out += ["", " POSITION                                       TOTAL-FORCE (eV/Angst)",
                " " + "-" * 83]
        out += [f"  {_v(pos[i], '%16.10f')}   {_v(traj.forces[k][i], '%14.8f')}"
                for i in range(nat)]
        out += [" " + "-" * 83, "    total drift:      0.000000      0.000000      0.000000", "",
                "  FREE ENERGIE OF THE ION-ELECTRON SYSTEM (eV)",
                "  ---------------------------------------------------",
                f"  free  energy   TOTEN  = {traj.energies[k]:20.8f} eV", "",
                f"  energy  without entropy= {traj.energies[k] + 4e-4:18.8f}  "
                f"energy(sigma->0) = {traj.energies[k] + 2e-4:18.8f}", ""]
    if finished:        # a relaxation that converged within NSW says so (as VASP prints it)
        if ibrion in (1, 2, 3):
            out += [" reached required accuracy - stopping structural energy minimisation"]
        out += ["", " General timing and accounting informations for this job:",
                " ========================================================", "",
                "                  Total CPU time used (sec):        1.000",
                "                            Elapsed time (sec):        1.000", ""]
    path = Path(path)
    path.write_text("\n".join(out) + "\n")
    return path


def write_xdatcar(path, traj: Trajectory, *, variable_cell=True) -> Path:
    """XDATCAR in VASP 5 layout; with ``variable_cell`` the header repeats before each step."""
    spec = traj.species()
    out = []
    for k in range(len(traj.cells)):
        if k == 0 or variable_cell:
            out += ["invented drifting layer", "           1"]
            out += [f"    {_v(r, '%14.10f')}" for r in traj.cells[k]]
            out += ["   " + "".join(f"{s:>5s}" for s, _ in spec),
                    "   " + "".join(f"{c:5d}" for _, c in spec)]
        out.append(f"Direct configuration={k + 1:6d}")
        out += [f"  {_v(r, '%14.10f')}" for r in traj.frac[k]]
    path = Path(path)
    path.write_text("\n".join(out) + "\n")
    return path


def write_poscar(path, cell, frac, symbols, comment="invented drifting layer") -> Path:
    spec = []
    for s in symbols:
        if spec and spec[-1][0] == s:
            spec[-1][1] += 1
        else:
            spec.append([s, 1])
    out = [comment, "1.0"] + [f"  {_v(r, '%16.10f')}" for r in cell]
    out += ["  " + " ".join(s for s, _ in spec), "  " + " ".join(str(c) for _, c in spec),
            "Direct"] + [f"  {_v(r, '%16.10f')}" for r in frac]
    path = Path(path)
    path.write_text("\n".join(out) + "\n")
    return path


def write_incar(path, **tags) -> Path:
    path = Path(path)
    path.write_text("".join(f"{k} = {v}\n" for k, v in tags.items()))
    return path


def write_run_folder(folder, traj: Trajectory, files=("vasprun.xml", "OUTCAR", "XDATCAR",
                                                     "INCAR", "POSCAR", "CONTCAR"),
                     *, isym=2, symprec=1e-5) -> Path:
    """A VASP run folder with the chosen files (all consistent with ``traj``)."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    if "vasprun.xml" in files:
        write_vasprun(folder / "vasprun.xml", traj, isym=isym, symprec=symprec)
    if "OUTCAR" in files:
        write_outcar(folder / "OUTCAR", traj, isym=isym)
    if "XDATCAR" in files:
        write_xdatcar(folder / "XDATCAR", traj)
    if "INCAR" in files:
        write_incar(folder / "INCAR", SYSTEM="invented", IBRION=2, ISIF=3, ISYM=isym,
                    SYMPREC=f"{symprec:.1E}", NSW=len(traj.cells))
    if "POSCAR" in files:
        write_poscar(folder / "POSCAR", traj.cells[0], traj.frac[0], traj.symbols)
    if "CONTCAR" in files:
        write_poscar(folder / "CONTCAR", traj.cells[-1], traj.frac[-1], traj.symbols)
    return folder


if __name__ == "__main__":
    out = Path(sys.argv[1] if len(sys.argv) > 1 else "vasp_run")
    nsteps = int(sys.argv[2]) if len(sys.argv) > 2 else 8
    write_run_folder(out, drifting_layer(nsteps))
    print(out)
