"""Prototype: pair CP2K's PROJECT-pos-1.xyz frames with PROJECT-1.cell rows (by step number) -> ASE Atoms.
Checked against the .out's CELL| lines and ENERGY| lines. Not part of driftwatch."""
import sys, re, numpy as np
from ase.io import read, write
from ase.units import Hartree

def read_cell(path):
    rows = {}
    for line in open(path):
        if line.startswith('#') or not line.strip(): continue
        v = line.split()
        rows[int(v[0])] = (np.array(v[2:11], float).reshape(3, 3), float(v[11]))
    return rows

def read_out_cells(path):
    """CELL| Vector lines of the .out (3 decimals) and the |a| etc (6 decimals), in order printed."""
    cells, cur = [], []
    for line in open(path):
        m = re.match(r'\s*CELL\| Vector ([abc]) \[angstrom\]:\s+(\S+)\s+(\S+)\s+(\S+)\s+\|\S\| =\s+(\S+)', line)
        if m:
            cur.append([float(m.group(i)) for i in (2, 3, 4, 5)])
            if len(cur) == 3: cells.append(np.array(cur)); cur = []
    return cells

def frames(xyz, cell):
    im = read(xyz, index=':')
    rows = read_cell(cell)
    out = []
    for a in im:
        i = int(a.info['i'])
        if i in rows: c = rows[i][0]
        else: c = rows[max(rows)][0]  # the re-evaluation at the minimum: same cell as the last step
        a = a.copy(); a.cell = c; a.pbc = True
        a.info = {'step': i, 'cp2k_energy_Ha': float(a.info['E'])}
        out.append(a)
    return out, rows

if __name__ == '__main__':
    xyz, cell, outp, dest = sys.argv[1:5]
    fr, rows = frames(xyz, cell)
    oc = read_out_cells(outp)
    print(f'{xyz}: {len(fr)} xyz frames, {len(rows)} .cell rows (steps {min(rows)}..{max(rows)}), {len(oc)} CELL| blocks in .out')
    # compare .cell rows to the .out's CELL| blocks: block k+1 (0 = input) is the cell of step k
    d = [np.abs(rows[k][0] - oc[k][:, :3]).max() for k in rows if k < len(oc)]
    dl = [np.abs(np.linalg.norm(rows[k][0], axis=1) - oc[k][:, 3]).max() for k in rows if k < len(oc)]
    print(f'  max |.cell - .out CELL| vector| over {len(d)} steps: {max(d):.2e} Å (out prints 3 decimals); lengths: {max(dl):.2e} Å')
    for a in fr: a.calc = None
    from ase.calculators.singlepoint import SinglePointCalculator
    for a in fr:
        a.calc = SinglePointCalculator(a, energy=a.info['cp2k_energy_Ha'] * Hartree)
    write(dest, fr, format='extxyz')
