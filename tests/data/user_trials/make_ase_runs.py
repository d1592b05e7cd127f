"""Fernhill-6: an invented demo campaign of small ASE relaxations (EMT / LennardJones).
Run: python make_ase_runs.py, driftwatch importable   (ASE's EMT and LennardJones, FrechetCellFilter)
Each run folder gets its inputs (start.xyz) beside the optimiser trajectory (relax.traj)."""
import os, warnings
import numpy as np
from ase import Atoms
from ase.build import bulk
from ase.calculators.emt import EMT
from ase.calculators.lj import LennardJones
from ase.filters import FrechetCellFilter
from ase.optimize import BFGS, FIRE
from ase.io import write
from driftwatch.live import SymmetryWatch

ROOT = os.path.dirname(os.path.abspath(__file__))

def run(name, atoms, calc, opt_cls, fmax, mask=None, watch=False, steps=300, fixed_cell=False):
    d = os.path.join(ROOT, "campaign", name); os.makedirs(d, exist_ok=True)
    write(os.path.join(d, "start.xyz"), atoms, format="extxyz")
    atoms.calc = calc
    obj = atoms if fixed_cell else FrechetCellFilter(atoms, mask=mask) if mask else FrechetCellFilter(atoms)
    opt = opt_cls(obj, trajectory=os.path.join(d, "relax.traj"), logfile=os.path.join(d, "opt.log"))
    w = None
    if watch:
        w = SymmetryWatch(atoms, mode="record", output=os.path.join(ROOT, "observer", "observer_" + name + ".json"))
        opt.attach(w, interval=1, optimizer=opt)
    conv = opt.run(fmax=fmax, steps=steps)
    if w is not None:
        rec = w.finish()
        print(name, "observer:", rec["summary"]["verdict"]["text"] if isinstance(rec, dict) else rec)
    print(name, "converged" if conv else "NOT converged", opt.nsteps, "steps")

# FH-1: oblique 2-atom Cu-Au layer (a=2.70, b=2.95 Å, gamma=104 deg), EMT, in-plane cell relax, observer attached
a1, a2 = np.array([2.70, 0, 0]), 2.95 * np.array([np.cos(np.radians(104)), np.sin(np.radians(104)), 0])
L = Atoms("CuAu", cell=[a1, a2, [0, 0, 18.0]], pbc=True,
          scaled_positions=[[0, 0, 0.5], [0.47, 0.55, 0.5]])
run("FH1_CuAu_layer_emt", L, EMT(), BFGS, 1e-3, mask=[1, 1, 0, 0, 0, 1], watch=True)

# FH-2: 4-atom fcc Cu cell (conventional, a=3.61 Å) rattled by 0.05 Å (seed 11), EMT, full cell relax
c = bulk("Cu", "fcc", a=3.61, cubic=True); c.rattle(0.05, seed=11)
run("FH2_Cu4_rattled_emt", c, EMT(), BFGS, 1e-4)

# FH-3: one-atom Ar-like LJ layer in an oblique cell (a=1.05, b=1.15, gamma=66 deg; sigma=1 units as Å), in-plane relax
b1, b2 = np.array([1.05, 0, 0]), 1.15 * np.array([np.cos(np.radians(66)), np.sin(np.radians(66)), 0])
m = Atoms("Ar", cell=[b1, b2, [0, 0, 12.0]], pbc=True, positions=[[0, 0, 6.0]])
run("FH3_Ar_layer_lj", m, LennardJones(sigma=1.0, epsilon=1.0, rc=3.0, smooth=True), FIRE, 1e-4, mask=[1, 1, 0, 0, 0, 1])

# FH-5: 3-atom Ni2Pd layer in a FIXED oblique cell, atoms off their sites, EMT atoms-only (fixed cell)
f = Atoms("Ni2Pd", cell=[[4.9, 0, 0], [1.2, 4.6, 0], [0, 0, 16.0]], pbc=True,
          scaled_positions=[[0.02, 0.01, 0.5], [0.36, 0.31, 0.5], [0.69, 0.64, 0.5]])
run("FH5_Ni2Pd_fixedcell_emt", f, EMT(), BFGS, 1e-3, fixed_cell=True)

# FH-6: 4-atom Ar-like LJ fcc cell sheared monoclinically (a-c shear 0.04) and stretched 2 %, full cell relax
g = bulk("Ar", "fcc", a=1.5874, cubic=True)  # ~ LJ minimum 2^(1/6)*sqrt(2) sigma for sigma=1
cell = np.array(g.cell); cell = cell @ np.array([[1.02, 0, 0.04], [0, 0.99, 0], [0, 0, 1.0]])
g.set_cell(cell, scale_atoms=True)
run("FH6_Ar4_sheared_lj", g, LennardJones(sigma=1.0, epsilon=1.0, rc=3.0, smooth=True), BFGS, 1e-5)
