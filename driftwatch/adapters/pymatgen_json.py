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
import os

import numpy as np

from ..errors import ForeignOutputError, InputError
from ._io import open_bytes
from .run import Frame, ReadContext

__all__ = ["read_structures", "read_task_doc", "task_doc_names"]


def _items(data, path, ctx):
    if isinstance(data, dict) and data.get("@class") == "Structure":
        ctx.warn("a single Structure, not a trajectory: no drift can be measured from it alone")
        return [data]
    if isinstance(data, dict) and isinstance(data.get("structures"), list):
        return data["structures"]
    if isinstance(data, list):
        return data
    if isinstance(data, dict) and "neb_method" in data and "images" in data:
        raise ForeignOutputError(path, "a nudged-elastic-band task document (its images are "
                                       "points of a path)", "nothing: not a relaxation's steps")
    what = f"object with keys {', '.join(sorted(data)[:6])}{', ...' if len(data) > 6 else ''}" \
        if isinstance(data, dict) else type(data).__name__
    raise InputError(path, f"not a pymatgen Structure list nor a task document with "
                           f"calcs_reversed: a JSON {what}")


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


def _load_json(path):
    """The JSON value of a file (plain or compressed); InputError naming the file if it is not JSON."""
    with open_bytes(path) as fh:
        try:
            return json.load(fh)
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise InputError(path, f"not valid JSON ({exc}); a cut file cannot be read "
                                   f"in part") from None


def read_structures(path, ctx: ReadContext):
    data = _load_json(path)
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


# ---------------------------------------------------------------- workflow task documents
_TASK_KEYS = ("ISYM", "SYMPREC", "ISIF", "IBRION", "NSW")


def _pmg_structure(item, path, where):
    """Cell, cartesian positions, numbers and pbc of a Structure dict, built by pymatgen from the
    dict's plain fields (lattice matrix, species, fractional coordinates; never ``from_dict``,
    whose decoder imports modules a file names)."""
    from pymatgen.core import Lattice, Structure
    cell, _, _, pbc = _structure_arrays(item, path, where)
    species = [str(site["species"][0]["element"]) for site in item["sites"]]
    frac = [site["abc"] if "abc" in site else None for site in item["sites"]]
    if any(f is None for f in frac):
        frac = np.linalg.solve(cell.T, np.array([s["xyz"] for s in item["sites"]], float).T).T
    st = Structure(Lattice(cell, pbc=tuple(bool(x) for x in pbc)), species, frac)
    return (np.array(st.lattice.matrix, float), np.array(st.cart_coords, float),
            np.array(st.atomic_numbers, int), np.array(pbc, bool))


_LISTS: dict = {}
"""The one list of task documents parsed last, keyed by (path, size, mtime): an audit reads each
member of a list file once, so the file is parsed once per process, not once per member."""


def _is_list(path) -> bool:
    """Whether the file's JSON value is a list (its first non-blank byte is ``[``)."""
    with open_bytes(path) as fh:
        return fh.read(4096).lstrip()[:1] == b"["


def _task_list(path) -> list:
    st = os.stat(path)
    key = (os.fspath(path), st.st_size, st.st_mtime_ns)
    if key not in _LISTS:
        _LISTS.clear()
        _LISTS[key] = _load_json(path)
    return _LISTS[key]


def _task_names(docs: list, path) -> tuple[list[str], str]:
    """A name for each document of a list, and what names them: its ``task_id`` when every
    document has a distinct one, otherwise its ``position`` ``doc-1``, ``doc-2``, ... (file order)."""
    bad = next((i for i, d in enumerate(docs) if not isinstance(d, dict)), None)
    if bad is not None:
        raise InputError(path, f"item {bad + 1} of the list is not a task document (a JSON "
                               f"{type(docs[bad]).__name__}, not an object)")
    ids = [d.get("task_id") for d in docs]
    names = [str(t) for t in ids]
    if any(t is None or t == "" for t in ids) or len(set(names)) != len(names):
        return [f"doc-{i + 1}" for i in range(len(docs))], "position"
    return names, "task_id"


def task_doc_names(path, structure_keys=()) -> list[str]:
    """The names of the task documents a JSON list holds (``FILE::NAME`` reads one); [] for a
    file holding one document."""
    return _task_names(_task_list(path), path)[0] if _is_list(path) else []


def _chosen_document(path, ctx: ReadContext):
    """The document ``path`` (``FILE`` or ``FILE::NAME``) names: the file's own, the list's only
    member, or the member NAME (then ``ctx.structure`` says which, as for other many-structure
    files). A list of several read whole is refused with the names."""
    from .batch import SEPARATOR, listing, refuse_many, split
    base, name = split(str(path))
    if name is None and not _is_list(base):
        return _load_json(base)
    docs = _task_list(base)
    if not isinstance(docs, list):
        raise InputError(base, f"holds one task document; '{SEPARATOR}{name}' names a member of "
                               f"a JSON list of task documents")
    if not docs:
        raise InputError(base, "an empty list: no task document to read")
    names, key = _task_names(docs, base)
    if name is None:
        if len(docs) == 1:
            return docs[0]
        refuse_many(base, names, "task documents")
    if name not in names:
        raise InputError(base, f"no task document named {name!r} in the list ({listing(names)})")
    ctx.structure = {"key": key, "value": name}
    return docs[names.index(name)]


def read_task_doc(path, ctx: ReadContext):
    """A workflow task document (as the Materials Project's workflow tools store them): JSON or
    JSON.gz with ``calcs_reversed[].output.ionic_steps[]`` (``structure``, ``e_fr_energy``,
    ``forces``, ``stress`` in kBar). The calculations run oldest first (``calcs_reversed`` is newest
    first); each is a stage, steps numbered on across them. A JSON list of documents (a database
    export) holds one run per document, read as ``FILE::NAME`` (:func:`task_doc_names`).
    Structures are built with pymatgen from the plain fields."""
    from ase.units import GPa
    doc = _chosen_document(path, ctx)
    path = str(path)
    calcs = doc.get("calcs_reversed") if isinstance(doc, dict) else None
    if not isinstance(calcs, list) or not calcs:
        raise InputError(path, "no calcs_reversed list: not a task document with ionic steps")
    title = doc.get("formula_pretty") or doc.get("task_id")
    ctx.title = None if title is None else str(title)
    step, stages = 0, []
    for k, calc in enumerate(reversed(calcs)):
        out = (calc or {}).get("output") or {}
        steps = out.get("ionic_steps") or []
        name = str(calc.get("task_name") or f"calc{k + 1}")
        params = ((calc.get("input") or {}).get("parameters") or
                  (calc.get("input") or {}).get("incar") or {})
        settings = {key: params[key] for key in _TASK_KEYS if params.get(key) is not None}
        if settings:
            ctx.settings.update({"code": "vasp", **settings, "settings_from": f"{name} input"})
        n0 = step
        for i, ion in enumerate(steps):
            item = (ion or {}).get("structure")
            if not isinstance(item, dict):
                raise InputError(path, f"{name}: ionic step {i} has no structure (a stripped "
                                       f"document)")
            cell, pos, numbers, pbc = _pmg_structure(item, path, f"{name} step {i}")
            energy = ion.get("e_fr_energy", ion.get("e_0_energy"))
            forces = ion.get("forces")
            stress = ion.get("stress")
            try:
                energy = None if energy is None else float(energy)
                forces = None if forces is None else np.array(forces, float)
                if stress is not None:
                    stress = (np.array(stress, float) * (-0.1 * GPa)).reshape(9)[[0, 4, 8, 5, 2, 1]]
            except (TypeError, ValueError) as exc:
                raise InputError(path, f"{name} step {i}: energy/forces/stress are not numbers "
                                       f"({exc})") from None
            yield Frame(cell=cell, positions=pos, numbers=numbers, pbc=pbc, step=step,
                        energy=energy, forces=forces, stress=stress)
            step += 1
        stages.append((name, step - n0))
    if not step:
        kind = "a molecule's task document" if any(
            "molecule" in key for c in calcs if isinstance(c, dict) for key in c) else \
            "a static, response-function or non-VASP task document?"
        raise InputError(path, f"no completed ionic step: none of its {len(calcs)} calculations "
                               f"holds output.ionic_steps ({kind})")
    if len(stages) > 1:
        ctx.file_stages = stages
