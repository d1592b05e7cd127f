"""Layer or bulk, the vacuum axis, the in-plane 2D lattice with its viewing side, layers in bulk.

Conventions (binding for the whole project):

* **Vacuum axis.** If ``pbc`` has exactly one False entry, that cell vector is the
  vacuum axis. Two or three False entries: a 1D/0D system, ``NotPeriodicError``.
  Otherwise (pbc all True, as DFT codes write it) the *empty gap* along each axis
  decides: for cell vector k, project the atoms onto the unit normal of the
  plane of the other two vectors; the largest periodic gap between consecutive
  projected heights, in Å, is the gap of axis k. Exactly one gap above the
  threshold (default 6 Å): a layer with that vacuum axis. None: bulk. Several:
  ``NotPeriodicError`` naming the axes (a wire or molecule in a box, not a layer).
  The decision is made on the first frame; later frames are reported in ``reason``
  if they would decide differently.
* **Viewing side.** A layer is viewed from the side its cell vector along the
  vacuum axis points to: the unit normal n of the layer plane is oriented so that
  n · c_vac > 0, frame by frame (so a cell that rotates during a relaxation keeps
  its side). The in-plane frame is e1 = a/|a|, e2 = n × e1, with (a, b) the two
  periodic vectors in cyclic order after the vacuum axis (vacuum axis 2: a0, a1;
  0: a1, a2; 1: a2, a0). The 2D basis rows are (v·e1, v·e2). With this choice
  det(2D basis) = (a × b) · n, whose sign is that of det(cell); a reflected layer
  (or a vacuum vector flipped to the other side) flips it. Because the side is
  fixed by the cell itself, **a sign change within one trajectory is a real change
  of handedness** of the layer's lattice, never an artefact of orientation.

Lengths in Å. Arrays carry a leading frame axis; (3, 3) / (N, 3) inputs are accepted.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import GeometryError, NotPeriodicError

__all__ = ["Geometry", "Layer", "classify", "vacuum_gaps", "plane_gaps", "layer_basis",
           "plane_normals", "inplane_bases",
           "find_layers", "layers_in_bulk", "position_warnings", "DEFAULT_GAP", "FAR_CELLS",
           "SAME_SITE"]

DEFAULT_GAP = 6.0
"""Å. Vacuum thicker than this along exactly one axis makes a cell a layer (common practice:
slab models use 10-20 Å of vacuum; interlayer gaps of van der Waals bulk crystals are ~3-4 Å)."""

_INPLANE = {0: (1, 2), 1: (2, 0), 2: (0, 1)}
_CROSS_A, _CROSS_B = (np.array(x) for x in zip(*_INPLANE.values()))
_BITS = np.array([1, 2, 4])


@dataclass(frozen=True, eq=False)
class Geometry:
    """What a run's cell holds."""

    dimension: int
    """2 for a layer in a slab cell, 3 for bulk."""
    vacuum_axis: int | None
    """Index of the cell vector along the vacuum (None for bulk)."""
    viewing_side: np.ndarray | None
    """(3,) unit normal of the layer plane in the first frame, oriented along the vacuum
    cell vector (None for bulk)."""
    reason: str
    """How the decision was made, in words."""
    gaps: np.ndarray | None = None
    """(3,) Å, the largest empty gap along each axis in the first frame (None if pbc decided)."""


@dataclass(frozen=True, eq=False)
class Layer:
    """One 2D component of a bulk crystal."""

    indices: np.ndarray
    """Atoms of the cell that belong to this layer."""
    basis: np.ndarray
    """(2, 2) Å, primitive in-plane lattice of the layer, in its own plane frame."""
    vectors: np.ndarray
    """(2, 3) Å, the same two lattice vectors in the cell's cartesian frame."""
    normal: np.ndarray
    """(3,) unit normal (the viewing side, see :func:`find_layers`)."""
    height: float
    """Å, mean position of the layer's atoms along ``normal`` (stacking order)."""


_MAX_LENGTH = 1e50
"""Å. Longer cell vectors are refused: their cross products overflow in double precision."""


def _frames(cells, positions=None):
    try:
        cells = np.asarray(cells, float)
        single = cells.ndim == 2
        cells = cells.reshape(-1, 3, 3)
    except (TypeError, ValueError) as exc:
        raise GeometryError(f"cells must be numeric (n, 3, 3) or (3, 3) arrays, Å: {exc}") from None
    if not np.isfinite(cells).all():
        raise GeometryError("cell contains non-finite numbers (NaN or inf)")
    if np.abs(cells).max(initial=0.0) > _MAX_LENGTH:
        raise GeometryError(f"cell vector component above {_MAX_LENGTH:g} Å: not a physical cell")
    if positions is None:
        return cells, None, single
    try:
        pos = np.asarray(positions, float)
        pos = pos.reshape(-1, pos.shape[-2], 3)
    except (TypeError, ValueError, IndexError) as exc:
        raise GeometryError(f"positions must be numeric (n, N, 3) or (N, 3) arrays, Å: {exc}") \
            from None
    if not np.isfinite(pos).all():
        raise GeometryError("positions contain non-finite numbers (NaN or inf)")
    if len(pos) != len(cells):
        raise GeometryError(f"{len(cells)} cells but {len(pos)} position frames")
    return cells, pos, single


def _pbc(pbc) -> np.ndarray:
    """(3,) bool periodicity from a flag or three (no broadcast view when it is already three)."""
    pbc = np.asarray(pbc, bool)
    return pbc if pbc.shape == (3,) else np.broadcast_to(pbc, (3,))


def vacuum_gaps(cells, positions) -> np.ndarray:
    """(n, 3) Å: largest empty gap between atom planes along each axis's plane normal."""
    cells, pos, single = _frames(cells, positions)
    vol = np.abs(np.linalg.det(cells))
    if (vol < 1e-9).any():
        raise GeometryError("singular cell: cannot measure vacuum gaps")
    frac = np.linalg.solve(np.transpose(cells, (0, 2, 1)), np.transpose(pos, (0, 2, 1)))
    frac = np.sort(frac % 1.0, axis=2)                        # (n, 3, N)
    inner = frac[:, :, 1:] - frac[:, :, :-1]
    wrap = 1.0 - frac[:, :, -1] + frac[:, :, 0]
    gmax = np.maximum(wrap, inner.max(axis=2) if inner.shape[2] else 0.0)
    # |a x b| of the two other cell vectors of each axis (np.cross is slow on a few frames)
    a, b = cells[:, _CROSS_A], cells[:, _CROSS_B]                 # (n, 3 axes, 3)
    cr = a[..., [1, 2, 0]] * b[..., [2, 0, 1]] - a[..., [2, 0, 1]] * b[..., [1, 2, 0]]
    out = gmax * (vol[:, None] / np.sqrt(np.einsum("nki,nki->nk", cr, cr)))
    return out[0] if single else out


_THIN_VACUUM = 4.0
"""Å: the smallest lone empty gap said to stand out in a cell read as bulk (the van der Waals gaps
between atom planes of bulk layered crystals are ~3-3.5 Å; from memory, common practice)."""


FAMILIES = np.array([h for h in np.ndindex(3, 3, 3) if any(x != 1 for x in h)]) - 1
FAMILIES = FAMILIES[[next(x for x in h if x) > 0 for h in FAMILIES]]
"""(13, 3): the lattice-plane families whose Miller indices in a reduced basis are 0 or +-1 (one
of each +-pair): the planes a layer's vacuum can lie along, whichever basis the file gives."""


def plane_gaps(cell, positions) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Largest empty gap (Å) between atom planes of each family of :data:`FAMILIES` in the cell's
    Minkowski-reduced basis (``ase.geometry.minkowski_reduce``): ``(gaps (13,), normals (13, 3)
    unit, op)``, the reduced cell being ``op @ cell`` (integer, determinant +1). Independent of
    the basis the cell is given in (up to ties of the reduction). One frame: cell (3, 3),
    positions (N, 3), Å."""
    from ase.geometry import minkowski_reduce
    cell = np.asarray(cell, float)
    reduced, op = minkowski_reduce(cell)
    recip = np.linalg.inv(reduced).T                       # rows b_i, a_i . b_j = delta_ij
    t = np.sort((np.asarray(positions, float) @ recip.T @ FAMILIES.T) % 1.0, axis=0)  # (N, 13)
    wrap = 1.0 - t[-1] + t[0]
    frac = np.maximum(wrap, np.diff(t, axis=0).max(axis=0)) if len(t) > 1 else wrap
    g = FAMILIES @ recip                                   # (13, 3): |g| = 1 / spacing
    size = np.linalg.norm(g, axis=1)
    return frac / size, g / size[:, None], np.asarray(op, int)


_SMALL = np.array([v for v in np.ndindex(5, 5, 5) if v != (2, 2, 2)]) - 2
"""(124, 3): the nonzero integer vectors with entries -2..2, where :func:`layer_basis` looks for
a basis of the plane's lattice and the third vector (in the reduced basis)."""


def layer_basis(cell, positions, gap: float = DEFAULT_GAP) -> tuple | None:
    """A basis that shows a layer's vacuum the cell as given hides: ``(M, vacuum, side)``, M an
    integer matrix of determinant +1 such that the first two vectors of ``M @ cell`` lie in the
    lattice planes along which the atoms leave their widest empty gap (``vacuum``, Å), when that
    gap is wider than ``gap`` (``geometry.vacuum_gap``) while none of the cell's own three planes
    shows one (:func:`vacuum_gaps`): stacked layers written in a centred lattice's primitive
    vectors, none of whose pairs spans the layer's plane. The third vector points to the side the
    file's vector reaching furthest out of the plane points to (index ``side``), from which the
    layer is seen, as a file whose vacuum vector is a cell vector is seen from that vector's side:
    the 2D sign does not depend on the basis; when vectors reach as far out on both sides (``side``
    None), to the side of the Cartesian axis nearest the plane's normal, whatever their order.
    None otherwise. One frame, Å."""
    try:
        own = float(vacuum_gaps(cell, positions).max())        # (refuses a singular cell)
        gaps, _, op = plane_gaps(cell, positions)
    except (GeometryError, np.linalg.LinAlgError, ValueError):
        return None
    k = int(np.argmax(gaps))
    if gaps[k] <= gap or own > gap:
        return None
    h = FAMILIES[k]
    cell = np.asarray(cell, float)
    red = op @ cell
    small = _SMALL[np.argsort(np.linalg.norm(_SMALL @ red, axis=1), kind="stable")]
    inplane = small[small @ h == 0]
    u = inplane[0]
    v = next((x for x in inplane[1:] if np.array_equal(np.abs(np.cross(u, x)), np.abs(h))), None)
    w = next((x for x in small if x @ h == 1), None)     # (u, v: a basis of the plane's lattice)
    if v is None or w is None:
        return None
    if np.cross(u, v) @ w < 0:
        u, v = v, u
    m = np.cross(u @ red, v @ red)
    out = cell @ m
    far = np.abs(out) >= np.abs(out).max() * (1 - 1e-6)
    if (out[far] > 0).any() and (out[far] < 0).any():   # as far out on both sides (ibrav 13:
        side, toward = None, m[np.argmax(np.abs(m))]    # (a, 0, -c)/2, (a, 0, c)/2): the side of
    else:                                               # the Cartesian axis nearest the normal
        side = int(np.flatnonzero(far)[0])
        toward = out[side]
    if (w @ red @ m) * toward < 0:                    # (v, u, -w keeps the determinant)
        u, v, w = v, u, -w
    return np.array([u, v, w]) @ op, float(gaps[k]), side


def classify(cells, pbc, positions, gap: float = DEFAULT_GAP, gaps=None) -> Geometry:
    """Decide whether a run's cell holds a layer (dimension 2) or bulk (3). See the module doc.

    ``gaps``: the frames' :func:`vacuum_gaps` when already known (the live tracker keeps them).
    Raises ``GeometryError`` for 1D/0D cells (two or three non-periodic axes, or vacuum
    along more than one axis).
    """
    cells, pos, _ = _frames(cells, positions if gaps is None else None)
    pbc = _pbc(pbc)
    free = [k for k in range(3) if not pbc[k]]
    if len(free) >= 2:
        kind = "a molecule or cluster" if len(free) == 3 else "a wire or chain"
        if not cells[0].any():        # plain XYZ, or a reader that found no lattice
            raise NotPeriodicError(f"{kind} as read: the file gives no cell (pbc = "
                                   f"{pbc.tolist()})", "a file with the cell and pbc (e.g. "
                                                       "extended XYZ with Lattice= and pbc=)")
        raise NotPeriodicError(f"{kind}: periodic along {3 - len(free)} axes (pbc = "
                               f"{pbc.tolist()})", "write the file with pbc True along the "
                                                   "periodic axes (driftwatch takes pbc from it)")
    if len(free) == 1:
        k = free[0]
        n = plane_normals(cells[:1], k)[0]
        return Geometry(2, k, n, f"pbc = {pbc.tolist()}: axis {k} is non-periodic")
    gaps = vacuum_gaps(cells, pos) if gaps is None else np.asarray(gaps, float)   # (n, 3)
    big = [k for k in range(3) if gaps[0, k] > gap]
    codes = np.flatnonzero(np.bincount((gaps[1:] > gap) @ _BITS, minlength=8))  # vacuum axes, bits
    later = {tuple(k for k in range(3) if int(c) >> k & 1) for c in codes}
    drift = "" if later <= {tuple(big)} else \
        f"; later frames have vacuum on axes {sorted(map(list, later - {tuple(big)}))}"
    desc = ", ".join(f"{g:.2f}" for g in gaps[0])
    first = pos[0] if pos is not None else np.asarray(positions[0] if np.ndim(positions) == 3
                                                      else positions, float)
    across, normals, _ = plane_gaps(cells[0], first)     # the same gaps whichever the basis
    wide = max(gap, DEFAULT_GAP)     # (a thin vacuum_gap is for thin vacuum: rows of atoms in a
    kind = _enclosed(across, normals, wide)                   # layer are not chains at 2.5 Å)
    if len(big) > 1:
        raise NotPeriodicError(f"{kind or 'a molecule, cluster or wire'} in a box: vacuum on "
                               f"more than one axis (empty gaps {desc} Å; > geometry.vacuum_gap "
                               f"{gap:g} Å along axes {big})",
                               f"a config (-c) with geometry.vacuum_gap: "
                               f"{bulk_gap(gaps[0]):.1f} Å analyses its cell as bulk")
    if not big:
        if kind:                                      # gaps along planes its vectors do not span
            raise NotPeriodicError(f"{kind} in a box: empty gaps wider than {wide:g} Å along "
                                   f"lattice planes of several directions (the cell's own planes "
                                   f"show {desc} Å)",
                                   f"a config (-c) with geometry.vacuum_gap: "
                                   f"{bulk_gap(across)} Å analyses its cell as bulk")
        g = np.sort(gaps[0])
        k = int(np.argmax(gaps[0]))          # one gap that stands out: a layer with thin vacuum?
        thin = (f"; the {g[2]:.2f} Å gap along axis {k} stands out: a layer with thin vacuum "
                f"is read as one with geometry.vacuum_gap below {g[2]:.2f} Å"
                if g[2] >= max(_THIN_VACUUM, 0.5 * gap, 1.5 * g[1]) else "")
        return Geometry(3, None, None, f"bulk: largest empty gaps {desc} Å, none above "
                                       f"{gap} Å{thin}{drift}", gaps[0])
    k = big[0]
    n = plane_normals(cells[:1], k)[0]
    other = across[(across > wide) & (np.abs(normals @ n) < 1.0 - 1e-6)]  # along planes no pair
    if len(other):                                                     # of its own vectors spans
        raise NotPeriodicError(
            f"{kind or 'chains or molecules'} in a box: beside the {gaps[0, k]:.2f} Å gap "
            f"along axis {k}, the atoms leave an empty gap of {other.max():.2f} Å along other "
            f"lattice planes (> {wide:g} Å; gaps along the cell's own planes {desc} Å)",
            f"a config (-c) with geometry.vacuum_gap: "
            f"{bulk_gap(np.concatenate([gaps[0], other]))} Å analyses its cell as bulk")
    return Geometry(2, k, n, f"layer: empty gap {_beside(gaps[0, k], gap)} Å > {gap} Å along "
                             f"axis {k} (gaps {desc} Å){drift}", gaps[0])


def _enclosed(across, normals, gap: float) -> str | None:
    """What a cell holds whose atoms leave empty gaps (``across``, Å, along plane families of unit
    ``normals``: :func:`plane_gaps`) wider than ``gap`` in two or three independent directions
    (two: rods along one direction, chains or molecules, two water molecules in a box among them;
    three: a molecule or cluster), whichever of them the file's vectors span; None for fewer."""
    big = normals[across > gap]
    rank = int(np.linalg.matrix_rank(big, tol=1e-6)) if len(big) else 0
    return {2: "chains or molecules", 3: "a molecule or cluster"}.get(rank)  # (else bulk, layer)


def _beside(value: float, limit: float) -> str:
    """A gap (Å) with 2 decimals, or as many as tell it from ``limit`` when they round alike
    (6.0000001 Å, a cell of 6 Å printed by the code in other units, is a layer at 6 Å)."""
    for d in (2, 4, 6, 8):
        if f"{value:.{d}f}" != f"{limit:.{d}f}":
            return f"{value:.{d}f}"
    return repr(float(value))


def bulk_gap(gaps) -> float:
    """The ``geometry.vacuum_gap`` (Å) that takes a cell with these empty gaps (Å) as bulk: the
    largest gap plus 0.5 Å, to 0.1 Å."""
    return round(float(max(gaps)) + 0.5, 1)


def plane_normals(cells, vacuum_axis: int) -> np.ndarray:
    """(n, 3) unit normals of the layer plane, oriented so that n · c_vac > 0 (the viewing side).

    A zero vacuum vector (ASE's way of writing a 2D cell with pbc False) is read as
    c_vac = a × b, i.e. the cell is taken as right-handed.
    """
    cells, _, single = _frames(cells)
    i, j = _INPLANE[int(vacuum_axis)]
    cr = np.cross(cells[:, i], cells[:, j])
    norm = np.linalg.norm(cr, axis=1)
    if np.any(norm < 1e-12):
        raise GeometryError("degenerate in-plane cell vectors (parallel or zero)")
    cvac = cells[:, vacuum_axis]
    side = np.sign(np.einsum("nk,nk->n", cr, cvac))
    zero = np.linalg.norm(cvac, axis=1) < 1e-12
    side[zero] = 1.0            # ASE's 2D convention (c = 0, pbc False): view along a x b
    if np.any(side == 0):
        raise GeometryError("the vacuum cell vector lies in the layer plane")
    n = cr / (norm * side)[:, None]
    return n[0] if single else n


def _plane_basis(a, b, n):
    e1 = a / np.linalg.norm(a, axis=-1, keepdims=True)
    e2 = np.cross(n, e1)
    va = np.stack([np.einsum("...k,...k", a, e1), np.einsum("...k,...k", a, e2)], -1)
    vb = np.stack([np.einsum("...k,...k", b, e1), np.einsum("...k,...k", b, e2)], -1)
    return np.stack([va, vb], -2)


def inplane_bases(cells, vacuum_axis: int) -> np.ndarray:
    """(n, 2, 2) Å: the two periodic cell vectors in the layer's plane frame (rows are vectors).

    Frame: e1 = a/|a|, e2 = n × e1, n the unit normal with n · c_vac > 0 (see the module
    doc). The first row is always (|a|, 0). det > 0 for a right-handed cell; a sign change
    within one trajectory is a real change of handedness.
    """
    cells, _, single = _frames(cells)
    if vacuum_axis not in (0, 1, 2):
        raise GeometryError(f"vacuum_axis must be 0, 1 or 2, not {vacuum_axis!r}")
    i, j = _INPLANE[int(vacuum_axis)]
    out = _plane_basis(cells[:, i], cells[:, j], plane_normals(cells, vacuum_axis))
    return out[0] if single else out


def find_layers(cell, positions, numbers, kcutoff: float | None = None) -> list[Layer]:
    """The 2D components of a bulk cell (ASE's rank-determination dimensionality analysis).

    Each layer gets its primitive in-plane lattice (ASE's choice of the smallest-area
    pair of periodic vectors) in its own plane frame. Viewing side: the normal is
    oriented along the cell vector that is most nearly perpendicular to the layer
    (the stacking vector), so all layers of a stack are viewed from the same side.
    Returns [] when the structure has no 2D component at ASE's best-scoring cutoff
    (``kcutoff`` overrides it). Layers are sorted by height along the normal.
    """
    from ase import Atoms
    from ase.geometry.dimensionality.isolation import construct_inplane_basis, traverse_graph

    cell = np.asarray(cell, float)
    atoms = Atoms(numbers=np.asarray(numbers), positions=np.asarray(positions, float),
                  cell=cell, pbc=True)
    components, all_visited, ranks = traverse_graph(atoms, kcutoff)
    layers = []
    for k, visited in all_visited.items():
        if ranks[k] != 2:
            continue
        visited = sorted(visited)
        a, b, _ = construct_inplane_basis(atoms, k, visited)
        members = np.unique([c for c, _ in visited])
        idx = np.flatnonzero(np.isin(components, members))
        n = np.cross(a, b)
        n /= np.linalg.norm(n)
        proj = cell @ n
        stack = int(np.argmax(np.abs(proj)))
        if proj[stack] < 0:
            n = -n
        if np.dot(np.cross(a, b), n) < 0:       # keep the pair right-handed about n
            a, b = b, a
        basis = _plane_basis(a, b, n)
        layers.append(Layer(idx, basis, np.array([a, b]), n,
                            float(np.mean(atoms.positions[idx] @ n))))
    return sorted(layers, key=lambda L: L.height)


def layers_in_bulk(cell, positions, numbers, kcutoff: float | None = None) -> list:
    """Per-layer (2, 2) in-plane bases (Å) of a layered bulk crystal, in stacking order.

    [] when the crystal is not layered. See :func:`find_layers` for atoms and normals.
    """
    return [L.basis for L in find_layers(cell, positions, numbers, kcutoff)]


FAR_CELLS = 1000.0
"""An atom more than this many cell lengths outside the cell (a fractional coordinate beyond
+-1000) is reported: no relaxation moves an atom that far (a unit or file error), and wrapped
back into the cell its position loses about |coordinate| x 2e-16 of precision."""
SAME_SITE = 0.1
"""Å. Two atoms closer than this (through the periodic images too) are reported as sitting at
one position (common practice: the shortest bond, H2, is 0.74 Å; a duplicated atom is ~0 Å)."""


def position_warnings(cells, positions, pbc, steps=None, *, far: float = FAR_CELLS,
                      same_site: float = SAME_SITE) -> list[str]:
    """Warnings (plain sentences) about positions no relaxation produces.

    Atoms more than ``far`` cell lengths outside the cell (every frame is checked; the first frame
    where the largest excursion occurs is named), and pairs of atoms closer than ``same_site`` Å
    (checked on the first frame, then the last, by :func:`_closest_pair`; the first found).
    ``steps`` names frames by the code's step numbers (default: frame indices). An empty list
    when all is well."""
    cells, pos, _ = _frames(cells, positions)
    pbc = _pbc(pbc)
    label = "frame" if steps is None else "step"
    steps = np.arange(len(cells)) if steps is None else np.asarray(steps)
    out = []
    if not pbc.all():                       # ASE writes a layer's vacuum vector as 0 (pbc False)
        from ase.geometry import complete_cell
        cells = np.array([complete_cell(c) for c in cells])
    try:
        with np.errstate(all="ignore"):
            frac = np.linalg.solve(np.transpose(cells, (0, 2, 1)), np.transpose(pos, (0, 2, 1)))
    except np.linalg.LinAlgError:
        return out                          # a singular cell: the readers refuse it already
    frac = np.transpose(frac, (0, 2, 1))                       # (n, N, 3)
    excess = np.where(pbc, np.abs(frac), 0.0)
    excess = np.where(np.isfinite(excess), excess, np.inf)
    worst = excess.max(axis=2)                                 # (n, N)
    bad = worst > far
    if bad.any():
        i, a = np.unravel_index(int(np.argmax(np.where(bad, worst, -1.0))), worst.shape)
        n_atoms = int(bad.any(axis=0).sum())
        w = float(worst[i, a])
        err = w * float(np.abs(cells[i]).max()) * np.finfo(float).eps
        others = f" ({n_atoms} atoms in all)" if n_atoms > 1 else ""
        out.append(f"atom {a} lies {w:.3g} cell lengths outside the cell at {label} "
                   f"{int(steps[i])}{others}: no relaxation moves an atom that far (a unit or "
                   f"file error?); wrapped into the cell its position is uncertain by {err:.2g} "
                   f"Å, so results involving it are not meaningful")
    for i in sorted({0, len(cells) - 1}):
        if len(pos[i]) < 2:
            continue
        pair = _closest_pair(cells[i], frac[i], pbc, same_site)
        if pair is not None:
            a, b, d = pair
            out.append(f"atoms {a} and {b} are {d:.2g} Å apart at {label} {int(steps[i])} "
                       f"(through the periodic images): two atoms at the same position (a "
                       f"duplicated atom?)")
            break                           # the first frame checked that has one is enough
    return out


def _closest_pair(cell, frac, pbc, cutoff):
    """(i, j, distance Å) of the closest pair of atoms i < j nearer than ``cutoff`` Å (through the
    periodic images along ``pbc``), or None.

    Every pair up to 200 atoms, else a cell list (:func:`_near_bins`): atoms binned in fractional
    coordinates with bins at least ``cutoff`` wide in every direction (the plane spacing of axis k
    is 1 / |b_k|, b the reciprocal vectors), so only pairs in the same or neighbouring bins are
    measured, O(N). Each pair is measured through the images that can bring it within
    ``cutoff``. ASE's neighbour list gives the same distances (tested); it is not used because it
    imports scipy.sparse and scipy.spatial (~0.1-0.4 s per process).
    """
    n = len(frac)
    wrapped = np.where(pbc, frac - np.floor(frac), frac)
    if n < 2 or not np.isfinite(wrapped).all():
        return None
    reach = cutoff * np.linalg.norm(np.linalg.inv(cell), axis=0)    # fractional half-widths
    if n <= 200:                                          # every pair: cheaper than binning
        i, j = np.triu_indices(n, 1)
    else:
        i, j = _near_bins(wrapped, pbc, reach)
    if not len(i):
        return None
    df = wrapped[j] - wrapped[i]
    df = np.where(pbc, df - np.round(df), df)
    reach_img = np.where(pbc, np.floor(reach + 0.5), 0).astype(int)
    shifts = np.stack(np.meshgrid(*[np.arange(-r, r + 1) for r in reach_img], indexing="ij"),
                      axis=-1).reshape(-1, 3)
    vec = (df[:, None, :] + shifts[None]) @ cell                     # (pairs, images, 3) Å
    d = np.sqrt(np.einsum("pki,pki->pk", vec, vec).min(axis=1))
    k = int(np.argmin(d))
    return (int(i[k]), int(j[k]), float(d[k])) if d[k] < cutoff else None


def _near_bins(wrapped, pbc, reach):
    """Pairs (i, j), i < j, of atoms in the same or neighbouring bins of a cell list whose bins
    are at least ``reach`` (fractional, per axis) wide."""
    n = len(wrapped)
    lo = np.where(pbc, 0.0, wrapped.min(axis=0))
    span = np.where(pbc, 1.0, wrapped.max(axis=0) - lo + 1e-12)
    nbins = np.maximum(1, np.minimum(np.floor(span / reach), 64)).astype(np.int64)
    while nbins.prod() > max(8 * n, 27):                  # wider bins stay correct, fewer empty
        nbins[np.argmax(nbins)] = max(1, nbins.max() // 2)
    b = np.minimum(((wrapped - lo) / span * nbins).astype(np.int64), nbins - 1)   # (N, 3)
    key = (b[:, 0] * nbins[1] + b[:, 1]) * nbins[2] + b[:, 2]
    order = np.argsort(key, kind="stable")
    count = np.bincount(key, minlength=int(nbins.prod()))
    first = np.cumsum(count) - count
    pairs = []
    offsets = [sorted({d % m if p else d for d in (-1, 0, 1)}) if m > 2 or not p else range(m)
               for m, p in zip(nbins, pbc)]
    for dx in offsets[0]:
        for dy in offsets[1]:
            for dz in offsets[2]:
                nb = b + (dx, dy, dz)
                ok = np.all(pbc | ((nb >= 0) & (nb < nbins)), axis=1)
                nb = nb % nbins
                nkey = (nb[:, 0] * nbins[1] + nb[:, 1]) * nbins[2] + nb[:, 2]
                c = np.where(ok, count[nkey], 0)
                i = np.repeat(np.arange(n), c)
                j = order[np.repeat(first[nkey] - np.cumsum(c) + c, c) + np.arange(c.sum())]
                pairs.append(i * n + j)
    code = np.unique(np.concatenate(pairs))
    i, j = code // n, code % n
    keep = i < j
    return i[keep], j[keep]
