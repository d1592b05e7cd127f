"""One run through the pipeline: frames -> invariants on every frame -> spglib where the answer needs it
-> record.

``analyze(path_or_run, config)`` returns the run record (schema ``driftwatch/run-2``, see
``docs/record.md``). The lattice invariants are computed for all frames in one vectorised call. spglib
is asked only what the record's answer reads:

* a tolerance spectrum (the symprec grid, structure and lattice alone) on the first and last frames
  (:func:`spectrum_frames`; every Nth with ``selection.every``, all with ``selection.all_frames``),
  with the structure's breakpoints bracketed on the last frame only (the tolerance advice reads them);
* the structure's group at :func:`structure_symprecs` on the first and last frames, and, where the two
  differ at the verdict's symprec, the frame from which the final group holds: the frames
  :func:`select_frames` picks (first, last, where the lattice moved) are scanned back from the last,
  then the frames between are bisected (:func:`_group_entries`).
"""

from __future__ import annotations

import dataclasses
import functools
import time
from collections.abc import Iterable

import numpy as np

from . import __version__, config as _config, geometry, lattice2d, lattice3d, records, rules, symmetry
from .adapters import Run, read_run
from .errors import GeometryError, InputError, LatticeError, NotPeriodicError, SymmetryError

__all__ = ["analyze", "record_from_run", "in_layer_basis", "classified", "symmetry_entry",
           "lattice_table", "select_frames", "spectrum_frames", "symprec_grid",
           "structure_symprecs", "FrameTable", "LAYER_TYPES", "BULK_TYPES"]

frame_progress = None
"""``callable(done, total)`` or None: told after each frame whose tolerance spectrum was computed
(the in-process audit shows a long run's progress with it)."""

LAYER_TYPES = lattice2d.TYPES
BULK_TYPES = lattice3d.TYPES


def lattice_table(run: Run, geo, metric: str = "l2", start: int = 0) -> dict:
    """Invariants of frames ``start:`` as arrays (n, ...). Layers use the in-plane 2D lattice; bulk
    the 3D cell. Each frame's values do not depend on the other frames computed with it."""
    cells = run.cells[start:]
    if geo.dimension == 2:
        bases = geometry.inplane_bases(cells, geo.vacuum_axis)
        inv = lattice2d.invariants(bases, metric=metric)
        return {"dimension": 2, "bases": bases, "root_invariant": inv["root_invariant"],
                "sign": inv["sign"], "projected": inv["projected"], "distance": inv["distances"],
                "distance_projected": inv["distances_projected"], "deformation": inv["deformation"],
                "chiral_distance": inv["chiral_distance"]}
    inv = lattice3d.invariants(cells, metric=metric)
    return {"dimension": 3, "bases": cells, "root_products": inv["root_products"],
            "distance": inv["distance"], "deformation": inv["deformation"],
            "systems": inv["systems"]}


def select_frames(deformation, sel: dict) -> list[int]:
    """Frames the search for the group's change starts from: first, last, every Nth, and where any
    deformation moved > on_change (Å) since the last one picked (all with ``all_frames``).
    ``deformation``: {type: (n,)} or the (n, types) array."""
    d = deformation if isinstance(deformation, np.ndarray) else \
        np.stack([np.asarray(v, float) for v in deformation.values()], axis=1)  # (n, types)
    n = d.shape[0]
    if sel["all_frames"]:
        return list(range(n))
    forced = {0, n - 1}
    if sel["every"]:
        forced.update(range(0, n, sel["every"]))
    forced = sorted(forced)
    chosen, j = [0], 0
    while j < n - 1:         # the next frame forced or moved beyond on_change since frame j
        nxt = forced[np.searchsorted(forced, j, side="right")]
        moved = np.flatnonzero(np.max(np.abs(d[j + 1:nxt] - d[j]), axis=1) > sel["on_change"]) \
            if nxt > j + 1 else ()
        j = j + 1 + int(moved[0]) if len(moved) else nxt
        chosen.append(j)
    return chosen


def spectrum_frames(n: int, sel: dict) -> list[int]:
    """Frames that get a tolerance spectrum: the first and last, every Nth (``every``), or all
    (``all_frames``)."""
    if sel["all_frames"]:
        return list(range(n))
    chosen = {0, n - 1}
    if sel["every"]:
        chosen.update(range(0, n, sel["every"]))
    return sorted(chosen)


def symprec_grid(cfg: dict) -> list[float]:
    """Log-spaced symprec grid (Å) plus every symprec a rule or the report quotes, so those are exact."""
    s, r = cfg["symmetry"], cfg["rules"]
    extra = (r["symprec_dependent"]["low"], r["symprec_dependent"]["high"],
             r["loose_symprec"]["symprec"], r["atoms_break_lattice"]["symprec"],
             *structure_symprecs(cfg))
    return list(_grid(float(s["symprec_min"]), float(s["symprec_max"]), int(s["grid_points"]),
                      tuple(float(x) for x in extra)))


@functools.lru_cache(maxsize=64)
def _grid(lo: float, hi: float, points: int, extra: tuple) -> tuple:
    """The grid of :func:`symprec_grid` (memoised: the live tracker asks for it every step)."""
    grid = np.geomspace(lo, hi, points)
    half_step = 0.5 * np.log(grid[1] / grid[0])
    out = list(grid)
    moved = set()
    for x in extra:
        if not lo <= x <= hi:
            continue
        i = int(np.argmin(np.abs(np.log(grid / x))))
        if abs(np.log(grid[i] / x)) < half_step and grid[i] not in (grid[0], grid[-1]) \
                and (i not in moved or out[i] == x):
            out[i] = x          # move the nearest interior grid point onto the quoted value
            moved.add(i)
        else:
            out.append(x)       # (a point already moved onto another quoted value stays there)
    return tuple(sorted({round(float(x), 12) for x in out}))


def structure_symprecs(cfg: dict) -> list[float]:
    """The symprecs (Å) at which the structure's group is compared between frames: the verdict's
    ``rules.structure.symprec`` and every ``report.common_symprecs``."""
    return sorted({float(cfg["rules"]["structure"]["symprec"]), *map(float,
                   cfg["report"]["common_symprecs"])})


def _group_at(run: Run, geo, cfg: dict, i: int, s: float, known: dict) -> dict:
    """spglib's group of frame ``i`` at symprec ``s`` (``symmetry.group_at``), kept in ``known``."""
    if (i, s) not in known:
        known[(i, s)] = symmetry.group_at(run.cells[i], run.positions[i], run.symmetry_types, s,
                                          angle_tolerance=cfg["symmetry"]["angle_tolerance"],
                                          vacuum_axis=geo.vacuum_axis)
    return known[(i, s)]


def _group_entries(run: Run, geo, cfg: dict, frames: list[dict], seeds: list[int],
                   search_at: list[float], known: dict | None = None, also=(),
                   persist: int | None = None) -> int:
    """spglib's group at :func:`structure_symprecs` on the first frame and the last seed, and, at
    each symprec of ``search_at`` where the two groups are not the same (``symmetry.relation``),
    the frame from which the final group holds: the seeds are scanned back from the last until one
    has another group, then the frames between it and the next seed are bisected (one change
    between them is assumed; the record says which frames were checked). Only what this asks is
    computed: a frame probed at one symprec carries that symprec alone in its ``structure`` entry.
    ``known``: {(frame, symprec): group} answers to reuse and extend (the live tracker keeps it).
    ``also``: frames asked at the verdict's symprec too (those with a tolerance spectrum, for the
    per-step tables: spglib's answer is the spectrum's). ``persist`` (a run still going): every
    frame of the last ``persist`` steps is asked too, so that a change counts as held only where
    spglib saw it hold (frames a poll brought together are never assumed). Returns the number of
    frames asked."""
    precs = structure_symprecs(cfg)
    known = {} if known is None else known
    asked: dict[int, set] = {}

    def group(i, s):
        asked.setdefault(i, set()).add(s)
        return _group_at(run, geo, cfg, i, s, known)

    for i in also:
        group(i, float(cfg["rules"]["structure"]["symprec"]))

    def relation(i, s):                 # to the first frame's group, kept with the groups
        if (i, s, "relation") not in known:
            known[(i, s, "relation")] = symmetry.relation(group(0, s), group(i, s))
        return known[(i, s, "relation")]

    key = lambda g: (g["group"], g["operations"])
    seeds = sorted(set(seeds) | {0})
    last = seeds[-1]
    for s in precs:
        group(0, s), group(last, s)

    def bisect(lo, hi, s, final):       # lo has another group than final, hi has final's
        while hi - lo > 1:
            mid = (lo + hi) // 2
            if key(group(mid, s)) == key(final):
                hi = mid
            else:
                lo = mid
        return hi

    for s in search_at:
        final = group(last, s)
        if relation(last, s) == "same":
            continue                # kept at s: there is no step to locate
        hi, lo = last, None
        for k in reversed(seeds[:-1]):
            if key(group(k, s)) != key(final):
                lo = k
                break
            hi = k
        if lo is not None:
            hi = bisect(lo, hi, s, final)
        hi = _went_and_came_back(frames, geo, final, hi, last, seeds,
                                 lambda k: key(group(k, s)) != key(final),
                                 lambda lo, hi: bisect(lo, hi, s, final),
                                 max(RECHECKS, RECHECK_COST // max(
                                     run.natoms * int(final["operations"] or 1), 1)))
        k = last - 1                    # live: the persistence window, frame by frame
        while persist is not None and k > hi and run.steps[last] - run.steps[k] + 1 <= persist:
            if key(group(k, s)) != key(final):
                break
            k -= 1
    for i, ss in asked.items():
        ss = sorted(ss)
        gs = [known[(i, s)] for s in ss]
        frames[i]["structure"] = {
            "symprec": ss, "group": [g["group"] for g in gs], "symbol": [g["symbol"] for g in gs],
            "operations": [g["operations"] for g in gs],
            "relation": [relation(i, s) for s in ss]}
    return len(asked)


RECHECKS = 8
"""The most frames after a located group change that :func:`_went_and_came_back` asks spglib about,
per symprec searched, unless they are cheap (:data:`RECHECK_COST`)."""
RECHECK_COST = 1000
"""Frames whose spglib call is cheap are asked up to this many atoms x final group's operations
(in the cell) x frames: spglib's cost grows with both (a two-atom P-1 cell: 250 frames; one atom
of Fm-3m: 20; a 48-atom cell: 8, :data:`RECHECKS`). Counted, not timed: records do not depend on
the machine."""


def _went_and_came_back(frames, geo, final: dict, hi: int, last: int, seeds, other, bisect,
                        most: int = RECHECKS) -> int:
    """``hi``, the first frame from which the final group holds, moved later where the group left
    and came back between two checked frames: spglib is asked on the frames after ``hi`` where the
    lattice moved away from the final group's Bravais type again (its deformation more than 10 %
    above the one at ``hi``), or on all of them when they are ``most`` or fewer (at most that many
    in all); one that has another group (``other(k)``) is bisected to the next checked frame
    (``bisect(k, next)``). Beyond that, a group that leaves while the lattice does not move is
    still not seen (the record's ``checked_after`` says so)."""
    t = rules.bravais_of_group(final["group"], final["symbol"], geo.dimension)
    dfm = [float((f.get("deformation") or {}).get(t, 0.0)) for f in frames] if t else None
    seeds = set(seeds)
    few = sum(j not in seeds for j in range(hi + 1, last)) <= most
    k, asked = hi + 1, 0
    while k < last and asked < most:
        if k not in seeds and (few or (dfm is not None and dfm[k] > 1.1 * dfm[hi])):
            asked += 1
            if other(k):
                hi = bisect(k, min((j for j in seeds if j > k), default=last))
                k = hi
        k += 1
    return hi


def _primitive_entry(run: Run, geo, cfg: dict, i: int) -> dict | None:
    """Bravais type of the structure's translation lattice at ``rules.atoms_break_lattice.symprec``
    (the cell's lattice plus spglib's pure translations), for the atoms-break-lattice rule, and
    ``multiplicity``: how many primitive cells of that lattice the cell holds (1: no pure
    translation)."""
    r = cfg["rules"]["atoms_break_lattice"]
    try:
        prim = symmetry.primitive_lattice(run.cells[i], run.positions[i], run.symmetry_types,
                                          r["symprec"],
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

    def most_specific(within):
        held = [t for t in types if dfm[t] <= within]
        return max(held, key=lambda x: (rules.ORDER[x], -dfm[x])) if held else low
    t = most_specific(r["within"])
    cells = abs(np.linalg.det(run.cells[i])) / abs(np.linalg.det(prim))   # primitive cells in it
    return {"symprec": r["symprec"], "type": t, "deformation": dfm.get(t, 0.0),
            "multiplicity": int(round(cells)),
            "lattice_type": most_specific(cfg["rules"]["lattice"]["within"])}


def _versions() -> dict:
    """What the record says produced it: driftwatch and spglib. Not spglib's failure counter nor
    its error mode (``symmetry.versions()``): both are the whole process's (ASE's FixSymmetry
    switches the mode for good), so a record holding them would depend on what ran earlier in the
    same process, while the answers do not (``symmetry`` reads both modes alike)."""
    v = {k: x for k, x in symmetry.versions().items()
         if k not in ("failures_seen", "error_mode_now")}
    return {"driftwatch": __version__, **v}


def _fixed_cell(cells: np.ndarray) -> bool:
    scale = max(float(np.abs(cells[0]).max()), 1.0)
    return bool(np.all(np.abs(cells - cells[0]) <= 1e-9 * scale))


def _frame_entries(run: Run, table: dict, start: int = 0) -> list[dict]:
    """Per-frame record entries of frames ``start:`` (``table`` holds those frames)."""
    n = len(run.cells)
    forces = run.forces
    fmax = None if forces is None else np.sqrt((np.asarray(forces[start:]) ** 2).sum(-1)).max(-1)
    steps = run.steps[start:].tolist()
    finite = lambda a: [x if np.isfinite(x) else None for x in np.asarray(a, float).tolist()]
    energies = None if run.energies is None else finite(run.energies[start:])   # None: not printed
    fmax = None if fmax is None else finite(fmax)
    cols = lambda d: {k: np.asarray(v, float).tolist() for k, v in d.items()}  # Python floats
    dim = table["dimension"]
    if dim == 2:
        ri, pr = table["root_invariant"].tolist(), table["projected"].tolist()
        sign, chiral = table["sign"].tolist(), np.asarray(table["chiral_distance"], float).tolist()
        dist, dproj = cols(table["distance"]), cols(table["distance_projected"])
    else:
        rp, dist, systems = table["root_products"].tolist(), cols(table["distance"]), \
            cols(table["systems"])
    dfm = cols(table["deformation"])
    out = []
    for j in range(n - start):
        f = {"index": start + j, "step": int(steps[j]),
             "energy": None if energies is None else energies[j],
             "fmax": None if fmax is None else fmax[j]}
        if dim == 2:
            f["root_invariant"] = ri[j]
            f["sign"] = int(sign[j])
            f["projected"] = pr[j]
            f["distance"] = {k: v[j] for k, v in dist.items()}
            f["distance_projected"] = {k: v[j] for k, v in dproj.items()}
            f["deformation"] = {k: v[j] for k, v in dfm.items()}
            f["chiral_distance"] = chiral[j]
        else:
            f["root_products"] = rp[j]
            f["distance"] = {k: v[j] for k, v in dist.items()}
            f["deformation"] = {k: v[j] for k, v in dfm.items()}
            f["systems"] = {k: v[j] for k, v in systems.items()}
        out.append(f)
    return out


class FrameTable:
    """The per-frame entries of a growing run (index, step, energy, fmax and the invariants), each
    frame computed once: what the live tracker keeps between records. ``truncate(k)`` forgets the
    frames from ``k`` on (they changed); ``update`` computes the frames not held yet in one call.
    ``add_deformation`` gives new bulk frames only what the lattice flags read (step and
    deformation: one reduction and the 13 deformations, no distances or canonical form); the next
    ``update`` completes those frames in one batch (the same values: a frame alone equals the
    frame in a batch, bit for bit)."""

    def __init__(self):
        self.entries: list[dict] = []
        self.matrix = np.zeros((0, 0))        # (frames, types) deformation (Å), columns ``types``
        self.types: tuple[str, ...] = ()
        self.complete = 0                     # entries[:complete] have every invariant
        self._key = None

    @property
    def deformation(self) -> dict[str, np.ndarray]:
        """{type: (n,)} the deformation series (views of ``matrix``)."""
        return {t: self.matrix[:, j] for j, t in enumerate(self.types)}

    def truncate(self, k: int) -> None:
        if k < len(self.entries):
            self.entries = self.entries[:k]
            self.matrix = self.matrix[:k]
            self.complete = min(self.complete, k)

    def _setting(self, key: tuple, n: int) -> None:
        """Entries are kept for one (dimension, vacuum axis, metric) and ``n`` frames."""
        if key != self._key:
            self.entries, self.matrix, self.complete, self._key = [], np.zeros((0, 0)), 0, key
        self.truncate(n)

    def update(self, run: Run, geo, metric: str) -> None:
        n = len(run.cells)
        self._setting((geo.dimension, geo.vacuum_axis, metric), n)
        start = self.complete
        if start >= n:
            return
        table = lattice_table(run, geo, metric, start)
        self.entries[start:] = _frame_entries(run, table, start)
        self._append(table["deformation"], start)
        self.complete = n

    def add_deformation(self, frames, metric: str) -> None:
        """Index, step and deformation of the bulk frames (objects with ``cell`` and ``step``,
        all frames so far) after those held."""
        self._setting((3, None, metric), len(frames))
        start = len(self.entries)
        if start >= len(frames):
            return
        new = frames[start:]
        dfm, size = lattice3d.deformation_and_size(np.array([f.cell for f in new], float),
                                                   metric=metric)
        cols = {t: np.asarray(v, float).tolist() for t, v in dfm.items()}
        self.entries += [{"index": start + j, "step": int(f.step), "size": float(size[j]),
                          "deformation": {t: v[j] for t, v in cols.items()}}
                         for j, f in enumerate(new)]
        self._append(dfm, start)

    def _append(self, deformation: dict, start: int) -> None:
        """Rows ``start:`` of the deformation matrix."""
        self.types = tuple(deformation)
        new = np.stack([np.asarray(v, float) for v in deformation.values()], axis=1)
        self.matrix = np.concatenate([self.matrix[:start], new]) if start else new


def symmetry_entry(run: Run, i: int, geo, cfg: dict, grid: list[float] | None = None,
                   brackets: str | None = "all", start: int | None = None) -> dict:
    """spglib's tolerance spectrum of frame ``i`` plus the displacement to each group it saw (and,
    with ``start``, that frame's displacement to the same instances of those groups).

    ``brackets`` (when ``symmetry.bisect`` is on): ``"all"`` brackets every breakpoint, of the
    structure and of the lattice alone (``driftwatch tolerance``); ``"group"`` the structure's only
    (what the record asks on its last frame: the tolerance advice reads them); None, none (the
    record's other frames: nothing reads their brackets)."""
    grid = symprec_grid(cfg) if grid is None else grid
    s = cfg["symmetry"]
    spec = symmetry.spectrum(run.cells[i], run.positions[i], run.symmetry_types, symprecs=grid,
                             angle_tolerance=s["angle_tolerance"], vacuum_axis=geo.vacuum_axis,
                             bisect=bool(s["bisect"] and brackets), precision=s["precision"],
                             lattice_bisect=bool(s["bisect"] and brackets == "all"),
                             floor=2.0 * (run.position_precision or 0.0))
    spec["displacement"] = symmetry.drift_table(
        run.cells[i], run.positions[i], run.symmetry_types, spec, vacuum_axis=geo.vacuum_axis,
        start=None if start is None else (run.cells[start], run.positions[start]))
    return spec


def angle_check_entry(run: Run, geo, cfg: dict, i: int, spec: dict) -> dict | None:
    """spglib at the tolerance advice's symprec for frame ``i`` with the other common
    angle_tolerance (:func:`symmetry.angle_check`: pymatgen's 5 degrees against spglib's -1), which
    the advice then says when the group differs; None with no suggested symprec."""
    adv = rules.advice(spec, min_plateau=cfg["tolerance"]["min_plateau"],
                       precision=run.position_precision)
    rec, plateau = adv["recommended_symprec"], adv["plateau"]
    if rec is None:
        return None
    try:
        return symmetry.angle_check(run.cells[i], run.positions[i], run.symmetry_types, rec,
                                    angle_tolerance=cfg["symmetry"]["angle_tolerance"],
                                    vacuum_axis=geo.vacuum_axis,
                                    expect=(plateau["group"], plateau["operations"]))
    except (SymmetryError, GeometryError, LatticeError):
        return None


RISING_STEPS = 3
"""Steps: a fixed-cell relaxation whose energy rose at each of at least this many last steps ..."""
RISING_PER_ATOM = 0.05
"""eV per moving atom: ... by this much in all is said as one that diverged (a relaxation in a
fixed cell only lowers its energy; an optimiser's uphill step is one step and meV; common
practice)."""
ENERGY_JUMP = 1.0
"""eV per atom (per moving atom when the code's constraints hold some): how far above the lowest
energy it reached a relaxation may end before that is said as a likely blow-up (a relaxation's
energy changes by meV to 0.1 eV/atom a step; common practice)."""


def _energy_jumps(run: Run) -> list[str]:
    """A relaxation whose last stage looks like one that blew up, said: it ends more than
    :data:`ENERGY_JUMP` per moving atom above the lowest energy it reached, or (a fixed cell, whose
    energy a relaxation only lowers) its energy rose at each of its last :data:`RISING_STEPS` or
    more steps by :data:`RISING_PER_ATOM` per moving atom in all. Its final frames, and a verdict
    read from them, may be a broken run's. (Earlier stages may differ in functional or cutoff, so
    only the last is compared; an uphill step the run recovered from is not said; a run its code
    says converged is not asked; atoms the code's constraints hold in every direction,
    ``fixed_atoms``, do not dilute the rise.)"""
    e = run.energies
    if e is None or run.not_relaxation or len(e) < 2 or run.kind == "end-points" or \
            run.code_settings.get("converged"):
        return []
    first = int(run.stages[-1]["first_frame"]) if run.stages else 0
    e = np.asarray(e[first:], float)
    if len(e) < 2 or not np.isfinite(e[-1]) or not np.isfinite(e[:-1]).any():
        return []
    moving = max(run.natoms - int(run.code_settings.get("fixed_atoms") or 0), 1)
    per = "moving atom" if moving < run.natoms else "atom"
    k = int(np.nanargmin(e[:-1]))
    rise = (e[-1] - e[k]) / moving
    check = "a too long ionic step, a broken SCF"
    if rise > ENERGY_JUMP:
        return [f"the energy ends {rise * moving:.4g} eV ({rise:.3g} eV/{per}) above the lowest it "
                f"reached (step {int(run.steps[first + k])}): a relaxation that blew up ({check})? "
                f"Its final frames, and a verdict read from them, describe that; check the run"]
    up = np.diff(e) > 0
    n = len(up) - int(np.flatnonzero(~up)[-1]) - 1 if not up.all() else len(up)  # last rises
    cells = run.cells[first:]
    fixed = bool(np.abs(cells - cells[0]).max() <= 1e-9 * np.abs(cells[0]).max())
    if fixed and n >= RISING_STEPS and (e[-1] - e[-1 - n]) / moving > RISING_PER_ATOM:
        return [f"the energy rose at each of the last {n} steps, {e[-1] - e[-1 - n]:.4g} eV in all "
                f"({(e[-1] - e[-1 - n]) / moving:.3g} eV/{per}), in a fixed cell, where a "
                f"relaxation only lowers it: a relaxation that diverged ({check})? Its final "
                f"frames, and a verdict read from them, describe that; check the run"]
    return []


def in_layer_basis(run: Run, gap: float, found=None) -> tuple[Run, tuple | None]:
    """``(run, found)``: the run read in the basis :func:`geometry.layer_basis` finds on its first
    frame (``found``: that answer, given when already known, as the live tracker keeps it), with a
    warning saying so, or the run as it is. Cartesian positions are kept: the same structure."""
    if found is None:
        if not np.all(run.pbc):
            return run, None
        found = geometry.layer_basis(run.cells[0], run.positions[0], gap)
        if found is None:
            return run, None
    M, vacuum, side = found
    note = (f"{run.source}: no two of the cell's vectors lie in the planes of the atoms' "
            f"{vacuum:.2f} Å empty gap (> geometry.vacuum_gap {gap:g} Å: a layer's vacuum, "
            f"written in a centred lattice's primitive vectors?): the frames are read in the basis "
            f"{np.asarray(M).tolist()} of the file's vectors (an integer change of basis, "
            f"determinant 1), whose first two lie in those planes, the layer seen from the side "
            + (f"the file's vector {'abc'[side]} points to" if side is not None else
               "of the Cartesian axis nearest its normal (the file's vectors reach as far out on "
               "both sides)") + ", the atoms where the file puts them")
    cells = np.einsum("ij,njk->nik", np.asarray(M, float), run.cells)
    return dataclasses.replace(run, cells=cells, warnings=(*run.warnings, note)), found


def classified(run: Run, cfg: dict) -> tuple[Run, geometry.Geometry]:
    """``(run, geometry)``: the run read in a basis that shows a layer's vacuum where its own
    vectors hide it (:func:`in_layer_basis`), and layer or bulk (:func:`geometry.classify`)."""
    gap = cfg["geometry"]["vacuum_gap"]
    run, _ = in_layer_basis(run, gap)
    return run, geometry.classify(run.cells, run.pbc, run.positions, gap=gap)


def record_from_run(run: Run, cfg: dict, *, geo=None, frames: Iterable[int] | None = None,
                    spectra: dict | None = None, groups: dict | None = None,
                    table: FrameTable | None = None, skip_newest: bool = False,
                    complete: bool = True) -> dict:
    """The record of an already read run.

    Args:
        run: the frames. cfg: a loaded config. geo: geometry (default: classified from the run).
        frames: tolerance spectra on exactly these frame indices, and the group's change searched
            from them (default: :func:`spectrum_frames` and :func:`select_frames`).
        spectra: a cache {(frame index, bracketed): symmetry entry}; groups: a cache {(frame
            index, symprec): group}; table: a :class:`FrameTable`. Entries found are reused, new
            ones are added (the live tracker keeps them across growing runs).
        skip_newest: a live record between the steps spglib is asked about: no tolerance spectra,
            and the structure level judged up to the newest frame where the lattice moved.
        complete: False for a run still going (live): a change counts only once it held for
            ``rules.persistence.steps`` steps (see :mod:`driftwatch.rules`), so the step of the
            change is located at every structure symprec, not only at the verdict's.
    """
    t0 = time.perf_counter()
    if geo is None:
        run, geo = classified(run, cfg)
    if cfg["geometry"]["require_layer"] and geo.dimension != 2:
        raise GeometryError(f"{run.source}: not a layer ({geo.reason}); this config requires one")
    if table is None:
        table = FrameTable()
    table.update(run, geo, cfg["lattice"]["metric"])
    entries = [dict(e) for e in table.entries]
    n = len(entries)
    odd = [] if skip_newest else geometry.position_warnings(run.cells, run.positions, run.pbc,
                                                            run.steps) + _energy_jumps(run)
    if odd:
        run = dataclasses.replace(run, warnings=(*run.warnings, *(f"{run.source}: {w}"
                                                                  for w in odd)))
    t1 = time.perf_counter()
    if frames is not None:
        seeds = sorted(set(frames))
        with_spectrum = seeds
    else:
        seeds = select_frames(table.matrix, cfg["selection"])
        with_spectrum = spectrum_frames(n, cfg["selection"])
        if skip_newest:
            seeds = [i for i in seeds if i < n - 1] or [0]
            with_spectrum = []
    grid = symprec_grid(cfg) if with_spectrum else None
    spectra = {} if spectra is None else spectra
    groups = {} if groups is None else groups
    precs = structure_symprecs(cfg)
    verdict_at = [float(cfg["rules"]["structure"]["symprec"])]
    calls = computed = 0
    tell = frame_progress if len(with_spectrum) > 100 else None
    for k, i in enumerate(with_spectrum):
        key = (i, i == n - 1)               # the structure's brackets on the last frame only
        if key not in spectra:
            spectra[key] = symmetry_entry(run, i, geo, cfg, grid,
                                          brackets="group" if key[1] else None,
                                          start=0 if key[1] and i else None)
            calls += int(spectra[key].pop("calls", 0) or 0)  # process-state dependent: timing only
            computed += 1
            if tell is not None:
                tell(k + 1, len(with_spectrum))
        entries[i]["symmetry"] = spectra[key]
        for s in (precs if i in (0, n - 1) else verdict_at):   # spglib's answers still memoised
            _group_at(run, geo, cfg, i, s, groups)
    probed = _group_entries(run, geo, cfg, entries, seeds, verdict_at if complete else precs,
                            groups, also=with_spectrum,
                            persist=None if complete else cfg["rules"]["persistence"]["steps"]) \
        if seeds else 0
    last = n - 1
    if "symmetry" in entries[last]:
        spec = entries[last]["symmetry"]                          # (the cached spectrum stays)
        entries[last]["symmetry"] = dict(spec, primitive=_primitive_entry(run, geo, cfg, last),
                                         angle_check=angle_check_entry(run, geo, cfg, last, spec))
    t2 = time.perf_counter()
    record = records.new_record(run, geo, cfg, entries, fixed_cell=_fixed_cell(run.cells),
                                versions=_versions())
    record["flags"], record["summary"] = rules.judge(record, cfg, complete=complete,
                                                     series=table.deformation)
    if run.species is not None and not skip_newest:
        _by_element(run, geo, cfg, record["summary"]["verdict"], verdict_at[0])
    asked = [i for i, f in enumerate(record["frames"]) if f.get("structure")]
    if skip_newest and asked and asked[-1] < n - 1:      # a live record between spglib's steps
        v, st = record["summary"]["verdict"], int(record["frames"][asked[-1]]["step"])
        v["groups_as_of_step"] = st
        v["text"] += (f" (spglib's groups as of step {st}, the newest it was asked about; the "
                      f"lattice as of step {int(record['frames'][-1]['step'])})")
    record["timing"] = {"invariants_s": t1 - t0, "symmetry_s": t2 - t1,
                        "total_s": time.perf_counter() - t0, "spglib_frames": len(with_spectrum),
                        "spglib_frames_computed": computed, "spglib_calls": calls,
                        "group_frames": probed}
    return record


def _by_element(run: Run, geo, cfg: dict, verdict: dict, s: float) -> None:
    """A run whose code tells atoms of one element apart (species labels, ``run.species``): spglib's
    group of the final structure by element alone, at the verdict's symprec, in
    ``verdict["structure"]["by_element"]``, and said in the verdict's text when it differs."""
    try:
        g = symmetry.group_at(run.cells[-1], run.positions[-1], run.numbers, s,
                              angle_tolerance=cfg["symmetry"]["angle_tolerance"],
                              vacuum_axis=geo.vacuum_axis)
    except (SymmetryError, GeometryError):
        return
    got = {"group": g["group"], "symbol": g["symbol"], "operations": g["operations"]}
    verdict["structure"]["by_element"] = got
    if (got["group"], got["operations"]) != (verdict["structure"]["final"]["group"],
                                            verdict["structure"]["final"]["operations"]):
        verdict["text"] += (f"; by element alone, not the code's species labels "
                            f"({', '.join(dict.fromkeys(run.species))}), the final structure is "
                            f"{got['symbol']} ({got['group']})")


def _frame_indices(frames, run: Run) -> list[int]:
    """``frames`` as a list of frame indices of ``run`` (negative from the end), or the error the
    command line's --frame gives."""
    import operator
    try:
        got = [operator.index(k) for k in ([frames] if isinstance(frames, str) else frames)]
    except TypeError:
        raise TypeError(f"frames: frame indices (integers), got {frames!r}") from None
    for k in got:
        if not -len(run) <= k < len(run):
            raise InputError(run.source, f"frame {k} out of range (the run has {len(run)} frames)")
    return [k % len(run) for k in got]


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
    import os
    if not isinstance(path_or_run, (Run, str, os.PathLike)):
        raise TypeError(f"analyze needs a file, a run folder or a Run, got "
                        f"{type(path_or_run).__name__} (ASE Atoms: write the frames to a file "
                        f"with ase.io.write, or watch a relaxation with driftwatch.live)")
    cfg = _config.coerce(config)
    run = path_or_run if isinstance(path_or_run, Run) else read_run(
        path_or_run, format=format, structure_keys=cfg["inputs"]["structure_keys"])
    if frames is not None:
        frames = _frame_indices(frames, run)
    try:
        return record_from_run(run, cfg, frames=frames, complete=complete)
    except (GeometryError, LatticeError, SymmetryError) as exc:
        if str(run.source) in str(exc):
            raise
        if isinstance(exc, NotPeriodicError):
            raise NotPeriodicError(exc.reason, exc.include, run.source) from exc
        raise type(exc)(f"{run.source}: {exc}") from exc
