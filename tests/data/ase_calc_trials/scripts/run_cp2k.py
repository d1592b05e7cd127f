"""Campaign 'Quillfern-7' (invented): ASE 3.29 driving CP2K 2023.1 (Debian) on tiny Si cells.
Usage: python run_cp2k.py CASE   (CASE in bulk_vc, fixed, layer, killed)"""
import os, sys
import numpy as np
from ase import Atoms
from ase.build import bulk
from ase.calculators.cp2k import CP2K
from ase.filters import FrechetCellFilter
from ase.optimize import BFGS
from ase.io import write

os.environ.setdefault("CP2K_DATA_DIR", "/usr/share/cp2k")
case = sys.argv[1]
root = os.path.dirname(os.path.abspath(__file__)) + "/../runs"
d = f"{root}/cp2k_{case}"
os.makedirs(d, exist_ok=True)
os.chdir(d)

KP = "2 2 2" if case != "layer" else "2 2 1"
inp = f"""&FORCE_EVAL
  &DFT
    &KPOINTS
      SCHEME MONKHORST-PACK {KP}
    &END KPOINTS
  &END DFT
&END FORCE_EVAL
"""
calc = CP2K(command="env OMP_NUM_THREADS=1 cp2k_shell", label="cp2k", inp=inp, xc="PBE",
            basis_set="SZV-MOLOPT-SR-GTH", pseudo_potential="GTH-PBE", cutoff=150 * 13.605693,
            max_scf=60, auto_write=(case == "fixed"))

if case in ("bulk_vc", "killed"):
    # SM-Q01: Si2 diamond start strained orthorhombically (conventional 5.30 x 5.48 x 5.62 A)
    a = bulk("Si", "diamond", a=5.45)
    cell = a.cell.array @ np.diag([5.30 / 5.45, 5.48 / 5.45, 5.62 / 5.45])
    a.set_cell(cell, scale_atoms=True)
    a.rattle(0.01, seed=3)
    obj = FrechetCellFilter(a)
elif case == "fixed":
    # SM-Q02: Si2 diamond in a fixed cubic fcc cell, second atom pushed off (1/4,1/4,1/4)
    a = bulk("Si", "diamond", a=5.45)
    a.positions[1] += [0.12, 0.05, -0.03]
    obj = a
elif case == "layer":
    # SM-Q03: Si2 buckled layer, oblique in-plane cell (3.70, 3.95, 114 deg), 15 A vacuum
    g = np.radians(114.0)
    cell = [[3.70, 0, 0], [3.95 * np.cos(g), 3.95 * np.sin(g), 0], [0, 0, 15.0]]
    a = Atoms("Si2", cell=cell, pbc=True)
    a.set_scaled_positions([[0, 0, 0.5], [1 / 3, 2 / 3, 0.5]])
    a.positions[1, 2] += 0.45
    obj = FrechetCellFilter(a, mask=[1, 1, 0, 0, 0, 1])
a.calc = calc
logfile = "opt.log" if case == "bulk_vc" else "-"
opt = BFGS(obj, trajectory="relax.traj", logfile=logfile, maxstep=0.1)
if case == "bulk_vc":
    opt.attach(lambda: write("steps.extxyz", a, append=True), interval=1)
opt.run(fmax=0.02, steps=40)
calc.close()
print("done", case, opt.nsteps)
