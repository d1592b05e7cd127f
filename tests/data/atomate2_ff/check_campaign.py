"""Compare driftwatch's records (audit with record.structures: all) against outside references.

python check_campaign.py CAMPAIGN AUDIT
- frames: task document's own output.ionic_steps (cell, cartesian positions, energy) vs ASE's read of
  relax.traj / XDATCAR, vs pymatgen's loadfn of trajectory.json.gz, vs driftwatch's record frames.
- spglib.get_symmetry_dataset(cell, symprec, angle_tolerance=-1) on the first and last frame at every
  symprec driftwatch's record lists, vs the record's group numbers there.
- ASE cell.get_bravais_lattice() (eps 2e-4 default; pbc given) vs driftwatch's initial/final lattice.
"""
import glob
import json
import os
import sys

import numpy as np
import spglib
from ase.io import read

CAMP, AUDIT = sys.argv[1], sys.argv[2]
PEARSON = {"CUB": "cP", "FCC": "cF", "BCC": "cI", "TET": "tP", "BCT": "tI", "ORC": "oP", "ORCF": "oF",
           "ORCI": "oI", "ORCC": "oS", "HEX": "hP", "RHL": "hR", "MCL": "mP", "MCLC": "mS", "TRI": "aP",
           "SQR": "tp", "RECT": "op", "CRECT": "oc", "HEX2D": "hp", "OBL": "mp", "LINE": "line"}
counts = {}


def tally(what, ok):
    c = counts.setdefault(what, [0, 0])
    c[0] += 1
    c[1] += (not ok)
    if not ok:
        print("  DISAGREE", what)


def same(cell1, pos1, cell2, pos2, tol):
    """Same cell (1e-6 A) and same positions up to lattice translations (tol A)."""
    if not np.allclose(cell1, cell2, atol=1e-6) or np.shape(pos1) != np.shape(pos2):
        return False
    d = np.linalg.solve(np.asarray(cell1).T, (np.asarray(pos1) - np.asarray(pos2)).T).T
    d -= np.round(d)
    return float(np.abs(d @ np.asarray(cell1)).max()) < tol


def doc_frames(path):
    d = json.load(open(path))
    out = []
    for ion in d["output"]["ionic_steps"]:
        s = ion["mol_or_struct"]
        cell = np.array(s["lattice"]["matrix"])
        pos = np.array([site["abc"] for site in s["sites"]]) @ cell
        out.append((cell, pos, ion["energy"]))
    return d, out


def records_by_source():
    recs = {}
    for f in glob.glob(os.path.join(AUDIT, "records", "*.json")):
        r = json.load(open(f))
        recs[os.path.normpath(r["run"]["source"])] = r
    return recs


recs = records_by_source()
print(len(recs), "records")
for jobdir in sorted(glob.glob(os.path.join(CAMP, "runs", "*", "job_*"))):
    doc, dframes = doc_frames(os.path.join(jobdir, "task_doc.json"))
    print(jobdir, "doc frames", len(dframes), "n_steps", doc["output"]["n_steps"], "state", doc["state"],
          "relax_cell", doc["input"]["relax_cell"], "steps", doc["input"]["steps"])
    tally("doc n_steps == len(ionic_steps)", doc["output"]["n_steps"] == len(dframes))
    # the model_dump and gz copies hold the same frames
    for other in ("task_doc_model_dump.json",):
        _, f2 = doc_frames(os.path.join(jobdir, other))
        tally("doc copies identical frames", len(f2) == len(dframes) and all(
            same(a[0], a[1], b[0], b[1], 1e-9) for a, b in zip(f2, dframes)))
    for name in ("relax.traj", "XDATCAR", "trajectory.json.gz"):
        p = os.path.join(jobdir, name)
        if not os.path.exists(p):
            continue
        if name == "trajectory.json.gz":
            from monty.serialization import loadfn
            tr = loadfn(p)
            frames = [(np.array(s.lattice.matrix), s.cart_coords, fp.get("energy"))
                      for s, fp in zip(tr, tr.frame_properties)]
        elif name == "XDATCAR":   # ASE 3.29's reader fails on pymatgen's per-frame headers
            from pymatgen.io.vasp import Xdatcar
            frames = [(np.array(s.lattice.matrix), s.cart_coords, None) for s in Xdatcar(p).structures]
        else:
            images = read(p, index=":")
            frames = [(a.cell.array, a.positions,
                       a.get_potential_energy() if a.calc is not None else None) for a in images]
        tally(f"{name}: frame count == doc ionic steps", len(frames) == len(dframes))
        ok = all(same(a[0], a[1], b[0], b[1], 2e-5) for a, b in zip(frames, dframes))
        tally(f"{name}: per-frame cell+positions == doc (1e-6 A cell, 2e-5 A positions)", ok)
        if frames[0][2] is not None:
            tally(f"{name}: per-frame energy == doc (1e-6 eV)",
                  all(abs(a[2] - b[2]) < 1e-6 for a, b in zip(frames, dframes)))
        # driftwatch's record of this file (or of the folder, for the XDATCAR)
        key = os.path.normpath(p if name != "XDATCAR" else jobdir)
        rec = recs.get(key) or recs.get(os.path.normpath(p))
        if rec is None:
            print("  driftwatch has no record of", p)
            continue
        rf = rec["frames"]
        tally(f"driftwatch {name}: n_frames == doc", rec["run"]["n_frames"] == len(dframes))
        st = rec["structures"]["frames"]
        ok = all(same(st[str(i)]["cell"], st[str(i)]["positions"], dframes[i][0], dframes[i][1], 2e-5)
                 for i in range(min(len(rf), len(dframes))))
        tally(f"driftwatch {name}: per-frame cell+positions == doc", ok)
        if rf[0]["energy"] is not None:
            tally(f"driftwatch {name}: per-frame energy == doc",
                  all(abs(rf[i]["energy"] - dframes[i][2]) < 1e-6 for i in range(len(dframes))))
        else:
            print("  driftwatch energies: none")
        # spglib on first and last frames at the record's symprecs
        numbers = rec["structures"]["numbers"]
        for i in sorted({0, len(rf) - 1}):
            sym = rf[i]["symmetry"]
            if not sym:
                continue
            cell = (np.array(st[str(i)]["cell"]), np.linalg.solve(np.array(st[str(i)]["cell"]).T,
                                                                  np.array(st[str(i)]["positions"]).T).T, numbers)
            for sp, g in zip(sym["symprec"], sym["group"]):
                if sym.get("group_kind") == "space":
                    ds = spglib.get_symmetry_dataset(cell, symprec=sp, angle_tolerance=-1.0)
                    what = "spglib space group at record symprec (first/last frame)"
                else:
                    ds = spglib.get_symmetry_layerdataset(cell, aperiodic_dir=2, symprec=sp)
                    what = "spglib layer group (get_symmetry_layerdataset, aperiodic z) at record symprec"
                ref = None if ds is None else ds.number
                tally(what, ref == g)
                if ref != g:
                    print("   ", i, sp, "spglib", ref, "driftwatch", g)
        # ASE Bravais lattice of first and last frames
        pbc = rec["structures"]["pbc"]
        from ase import Atoms
        for i, which in ((0, "initial"), (len(rf) - 1, "final")):
            if rec["geometry"].get("dimension") == 2 or str(rec["geometry"].get("dimension")) == "2":
                pbc = [True, True, False]
            a = Atoms(cell=np.array(st[str(i)]["cell"]), pbc=pbc)
            try:
                lat = a.cell.get_bravais_lattice(pbc=pbc).name
                lat3 = a.cell.get_bravais_lattice(pbc=pbc, eps=1e-3).name
                if lat3 != lat:
                    print(f"   ({which}: ASE with eps=1e-3: {lat3})")
            except Exception as exc:  # noqa
                lat = f"error {exc}"
            dw = rec["summary"][which]["type"] if isinstance(rec["summary"].get(which), dict) else None
            print(f"   {which}: ASE {lat} -> {PEARSON.get(lat, lat)}; driftwatch {dw}")
            if dw is not None:
                tally("ASE get_bravais_lattice == driftwatch lattice (first/last)", PEARSON.get(lat) == dw)
        print("   verdict:", rec["summary"]["verdict"].get("text", rec["summary"]["verdict"])
              if isinstance(rec["summary"]["verdict"], dict) else rec["summary"]["verdict"],
              "| unfinished:", rec["run"]["unfinished"], "| fixed_cell:", rec["run"]["fixed_cell"],
              "| not_relaxation:", rec["run"]["not_relaxation"])
print()
for k, (n, bad) in counts.items():
    print(f"{n:4d} {bad:3d}  {k}")
