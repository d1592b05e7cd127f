"""One run through the pipeline: frames -> invariants on every frame -> spglib on chosen frames -> record.

``analyze(path_or_run, config)`` returns the run record (schema ``driftwatch/run-2``, see
``docs/record.md``). The lattice invariants are computed for all frames in one vectorised call; spglib
runs only on the frames :func:`select_frames` picks.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Iterable

import numpy as np

from . import __version__, config as _config, geometry, lattice2d, lattice3d, records, rules, symmetry
from .adapters import Run, read_run
from .errors import GeometryError, LatticeError, SymmetryError

__all__ = ["analyze", "record_from_run", "symmetry_entry", "lattice_table", "select_frames",
           "symprec_grid", "structure_symprecs", "LAYER_TYPES", "BULK_TYPES"]

LAYER_TYPES = lattice2d.TYPES
BULK_TYPES = lattice3d.TYPES


def _as_lists(d: dict, i: int) -> dict:
    return {k: float(v[i]) for k, v in d.items()}


def lattice_table(run: Run, geo, metric: str = "l2") -> dict:
    """Invariants of every frame as arrays (n, ...). Layers use the in-plane 2D lattice; bulk the 3D cell."""
    if geo.dimension == 2:
        bases = geometry.inplane_bases(run.cells, geo.vacuum_axis)
        inv = lattice2d.invariants(bases, metric=metric)
        return {"dimension": 2, "bases": bases, "root_invariant": inv["root_invariant"],
                "sign": inv["sign"], "projected": inv["projected"], "distance": inv["distances"],
                "distance_projected": inv["distances_projected"], "deformation": inv["deformation"],
                "chiral_distance": inv["chiral_distance"]}
    inv = lattice3d.invariants(run.cells, metric=metric)
    return {"dimension": 3, "bases": run.cells, "root_products": inv["root_products"],
            "distance": inv["distance"], "deformation": inv["deformation"],
            "systems": inv["systems"]}


def select_frames(deformation: dict, sel: dict) -> list[int]:
    """Frames for spglib: first, last, every Nth, and where any deformation moved > on_change (Å)."""
    d = np.stack([np.asarray(v, float) for v in deformation.values()], axis=1)  # (n, types)
    n = d.shape[0]
    if sel["all_frames"]:
        return list(range(n))
    chosen = {0, n - 1}
    if sel["every"]:
        chosen.update(range(0, n, sel["every"]))
    last = d[0]
    for i in range(1, n):
        if i in chosen or np.max(np.abs(d[i] - last)) > sel["on_change"]:
            chosen.add(i)
            last = d[i]
    return sorted(chosen)


def symprec_grid(cfg: dict) -> list[float]:
    """Log-spaced symprec grid (Å) plus every symprec a rule or the report quotes, so those are exact."""
    s = cfg["symmetry"]
    grid = np.geomspace(s["symprec_min"], s["symprec_max"], s["grid_points"])
    half_step = 0.5 * np.log(grid[1] / grid[0])
    r = cfg["rules"]
    extra = [r["symprec_dependent"]["low"], r["symprec_dependent"]["high"],
             r["loose_symprec"]["symprec"], r["atoms_break_lattice"]["symprec"],
             *structure_symprecs(cfg)]
    out = list(grid)
    moved = set()
    for x in extra:
        if not s["symprec_min"] <= x <= s["symprec_max"]:
            continue
        i = int(np.argmin(np.abs(np.log(grid / x))))
        if abs(np.log(grid[i] / x)) < half_step and grid[i] not in (grid[0], grid[-1]) \
                and (i not in moved or out[i] == x):
            out[i] = x          # move the nearest interior grid point onto the quoted value
            moved.add(i)
        else:
            out.append(x)       # (a point already moved onto another quoted value stays there)
    return sorted({round(float(x), 12) for x in out})


def structure_symprecs(cfg: dict) -> list[float]:
    """The symprecs (Å) at which the structure's group is compared between frames: the verdict's
    ``rules.structure.symprec`` and every ``report.common_symprecs``."""
    return sorted({float(cfg["rules"]["structure"]["symprec"]), *map(float,
                   cfg["report"]["common_symprecs"])})


def _group_entries(run: Run, geo, cfg: dict, frames: list[dict], chosen: list[int]) -> int:
    """spglib's group at :func:`structure_symprecs` on the chosen frames, each compared with the
    first frame's (``symmetry.relation``); then, for each of those symprecs, the frame from which the
    final group holds is located by bisection over the frames between the last checked frame with
    another group and the first with the final one (one change between them is assumed; the record
    says which frames were checked). Adds ``structure`` to those frames; returns frames probed."""
    sym = cfg["symmetry"]
    precs = structure_symprecs(cfg)
    cache: dict = {}

    def groups(i):
        if i not in cache:
            cache[i] = [symmetry.group_at(run.cells[i], run.positions[i], run.numbers, s,
                                          angle_tolerance=sym["angle_tolerance"],
                                          vacuum_axis=geo.vacuum_axis) for s in precs]
            first = groups(0) if i else cache[i]
            frames[i]["structure"] = {
                "symprec": precs, "group": [g["group"] for g in cache[i]],
                "symbol": [g["symbol"] for g in cache[i]],
                "operations": [g["operations"] for g in cache[i]],
                "relation": [symmetry.relation(a, b) for a, b in zip(first, cache[i])]}
        return cache[i]

    key = lambda g: (g["group"], g["operations"])
    for i in sorted(set(chosen) | {0}):
        groups(i)
    last = max(chosen)
    for j in range(len(precs)):
        final = key(groups(last)[j])
        checked = sorted(cache)
        hi = last
        for k in reversed([c for c in checked if c < last]):
            if key(groups(k)[j]) != final:
                break
            hi = k
        lo = max([c for c in checked if c < hi], default=None)
        while lo is not None and hi - lo > 1:
            mid = (lo + hi) // 2
            if key(groups(mid)[j]) == final:
                hi = mid
            else:
                lo = mid
    return len(cache)


def _primitive_entry(run: Run, geo, cfg: dict, i: int) -> dict | None:
    """Bravais type of the structure's translation lattice at ``rules.atoms_break_lattice.symprec``
    (the cell's lattice plus spglib's pure translations), for the atoms-break-lattice rule."""
    r = cfg["rules"]["atoms_break_lattice"]
    try:
        prim = symmetry.primitive_lattice(run.cells[i], run.positions[i], run.numbers, r["symprec"],
                                          angle_tolerance=cfg["symmetry"]["angle_tolerance"],
                                          vacuum_axis=geo.vacuum_axis)
    except (SymmetryError, GeometryError, LatticeError):
        return None
    if geo.dimension == 2:
        dfm = lattice2d.deformation(geometry.inplane_bases(prim[None], 2)[0],
                                    metric=cfg["lattice"]["metric"])
        types, low = lattice2d.TYPES, "mp"
    else:
        dfm = lattice3d.deformation(prim, metric=cfg["lattice"]["metric"])
        types, low = lattice3d.TYPES, "aP"
    dfm = {t: float(dfm[t]) for t in types}
    held = [t for t in types if dfm[t] <= r["within"]]
    t = max(held, key=lambda x: (rules.ORDER[x], -dfm[x])) if held else low
    return {"symprec": r["symprec"], "type": t, "deformation": dfm.get(t, 0.0)}


def _versions() -> dict:
    """What the record says produced it: driftwatch, spglib and its error mode. Not spglib's
    failure counter (``symmetry.versions()["failures_seen"]``): it counts the whole process, so a
    record holding it would depend on what ran earlier in the same process."""
    v = {k: x for k, x in symmetry.versions().items() if k != "failures_seen"}
    return {"driftwatch": __version__, **v}


def _fixed_cell(cells: np.ndarray) -> bool:
    scale = max(float(np.abs(cells[0]).max()), 1.0)
    return bool(np.all(np.abs(cells - cells[0]) <= 1e-9 * scale))


def _frame_entries(run: Run, table: dict) -> list[dict]:
    n = len(run.cells)
    forces = run.forces
    fmax = None if forces is None else np.sqrt((np.asarray(forces) ** 2).sum(-1)).max(-1)
    out = []
    for i in range(n):
        f = {"index": i, "step": int(run.steps[i]),
             "energy": None if run.energies is None else float(run.energies[i]),
             "fmax": None if fmax is None else float(fmax[i])}
        if table["dimension"] == 2:
            f["root_invariant"] = [float(x) for x in table["root_invariant"][i]]
            f["sign"] = int(table["sign"][i])
            f["projected"] = [float(x) for x in table["projected"][i]]
            f["distance"] = _as_lists(table["distance"], i)
            f["distance_projected"] = _as_lists(table["distance_projected"], i)
            f["deformation"] = _as_lists(table["deformation"], i)
            f["chiral_distance"] = float(table["chiral_distance"][i])
        else:
            f["root_products"] = [float(x) for x in table["root_products"][i]]
            f["distance"] = _as_lists(table["distance"], i)
            f["deformation"] = _as_lists(table["deformation"], i)
            f["systems"] = _as_lists(table["systems"], i)
        out.append(f)
    return out


def symmetry_entry(run: Run, i: int, geo, cfg: dict, grid: list[float] | None = None) -> dict:
    """spglib's tolerance spectrum of frame ``i`` plus the displacement to each group it saw."""
    grid = symprec_grid(cfg) if grid is None else grid
    s = cfg["symmetry"]
    spec = symmetry.spectrum(run.cells[i], run.positions[i], run.numbers, symprecs=grid,
                             angle_tolerance=s["angle_tolerance"], vacuum_axis=geo.vacuum_axis,
                             bisect=s["bisect"], precision=s["precision"])
    spec["displacement"] = symmetry.drift_table(run.cells[i], run.positions[i], run.numbers, spec,
                                                vacuum_axis=geo.vacuum_axis)
    return spec


def record_from_run(run: Run, cfg: dict, *, geo=None, frames: Iterable[int] | None = None,
                    spectra: dict | None = None, skip_newest: bool = False,
                    complete: bool = True) -> dict:
    """The record of an already read run.

    Args:
        run: the frames. cfg: a loaded config. geo: geometry (default: classified from the run).
        frames: spglib on exactly these frame indices (default: :func:`select_frames`).
        spectra: a cache {frame index: symmetry entry}; entries found are reused, new ones are added
            (the live tracker keeps it across growing runs).
        skip_newest: leave the last frame out of the default selection (a live step not yet final).
        complete: False for a run still going (live): a change counts only once it held for
            ``rules.persistence.steps`` steps (see :mod:`driftwatch.rules`).
    """
    t0 = time.perf_counter()
    if geo is None:
        geo = geometry.classify(run.cells, run.pbc, run.positions, gap=cfg["geometry"]["vacuum_gap"])
    if cfg["geometry"]["require_layer"] and geo.dimension != 2:
        raise GeometryError(f"{run.source}: not a layer ({geo.reason}); this config requires one")
    table = lattice_table(run, geo, cfg["lattice"]["metric"])
    entries = _frame_entries(run, table)
    if odd := geometry.position_warnings(run.cells, run.positions, run.pbc, run.steps):
        run = dataclasses.replace(run, warnings=(*run.warnings, *(f"{run.source}: {w}"
                                                                  for w in odd)))
    t1 = time.perf_counter()
    if frames is not None:
        chosen = sorted(set(frames))
    else:
        chosen = select_frames(table["deformation"], cfg["selection"])
        if skip_newest and len(entries) > 1:
            chosen = [i for i in chosen if i < len(entries) - 1]
    grid = symprec_grid(cfg)
    spectra = {} if spectra is None else spectra
    calls = computed = 0
    for i in chosen:
        if i not in spectra:
            spectra[i] = symmetry_entry(run, i, geo, cfg, grid)
            calls += int(spectra[i].pop("calls", 0) or 0)  # process-state dependent: timing only
            computed += 1
        entries[i]["symmetry"] = spectra[i]
    probed = _group_entries(run, geo, cfg, entries, chosen) if chosen else 0
    last = max(chosen) if chosen else None
    if last is not None and "symmetry" in entries[last]:
        entries[last]["symmetry"] = dict(entries[last]["symmetry"],   # the cached spectrum stays
                                         primitive=_primitive_entry(run, geo, cfg, last))
    t2 = time.perf_counter()
    record = records.new_record(run, geo, cfg, entries, fixed_cell=_fixed_cell(run.cells),
                                versions=_versions())
    record["flags"], record["summary"] = rules.judge(record, cfg, complete=complete)
    record["timing"] = {"invariants_s": t1 - t0, "symmetry_s": t2 - t1,
                        "total_s": time.perf_counter() - t0, "spglib_frames": len(chosen),
                        "spglib_frames_computed": computed, "spglib_calls": calls,
                        "group_frames": probed}
    return record


def analyze(path_or_run, config=None, *, format: str | None = None,
            frames: Iterable[int] | None = None, complete: bool = True) -> dict:
    """Analyse one run and return its record (schema ``driftwatch/run-2``).

    Args:
        path_or_run: a file, a run folder, or a :class:`~driftwatch.adapters.Run`.
        config: preset name, YAML path, mapping, or an already loaded config (None: default).
        format: adapter name, overriding detection.
        frames: analyse spglib on exactly these frame indices (default: the config's selection).
        complete: False judges the frames as a run still going: a change counts only once it held
            for ``rules.persistence.steps`` steps (what the live tools do).
    """
    cfg = _config.coerce(config)
    run = path_or_run if isinstance(path_or_run, Run) else read_run(
        path_or_run, format=format, structure_keys=cfg["inputs"]["structure_keys"])
    try:
        return record_from_run(run, cfg, frames=frames, complete=complete)
    except (GeometryError, LatticeError, SymmetryError) as exc:
        if str(run.source) in str(exc):
            raise
        raise type(exc)(f"{run.source}: {exc}") from exc
