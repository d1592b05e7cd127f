"""pymatgen Structure lists in JSON (``[s.as_dict() for s in structures]``).

Also accepted: a single Structure dict (one frame, with a warning), a dict with a
``"structures"`` list, and lists of dicts holding a ``"structure"`` entry (as in
``Vasprun.ionic_steps``) whose ``"e_fr_energy"`` or ``"energy"`` and ``"forces"``
are then kept. The dicts are read field by field (pymatgen itself is not called:
its ``from_dict`` would let a file import modules, see ``_structure_arrays``). JSON
cannot be streamed: the file is loaded whole.
"""
from __future__ import annotations

import json

import numpy as np

from ..errors import InputError
from ._io import open_bytes
from .run import Frame, ReadContext

__all__ = ["read_structures"]


def _items(data, path, ctx):
    if isinstance(data, dict) and data.get("@class") == "Structure":
        ctx.warn("a single Structure, not a trajectory: no drift can be measured from it alone")
        return [data]
    if isinstance(data, dict) and isinstance(data.get("structures"), list):
        return data["structures"]
    if isinstance(data, list):
        return data
    raise InputError(path, "not a pymatgen Structure list: expected a JSON list of Structure dicts")


def _structure_arrays(item, path, i):
    """cell (3, 3), cartesian positions (N, 3), numbers (N,), pbc (3,) of a Structure dict.

    Read field by field with plain JSON types: ``Structure.from_dict`` passes site and structure
    ``properties`` through monty's decoder, which imports any module a file names under
    ``@module`` (running its top-level code). A data file must not be able to do that.
    """
    from ase.data import atomic_numbers
    try:
        lat = item["lattice"]
        cell = np.array(lat["matrix"], float)
        pbc = np.array(lat.get("pbc", (True, True, True)), bool)
        frac, numbers = [], []
        for j, site in enumerate(item["sites"]):
            species = site["species"]
            if len(species) != 1 or float(species[0].get("occu", 1.0)) != 1.0:
                raise InputError(path, f"item {i}, site {j}: partial occupancy (a disordered "
                                       f"structure) has no single lattice of atoms to analyse")
            el = str(species[0]["element"])
            if el not in atomic_numbers or atomic_numbers[el] == 0:
                raise InputError(path, f"item {i}, site {j}: unknown element {el[:20]!r}")
            numbers.append(atomic_numbers[el])
            frac.append(site["abc"] if "abc" in site else
                        np.linalg.solve(cell.T, np.asarray(site["xyz"], float)))
        frac = np.array(frac, float).reshape(-1, 3)
    except InputError:
        raise
    except (KeyError, TypeError, ValueError, IndexError, AttributeError,
            np.linalg.LinAlgError) as exc:
        raise InputError(path, f"item {i} is not a valid pymatgen Structure dict "
                               f"({type(exc).__name__}: {exc})") from None
    if cell.shape != (3, 3) or pbc.shape != (3,):
        raise InputError(path, f"item {i}: lattice matrix of shape {cell.shape}")
    return cell, frac @ cell, np.array(numbers, int), pbc


def read_structures(path, ctx: ReadContext):
    with open_bytes(path) as fh:
        try:
            data = json.load(fh)
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise InputError(path, f"not valid JSON ({exc}); a cut file cannot be read "
                                   f"in part") from None
    for i, item in enumerate(_items(data, path, ctx)):
        extra = {}
        if isinstance(item, dict) and "structure" in item and "@class" not in item:
            extra, item = item, item["structure"]
        if not isinstance(item, dict) or item.get("@class") != "Structure":
            raise InputError(path, f"item {i} is not a pymatgen Structure dict")
        cell, positions, numbers, pbc = _structure_arrays(item, path, i)
        energy = extra.get("e_fr_energy", extra.get("energy"))
        forces = extra.get("forces")
        try:
            energy = None if energy is None else float(energy)
            forces = None if forces is None else np.array(forces, float)
        except (TypeError, ValueError) as exc:
            raise InputError(path, f"item {i}: energy/forces are not numbers ({exc})") from None
        yield Frame(cell=cell, positions=positions, numbers=numbers, pbc=pbc, step=i,
                    energy=energy, forces=forces)
