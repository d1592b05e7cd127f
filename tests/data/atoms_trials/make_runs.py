"""Invented relaxations for field trial B (campaign 'Quillon-7'). ASE 3.29, EMT/LJ/Morse.
Run: python make_runs.py   (writes one folder per run with relax.traj)"""
import os, numpy as np
from ase.build import bulk
from ase import Atoms
from ase.calculators.emt import EMT
from ase.calculators.lj import LennardJones
from ase.calculators.morse import MorsePotential
from ase.optimize import BFGS, FIRE
from ase.filters import FrechetCellFilter

def run(name, atoms, opt=BFGS, cellfilter=False, fmax=0.005, steps=300):
    os.makedirs(name, exist_ok=True)
    path = os.path.join(name, "relax.traj")
    if os.path.exists(path):
        os.remove(path)
    obj = FrechetCellFilter(atoms) if cellfilter else atoms
    o = opt(obj, trajectory=path, logfile=os.path.join(name, "opt.log"))
    o.run(fmax=fmax, steps=steps)
    print(name, len(atoms), o.nsteps)

rng = np.random.default_rng(7)

# Q01: rattled Cu fcc conventional 2x2x2 (32 atoms), fixed cell, BFGS -> back to Fm-3m
a = bulk("Cu", "fcc", a=3.61, cubic=True).repeat((2, 2, 2))
a.positions += rng.normal(0, 0.06, a.positions.shape); a.calc = EMT()
run("Q01_Cu_rattle_fixed", a)

# Q02: L1_2 "Ni3Al-like" invented ordered cell (Al corner, Ni faces) rattled, FIRE + cell filter
a = Atoms("AlNi3", scaled_positions=[[0,0,0],[0,.5,.5],[.5,0,.5],[.5,.5,0]], cell=np.diag([3.58,3.58,3.58]), pbc=True)
a = a.repeat((1, 1, 1)); a.positions += rng.normal(0, 0.05, a.positions.shape); a.calc = EMT()
run("Q02_AlNi3_L12_rattle_cell", a, opt=FIRE, cellfilter=True, fmax=0.003, steps=600)

# Q03: Ni vacancy in a 2x2x2 conventional cell (31 atoms), slight rattle, BFGS fixed cell
a = bulk("Ni", "fcc", a=3.52, cubic=True).repeat((2, 2, 2)); del a[13]
a.positions += rng.normal(0, 0.02, a.positions.shape); a.calc = EMT()
run("Q03_Ni_vacancy", a)

# Q04: antisite in L1_2 Cu3Au-like 2x1x1 (8 atoms): one Au swapped with a Cu, BFGS fixed cell
a = Atoms("AuCu3", scaled_positions=[[0,0,0],[0,.5,.5],[.5,0,.5],[.5,.5,0]], cell=np.diag([3.75]*3), pbc=True).repeat((2,1,1))
sym = a.get_chemical_symbols(); sym[4], sym[5] = sym[5], sym[4]; a.set_chemical_symbols(sym)
a.positions += rng.normal(0, 0.01, a.positions.shape); a.calc = EMT()
run("Q04_AuCu3_antisite", a)

# Q05: Al 4-atom conventional fcc, one atom pushed 0.15 A off its mirror along x (fixed cell)
a = bulk("Al", "fcc", a=4.05, cubic=True); a.positions[1] += [0.15, 0.0, 0.0]; a.calc = EMT()
run("Q05_Al_push_mirror", a)

# Q06: bct Pt (c/a stretched) -> cubic with cell filter (lower group -> higher group), BFGS
a = bulk("Pt", "fcc", a=3.92, cubic=True); a.set_cell(np.diag([3.85, 3.85, 4.15]), scale_atoms=True)
a.positions[0] += [0.02, -0.01, 0.03]; a.calc = EMT()
run("Q06_Pt_bct_to_fcc_cell", a, cellfilter=True, fmax=0.002, steps=400)

# Q07: self-interstitial Cu at the octahedral site, pushed along x -> leaves the symmetric site (group lost)
a = bulk("Cu", "fcc", a=3.61, cubic=True).repeat((2, 2, 2))
a += Atoms("Cu", positions=[[1.805 + 0.12, 1.805 + 0.03, 1.805]]); a.calc = EMT()
run("Q07_Cu_interstitial_away", a, steps=400)

# Q08: LJ rattled fcc (argon-like invented units) FIRE fixed cell
a = bulk("Ar", "fcc", a=1.5496, cubic=True).repeat((2, 2, 1))
a.positions += rng.normal(0, 0.03, a.positions.shape); a.calc = LennardJones(sigma=1.0, epsilon=1.0, rc=3.0)
run("Q08_LJ_rattle", a, opt=FIRE, fmax=1e-3, steps=800)

# Q09: Morse bcc-like 2-atom cell, atom 2 off centre -> Morse relax (fixed cell)
a = Atoms("Pd2", scaled_positions=[[0,0,0],[.5,.5,.5]], cell=np.diag([3.0, 3.0, 3.0]), pbc=True)
a.positions[1] += [0.10, 0.05, -0.03]; a.calc = MorsePotential(epsilon=0.4, r0=2.6, rho0=6.0)
run("Q09_Morse_bcc_offcentre", a, fmax=1e-3)

# Q10: Au/Pd mixture: rattled L1_0-like AuPd (2 atoms tetragonal), cell filter
a = Atoms("AuPd", scaled_positions=[[0,0,0],[.5,.5,.5]], cell=[2.80, 2.80, 3.95], pbc=True)
a.positions[1] += [0.06, -0.04, 0.05]; a.calc = EMT()
run("Q10_AuPd_L10_cell", a, opt=FIRE, cellfilter=True, fmax=2e-3, steps=800)

# Q11: LJ chain of 2 atoms per 3.0 sigma along z, equal spacing (P4/mmm) pushed 0.02 -> dimerises (group lost)
a = Atoms("Ar2", positions=[[0, 0, 0], [0, 0, 1.52]], cell=np.diag([3.2, 3.2, 3.0]), pbc=True)
a.calc = LennardJones(sigma=1.0, epsilon=1.0, rc=2.9)
run("Q11_LJ_chain_dimerise", a, opt=BFGS, fmax=1e-4, steps=300)

# Q12: LJ chain, 2 atoms per 2.2 sigma, starting paired (1.0 / 1.2) -> settles to equal spacing (translation c/2 gained);
# loose fmax so the end is a few mA from equal spacing
a = Atoms("Ar2", positions=[[0, 0, 0], [0, 0, 1.0]], cell=np.diag([3.2, 3.2, 2.2]), pbc=True)
a.calc = LennardJones(sigma=1.0, epsilon=1.0, rc=2.9)
run("Q12_LJ_chain_equalise", a, opt=FIRE, fmax=1.0, steps=300)

# Q13: Cu 2x2x2 conventional (32 atoms): the 12 neighbours of atom 0 breathe out 0.08 A (a Pm-3m pattern)
# plus a 0.002 A rattle; BFGS fixed cell back to Fm-3m
a = bulk("Cu", "fcc", a=3.61, cubic=True).repeat((2, 2, 2))
d = a.get_distances(0, range(len(a)), mic=True, vector=True)
for j in range(1, len(a)):
    if abs(np.linalg.norm(d[j]) - 3.61 / np.sqrt(2)) < 1e-3:
        a.positions[j] += 0.08 * d[j] / np.linalg.norm(d[j])
a.positions += np.random.default_rng(13).normal(0, 0.002, a.positions.shape); a.calc = EMT()
run("Q13_Cu_breathing", a, fmax=0.01)

# Q14: as Q13 without the rattle (the breathing pattern keeps Pm-3m exactly), BFGS to fmax 0.05
a = bulk("Cu", "fcc", a=3.61, cubic=True).repeat((2, 2, 2))
d = a.get_distances(0, range(len(a)), mic=True, vector=True)
for j in range(1, len(a)):
    if abs(np.linalg.norm(d[j]) - 3.61 / np.sqrt(2)) < 1e-3:
        a.positions[j] += 0.08 * d[j] / np.linalg.norm(d[j])
a.calc = EMT()
run("Q14_Cu_breathing_exact", a, fmax=0.05)
