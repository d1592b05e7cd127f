# ASE 3.29: an ASE JSON database of two relaxation frames of an invented Cu2 cell, each row tagged with
# the force field that computed it (a key-value pair named as atomate2 names it)
from ase.build import bulk
from ase.db import connect
from ase.calculators.emt import EMT
from ase.optimize import BFGS
import os
if os.path.exists('ffrows.json'): os.remove('ffrows.json')
a = bulk('Cu', 'fcc', a=3.7, cubic=False) * (2, 1, 1)
a.rattle(0.05, seed=3); a.calc = EMT()
db = connect('ffrows.json')
opt = BFGS(a, logfile=None)
def save(): db.write(a, forcefield_name='EMT', campaign='inv-cu2')
opt.attach(save); opt.run(fmax=0.05, steps=5)
