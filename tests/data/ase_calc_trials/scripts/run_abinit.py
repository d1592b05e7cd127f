"""Campaign 'Quillfern-7' (invented): ASE 3.29 driving ABINIT 9.6.2 (Debian) on tiny Al/Si cells.
Usage: python run_abinit.py CASE   (CASE in bulk_vc, fixed, layer, killed, kept_vc)"""
import os, sys
import numpy as np
from ase import Atoms
from ase.build import bulk
from ase.calculators.abinit import Abinit, AbinitProfile
from ase.filters import FrechetCellFilter
from ase.optimize import BFGS

case = sys.argv[1]
here = os.path.dirname(os.path.abspath(__file__))
d = f"{here}/../runs/abinit_{case}"
os.makedirs(d, exist_ok=True)
os.chdir(d)
profile = AbinitProfile(command="abinit", pp_paths=[f"{here}/../pseudo"])

if case in ("bulk_vc", "killed"):
    # SM-A01: one-atom Al cell, fcc primitive strained to face-centred orthorhombic
    # (conventional 3.90 x 4.05 x 4.18 A)
    a = bulk("Al", "fcc", a=4.05)
    a.set_cell(a.cell.array @ np.diag([3.90 / 4.05, 1.0, 4.18 / 4.05]), scale_atoms=True)
    calc = Abinit(profile=profile, directory=".", xc="LDA", pps="fhi", ecut=8 * 27.2114,
                  kpts=[6, 6, 6], occopt=7, tsmear=0.27, toldfe=1e-7, nstep=40, chksymtnons=0, chksymbreak=0)
    obj = FrechetCellFilter(a)
elif case == "fixed":
    # SM-A02: Si2 diamond in a fixed cubic fcc cell, second atom pushed off (1/4,1/4,1/4)
    a = bulk("Si", "diamond", a=5.40)
    a.positions[1] += [0.12, 0.05, -0.03]
    calc = Abinit(profile=profile, directory=".", xc="LDA", pps="fhi", ecut=8 * 27.2114,
                  kpts=[3, 3, 3], toldfe=1e-7, nstep=40, chksymtnons=0, chksymbreak=0)
    obj = a
elif case == "kept_vc":
    # SM-A04: Si2 diamond compressed (a = 5.25 A), cell filter: stays cubic by symmetry
    a = bulk("Si", "diamond", a=5.25)
    calc = Abinit(profile=profile, directory=".", xc="LDA", pps="fhi", ecut=8 * 27.2114,
                  kpts=[3, 3, 3], toldfe=1e-7, nstep=40, chksymtnons=0, chksymbreak=0)
    obj = FrechetCellFilter(a)
elif case == "layer":
    # SM-A03: Si2 buckled layer, oblique in-plane cell (3.70, 3.95, 114 deg), 12 A vacuum
    g = np.radians(114.0)
    cell = [[3.70, 0, 0], [3.95 * np.cos(g), 3.95 * np.sin(g), 0], [0, 0, 12.0]]
    a = Atoms("Si2", cell=cell, pbc=True)
    a.set_scaled_positions([[0, 0, 0.5], [1 / 3, 2 / 3, 0.5]])
    a.positions[1, 2] += 0.45
    calc = Abinit(profile=profile, directory=".", xc="LDA", pps="fhi", ecut=7 * 27.2114,
                  kpts=[4, 4, 1], occopt=7, tsmear=0.27, toldfe=1e-7, nstep=40, chksymtnons=0, chksymbreak=0)
    obj = FrechetCellFilter(a, mask=[1, 1, 0, 0, 0, 1])
a.calc = calc
logfile = "opt.log" if case == "bulk_vc" else "-"
opt = BFGS(obj, trajectory="relax.traj", logfile=logfile, maxstep=0.1)
opt.run(fmax=0.01, steps=40)
print("done", case, opt.nsteps)
