"""ASE BFGS relaxation of a strained, displaced Si2 cell, pw.x driven through ASE's SocketIOCalculator
(i-PI protocol over a unix socket; pw.x started by ASE as `pw.x -in espresso.pwi --ipi NAME:UNIX`)."""
import os
import numpy as np
from ase import Atoms
from ase.calculators.espresso import Espresso, EspressoProfile
from ase.optimize import BFGS

cell = [[0.0, 2.781, 2.781], [2.7, 0.0, 2.7], [2.7, 2.7, 0.0]]
atoms = Atoms("Si2", cell=cell, pbc=True, scaled_positions=[[0, 0, 0], [0.28, 0.25, 0.23]])
profile = EspressoProfile(command="nice -n 10 mpirun --allow-run-as-root --oversubscribe -np 2 pw.x",
                          pseudo_dir="../../pseudo")
espresso = Espresso(profile=profile, directory=".",
                    input_data={"control": {"calculation": "scf", "prefix": "si2ipi", "outdir": "./tmp",
                                            "disk_io": "none", "tprnfor": True, "tstress": True},
                                "system": {"ecutwfc": 14},
                                "electrons": {"conv_thr": 1e-9}},
                    pseudopotentials={"Si": "Si.pz-vbc.UPF"}, kpts=(2, 2, 2))
# ASE 3.29: SocketIOCalculator(espresso, unixsocket=...) launches argv without the pw.x command
# (FileIOSocketClientLauncher uses template.socketio_argv alone: "No such file or directory: '-in'");
# the calculator's own socketio() builds the command from the profile
with espresso.socketio(unixsocket=f"dw-si2-{os.getpid()}") as calc:
    atoms.calc = calc
    opt = BFGS(atoms, trajectory="relax.traj", logfile="-")
    opt.run(fmax=0.01, steps=30)
print("final energy", atoms.get_potential_energy())
