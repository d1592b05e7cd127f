"""Prototype: ABINIT *_HIST.nc -> ASE Atoms per ionic step (rprimd bohr, xred). Not part of driftwatch."""
import sys, numpy as np, netCDF4
from ase import Atoms
from ase.units import Bohr, Hartree
def frames(path):
    d = netCDF4.Dataset(path)
    rp = np.array(d['rprimd'][:]) * Bohr; xr = np.array(d['xred'][:]); z = np.array(d['znucl'][:]).astype(int)
    ty = np.array(d['typat'][:]).astype(int); et = np.array(d['etotal'][:]) * Hartree
    return [Atoms(numbers=z[ty - 1], cell=rp[k], scaled_positions=xr[k], pbc=True, info={'energy_eV': et[k]}) for k in range(len(et))]
