"""Prototype: Elk GEOMETRY_OPT.OUT -> one ASE Atoms per block (each block is GEOMETRY.OUT's format,
read with ASE's elk reader); blocks headed '! Lattice optimisation step : n' or
'! Atomic position optimisation step : n'. Not part of driftwatch."""
import io, re
from ase.io.elk import read_elk
def blocks(path):
    txt = open(path).read()
    parts = re.split(r'^! (Lattice|Atomic position) optimisation step :\s*(\d+)\s*$', txt, flags=re.M)
    out = []
    for k in range(1, len(parts), 3):
        kind, n, body = parts[k], int(parts[k + 1]), parts[k + 2]
        out.append((kind, n, read_elk(io.StringIO(body))))
    return out
