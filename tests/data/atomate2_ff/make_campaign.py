"""Invented campaign 'kestrel-ff': tiny cells relaxed with CHGNet through atomate2's force-field makers.

Run with the venv python:  OMP_NUM_THREADS=1 nice -n 10 venv/bin/python make_campaign.py OUTDIR
Writes OUTDIR/runs/<case>/job_*/ (jobflow run folders, create_folders=True), OUTDIR/store/docs.json and
OUTDIR/store/data.json (maggma JSONStore as jobflow's JobStore left them), and per case the task
document the ways a user saves one: task_doc.json (monty dumpfn of the pydantic document),
task_doc_model_dump.json (jsanitize(doc.model_dump())), task_doc.json.gz; OUTDIR/all_docs.json is a
list of every document; OUTDIR/batch/ is one batch job (a list of structures) run with jobflow's
default create_folders=False, so its final_atoms_object.xyz gets every final structure appended.
All cells, names and the campaign are invented.
"""
import gzip
import json
import os
import sys
from pathlib import Path

import numpy as np
from jobflow import Flow, JobStore, run_locally
from maggma.stores import JSONStore
from monty.json import jsanitize
from monty.serialization import dumpfn
from pymatgen.core import Lattice, Structure

from atomate2.forcefields.jobs import ForceFieldRelaxMaker, ForceFieldStaticMaker

OUT = Path(sys.argv[1]).resolve()
rng = np.random.default_rng(20261205)


def fcc_prim(a, el, strain=(1, 1, 1)):
    L = np.array([[0, .5, .5], [.5, 0, .5], [.5, .5, 0]]) * a
    return Structure(Lattice(L * np.array(strain)), [el], [[0, 0, 0]])


def bcc_prim(a, el, strain=(1, 1, 1)):
    L = np.array([[-.5, .5, .5], [.5, -.5, .5], [.5, .5, -.5]]) * a
    return Structure(Lattice(L * np.array(strain)), [el], [[0, 0, 0]])


def diamond_conv(a, el, rattle):
    f = np.array([[0, 0, 0], [0, .5, .5], [.5, 0, .5], [.5, .5, 0]])
    f = np.vstack([f, f + .25])
    s = Structure(Lattice.cubic(a), [el] * 8, f)
    for i, v in enumerate(rng.normal(0, rattle, (8, 3))):
        s.translate_sites([i], v, frac_coords=False)
    return s


def diamond_prim(a, el, rattle, strain):
    L = np.array([[0, .5, .5], [.5, 0, .5], [.5, .5, 0]]) * a
    s = Structure(Lattice(L @ np.array(strain)), [el] * 2, [[0, 0, 0], [.25, .25, .25]])
    s.translate_sites([1], rng.normal(0, rattle, 3), frac_coords=False)
    return s


def bn_layer_sheared(a=2.50, vac=15.0, shear=0.12):
    L = np.array([[a, 0, 0], [-a / 2 + shear * a, a * np.sqrt(3) / 2, 0], [0, 0, vac]])
    return Structure(Lattice(L), ["B", "N"], [[1 / 3, 2 / 3, .5], [2 / 3, 1 / 3, .5]])


def low_cell():
    L = np.array([[4.1, 0, 0], [0.7, 4.6, 0], [0.4, 0.9, 5.3]])
    return Structure(Lattice(L), ["Li", "Mg", "Al", "Cl"],
                     [[0.03, 0.11, 0.07], [0.48, 0.37, 0.55], [0.21, 0.71, 0.33], [0.77, 0.58, 0.91]])


def fcc_conv_rattled(a, el, strain, rattle):
    f = [[0, 0, 0], [0, .5, .5], [.5, 0, .5], [.5, .5, 0]]
    s = Structure(Lattice(np.diag([a, a, a]) * np.array(strain)), [el] * 4, f)
    for i, v in enumerate(rng.normal(0, rattle, (4, 3))):
        s.translate_sites([i], v, frac_coords=False)
    return s


FF = "CHGNet"
cases = {
    # name: (maker(s), structure, what is expected)
    "c01_cu_fcc_tetragonal": (ForceFieldRelaxMaker(force_field_name=FF, relax_kwargs={"traj_file": "relax.traj"}),
                              fcc_prim(3.62, "Cu", (1.0, 1.0, 1.06))),
    "c02_mo_bcc_orthorhombic": (ForceFieldRelaxMaker(force_field_name=FF, store_trajectory="full"),
                                bcc_prim(3.15, "Mo", (1.03, 0.98, 1.0))),
    "c03_al_fcc_fixedcell": (ForceFieldRelaxMaker(force_field_name=FF, relax_cell=False,
                                                  relax_kwargs={"traj_file": "relax.traj"}),
                             fcc_conv_rattled(4.04, "Al", (1.0, 1.0, 1.05), 0.06)),
    "c04_si_diamond_rattled_fixedcell": (ForceFieldRelaxMaker(force_field_name=FF, relax_cell=False,
                                                              relax_kwargs={"traj_file": "XDATCAR",
                                                                            "traj_file_fmt": "xdatcar"}),
                                         diamond_conv(5.47, "Si", 0.05)),
    "c05_si_diamond_rattled_cell": (ForceFieldRelaxMaker(force_field_name=FF,
                                                         relax_kwargs={"traj_file": "trajectory.json.gz",
                                                                       "traj_file_fmt": "pmg"}),
                                    diamond_prim(5.47, "Si", 0.06, [[1, 0.03, 0], [0, 1, 0], [0, 0, 1.02]])),
    "c06_bn_layer_sheared": (ForceFieldRelaxMaker(force_field_name=FF, relax_kwargs={"traj_file": "relax.traj"}),
                             bn_layer_sheared()),
    "c07_limgalcl_low": (ForceFieldRelaxMaker(force_field_name=FF, relax_kwargs={"traj_file": "relax.traj"}),
                         low_cell()),
    "c08_cu_static": (ForceFieldStaticMaker(force_field_name=FF), fcc_prim(3.62, "Cu", (1.0, 1.0, 1.06))),
    "c09_w_bcc_steplimit": (ForceFieldRelaxMaker(force_field_name=FF, steps=4, relax_kwargs={"traj_file": "relax.traj"}),
                            bcc_prim(3.17, "W", (1.06, 0.95, 1.0))),
    "c10_cu_fcc_fixsym": (ForceFieldRelaxMaker(force_field_name=FF, fix_symmetry=True,
                                               relax_kwargs={"traj_file": "relax.traj"}),
                          fcc_prim(3.62, "Cu", (1.0, 1.0, 1.06))),
}

OUT.mkdir(parents=True, exist_ok=True)
(OUT / "store").mkdir(exist_ok=True)
store = JobStore(JSONStore(str(OUT / "store" / "docs.json"), read_only=False),
                 additional_stores={"data": JSONStore(str(OUT / "store" / "data.json"), read_only=False)})
all_docs = []


def save_doc(doc, folder: Path):
    dumpfn(doc, folder / "task_doc.json")
    d = jsanitize(doc.model_dump(), strict=True, enum_values=True)  # strict=False would turn Structures into str
    (folder / "task_doc_model_dump.json").write_text(json.dumps(d))
    with gzip.open(folder / "task_doc.json.gz", "wt") as fh:
        json.dump(jsanitize(doc, strict=True, enum_values=True), fh)
    all_docs.append(jsanitize(doc, strict=True, enum_values=True))


for name, (maker, s) in cases.items():
    root = OUT / "runs" / name
    root.mkdir(parents=True, exist_ok=True)
    s.to(filename=str(root / "input_POSCAR"), fmt="poscar")
    j = maker.make(s)
    j.name = name
    res = run_locally(j, store=store, create_folders=True, root_dir=str(root))
    doc = res[j.uuid][1].output
    save_doc(doc, Path(doc.dir_name))
    print(name, "n_steps", doc.output.n_steps, "state", doc.state, "force_conv", doc.is_force_converged, flush=True)

# double relax: two chained relax jobs, as a user builds it (atomate2 has no force-field double relax maker)
name = "c11_si_double_relax"
root = OUT / "runs" / name
root.mkdir(parents=True, exist_ok=True)
s = diamond_prim(5.47, "Si", 0.06, [[1, 0.04, 0], [0, 1, 0], [0, 0, 1.03]])
j1 = ForceFieldRelaxMaker(force_field_name=FF, name="relax 1", relax_kwargs={"traj_file": "relax.traj", "fmax": 0.2}).make(s)
j2 = ForceFieldRelaxMaker(force_field_name=FF, name="relax 2", relax_kwargs={"traj_file": "relax.traj", "fmax": 0.02}).make(j1.output.structure)
res = run_locally(Flow([j1, j2], name=name), store=store, create_folders=True, root_dir=str(root))
for jj in (j1, j2):
    doc = res[jj.uuid][1].output
    save_doc(doc, Path(doc.dir_name))
    print(name, jj.name, "n_steps", doc.output.n_steps, "state", doc.state, flush=True)

# a batch job with jobflow's defaults (create_folders=False): one folder, one job, many structures
batch = OUT / "batch"
batch.mkdir(exist_ok=True)
cwd = os.getcwd()
os.chdir(batch)
structs = [fcc_prim(3.62, "Cu", (1.0, 1.0, 1.05)), bcc_prim(3.15, "Mo", (1.02, 0.99, 1.0)),
           diamond_prim(5.47, "Si", 0.05, [[1, 0.02, 0], [0, 1, 0], [0, 0, 1]])]
jb = ForceFieldRelaxMaker(force_field_name=FF).make(structs)
res = run_locally(jb, store=store)
docs = res[jb.uuid][1].output
dumpfn(docs, batch / "batch_docs.json")
for d in docs:
    print("batch", d.formula_pretty, "n_steps", d.output.n_steps, d.dir_name)
os.chdir(cwd)

(OUT / "all_docs.json").write_text(json.dumps(all_docs))
print("done")
