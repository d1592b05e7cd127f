"""Invented 'Tarnwick campaign' relaxations with GPAW 22.8 (Debian) driven by Debian's ASE 3.22.1.
Usage: /usr/bin/python3 relax.py CASE   (writes into ./CASE/)"""
import os, sys, numpy as np
from ase import Atoms
from ase.io import write
from ase.io.trajectory import Trajectory
from ase.constraints import ExpCellFilter, UnitCellFilter, FixAtoms
from ase.spacegroup.symmetrize import FixSymmetry
from ase.optimize import BFGS, FIRE, LBFGS, BFGSLineSearch
from gpaw import GPAW, PW

case = sys.argv[1]
os.makedirs(case, exist_ok=True); os.chdir(case)

def layer(a, b, gamma, vac=12.0, shift=(0.0, 0.0), pbc=True):
    g = np.radians(gamma)
    cell = [[a, 0, 0], [b*np.cos(g), b*np.sin(g), 0], [0, 0, vac]]
    at = Atoms('C2', cell=cell, pbc=pbc,
               scaled_positions=[(1/3+shift[0], 2/3, 0.5), (2/3, 1/3+shift[1], 0.5)])
    return at

def per_step(atoms, name='steps.extxyz'):
    def f():
        write(name, atoms, format='extxyz', append=True)
    return f

watch = None
if case.startswith('L1_hex_ecf_bfgs'):      # oblique honeycomb layer, in-plane cell free (mask), -> hp
    at = layer(2.48, 2.44, 118.0, shift=(0.01, -0.008))
    at.calc = GPAW(mode=PW(350), kpts=(6, 6, 1), xc='PBE', txt='gpaw.txt')
    flt = ExpCellFilter(at, mask=[1, 1, 0, 0, 0, 1])
    opt = BFGS(flt, trajectory='relax.traj', logfile='opt.log')
    opt.attach(per_step(at)); opt.run(fmax=0.01 if case == 'L1_hex_ecf_bfgs' else 0.0005, steps=80)
elif case == 'L2_hex_fixed_pbc110_fire':   # same layer, pbc (1,1,0), fixed cell (LCAO: no stress)
    at = layer(2.48, 2.44, 118.0, shift=(0.03, -0.02), pbc=(1, 1, 0))
    at.calc = GPAW(mode='lcao', basis='dzp', h=0.2, kpts=(6, 6, 1), xc='PBE', txt='gpaw.txt')
    opt = FIRE(at, trajectory='relax.traj', logfile='opt.log')
    opt.attach(per_step(at)); opt.run(fmax=0.02, steps=120)
elif case == 'L3_obl_hydro_lbfgs':   # oblique layer under hydrostatic strain only: stays oblique
    at = layer(2.52, 2.40, 116.0, shift=(0.01, 0.0))
    at.calc = GPAW(mode=PW(350), kpts=(6, 6, 1), xc='PBE', txt='gpaw.txt')
    flt = UnitCellFilter(at, hydrostatic_strain=True)
    opt = LBFGS(flt, trajectory='relax.traj', logfile='opt.log')
    opt.run(fmax=0.02, steps=60)
elif case == 'B1_al_tric_ucf_lbfgs':   # strained 1-atom fcc cell -> cF
    a = 4.04
    prim = np.array([[0, a/2, a/2], [a/2, 0, a/2], [a/2, a/2, 0]])
    strain = np.array([[1.012, 0.006, -0.004], [0.006, 0.992, 0.009], [-0.004, 0.009, 1.003]])
    at = Atoms('Al', cell=prim @ strain, pbc=True)
    at.calc = GPAW(mode=PW(300), kpts={'size': (8, 8, 8), 'gamma': True}, xc='PBE', occupations={'name': 'fermi-dirac', 'width': 0.1}, txt='gpaw.txt')
    flt = UnitCellFilter(at)
    opt = LBFGS(flt, trajectory='relax.traj', logfile='opt.log')
    opt.attach(per_step(at)); opt.run(fmax=0.005, steps=60)
elif case == 'B2_al_bct_fixsym_bfgsls':   # bct Al (c/a 1.30 in the body-centred cell) under FixSymmetry
    a, c = 2.95, 2.95*1.30
    cell = np.array([[-a/2, a/2, c/2], [a/2, -a/2, c/2], [a/2, a/2, -c/2]])
    at = Atoms('Al', cell=cell, pbc=True)
    at.set_constraint(FixSymmetry(at))
    at.calc = GPAW(mode=PW(300), kpts={'size': (8, 8, 8), 'gamma': True}, xc='PBE', occupations={'name': 'fermi-dirac', 'width': 0.1}, txt='gpaw.txt')
    flt = ExpCellFilter(at)
    opt = BFGSLineSearch(flt, trajectory='relax.traj', logfile='opt.log')
    opt.attach(per_step(at)); opt.run(fmax=0.005, steps=60)
elif case == 'F1_al4_fixatoms_bfgs':   # fixed cubic 4-atom cell, two atoms held, one rattled
    a = 4.04
    at = Atoms('Al4', cell=[a, a, a], pbc=True,
               scaled_positions=[(0, 0, 0), (0, .5, .5), (.5, 0, .5), (.5, .5, 0)])
    at.positions[3] += (0.12, 0.05, -0.03)
    at.positions[2] += (-0.04, 0.0, 0.06)
    at.set_constraint(FixAtoms(indices=[0, 1]))
    at.calc = GPAW(mode=PW(250), kpts={'size': (4, 4, 4), 'gamma': True}, xc='PBE', occupations={'name': 'fermi-dirac', 'width': 0.1}, txt='gpaw.txt')
    opt = BFGS(at, trajectory='relax.traj', logfile='opt.log')
    opt.attach(per_step(at)); opt.run(fmax=0.01, steps=60)
elif case.startswith('H1'):   # as L1 with a Γ-centred 7x7x1 mesh (hexagonally symmetric): can reach hp
    at = layer(2.48, 2.44, 118.0, shift=(0.01, -0.008))
    at.calc = GPAW(mode=PW(350), kpts={'size': (7, 7, 1), 'gamma': True}, xc='PBE', txt='gpaw.txt')
    flt = ExpCellFilter(at, mask=[1, 1, 0, 0, 0, 1])
    opt = BFGS(flt, trajectory='relax.traj', logfile='opt.log')
    opt.attach(per_step(at)); opt.run(fmax=0.001, steps=80)
elif case.startswith('D1'):   # two relaxations written per step into one ase.db (rows keyed relax_id, step)
    from ase.db import connect
    db = connect('campaign.db')
    for rid, (a, b, g) in (('tarnwick-c2-07', (2.48, 2.44, 118.0)), ('tarnwick-c2-11', (2.50, 2.43, 117.0))):
        at = layer(a, b, g, shift=(0.01, -0.008))
        at.calc = GPAW(mode=PW(350), kpts={'size': (7, 7, 1), 'gamma': True}, xc='PBE', txt=f'gpaw-{rid}.txt')
        flt = ExpCellFilter(at, mask=[1, 1, 0, 0, 0, 1])
        opt = FIRE(flt, logfile=f'opt-{rid}.log')
        opt.attach(lambda: db.write(at, relax_id=rid, step=opt.nsteps))
        opt.run(fmax=0.01, steps=60)
elif case.startswith('K1') or case.startswith('V'):   # FIRE layer relaxation (killed / followed live)
    at = layer(2.50, 2.43, 117.0, shift=(0.015, -0.01))
    at.calc = GPAW(mode=PW(350), kpts=(6, 6, 1), xc='PBE', txt='gpaw.txt')
    flt = ExpCellFilter(at, mask=[1, 1, 0, 0, 0, 1])
    opt = FIRE(flt, trajectory='relax.traj', logfile='opt.log')
    opt.attach(per_step(at))
    if case.startswith('V') and os.environ.get('WATCH'):
        from driftwatch.live import SymmetryWatch
        if os.environ['WATCH'] == 'warn':
            import warnings
            def show(message, category, filename, lineno, file=None, line=None):
                print(f'WARNING at optimiser step {opt.nsteps}: {category.__name__}: {message}', flush=True)
            warnings.showwarning = show
            watch = SymmetryWatch(at, optimizer=opt, mode='warn', output='watch_record.json',
                                  stop_on=('lattice-gained', 'lattice-nearing', 'group-gained', 'passed-through', 'handedness-flip'))
        else:
            watch = SymmetryWatch(at, optimizer=opt, mode='record', output='watch_record.json')
        opt.attach(watch)
    opt.run(fmax=0.01, steps=150)
    if watch is not None:
        watch.finish()
elif case.startswith('S'):   # Si2 diamond, isotropically strained; GPAW's own symmetry on (default)
    from ase.build import bulk
    at = bulk('Si', 'diamond', a=5.56)
    at.calc = GPAW(mode=PW(250), kpts={'size': (4, 4, 4), 'gamma': True}, xc='PBE', txt='gpaw.txt')
    if case.startswith('S2'):
        at.set_constraint(FixSymmetry(at))
    flt = UnitCellFilter(at)
    opt = BFGS(flt, trajectory='relax.traj', logfile='opt.log')
    if os.environ.get('WATCH'):
        from driftwatch.live import SymmetryWatch
        watch = SymmetryWatch(at, optimizer=opt, mode='record', output='watch_record.json')
        opt.attach(watch)
    opt.run(fmax=0.002, steps=40)
    if watch is not None:
        watch.finish()
else:
    sys.exit('unknown case ' + case)
print('done', case, opt.nsteps)
