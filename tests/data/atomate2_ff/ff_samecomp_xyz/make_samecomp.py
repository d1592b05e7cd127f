"""Three separate CHGNet relax jobs of invented Cu cells run with jobflow's default run_locally
(create_folders=False) in one folder: atomate2 appends each final structure to final_atoms_object.xyz.
Run: OMP_NUM_THREADS=1 nice -n 10 venv/bin/python make_samecomp.py OUTDIR"""
import os, sys
from pathlib import Path
import numpy as np
from jobflow import Flow, run_locally
from pymatgen.core import Lattice, Structure
from atomate2.forcefields.jobs import ForceFieldRelaxMaker

out = Path(sys.argv[1]); out.mkdir(parents=True, exist_ok=True); os.chdir(out)
L = np.array([[0, .5, .5], [.5, 0, .5], [.5, .5, 0]]) * 3.62
cells = {"cu_a": (1.0, 1.0, 1.06), "cu_b": (1.04, 0.98, 1.0), "cu_c": (1.0, 1.0, 0.95)}
jobs = []
for name, strain in cells.items():
    j = ForceFieldRelaxMaker(force_field_name="CHGNet", name=name).make(
        Structure(Lattice(L * np.array(strain)), ["Cu"], [[0, 0, 0]]))
    jobs.append(j)
res = run_locally(Flow(jobs))          # jobflow's defaults: no job folders
for j in jobs:
    d = res[j.uuid][1].output
    print(j.name, d.output.n_steps, d.symmetry.number, d.dir_name)
