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

from ..errors import ForeignOutputError, InputError, NotPeriodicError
from ._io import open_bytes, strip_compression
from .run import Frame, ReadContext

__all__ = ["read_structures", "read_task_doc", "task_doc_names", "read_pmg_trajectory"]


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


def _step_frame(item: dict, energy, ion: dict, path, where: str, step: int) -> Frame:
    """A task document's ionic step: its Structure dict ``item``, ``energy`` (eV), and the step's
    ``forces`` (eV/Å) and ``stress`` (3x3 kBar, VASP's sign: pressure positive)."""
    from ase.units import GPa
    cell, pos, numbers, pbc = _pmg_structure(item, path, where)
    forces, stress = ion.get("forces"), ion.get("stress")
    try:
        energy = None if energy is None else float(energy)
        forces = None if forces is None else np.array(forces, float)
        if stress is not None:
            stress = (np.array(stress, float) * (-0.1 * GPa)).reshape(9)[[0, 4, 8, 5, 2, 1]]
    except (TypeError, ValueError) as exc:
        raise InputError(path, f"{where}: energy/forces/stress are not numbers ({exc})") from None
    return Frame(cell=cell, positions=pos, numbers=numbers, pbc=pbc, step=step, energy=energy,
                 forces=forces, stress=stress)


_LISTS: dict = {}
"""The one list of task documents parsed last, keyed by (path, size, mtime): an audit reads each
member of a list file once, so the file is parsed once per process, not once per member."""


def _is_list(path) -> bool:
    """Whether the file's JSON value is a list (its first non-blank byte is ``[``)."""
    with open_bytes(path) as fh:
        return fh.read(4096).lstrip()[:1] == b"["


def _task_list(path) -> list:
    """The task documents of a JSON list file: its items, a jobflow store's entries (``{"uuid",
    "index", "output", "name"}``, as maggma's JSONStore keeps a JobStore's documents) replaced by
    the task documents their ``output`` holds (one, or a list: a batch job's); entries whose
    output is no task document (another job's result) are left out."""
    st = os.stat(path)
    key = (os.fspath(path), st.st_size, st.st_mtime_ns)
    if key not in _LISTS:
        _LISTS.clear()
        _LISTS[key] = _unwrapped(_load_json(path))
    return _LISTS[key]


def _is_store_entry(item) -> bool:
    return isinstance(item, dict) and "uuid" in item and "output" in item and "index" in item


def _is_task_doc(doc) -> bool:
    return isinstance(doc, dict) and ("calcs_reversed" in doc or _is_ase_doc(doc))


def _unwrapped(data):
    """A JSON list with jobflow store entries flattened to their task documents (each remembers
    its job's name as ``_job``); any other value unchanged."""
    if not isinstance(data, list) or not any(_is_store_entry(d) for d in data):
        return data
    docs = []
    for entry in data:
        out = entry.get("output") if _is_store_entry(entry) else entry
        outs = [d for d in (out if isinstance(out, list) else [out]) if _is_task_doc(d)]
        for k, doc in enumerate(outs):
            job = str(entry.get("name") or entry.get("uuid")) if _is_store_entry(entry) else None
            docs.append({**doc, "_job": job if job is None or len(outs) == 1 else f"{job}-{k + 1}",
                         "_uuid": entry.get("uuid") if _is_store_entry(entry) else None})
    return docs


def _task_names(docs: list, path) -> tuple[list[str], str]:
    """A name for each document of a list, and what names them: its ``task_id`` when every
    document has a distinct one; else, in a jobflow store, its job's name (``-2``, ... for the
    documents of one batch job) or, when those repeat, the job's ``uuid``; otherwise its
    ``position`` ``doc-1``, ``doc-2``, ... (file order)."""
    bad = next((i for i, d in enumerate(docs) if not isinstance(d, dict)), None)
    if bad is not None:
        raise InputError(path, f"item {bad + 1} of the list is not a task document (a JSON "
                               f"{type(docs[bad]).__name__}, not an object)")
    for key in ("task_id", "_job", "_uuid"):
        ids = [d.get(key) for d in docs]
        names = [str(t) for t in ids]
        if not any(t is None or t == "" for t in ids) and len(set(names)) == len(names):
            return names, {"_job": "job name", "_uuid": "job uuid"}.get(key, key)
    return [f"doc-{i + 1}" for i in range(len(docs))], "position"


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
    doc = _chosen_document(path, ctx)
    if _is_store_entry(doc) and _is_task_doc(doc.get("output")):
        doc = doc["output"]                    # one jobflow store entry saved alone
    path = str(path)
    if _is_ase_doc(doc):
        yield from _read_ase_doc(doc, path, ctx)
        return
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
            yield _step_frame(item, ion.get("e_fr_energy", ion.get("e_0_energy")), ion, path,
                              f"{name} step {i}", step)
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


# ------------------------------------------------ atomate2's ASE and force-field task documents
# atomate2's AseTaskDoc and the ForceFieldTaskDocument built on it (atomate2 0.1.5: atomate2/ase/
# schemas.py; tests/data/atomate2_ff): ``output.ionic_steps[]`` with ``mol_or_struct`` (a Structure
# dict; ``structure`` in atomate2's earlier force-field documents), ``energy`` (eV), ``forces``
# (eV/Å), ``stress`` (3x3, kBar with VASP's sign: checked against ASE's get_stress of the same
# relaxation's trajectory); ``input`` with ``steps``, ``relax_cell``, ``fix_symmetry``, ``symprec``;
# ``state`` "failed" when the ASE optimiser's ``run`` returned False (its step limit reached).
_ASE_DOC_KEYS = ("ase_calculator_name", "forcefield_name")


def _is_ase_doc(doc) -> bool:
    return isinstance(doc, dict) and "calcs_reversed" not in doc and \
        any(k in doc for k in _ASE_DOC_KEYS) and isinstance(doc.get("output"), dict) and \
        "ionic_steps" in doc["output"]


_BLOBS: dict = {}
"""The one jobflow blob store parsed last, keyed by (path, size, mtime) -> {blob_uuid: data}."""


def _blob(ref: dict, path, ctx: ReadContext):
    """The data a jobflow blob reference (``{"blob_uuid", "store"}``: a JobStore put a job's
    large output in its additional store ``store``) points to, from that store's JSON file beside
    the document's (``STORE.json``, maggma's JSONStore, plain or compressed)."""
    store, uuid = str(ref.get("store") or ""), str(ref.get("blob_uuid"))
    folder = os.path.dirname(os.path.abspath(path))
    found = [os.path.join(folder, n) for n in sorted(os.listdir(folder))
             if strip_compression(n) == f"{store}.json"]
    if not store or not found:
        raise InputError(path, f"its ionic steps are in jobflow's {store!r} store (blob "
                               f"{uuid}), and no {store}.json is beside it: audit the store "
                               f"files together, or a document saved with its steps")
    ctx.uses(found[0])
    st = os.stat(found[0])
    key = (found[0], st.st_size, st.st_mtime_ns)
    if key not in _BLOBS:
        _BLOBS.clear()
        blobs = _load_json(found[0])
        _BLOBS[key] = {str(b.get("blob_uuid")): b.get("data") for b in
                       (blobs if isinstance(blobs, list) else []) if isinstance(b, dict)}
    if uuid not in _BLOBS[key]:
        raise InputError(path, f"its ionic steps are blob {uuid} of jobflow's {store!r} store, "
                               f"which {os.path.basename(found[0])} does not hold")
    return _BLOBS[key][uuid]


def _read_ase_doc(doc: dict, path: str, ctx: ReadContext):
    """The frames of an atomate2 ASE or force-field task document (see above), and what the
    document says of the run: a static (``input.steps`` <= 1) is a single point, ``state``
    "failed" an unfinished run, ``fix_symmetry`` a symmetry held by the constraint."""
    inp, out = doc.get("input") or {}, doc["output"]
    steps = out.get("ionic_steps")
    if isinstance(steps, dict) and "blob_uuid" in steps:
        steps = _blob(steps, path, ctx)
    name = doc.get("forcefield_name") or doc.get("ase_calculator_name")
    if not isinstance(steps, list) or not steps:
        raise InputError(path, f"an atomate2 task document ({name}) with no ionic steps (they "
                               f"are stored only when its maker's ionic_step_data names them)")
    ctx.title = str(doc.get("formula_pretty") or doc.get("_job") or "") or None
    limit = inp.get("steps")
    settings = {"code": "atomate2", "calculator": str(name),
                "settings_from": "the task document's input"}
    for key in ("steps", "relax_cell", "relax_shape"):
        if inp.get(key) is not None:
            settings[key] = inp[key]
    if inp.get("fix_symmetry"):
        prec = inp.get("symprec")
        settings["fix_symmetry"] = {"operations": None,
                                    "symprec": None if prec is None else float(prec)}
    if isinstance(limit, int) and limit <= 1:
        settings["calculation"] = (f"a single-point calculation (atomate2: input.steps = "
                                   f"{limit}): one structure, no ionic steps")
    elif doc.get("state") == "failed":
        ctx.unfinished = (f"stopped at its step limit (atomate2's task document: state 'failed', "
                          f"the ASE optimiser's steps = {limit})" if isinstance(limit, int) else
                          "stopped without converging (atomate2's task document: state "
                          "'failed')")
    ctx.settings.update(settings)
    for i, ion in enumerate(steps):
        item = (ion or {}).get("mol_or_struct", (ion or {}).get("structure"))
        if not isinstance(item, dict):
            raise InputError(path, f"ionic step {i} has no structure (its maker's "
                                   f"ionic_step_data left it out)")
        yield _step_frame(item, ion.get("energy"), ion, path, f"step {i}", i)


# ---------------------------------------------------------------- pymatgen Trajectory
def _array(value, path, what):
    """A float array from plain JSON or monty's numpy encoding (``{"@class": "array", "data"}``)."""
    if isinstance(value, dict) and value.get("@class") == "array":
        value = value.get("data")
    try:
        return np.array(value, float)
    except (TypeError, ValueError) as exc:
        raise InputError(path, f"{what} is not an array of numbers ({exc})") from None


def read_pmg_trajectory(path, ctx: ReadContext):
    """A pymatgen ``Trajectory`` saved as JSON (``Trajectory.as_dict``, monty's ``dumpfn``; as
    atomate2 writes ``traj_file_fmt="pmg"``): fractional ``coords`` per frame (or displacements
    from the frame before, ``coords_are_displacement``, from ``base_positions``), one ``lattice``
    or one per frame, ``frame_properties[]`` ``energy`` (eV) and ``forces`` (eV/Å). Its stress is
    not read: the class leaves its units to the writer."""
    from ase.data import atomic_numbers
    data = _load_json(path)
    if not isinstance(data, dict) or data.get("@class") != "Trajectory":
        raise InputError(path, "not a pymatgen Trajectory (a JSON object of @class Trajectory)")
    if data.get("lattice") is None:
        raise NotPeriodicError("a pymatgen Trajectory with no lattice (a molecule's)",
                               "nothing: driftwatch audits periodic cells", source=path)
    coords = _array(data.get("coords"), path, "coords")
    if coords.ndim != 3 or coords.shape[-1] != 3 or not len(coords):
        raise InputError(path, f"coords of shape {coords.shape}, not (frames, sites, 3)")
    if data.get("coords_are_displacement"):
        coords = _array(data.get("base_positions"), path, "base_positions") + \
            np.cumsum(coords, axis=0)
    lattice = _array(data["lattice"], path, "lattice")
    if lattice.shape == (3, 3):
        lattice = np.broadcast_to(lattice, (len(coords), 3, 3))
    if lattice.shape != (len(coords), 3, 3):
        raise InputError(path, f"lattice of shape {lattice.shape} for {len(coords)} frames")
    numbers = []
    for j, sp in enumerate(data.get("species") or []):
        el = sp.get("element") if isinstance(sp, dict) else sp
        el = "".join(c for c in str(el) if c.isalpha())       # "Fe2+" as pymatgen names a Species
        if atomic_numbers.get(el, 0) == 0:
            raise InputError(path, f"site {j}: species {str(sp)[:30]!r} is no element")
        numbers.append(atomic_numbers[el])
    if len(numbers) != coords.shape[1]:
        raise InputError(path, f"{len(numbers)} species for {coords.shape[1]} sites")
    props = data.get("frame_properties") or [{}] * len(coords)
    ctx.settings["code"] = "pymatgen"
    for i, (cell, frac) in enumerate(zip(lattice, coords)):
        p = props[i] if i < len(props) and isinstance(props[i], dict) else {}
        energy = p.get("energy", p.get("e_fr_energy"))
        try:
            energy = None if energy is None else float(energy)
            forces = None if p.get("forces") is None else _array(p["forces"], path, "forces")
        except (TypeError, ValueError) as exc:
            raise InputError(path, f"frame {i}: energy is not a number ({exc})") from None
        yield Frame(cell=np.array(cell), positions=frac @ cell, numbers=np.array(numbers, int),
                    pbc=np.ones(3, bool), step=i, energy=energy, forces=forces)
