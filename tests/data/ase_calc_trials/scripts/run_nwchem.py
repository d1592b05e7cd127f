"""Campaign 'Quillfern-7' (invented): ASE 3.29 driving NWChem 7.0.2 (Debian), plane-wave (NWPW)
on tiny Si cells.  Usage: python run_nwchem.py CASE   (CASE in bulk_vc, fixed, killed)"""
import os, sys
import numpy as np
from ase.build import bulk
from ase.calculators.nwchem import NWChem
from ase.filters import FrechetCellFilter
from ase.optimize import BFGS

case = sys.argv[1]
here = os.path.dirname(os.path.abspath(__file__))
d = f"{here}/../runs/nwchem_{case}"
os.makedirs(d, exist_ok=True)
os.chdir(d)
calc = NWChem(label="nwchem", command="env OMP_NUM_THREADS=1 nwchem nwchem.nwi > nwchem.nwo",
              theory="band", kpts=(2, 2, 2), xc="LDA",
              nwpw={"cutoff": 10.0, "tolerances": "1e-8 1e-8"})
if case in ("bulk_vc", "killed"):
    # SM-N01: Si2 diamond start strained orthorhombically (conventional 5.30 x 5.48 x 5.62 A)
    a = bulk("Si", "diamond", a=5.40)
    a.set_cell(a.cell.array @ np.diag([5.30 / 5.40, 5.48 / 5.40, 5.62 / 5.40]), scale_atoms=True)
    obj = FrechetCellFilter(a)
elif case == "fixed":
    # SM-N02: Si2 diamond in a fixed cubic fcc cell, second atom pushed off (1/4,1/4,1/4)
    a = bulk("Si", "diamond", a=5.40)
    a.positions[1] += [0.12, 0.05, -0.03]
    obj = a
a.calc = calc
opt = BFGS(obj, trajectory="relax.traj", logfile="-", maxstep=0.1)
opt.run(fmax=0.02, steps=30)
print("done", case, opt.nsteps)
