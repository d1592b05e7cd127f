"""pymatgen Structure lists in JSON (``[s.as_dict() for s in structures]``).

Also accepted: a single Structure dict (one frame, with a warning), a dict with a
``"structures"`` list, and lists of dicts holding a ``"structure"`` entry (as in
``Vasprun.ionic_steps``) whose ``"e_fr_energy"`` or ``"energy"`` and ``"forces"``
are then kept. pymatgen is imported here only. JSON cannot be streamed: the file
is loaded whole.
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


def read_structures(path, ctx: ReadContext):
    from pymatgen.core import Structure
    with open_bytes(path) as fh:
        try:
            data = json.load(fh)
        except json.JSONDecodeError as exc:
            raise InputError(path, f"not valid JSON ({exc}); a cut file cannot be read "
                                   f"in part") from None
    for i, item in enumerate(_items(data, path, ctx)):
        extra = {}
        if isinstance(item, dict) and "structure" in item and "@class" not in item:
            extra, item = item, item["structure"]
        if not isinstance(item, dict) or item.get("@class") != "Structure":
            raise InputError(path, f"item {i} is not a pymatgen Structure dict")
        s = Structure.from_dict(item)
        energy = extra.get("e_fr_energy", extra.get("energy"))
        forces = extra.get("forces")
        pbc = np.array(getattr(s.lattice, "pbc", (True, True, True)), bool)
        yield Frame(cell=np.array(s.lattice.matrix, float), positions=np.array(s.cart_coords),
                    numbers=np.array(s.atomic_numbers, int), pbc=pbc, step=i,
                    energy=None if energy is None else float(energy),
                    forces=None if forces is None else np.array(forces, float))
