"""symmetry: the one place that calls spglib.

Three questions per frame:

* ``spectrum``: spglib's verdict over a log-spaced ``symprec`` grid (Å) for the full structure
  (space group, or layer group when a vacuum axis is given) and for the lattice alone (a one-atom
  cell: its Bravais type), plus the ``symprec`` values where a verdict changes, bracketed by
  bisection in log ``symprec``.
* ``displacement_to_group``: how far the atoms are (Å, RMS and max, input setting) from a
  configuration that is exactly symmetric under the group spglib finds at one ``symprec``, and the
  lattice strain that group needs (unitless).
* ``drift_table``: that displacement for every group seen in a spectrum.

Conventions
-----------
``cell`` is (3, 3), rows are lattice vectors in Å; ``positions`` are *cartesian* Å (as
``ase.Atoms.get_positions()``); ``numbers`` are atomic numbers (any integer species labels).
``symprec`` is spglib's distance tolerance in Å; ``angle_tolerance`` is spglib's, in degrees, with
-1 meaning spglib's default. For layers (``vacuum_axis`` 0, 1 or 2) the cell axes are permuted
cyclically (handedness kept) so that the vacuum axis is c before spglib's layer-group routine is
called; cartesian results do not depend on the permutation. The vacuum vector is also replaced
by its component along the layer normal (a leaning vacuum vector would hide layer operations
from spglib). spglib 2.8's layer routine takes no ``angle_tolerance``; spectra record whether it
was applied (``angle_tolerance_applied``).

Reading the results
-------------------
spglib's verdict is not a clean step function of ``symprec``: near a change it can flicker
(windows well under 1 % wide where it falls back to a lower group were seen on rattled Si), so
breakpoints come as brackets whose two ends spglib has been asked about, and a spectrum may go
up and down. None of this proves a structure stable or a tolerance "safe": it shows where
spglib's answer changes for this frame.

spglib failures
---------------
spglib fails in one of two ways depending on process state: it returns ``None`` (its old error
handling, the 2.8 default) or raises ``SpglibError`` (when ``SPGLIB_OLD_ERROR_HANDLING`` is false,
which ASE's symmetry code sets for the whole process). ``_call`` handles both, and silences only
spglib's per-call "Set OLD_ERROR_HANDLING" ``DeprecationWarning``. We never change spglib's mode.
``warnings.catch_warnings`` is not thread-safe: run spectra in processes, not threads.
"""
from __future__ import annotations

import collections
import functools
import hashlib
import inspect
import math
import os
import re
import time
import warnings

import numpy as np

# spglib's C code prints "spglib: ssm_get_exact_positions failed." and the like straight to the
# process's stderr when an internal step fails at one tolerance and it recovers by itself; on an
# audit that is dozens of meaningless lines on the user's terminal. Off unless the user set it.
os.environ.setdefault("SPGLIB_WARNING", "OFF")
import spglib  # noqa: E402

from .errors import ConfigError, GeometryError, LatticeError, SymmetryError

SPGLIB_MIN = (2, 7)
"""The oldest spglib driftwatch runs on: ``spglib.error`` (SpglibError raised, the error mode) and
``get_symmetry_layerdataset`` first ship in 2.7.0 (2.5 and 2.6 return None on failure and name
the layer function ``get_layergroup``)."""


def spglib_supported(version: str) -> bool:
    """True when a spglib ``__version__`` string is at least :data:`SPGLIB_MIN`."""
    parts = [int(x) for x in re.findall(r"\d+", version)[:2]]
    return tuple(parts + [0] * (2 - len(parts))) >= SPGLIB_MIN


if not spglib_supported(spglib.__version__):      # fail at import: before a relaxation starts
    raise ImportError(f"driftwatch needs spglib >= {'.'.join(map(str, SPGLIB_MIN))}, found "
                      f"{spglib.__version__} ({spglib.__file__}): pip install -U 'spglib>=2.7'")

__all__ = [
    "DEFAULT_SYMPRECS", "DEFAULT_PRECISION", "spectrum", "displacement_to_group", "displacement_from",
    "drift_table",
    "symmetrize", "versions", "clear_cache", "group_at", "relation", "primitive_lattice",
    "POINT_ORDER",
]

#: Default grid: 17 values log-spaced from 1e-5 Å to 0.3 Å (neighbours differ by a factor ~1.90).
#: Not higher: at 0.5 Å one spglib call on a rattled 192-atom cell took 1.0 s (0.16 s at 0.3 Å,
#: 5 ms at 1e-5 Å; bench/README.md), and a tolerance of half an ångström says little about a crystal.
DEFAULT_SYMPRECS = tuple(float(s) for s in np.logspace(-5.0, math.log10(0.3), 17))
#: Default bracket precision: every breakpoint has ``high / low <= 1.02``.
DEFAULT_PRECISION = 1.02

_DEPRECATION = r"Set OLD_ERROR_HANDLING"
_SEEN = {"returned_none": 0, "raised": 0}


# ----------------------------------------------------------------------------------------------
# the one wrapper around spglib
# ----------------------------------------------------------------------------------------------
@functools.lru_cache(maxsize=None)
def _accepts(fn, name):
    try:
        return name in inspect.signature(fn).parameters
    except (TypeError, ValueError):  # pragma: no cover - C functions without signatures
        return False


def _call(fn, *args, **kwargs):
    """Call a spglib function; return ``(result, None)`` or ``(None, message)``.

    Handles both failure modes (``None`` returned / ``SpglibError`` raised) and counts which one
    was seen (reported by ``versions()``).
    """
    try:
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=_DEPRECATION, category=DeprecationWarning)
            out = fn(*args, **kwargs)
    except spglib.error.SpglibError as exc:
        _SEEN["raised"] += 1
        return None, str(exc).strip() or type(exc).__name__
    if out is None:
        _SEEN["returned_none"] += 1
        return None, _message_after_none(fn, args, kwargs)
    return out, None


def _message_after_none(fn, args, kwargs):
    """spglib 2.8's ``get_error_message()`` loses the message; ask once more with ``_throw``.

    ``_throw`` is a per-call keyword of spglib's own functions (not the process-wide switch);
    it is used only to recover the text of a failure that already happened.
    """
    generic = "spglib returned None"
    if not _accepts(fn, "_throw"):
        return generic
    try:
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=_DEPRECATION, category=DeprecationWarning)
            fn(*args, _throw=True, **kwargs)
    except spglib.error.SpglibError as exc:
        return str(exc).strip() or generic
    except Exception as exc:  # noqa: BLE001 - only used to build a message
        return f"{generic} ({type(exc).__name__}: {exc})"
    return generic


def _layer_function():
    fn = getattr(spglib, "get_symmetry_layerdataset", None)
    if fn is None:
        raise SymmetryError(f"spglib {spglib.__version__} has no layer-group support "
                            "(get_symmetry_layerdataset); install spglib >= 2.7")
    return fn


_DATASETS: "collections.OrderedDict[tuple, tuple]" = collections.OrderedDict()
_DATASET_MEMO = 128


def _dataset(lattice, frac, numbers, symprec, angle_tolerance, layer):
    """spglib dataset at one symprec, ``(dataset, None)`` or ``(None, message)``.

    For ``layer`` the aperiodic axis must already be c (see ``_to_c_axis``). Results are memoised
    on the exact input bytes (and spglib's error mode), so the displacement step reuses the
    datasets the spectrum already asked spglib for instead of asking again (no approximation:
    spglib is deterministic in its input).
    """
    lattice, frac = np.ascontiguousarray(lattice, float), np.ascontiguousarray(frac, float)
    numbers = np.ascontiguousarray(numbers, np.intc)
    key = (lattice.tobytes(), frac.tobytes(), numbers.tobytes(), float(symprec),
           float(angle_tolerance), bool(layer), getattr(spglib.error, "OLD_ERROR_HANDLING", None),
           os.environ.get("SPGLIB_OLD_ERROR_HANDLING"))
    hit = _DATASETS.get(key)
    if hit is not None:
        _DATASETS.move_to_end(key)
        return hit
    out = _dataset_uncached(lattice, frac, numbers, symprec, angle_tolerance, layer)
    _DATASETS[key] = out
    if len(_DATASETS) > _DATASET_MEMO:
        _DATASETS.popitem(last=False)
    return out


after_call = None
"""Called as ``after_call(symprec, seconds)`` after each spglib call that was not memoised (the
audit's progress line: a call takes minutes on thousands of atoms at large symprec), or None."""


def _dataset_uncached(lattice, frac, numbers, symprec, angle_tolerance, layer):
    cell = (lattice, frac, numbers)
    t = time.perf_counter()
    if not layer:
        out = _call(spglib.get_symmetry_dataset, cell, symprec=symprec,
                    angle_tolerance=angle_tolerance)
    else:
        fn = _layer_function()
        kwargs = {"symprec": symprec}
        if _accepts(fn, "aperiodic_dir"):
            kwargs["aperiodic_dir"] = 2
        if _accepts(fn, "angle_tolerance"):
            kwargs["angle_tolerance"] = angle_tolerance
        out = _call(fn, cell, **kwargs)
    if after_call is not None:
        after_call(symprec, time.perf_counter() - t)
    return out


def _layer_angle_tolerance_applied():
    fn = getattr(spglib, "get_symmetry_layerdataset", None)
    return fn is not None and _accepts(fn, "angle_tolerance")


# ----------------------------------------------------------------------------------------------
# input checks and the layer permutation
# ----------------------------------------------------------------------------------------------
_PREPARED: "collections.OrderedDict[tuple, tuple]" = collections.OrderedDict()


def _prepare(cell, positions, numbers, vacuum_axis):
    """(lattice, fractional positions, numbers) as spglib takes them, checked; memoised on the
    exact input (a frame's spectrum, groups and displacements share it). Read-only arrays."""
    try:
        c, p, z = (np.ascontiguousarray(cell, dtype=float), np.ascontiguousarray(positions, float),
                   np.ascontiguousarray(numbers))
        key = (c.shape, c.tobytes(), p.shape, p.tobytes(), z.dtype.str, z.shape, z.tobytes(),
               vacuum_axis)
    except (TypeError, ValueError):
        return _prepare_uncached(cell, positions, numbers, vacuum_axis)
    hit = _PREPARED.get(key)
    if hit is None:
        hit = _prepare_uncached(cell, positions, numbers, vacuum_axis)
        for a in hit:
            a.setflags(write=False)
        _PREPARED[key] = hit
        if len(_PREPARED) > _DATASET_MEMO:
            _PREPARED.popitem(last=False)
    return hit


def _prepare_uncached(cell, positions, numbers, vacuum_axis):
    cell = np.asarray(cell, dtype=float)
    positions = np.asarray(positions, dtype=float)
    numbers = np.asarray(numbers)
    if cell.shape != (3, 3) or not np.all(np.isfinite(cell)):
        raise LatticeError(f"cell must be a finite (3, 3) array of row vectors in Å, got shape {cell.shape}")
    if vacuum_axis in (0, 1, 2) and not np.any(cell[vacuum_axis]) and positions.ndim == 2 \
            and positions.shape[-1:] == (3,) and np.all(np.isfinite(positions)):
        # ASE's 2D convention (pbc False along a zero vacuum vector): give spglib a slab period
        cell = cell.copy()
        normal = np.cross(cell[(vacuum_axis + 1) % 3], cell[(vacuum_axis + 2) % 3])
        if np.linalg.norm(normal) > 0:
            normal = normal / np.linalg.norm(normal)
            heights = positions @ normal
            cell[vacuum_axis] = normal * (float(np.ptp(heights)) + 20.0)
    volume = abs(np.linalg.det(cell))
    if volume < 1e-9 * max(1.0, float(np.abs(cell).max())) ** 3:
        raise LatticeError("cell is singular (zero volume): its vectors are coplanar or zero")
    if positions.ndim != 2 or positions.shape[1] != 3 or len(positions) == 0:
        raise GeometryError(f"positions must be (N, 3) cartesian Å with N >= 1, got shape {positions.shape}")
    if not np.all(np.isfinite(positions)):
        raise GeometryError("positions contain non-finite values")
    if numbers.shape != (len(positions),) or not np.issubdtype(numbers.dtype, np.integer):
        raise GeometryError(f"numbers must be {len(positions)} integers, got shape {numbers.shape}")
    if vacuum_axis not in (None, 0, 1, 2):
        raise GeometryError(f"vacuum_axis must be None, 0, 1 or 2, got {vacuum_axis!r}")
    lattice = _to_c_axis(cell, vacuum_axis)
    if vacuum_axis is not None:
        lattice = _perpendicular_vacuum(lattice)
    frac = np.linalg.solve(lattice.T, positions.T).T
    if vacuum_axis is not None:
        frac[:, 2] += _layer_in_one_piece(frac[:, 2])
    return lattice, np.ascontiguousarray(frac), numbers.astype(np.intc)


def _layer_in_one_piece(z):
    """Whole numbers of slab periods to add to each atom's fractional height ``z`` so that the
    layer is in one piece (the vacuum, the widest empty gap, between its top and the next
    period's bottom) with its middle in [0, 1). spglib's layer routine is not invariant under
    these lattice translations (2.8: a 1H MX2 layer wrapped across z = 0, its atoms at z 0, 0.07
    and 0.93, is p3m1 (69); in one piece, p-6m2 (78), as 3D spglib's P-6m2 (187) says); a layer
    already in one piece about the middle of the cell is left as it is."""
    wrapped = z - np.floor(z)
    ordered = np.sort(wrapped)
    gaps = np.diff(np.append(ordered, ordered[0] + 1.0))
    bottom = ordered[(int(np.argmax(gaps)) + 1) % len(ordered)]
    piece = wrapped + (wrapped < bottom)                   # [bottom, bottom + 1)
    piece -= np.floor((piece.min() + piece.max()) / 2)      # its middle in [0, 1)
    return np.round(piece - z)


def _to_c_axis(cell, vacuum_axis):
    """Cyclic permutation of the cell axes putting the vacuum axis last (keeps handedness)."""
    if vacuum_axis is None or vacuum_axis == 2:
        return np.array(cell, dtype=float)
    return np.array(cell[[(vacuum_axis + 1) % 3, (vacuum_axis + 2) % 3, vacuum_axis]], dtype=float)


def _perpendicular_vacuum(lattice):
    """Replace the vacuum vector by its component along the layer normal.

    A layer's symmetry does not depend on how the vacuum vector leans, but spglib's layer routine
    treats the cell as given (a leaning c hides operations), so it always sees c normal to the
    layer, with the same slab period along the normal. Cartesian positions are kept."""
    normal = np.cross(lattice[0], lattice[1])
    normal /= np.linalg.norm(normal)
    height = float(np.dot(lattice[2], normal))
    if abs(height) < 1e-6:
        raise GeometryError("the vacuum vector lies in the layer plane (slab height 0 Å)")
    lattice[2] = normal * height
    return lattice


def _check_grid(symprecs, precision):
    grid = DEFAULT_SYMPRECS if symprecs is None else symprecs
    try:
        grid = np.array(grid, dtype=float).ravel()
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"symprecs: not a list of numbers ({exc})") from exc
    if grid.size == 0 or not np.all(np.isfinite(grid)) or np.any(grid <= 0):
        raise ConfigError("symprecs: need at least one positive, finite value (Å)")
    grid = np.unique(grid)
    if not (isinstance(precision, (int, float)) and math.isfinite(precision) and precision > 1.0):
        raise ConfigError(f"precision: the bracket ratio high/low must be a number > 1, got {precision!r}")
    return tuple(float(s) for s in grid)


# ----------------------------------------------------------------------------------------------
# verdicts
# ----------------------------------------------------------------------------------------------
def _pearson3d(number, symbol):
    """Pearson symbol (International Tables) of a space group's lattice: aP mP mS oP oS ... cF."""
    system = ("a" if number <= 2 else "m" if number <= 15 else "o" if number <= 74 else
              "t" if number <= 142 else "h" if number <= 194 else "c")
    centring = symbol.strip()[0].upper()
    if system == "a":
        return "aP"
    if system == "h":
        return "hR" if centring == "R" else "hP"
    return system + ("S" if centring in "ABC" else centring)


def _pearson2d(number, symbol):
    """2D Bravais type of a layer group's lattice: mp (oblique) op oc tp hp."""
    if number <= 7:
        return "mp"
    if number <= 48:
        return "oc" if symbol.strip().lower().startswith("c") else "op"
    return "tp" if number <= 64 else "hp"


def _one_atom_cell(lattice, layer):
    """The lattice alone: one atom at the origin; for layers a long vacuum vector along the normal."""
    if layer:
        a, b = lattice[0], lattice[1]
        normal = np.cross(a, b)
        length = 10.0 * max(np.linalg.norm(a), np.linalg.norm(b), 3.0)
        lattice = np.array([a, b, normal / np.linalg.norm(normal) * length])
    return np.ascontiguousarray(lattice), np.zeros((1, 3)), np.ones(1, dtype=np.intc)


# ----------------------------------------------------------------------------------------------
# scanning a grid and bisecting between neighbours whose verdicts differ
# ----------------------------------------------------------------------------------------------
def _scan(probe, key, grid, bisect, ratio, hints=(), values=None, floor=0.0):
    """Verdicts on ``grid`` and bracketed changes between neighbours.

    ``probe(s)`` returns a verdict, ``key(verdict)`` what must change to count as a change.
    ``hints`` are (low, high) brackets from a previous, similar spectrum: they are probed first
    (so a still-valid bracket costs two calls) and the search continues from what they show.
    ``values`` are grid verdicts already known. A change in a grid interval that ends at or below
    ``floor`` (Å: what the file's printed positions cannot resolve) keeps that interval as its
    bracket (not bisected, not swept). Returns (verdicts on the grid, list of
    (low, v_low, high, v_high)).
    """
    values = [probe(s) for s in grid] if values is None else list(values)
    brackets = []
    if not bisect:
        return values, brackets
    for i in range(len(grid) - 1):
        lo, hi = grid[i], grid[i + 1]
        if key(values[i]) == key(values[i + 1]):
            continue
        if hi <= floor:
            brackets.append((lo, values[i], hi, values[i + 1]))
            continue
        points = [(lo, values[i]), (hi, values[i + 1])]
        for low, high in hints:
            for s in (low, high):
                if lo < s < hi and all(abs(math.log(s / p)) > 1e-12 for p, _ in points):
                    points.append((s, probe(s)))
        points.sort(key=lambda p: p[0])
        for (s0, v0), (s1, v1) in zip(points, points[1:]):
            if key(v0) != key(v1):
                brackets += _bisect(probe, key, s0, v0, s1, v1, ratio)
    return values, _sweep(probe, key, grid, values, brackets, ratio, floor)


SWEEP_CALLS = 100
"""The most spglib calls one scan spends probing the neighbours of a flicker (:func:`_sweep`)."""
SWEEP_STEP = 0.35
SWEEP_PROBES = 2
"""Probes in each stretch of a grid interval that holds a chain of changes (A -> B -> C), to tell a
chain from a flicker (:func:`_sweep`)."""
"""The probing step of :func:`_sweep`: ``precision ** SWEEP_STEP`` in log symprec."""


def _sweep(probe, key, grid, values, brackets, ratio, floor=0.0):
    """``brackets`` completed where spglib flickered.

    spglib's verdict is not monotonic in symprec: where one grid interval holds a change and its
    return (the verdict went A -> B -> A), or a chain of changes that a few probes contradict, it
    often flickers over a wider range than that interval, in windows of a few per cent that grid
    points a factor ~2 apart step over. So that interval and its neighbours are probed at steps of ``ratio ** SWEEP_STEP`` (1.7 % for the
    default 1.05) in log symprec, outwards, as long as the probing finds changes the grid did not
    show (at most :data:`SWEEP_CALLS` calls per scan). Windows narrower than the step can stay
    hidden. Returns all brackets, sorted, those of a probed interval replaced by what its probing
    found."""
    n = len(grid) - 1
    per = [[] for _ in range(n)]
    for b in brackets:
        i = min(max(0, int(np.searchsorted(grid, b[0], side="right")) - 1), n - 1)
        per[i].append(b)

    def flickers(i):
        """The verdict came back within the interval (A -> B -> A); or, for a chain of different
        verdicts (A -> B -> C), a few probes between its brackets disagree with it."""
        bs = sorted(per[i], key=lambda b: b[0])
        chain = [key(values[i])] + [key(b[3]) for b in bs]
        if len(set(chain)) < len(chain):
            return True
        ends = [grid[i]] + [x for b in bs for x in (b[0], b[2])] + [grid[i + 1]]
        for k in range(0, len(ends), 2):             # the stretches of one verdict between them
            lo, hi = ends[k], ends[k + 1]
            for s in np.geomspace(lo, hi, SWEEP_PROBES + 2)[1:-1] if hi / lo > ratio else ():
                if key(probe(float(s))) != chain[k // 2]:
                    return True
        return False
    busy = [i for i in range(n) if len(per[i]) >= 2 and flickers(i)]
    if not busy:
        return brackets
    step, calls = ratio ** SWEEP_STEP, [0]

    def probed(j):
        lo, hi = grid[j], grid[j + 1]
        pts = [(lo, values[j])]
        s = lo * step
        while s < hi / step ** 0.5 and calls[0] < SWEEP_CALLS:
            pts.append((s, probe(s)))
            calls[0] += 1
            s *= step
        pts.append((hi, values[j + 1]))
        out = []
        for (s0, v0), (s1, v1) in zip(pts, pts[1:]):
            if key(v0) != key(v1):
                out += _bisect(probe, key, s0, v0, s1, v1, ratio)
        return out

    done = set(busy)
    for i0 in busy:
        found = probed(i0)                  # the flickering interval itself, then outwards
        per[i0] = found if len(found) > len(per[i0]) else per[i0]
        for d in (-1, 1):
            j = i0 + d
            while (0 <= j < n and j not in done and calls[0] < SWEEP_CALLS
                   and grid[j + 1] > floor):
                done.add(j)
                found = probed(j)
                more = len(found) > len(per[j])
                per[j] = found if more else per[j]
                if not more:
                    break
                j += d
    return sorted((b for bs in per for b in bs), key=lambda b: b[0])


def _bisect(probe, key, lo, vlo, hi, vhi, ratio):
    """Bisect in log symprec until ``hi / lo <= ratio``; a third verdict in between splits it."""
    if hi / lo <= ratio:
        return [(lo, vlo, hi, vhi)]
    mid = math.sqrt(lo * hi)
    vmid = probe(mid)
    out = []
    if key(vmid) != key(vlo):
        out += _bisect(probe, key, lo, vlo, mid, vmid, ratio)
    if key(vmid) != key(vhi):
        out += _bisect(probe, key, mid, vmid, hi, vhi, ratio)
    return out


class _Prober:
    """Evaluates verdicts at one symprec and remembers failures and call counts."""

    def __init__(self, kind, lattice, frac, numbers, angle_tolerance, layer):
        self.kind, self.layer = kind, layer
        self.cell = (lattice, frac, numbers)
        self.angle_tolerance = angle_tolerance
        self.failures, self.calls, self.seen = [], 0, {}

    def __call__(self, symprec):
        if symprec not in self.seen:
            self.seen[symprec] = self._verdict(symprec)
        return self.seen[symprec]

    def _verdict(self, symprec):
        self.calls += 1
        ds, msg = _dataset(*self.cell, symprec, self.angle_tolerance, self.layer)
        if ds is None:
            self.failures.append({"kind": self.kind, "symprec": symprec, "message": msg})
            return (0, "", 0) if self.kind == "group" else None
        if self.kind == "group":
            return int(ds.number), str(ds.international), int(len(ds.rotations))
        pearson = _pearson2d if self.layer else _pearson3d
        return pearson(int(ds.number), str(ds.international))


def _group_key(verdict):
    return verdict[0], verdict[2]  # group number and operation count (lost translations count)


def _hint_brackets(previous, kind):
    if not previous:
        return ()
    return tuple((b["low"], b["high"]) for b in previous.get("breakpoints", ()) if b["kind"] == kind)


_LATTICE_CACHE: "collections.OrderedDict[tuple, tuple]" = collections.OrderedDict()
_SPECTRUM_CACHE: "collections.OrderedDict[bytes, dict]" = collections.OrderedDict()
# pure functions of their keys (no spglib answer in them), so ``clear_cache`` keeps them
_SETTINGS: "collections.OrderedDict[tuple, tuple]" = collections.OrderedDict()
_BASES: "collections.OrderedDict[tuple, np.ndarray]" = collections.OrderedDict()
_CACHE_SIZE = 512


def _cached(cache, key, compute):
    if key in cache:
        cache.move_to_end(key)
        return cache[key], True
    value = compute()
    cache[key] = value
    if len(cache) > _CACHE_SIZE:
        cache.popitem(last=False)
    return value, False


def _lattice_spectrum(lattice, angle_tolerance, layer, grid, bisect, ratio, shortcut):
    """Lattice-only verdicts and brackets, cached on the exact lattice (fixed-cell runs: one call).

    With ``shortcut`` the grid is walked upwards only until spglib gives the type it gives at the
    largest symprec (the holohedry it settles on); the grid points above are given that type
    without asking (spglib's lattice search takes ~10 ms per call for cubic cells). This assumes
    the lattice verdict does not leave and come back above that point; ``shortcut=False`` asks
    at every grid point. Returns (values, brackets, failures, calls, first assumed symprec|None).
    """
    one = _one_atom_cell(lattice, layer)
    key = (one[0].tobytes(), float(angle_tolerance), layer, grid, bisect, float(ratio), shortcut)

    def compute():
        prober = _Prober("lattice", *one, angle_tolerance, layer)
        values, assumed = None, None
        if shortcut and len(grid) > 2:
            top = prober(grid[-1])
            values = []
            for i, s in enumerate(grid[:-1]):
                values.append(prober(s))
                if values[-1] == top and top is not None:
                    values += [top] * (len(grid) - 1 - len(values)) + [top]
                    assumed = grid[i + 1] if i + 1 < len(grid) - 1 else None
                    break
            else:
                values.append(top)
        values, brackets = _scan(prober, lambda v: v, grid, bisect, ratio, values=values)
        return tuple(values), tuple(brackets), tuple(prober.failures), prober.calls, assumed

    value, hit = _cached(_LATTICE_CACHE, key, compute)
    return value, hit


# ----------------------------------------------------------------------------------------------
# public: spectrum
# ----------------------------------------------------------------------------------------------
def spectrum(cell, positions, numbers, *, symprecs=None, angle_tolerance=-1.0, vacuum_axis=None,
             bisect=True, precision=DEFAULT_PRECISION, previous=None, lattice_shortcut=True,
             lattice_bisect=None, floor=0.0):
    """spglib's verdict across a symprec grid, and where it changes.

    Parameters
    ----------
    cell : (3, 3) rows are lattice vectors, Å.  positions : (N, 3) cartesian Å.  numbers : (N,) int.
    symprecs : grid of spglib ``symprec`` values, Å (default ``DEFAULT_SYMPRECS``: 17 log-spaced
        values, 1e-5 to 0.3 Å). Sorted and de-duplicated.
    angle_tolerance : spglib's, degrees (-1: spglib's default). Not applied by spglib 2.8's layer
        routine (see ``angle_tolerance_applied``).
    vacuum_axis : None for bulk (space groups, 3D Pearson symbols), or 0/1/2 for a layer (layer
        groups 1-80, 2D lattice types ``mp op oc tp hp``).
    bisect : bracket every change between neighbouring grid points.
    lattice_bisect : bracket the lattice-only changes too (default: as ``bisect``). The run record
        asks for the structure's brackets of its final frame only (what the tolerance advice reads).
    precision : bracket ratio: each breakpoint has ``high / low <= precision`` (default 1.02).
    floor : Å; a group change in a grid interval ending at or below it is not bisected (its
        bracket is that interval): twice the file's printed precision of positions, below which
        the file cannot tell the verdicts apart (0: bisect every change).
    previous : the spectrum of a similar earlier frame (e.g. the previous ionic step); its group
        breakpoints are probed first, so a bracket that still holds costs two spglib calls instead
        of ~6. The result is still decided by spglib on this frame only (brackets may differ from
        a cold run's when several changes are close). Measured: 35-50% fewer calls but only
        5-20% less time, because the calls left are the slow ones next to a change. Exact repeats
        of a frame are served from a cache (``calls`` = 0); the lattice-only spectrum is cached on
        the exact lattice, so a fixed-cell run computes it once.
    lattice_shortcut : stop asking spglib about the lattice alone once it gives the type it gives
        at the largest symprec, and take that type for the grid points above
        (``lattice_assumed_from`` says from where; None when every point was asked). False: ask
        at every grid point.

    Returns
    -------
    dict with ``symprec`` (the grid, Å), ``angle_tolerance``, ``group`` (number per symprec, 0
    where spglib failed), ``group_symbol``, ``operations`` (operations spglib lists for the input
    cell: only those integral in its basis, times its pure translations), ``lattice`` (Bravais
    type of the *cell's* lattice alone, None where spglib failed; for a supercell this can be
    lower than the crystal's translation lattice, e.g. ``op`` for an orthohexagonal cell of a
    hexagonal layer), ``breakpoints``
    (dicts ``kind`` "group"|"lattice", ``low``/``high`` Å with spglib's verdict ``from`` at
    ``low`` and ``to`` at ``high``; group ones also carry symbols and operation counts),
    ``failures`` (``kind``, ``symprec``, ``message``), ``spglib_version``, ``vacuum_axis``,
    ``precision``, ``calls`` (spglib calls made for this result).

    Notes
    -----
    A group change is a change of the group number *or* of the operation count (a supercell that
    loses a translation keeps its group type but not its group). Changes are searched only between
    neighbouring grid points whose verdicts differ: an excursion that leaves and returns between two
    grid points (e.g. A -> B -> A) is not found, so the grid spacing bounds what is seen. Verdicts
    need not be monotonic in symprec; every change found is reported, including ones to a lower
    group. Bisection also reports every change it meets inside one grid interval.
    """
    grid = _check_grid(symprecs, precision)
    lattice, frac, nums = _prepare(cell, positions, numbers, vacuum_axis)
    angle_tolerance = float(angle_tolerance)
    hints = _hint_brackets(previous, "group")
    lattice_bisect = bool(bisect) if lattice_bisect is None else bool(lattice_bisect)
    digest = hashlib.sha1(b"".join([
        lattice.tobytes(), frac.tobytes(), nums.tobytes(), np.array(grid).tobytes(),
        repr((angle_tolerance, vacuum_axis, bool(bisect), float(precision), hints,
              bool(lattice_shortcut), lattice_bisect, float(floor))).encode(),
    ])).digest()
    result, hit = _cached(_SPECTRUM_CACHE, digest, lambda: _spectrum(
        lattice, frac, nums, grid, angle_tolerance, vacuum_axis, bool(bisect), float(precision), hints,
        bool(lattice_shortcut), lattice_bisect, float(floor)))
    result = _copy(result)
    if hit:
        result["calls"] = 0
    return result


def _copy(result):
    """A copy of a spectrum the caller may change (its leaves are numbers, strings and None; the
    lists and the dicts in them are copied, which is all ``copy.deepcopy`` did, 20x faster)."""
    out = {}
    for k, v in result.items():
        if isinstance(v, list):
            v = [dict(x) if isinstance(x, dict) else x for x in v]
        out[k] = v
    return out


def _spectrum(lattice, frac, nums, grid, angle_tolerance, vacuum_axis, bisect, ratio, hints,
              lattice_shortcut, lattice_bisect=None, floor=0.0):
    layer = vacuum_axis is not None
    prober = _Prober("group", lattice, frac, nums, angle_tolerance, layer)
    groups, gbrackets = _scan(prober, _group_key, grid, bisect, ratio, hints, floor=floor)
    (lats, lbrackets, lfail, lcalls, assumed), lhit = _lattice_spectrum(
        lattice, angle_tolerance, layer, grid, bisect if lattice_bisect is None else lattice_bisect,
        ratio, lattice_shortcut)
    failures = prober.failures + [dict(f) for f in lfail]
    if all(g[0] == 0 for g in groups) and all(v is None for v in lats):
        msgs = sorted({f["message"] for f in failures})
        raise SymmetryError(f"spglib failed at every symprec in {grid[0]:g}..{grid[-1]:g} Å: "
                            + "; ".join(msgs))
    breakpoints = [{"kind": "group", "low": lo, "high": hi, "from": vlo[0], "to": vhi[0],
                    "from_symbol": vlo[1], "to_symbol": vhi[1],
                    "from_operations": vlo[2], "to_operations": vhi[2]}
                   for lo, vlo, hi, vhi in gbrackets]
    breakpoints += [{"kind": "lattice", "low": lo, "high": hi, "from": vlo, "to": vhi}
                    for lo, vlo, hi, vhi in lbrackets]
    breakpoints.sort(key=lambda b: (b["low"], b["kind"]))
    return {
        "symprec": list(grid),
        "angle_tolerance": angle_tolerance,
        "angle_tolerance_applied": (not layer) or _layer_angle_tolerance_applied(),
        "vacuum_axis": vacuum_axis,
        "group_kind": "layer" if layer else "space",
        "group": [g[0] for g in groups],
        "group_symbol": [g[1] for g in groups],
        "operations": [g[2] for g in groups],
        "lattice": list(lats),
        "lattice_assumed_from": assumed,
        "breakpoints": breakpoints,
        "failures": sorted(failures, key=lambda f: (f["kind"], f["symprec"])),
        "precision": ratio,
        "spglib_version": spglib.__version__,
        "calls": prober.calls + (0 if lhit else lcalls),
    }


# ----------------------------------------------------------------------------------------------
# one group at one symprec, and how two groups of one run relate
# ----------------------------------------------------------------------------------------------
def group_at(cell, positions, numbers, symprec, *, angle_tolerance=-1.0, vacuum_axis=None) -> dict:
    """spglib's group of one structure at one ``symprec`` (Å), with what :func:`relation` compares.

    Returns ``{"group", "symbol", "operations", "rotations", "centring"}``: the space-group number
    (layer group for layers; 0 where spglib failed), its symbol, the number of operations spglib
    lists for the input cell, the distinct point operations as integer matrices in the input cell's
    own basis (sorted), and the pure translations (fractional, sorted, each component in [0, 1)).
    Shares spglib's answers with :func:`spectrum` (memoised on the exact input).
    """
    lattice, frac, nums = _prepare(cell, positions, numbers, vacuum_axis)
    ds, _ = _dataset(lattice, frac, nums, float(symprec), float(angle_tolerance),
                     vacuum_axis is not None)
    if ds is None:
        return {"group": 0, "symbol": "", "operations": 0, "rotations": [], "centring": []}
    rot = np.asarray(ds.rotations, dtype=int)
    unique = np.unique(rot.reshape(len(rot), 9), axis=0).tolist()   # sorted, as tuples sort
    centring = np.mod(np.round(_pure_translations(ds), 6), 1.0)
    centring = sorted({tuple(float(x) % 1.0 for x in t) for t in centring})
    return {"group": int(ds.number), "symbol": str(ds.international), "operations": int(len(rot)),
            "rotations": unique, "centring": [list(t) for t in centring],
            "point_order": POINT_ORDER.get(str(getattr(ds, "pointgroup", "")).strip())}


# orders of the 32 crystallographic point groups, by the symbols spglib gives them (International
# Tables for Crystallography Vol. A; the orders written from memory, each the number of its
# operations: checked in the tests against spglib's own operation counts of primitive cells)
POINT_ORDER = {"1": 1, "-1": 2, "2": 2, "m": 2, "2/m": 4, "222": 4, "mm2": 4, "mmm": 8,
               "4": 4, "-4": 4, "4/m": 8, "422": 8, "4mm": 8, "-42m": 8, "4/mmm": 16,
               "3": 3, "-3": 6, "32": 6, "3m": 6, "-3m": 12, "6": 6, "-6": 6, "6/m": 12,
               "622": 12, "6mm": 12, "-6m2": 12, "6/mmm": 24,
               "23": 12, "m-3": 24, "432": 24, "-43m": 24, "m-3m": 48}


PYMATGEN_ANGLE = 5.0
"""Degrees: the ``angle_tolerance`` pymatgen's ``SpacegroupAnalyzer`` uses by default (spglib's
own default, -1, is what the spectra use unless configured). A cell a fraction of a degree from a
higher lattice is that lattice at 5 degrees whatever the symprec: the tolerance advice is checked
at it (:func:`angle_check`)."""


def angle_check(cell, positions, numbers, symprec, *, angle_tolerance=-1.0, vacuum_axis=None,
                expect=None) -> dict | None:
    """Is spglib's group at ``symprec`` (Å) the same with the other common ``angle_tolerance``
    (:data:`PYMATGEN_ANGLE`, or spglib's default -1 when the spectra use 5 degrees)?

    A bulk cell compares the 3D group at the other angle with ``expect`` (group number, operation
    count: the advice's plateau, asked at ``angle_tolerance``); a layer (``vacuum_axis``) compares
    spglib's 3D space group at both angles (spglib's layer routine takes no angle, and a user's 3D
    library gives the space group) of the cell as given, leaning vacuum vector and all, which is
    what that library sees (``"cell": "as given"``), or, for ASE's 2D convention (a zero vacuum
    vector), of the slab spglib's layer routine is given (``"slab"``). Returns ``{"symprec",
    "angle_tolerance" (the other one), "group", "group_symbol", "operations", "same", "kind":
    "space"}`` plus, for a layer, ``"at_configured"`` [group, symbol, operations] and ``"cell"``;
    None where spglib fails."""
    alt = -1.0 if float(angle_tolerance) == PYMATGEN_ANGLE else PYMATGEN_ANGLE
    slab = vacuum_axis is not None and not np.any(np.asarray(cell, float)[vacuum_axis])
    lattice, frac, nums = _prepare(cell, positions, numbers, vacuum_axis if slab else None)

    def space(angle):
        ds, _ = _dataset(lattice, frac, nums, float(symprec), float(angle), False)
        return None if ds is None else (int(ds.number), str(ds.international), len(ds.rotations))
    other = space(alt)
    mine = space(angle_tolerance) if vacuum_axis is not None else \
        (None if expect is None else (int(expect[0]), "", int(expect[1])))
    if other is None or mine is None:
        return None
    out = {"symprec": float(symprec), "angle_tolerance": alt, "group": other[0],
           "group_symbol": other[1], "operations": other[2], "kind": "space",
           "same": (other[0], other[2]) == (mine[0], mine[2])}
    if vacuum_axis is not None:
        out.update(at_configured=list(mine), cell="slab" if slab else "as given")
    return out


def primitive_lattice(cell, positions, numbers, symprec, *, angle_tolerance=-1.0, vacuum_axis=None):
    """The structure's translation lattice at ``symprec``: the input lattice plus the pure
    translations spglib finds (rows, cartesian Å, input orientation). For a layer the axes are
    permuted cyclically so that the vacuum vector is the last row. A supercell of a smaller cell
    (e.g. R-3m written in hexagonal axes) gives the smaller cell's lattice. Raises SymmetryError
    when spglib fails at this symprec."""
    lattice, frac, nums = _prepare(cell, positions, numbers, vacuum_axis)
    ds, msg = _dataset(lattice, frac, nums, float(symprec), float(angle_tolerance),
                       vacuum_axis is not None)
    if ds is None:
        raise SymmetryError(f"spglib found no symmetry at symprec={symprec:g} Å: {msg}")
    T = _pure_translations(ds)
    basis = _translation_basis(T) if len(T) > 1 else None
    return lattice.copy() if basis is None else basis @ lattice


def relation(before: dict, after: dict) -> str:
    """How the group ``after`` relates to ``before`` (two :func:`group_at` results of one run).

    Both are taken in the run's own cell basis, which a relaxation deforms continuously, so an
    operation kept by the relaxation is the same integer matrix in both. The comparison is by
    inclusion of the point operations and of the pure (centring) translations:
    ``"same"`` (equal sets, same group number), ``"supergroup"`` (``after`` contains ``before``:
    symmetry gained), ``"subgroup"`` (symmetry lost), ``"unrelated"`` (neither contains the other,
    or equal sets with another group number and point group of the same order, e.g. a screw axis
    replacing a rotation axis), or ``"unknown"`` when spglib failed on either. Equal sets in the
    cell with a larger point group (``point_order``) on one side: that group's other operations do
    not map this cell's lattice onto itself (a supercell: P-1 to C2/m in a doubled cell), and the
    group with the larger point group contains the other. Glide and screw parts and origin choices
    are not compared: an inclusion here is of the point-group-and-centring level (a necessary
    condition).
    """
    if not before.get("group") or not after.get("group"):
        return "unknown"

    def sets(g):
        return ({tuple(r) for r in g["rotations"]},
                {tuple(round(x, 5) % 1.0 for x in t) for t in g["centring"]})

    ra, ta = sets(before)
    rb, tb = sets(after)
    if ra == rb and ta == tb:
        if before["group"] == after["group"]:
            return "same"
        na, nb = before.get("point_order"), after.get("point_order")
        if na and nb and na != nb:
            return "supergroup" if nb > na else "subgroup"
        return "unrelated"
    if ra <= rb and ta <= tb:
        return "supergroup"
    if rb <= ra and tb <= ta:
        return "subgroup"
    return "unrelated"


# ----------------------------------------------------------------------------------------------
# the full group in the input setting, and the Reynolds projection
# ----------------------------------------------------------------------------------------------
def _snap(matrix, denominator=720, tol=1e-8):
    """Round entries that are within ``tol`` of a multiple of 1/denominator (removes fp noise)."""
    scaled = matrix * denominator
    near = np.abs(scaled - np.round(scaled)) < tol * denominator
    return np.where(near, np.round(scaled) / denominator, matrix)


def _std_operations(ds, layer):
    """The whole group's operations in the standardised basis of ``ds`` (exact rationals).

    Bulk: spglib's database for ``ds.hall_number``. Layers (no database in spglib 2.8): spglib's
    layer routine on the idealised standard cell, accepted only if it finds the same layer group.
    Returns (rotations, translations) or None.
    """
    if not layer:
        return _database_operations(int(ds.hall_number))
    std, _ = _dataset(np.array(ds.std_lattice), np.array(ds.std_positions),
                      np.array(ds.std_types, dtype=np.intc), 1e-5, -1.0, True)
    if std is None or int(std.number) != int(ds.number):
        return None
    return np.array(std.rotations, dtype=float), np.array(std.translations, dtype=float)


@functools.lru_cache(maxsize=None)
def _database_operations(hall_number):
    """spglib's operations for a Hall number (its database: the same answer every time), as
    read-only float arrays, or None."""
    db, _ = _call(spglib.get_symmetry_from_database, hall_number)
    if db is None:
        return None
    return _read_only(np.array(db["rotations"], dtype=float)), \
        _read_only(np.array(db["translations"], dtype=float))


def _read_only(a):
    a.setflags(write=False)
    return a


def _first_of_each(rows):
    """Sorted indices of the first occurrence of each distinct row (what ``np.unique(...,
    axis=0, return_index=True)`` then ``np.sort`` give, -0.0 and 0.0 equal), without sorting."""
    seen, first = set(), []
    for i, r in enumerate(rows + 0.0):   # + 0.0: -0.0 becomes 0.0, as np.unique compares
        b = r.tobytes()
        if b not in seen:
            seen.add(b)
            first.append(i)
    return np.array(first, dtype=np.intp)


def _group_in_input_setting(ds, layer):
    """Point-operation representatives (one per rotation) of the whole group, input basis.

    With x_std = P x + p (spglib's transformation_matrix P and origin_shift p), an operation
    (W_s, w_s) of the standard setting acts on input fractional coordinates as
    W = P^-1 W_s P, w = P^-1 (W_s p + w_s - p). W need not be integral when the input cell is a
    supercell whose lattice lacks some of the crystal's symmetry (e.g. an orthohexagonal cell);
    that is why the input cell's own operation list (only the integral ones) is not enough.
    Returns (W (k, 3, 3), w (k, 3), complete: bool).
    """
    ops = _std_operations(ds, layer)
    if ops is None:  # fall back to the operations integral in the input cell (a subgroup)
        rot, tr = np.array(ds.rotations, dtype=float), np.array(ds.translations, dtype=float)
        first = _first_of_each(np.round(rot, 6).reshape(len(rot), -1))
        return rot[first], tr[first], False
    P = _snap(np.array(ds.transformation_matrix, dtype=float))
    rs, ts = ops
    (Pinv, rot, rs, ts), _ = _cached(_SETTINGS, (P.tobytes(), rs.tobytes(), ts.tobytes()),
                                     lambda: _rotations_in_setting(P, rs, ts))
    p = np.array(ds.origin_shift, dtype=float)
    return rot, np.einsum("ij,kj->ki", Pinv, np.einsum("kij,j->ki", rs, p) + ts - p), True


def _rotations_in_setting(P, rs, ts):
    """For ``_group_in_input_setting``: P^-1, the distinct rotations P^-1 W_s P (first of each,
    in order) and the standard operations (W_s, w_s) they come from; read-only arrays."""
    Pinv = _snap(np.linalg.inv(P))
    rot = np.einsum("ij,kjl,lm->kim", Pinv, rs, P)
    first = _first_of_each(np.round(rot, 6).reshape(len(rot), -1))
    return tuple(map(_read_only, (Pinv, rot[first], rs[first], ts[first])))


def _pure_translations(ds):
    rot = np.array(ds.rotations)
    mask = np.all(rot == np.eye(3, dtype=rot.dtype), axis=(1, 2))
    return np.array(ds.translations, dtype=float)[mask]


def _integer_basis(rows):
    """Basis (3 integer rows, upper triangular) of the lattice generated by integer ``rows``."""
    pool = [list(map(int, r)) for r in rows if any(r)]
    basis = []
    for col in range(3):
        while True:
            nonzero = sorted((r for r in pool if r[col] != 0), key=lambda r: abs(r[col]))
            if len(nonzero) <= 1:
                break
            pivot = nonzero[0]
            for r in nonzero[1:]:
                q = r[col] // pivot[col]
                for k in range(3):
                    r[k] -= q * pivot[k]
        nonzero = [r for r in pool if r[col] != 0]
        basis.append(nonzero[0])
        pool = [r for r in pool if r is not nonzero[0] and any(r)]
    return np.array(basis, dtype=float)


def _translation_basis(translations):
    """Rows: a basis of the lattice generated by the input lattice and ``translations`` (input
    fractional, each a multiple of 1/len), or None if they are not such multiples. Cached on
    the rounded multiples; read-only."""
    n = len(translations)
    scaled = translations * n
    rounded = np.round(scaled)
    if np.abs(scaled - rounded).max() > 1e-5 * n:
        return None
    basis, _ = _cached(_BASES, (n, rounded.tobytes()), lambda: _read_only(
        _integer_basis(np.vstack([n * np.eye(3), rounded])) / n))
    return basis


def _primitive_basis(lattice, translations):
    """Rows: a basis of the primitive lattice (input lattice plus the pure translations), in input
    fractional coordinates, Niggli-reduced for clean minimum images. None if the translations are
    not multiples of 1/len(translations) (then the input lattice is used)."""
    n = len(translations)
    if n <= 1:
        return np.eye(3)
    basis = _translation_basis(translations)
    if basis is None or abs(abs(np.linalg.det(basis)) * n - 1.0) > 1e-8:
        return None
    reduced, _ = _call(spglib.niggli_reduce, basis @ lattice)
    if reduced is not None:
        candidate = _snap(np.array(reduced) @ np.linalg.inv(lattice), denominator=n, tol=1e-6)
        if abs(abs(np.linalg.det(candidate)) * n - 1.0) < 1e-8:
            basis = candidate
    return basis


def _match(images, frac, numbers_src, numbers, lattice, basis):
    """For images (k, M, 3) of M atoms, the nearest atom of ``frac`` (N, 3) with the same species,
    modulo the lattice whose basis rows (input fractional) are ``basis``.
    Returns (target (k, M), offset (k, M, 3) frac, distance (k, M) Å)."""
    diff = images[:, :, None, :] - frac[None, None, :, :]
    inv = np.linalg.inv(basis)
    z = diff @ inv
    diff = (z - np.round(z)) @ basis
    cart = diff @ lattice
    dist2 = np.einsum("knmi,knmi->knm", cart, cart)
    dist2[:, numbers_src[:, None] != numbers[None, :]] = np.inf
    target = np.argmin(dist2, axis=2)
    k_idx, i_idx = np.indices(target.shape)
    return target, diff[k_idx, i_idx, target], np.sqrt(dist2[k_idx, i_idx, target])


def _average(frac, numbers, lattice, rotations, translations, basis, chunk_elems=3_000_000):
    """Reynolds average over operations acting on a periodic structure (input fractional coords).

    Each operation must permute the atoms modulo the lattice with basis rows ``basis``; atom j
    receives the offset of the image that lands on it. Returns (averaged frac, orbit targets
    (k, N), largest matched distance Å); SymmetryError if an operation is not a permutation.
    """
    n = len(frac)
    acc = np.zeros_like(frac)
    targets, worst = [], 0.0
    step = max(1, chunk_elems // (3 * n * n))
    for start in range(0, len(rotations), step):
        W, w = rotations[start:start + step], translations[start:start + step]
        images = np.einsum("kij,nj->kni", W, frac) + w[:, None, :]
        target, offset, dist = _match(images, frac, numbers, numbers, lattice, basis)
        if np.any(np.sort(target, axis=1) != np.arange(n)):
            raise SymmetryError("the group's operations do not map the atoms onto one another "
                                "(symprec too large for this structure?)")
        np.add.at(acc, target.ravel(), offset.reshape(-1, 3))
        targets.append(target)
        worst = max(worst, float(dist.max()))
    return frac + acc / len(rotations), np.vstack(targets), worst


def _translation_average(frac, numbers, lattice, T, basis, ds):
    """Average over the pure translations T. Returns (y, representative atom of each atom's class).

    An atom's images under T are the atoms of its primitive class (spglib's mapping_to_primitive),
    so the average is the mean minimum-image offset within each class (O(N |T|) work); if spglib's
    classes do not have |T| members each, every translation is matched explicitly instead."""
    if len(T) == 1 and not T.any():   # the identity alone: every atom is its own class
        return frac + 0.0, np.arange(len(frac))
    classes = np.asarray(getattr(ds, "mapping_to_primitive", np.zeros(0)), dtype=int)
    counts = np.bincount(classes) if classes.shape == (len(frac),) else np.zeros(0)
    if len(T) > 1 and counts.size and np.all(counts == len(T)):
        y = frac.copy()
        rep_of = np.empty(len(frac), dtype=int)
        inv = np.linalg.inv(basis)
        for c in range(counts.size):
            idx = np.flatnonzero(classes == c)
            if np.any(numbers[idx] != numbers[idx[0]]):
                break
            d = frac[idx][:, None, :] - frac[idx][None, :, :]  # d[i, j] = x_i - x_j
            z = d @ inv
            y[idx] = frac[idx] + ((z - np.round(z)) @ basis).mean(axis=0)
            rep_of[idx] = idx[0]
        else:
            return y, rep_of
    eye = np.repeat(np.eye(3)[None], len(T), axis=0)
    y, orbit, _ = _average(frac, numbers, lattice, eye, T, np.eye(3))
    return y, orbit.min(axis=0)


_INVARIANT_TOL = 1e-6
"""Å: how far a projected configuration's images under its group may lie from its atoms (float
rounding; a consistent group gives ~1e-13)."""


def _projection(lattice, frac, numbers, symprec, angle_tolerance, layer, ds=None):
    """Symmetric positions (input fractional) for the group found at symprec; see
    ``displacement_to_group``. ``ds``: the dataset of another structure of the same atoms in the
    same cell basis (an earlier frame of the run), whose instance of the group is projected on.
    Returns (dataset, point rotations, xbar, cart shift, complete)."""
    if ds is None:
        ds, msg = _dataset(lattice, frac, numbers, symprec, angle_tolerance, layer)
        if ds is None:
            raise SymmetryError(f"spglib found no symmetry at symprec={symprec:g} Å: {msg}")
    rot, tr, complete = _group_in_input_setting(ds, layer)
    T = _pure_translations(ds)
    basis = _primitive_basis(lattice, T) if complete else None
    if basis is None:  # only the operations integral in the input cell
        rot, tr, complete = (np.array(ds.rotations, dtype=float), np.array(ds.translations, dtype=float),
                             False)
        T, basis = np.zeros((1, 3)), np.eye(3)
    # 1) pure translations: y becomes periodic with the primitive lattice
    y, rep_of = _translation_average(frac, numbers, lattice, T, basis, ds)
    reps = np.unique(rep_of)
    # 2) one operation per point operation, acting on the classes (modulo the primitive lattice)
    ybar, _, _ = _average(y[reps], numbers[reps], lattice, rot, tr, basis)
    # spglib's operations at a loose symprec can pair the atoms inconsistently (a dataset naming
    # a group whose operations it does not all hold, atoms moved by more than half a primitive
    # cell): the average is then not invariant; refuse it. Checked: each class is one point
    # modulo the primitive lattice, and the classes' points map onto one another under the
    # point operations.
    z = (y - y[rep_of]) @ np.linalg.inv(basis)
    off = float(np.linalg.norm(((z - np.round(z)) @ basis) @ lattice, axis=1).max())
    if off <= _INVARIANT_TOL:
        off = _average(ybar, numbers[reps], lattice, rot, tr, basis)[2]
    if off > _INVARIANT_TOL:
        raise SymmetryError(f"spglib's operations at symprec={symprec:g} Å do not form a group of "
                            f"this structure (its symmetric configuration is {off:.2g} Å off "
                            f"its own images): no displacement to {ds.international}")
    index = np.searchsorted(reps, rep_of)
    xbar = ybar[index] + (y - y[rep_of])
    # minimum over origin choices: a uniform shift of a symmetric configuration stays symmetric
    # (under the translated group); removing the mean displacement is the least-squares shift.
    shift = (xbar - frac) @ lattice
    shift -= shift.mean(axis=0)
    xbar = frac + shift @ np.linalg.inv(lattice)
    return ds, rot, xbar, shift, complete


def _metric_average(lattice, rotations):
    """Group average of the metric tensor, sum_W W^T G W / k (the nearest invariant metric)."""
    G = lattice @ lattice.T
    return np.einsum("kji,jl,klm->im", rotations, G, rotations) / len(rotations)


def _strain_norm(lattice, rotations, layer):
    """Frobenius norm of the Green-Lagrange strain E = (F^T F - I)/2 from the input lattice to the
    group-averaged one (same orientation; eigenvalues of E are (eig(G^-1 Gbar) - 1)/2).
    For layers only the in-plane 2x2 block counts (the vacuum vector is not a lattice vector)."""
    G, Gbar = lattice @ lattice.T, _metric_average(lattice, rotations)
    if layer:
        G, Gbar = G[:2, :2], Gbar[:2, :2]
    lam = np.linalg.eigvals(np.linalg.solve(G, Gbar)).real
    return float(0.5 * np.sqrt(np.sum((lam - 1.0) ** 2)))


# ----------------------------------------------------------------------------------------------
# public: displacement, drift table, symmetrize, versions
# ----------------------------------------------------------------------------------------------
def displacement_to_group(cell, positions, numbers, symprec, *, angle_tolerance=-1.0, vacuum_axis=None):
    """Displacement the atoms need to be exactly symmetric under the group spglib finds at ``symprec``.

    Method: the Reynolds projection (average over the group's operations) in the input cell's
    fractional coordinates, first over the pure translations, then over one operation per point
    operation of the *whole* group (taken from spglib's standard setting and transformed to the
    input basis, so supercells whose lattice lacks part of the symmetry are treated right). The
    result is invariant under the group by construction; the best uniform shift (origin choice) is
    then applied, which removes the mean displacement. Distances are minimum-image, cartesian Å
    with the *input* lattice; the lattice change needed is reported separately as ``strain``.
    For a fixed-cell relaxation (symmetric lattice, strain ~ 0) this is the whole drift.

    What it is and is not: the projection is the least-squares nearest configuration invariant
    under *this* instance of the group (spglib's operations at this symprec, any origin), for the
    atom matching those operations induce, exactly so when the lattice is already symmetric and
    to first order in the strain otherwise. Other orientations or settings of the same group type
    are not searched, so it is an upper bound on the displacement to that group type.

    Returns dict: ``group`` (number; layer group for layers), ``symbol``, ``symprec`` Å,
    ``angle_tolerance``, ``rms`` and ``max`` Å (per-atom displacement), ``max_atom`` (index),
    ``strain`` (Frobenius norm of the Green-Lagrange strain to the group-averaged lattice,
    unitless), ``operations`` (the group's operations in the input cell, pure translations
    included, as spglib and the spectrum count them), ``point_operations`` (one per point
    operation: those averaged), ``complete`` (False if only the operations integral in the input
    cell could be used: then the displacement is to a subgroup and may be too small). ``max`` is
    taken at the origin that minimises the rms, so one atom of N displaced by d shows
    (N - 1) d / N. Raises SymmetryError if spglib fails at this symprec, or when its operations
    there are no group of the structure (an inconsistent dataset at a loose symprec).
    """
    lattice, frac, nums = _prepare(cell, positions, numbers, vacuum_axis)
    layer = vacuum_axis is not None
    ds, _ = _dataset(lattice, frac, nums, float(symprec), float(angle_tolerance), layer)
    if ds is not None and len(ds.rotations) == 1:
        # the identity alone (P1 / p1, no pure translation): every configuration is symmetric
        rms = peak = strain = 0.0
        worst, point, complete = 0, 1, True
    else:
        ds, rot, _, shift, complete = _projection(lattice, frac, nums, float(symprec),
                                                  float(angle_tolerance), layer)
        rms, peak, worst = _sizes(shift)
        strain, point = _strain_norm(lattice, rot, layer), int(len(rot))
    return {
        "group": int(ds.number), "symbol": str(ds.international),
        "symprec": float(symprec), "angle_tolerance": float(angle_tolerance),
        "rms": rms, "max": peak, "max_atom": worst, "strain": strain,
        "operations": int(len(ds.rotations)), "point_operations": point,
        "complete": bool(complete),
    }


def symmetrize(cell, positions, numbers, symprec, *, angle_tolerance=-1.0, vacuum_axis=None):
    """The symmetric configuration behind ``displacement_to_group``: (cell (3, 3) Å, positions (N, 3)
    cartesian Å, group number). The cell is the group-averaged lattice in the input orientation
    (right stretch U = sqrt(F^T F), no rotation); for layers the vacuum vector is left alone."""
    lattice, frac, nums = _prepare(cell, positions, numbers, vacuum_axis)
    layer = vacuum_axis is not None
    ds, rot, xbar, _, _ = _projection(lattice, frac, nums, float(symprec), float(angle_tolerance), layer)
    Gbar = _metric_average(lattice, rot)
    Linv = np.linalg.inv(lattice)
    C = Linv @ Gbar @ Linv.T
    vals, vecs = np.linalg.eigh((C + C.T) / 2)
    U = vecs @ np.diag(np.sqrt(vals)) @ vecs.T
    new = lattice @ U
    if layer:
        new[2] = lattice[2]
    positions_out = xbar @ new
    if layer:  # give back the user's own vacuum vector (cartesian positions do not depend on it)
        new[2] = _to_c_axis(np.asarray(cell, dtype=float), vacuum_axis)[2]
    if vacuum_axis is not None and vacuum_axis != 2:  # undo the cyclic permutation
        new = new[np.argsort([(vacuum_axis + 1) % 3, (vacuum_axis + 2) % 3, vacuum_axis])]
    return new, positions_out, int(ds.number)


def displacement_from(start, cell, positions, numbers, symprec, *, angle_tolerance=-1.0,
                      vacuum_axis=None) -> dict:
    """How far the atoms of ``start`` (cell, positions: another structure of the same atoms in
    the same cell basis, e.g. a run's first frame) are from the symmetric configuration of the
    group spglib finds on this structure at ``symprec``: the projection of ``displacement_to_group``
    with *this* structure's instance of the group (its operations, its atom classes), applied to
    ``start``. Returns ``{"rms", "max"}`` Å, or ``{"error"}`` when the operations do not map
    ``start``'s atoms onto one another (a structure too far from the group)."""
    lattice, frac, nums = _prepare(cell, positions, numbers, vacuum_axis)
    layer = vacuum_axis is not None
    ds, msg = _dataset(lattice, frac, nums, float(symprec), float(angle_tolerance), layer)
    if ds is None:
        return {"error": f"spglib found no symmetry at symprec={symprec:g} Å: {msg}"}
    lat0, frac0, nums0 = _prepare(start[0], start[1], numbers, vacuum_axis)
    try:
        _, _, _, shift, _ = _projection(lat0, frac0, nums0, float(symprec),
                                        float(angle_tolerance), layer, ds=ds)
    except SymmetryError as exc:
        return {"error": str(exc)}
    rms, peak, _ = _sizes(shift)
    return {"rms": rms, "max": peak}


def _sizes(shift):
    """(RMS Å, max Å, index of the largest) of per-atom displacements (N, 3) cartesian Å."""
    norms = np.linalg.norm(shift, axis=1)
    return float(np.sqrt(np.mean(norms ** 2))), float(norms.max()), int(np.argmax(norms))


def drift_table(cell, positions, numbers, spec, *, vacuum_axis=None, start=None):
    """Displacement to each group seen in ``spec`` (a ``spectrum`` result for this structure).

    One entry per instance of a group: a group number with an operation count (the same group
    with more pure translations, a gained c/2 or centring, is another instance), keyed by the
    group number as str, or ``"number/operations"`` for a further instance of a number already
    keyed; each entry is ``displacement_to_group`` at the smallest symprec at which spglib gave
    that instance (grid points and bisection bracket ends), or ``{"group", "operations",
    "symprec", "error"}`` when that failed. ``vacuum_axis`` defaults to the spectrum's own.
    ``start`` (cell, positions of the run's first frame, same atoms): each entry also gets
    ``start`` = :func:`displacement_from` that frame to the same instance of the group (where the
    atoms came from: a structure that settled onto the group starts far and ends close).
    """
    axis = spec.get("vacuum_axis") if vacuum_axis is None else vacuum_axis
    if "vacuum_axis" in spec and spec["vacuum_axis"] != axis:
        raise GeometryError(f"vacuum_axis={vacuum_axis!r} but the spectrum was computed with "
                            f"vacuum_axis={spec['vacuum_axis']!r}")
    smallest = {}
    seen = list(zip(spec["symprec"], spec["group"], spec["operations"]))
    for b in spec["breakpoints"]:
        if b["kind"] == "group":
            seen += [(b["low"], b["from"], b["from_operations"]),
                     (b["high"], b["to"], b["to_operations"])]
    for s, g, k in seen:
        if g and s < smallest.get((g, k), math.inf):
            smallest[(g, k)] = s
    table = {}
    for (g, k), s in sorted(smallest.items(), key=lambda item: item[1]):
        key = str(g) if str(g) not in table else f"{g}/{k}"
        try:
            table[key] = displacement_to_group(
                cell, positions, numbers, symprec=s, angle_tolerance=spec["angle_tolerance"],
                vacuum_axis=axis)
            if start is not None and table[key]["operations"] > 1:
                table[key]["start"] = displacement_from(
                    start, cell, positions, numbers, s, angle_tolerance=spec["angle_tolerance"],
                    vacuum_axis=axis)
        except SymmetryError as exc:
            table[key] = {"group": g, "operations": k, "symprec": s, "error": str(exc)}
    return table


def clear_cache():
    """Forget cached spectra, lattice spectra and spglib datasets (keyed on exact input bytes)."""
    _SPECTRUM_CACHE.clear()
    _LATTICE_CACHE.clear()
    _DATASETS.clear()
    _PREPARED.clear()


def versions():
    """spglib version, layer-group support, and the error-handling modes seen in this process."""
    env = os.environ.get("SPGLIB_OLD_ERROR_HANDLING")
    old = getattr(spglib.error, "OLD_ERROR_HANDLING", None)
    if env is not None:
        current = "returns None" if env.lower() not in ("false", "0") else "raises SpglibError"
    elif old is not None:
        current = "returns None" if old else "raises SpglibError"
    else:
        current = "raises SpglibError"
    return {
        "spglib": spglib.__version__,
        "layer_groups": hasattr(spglib, "get_symmetry_layerdataset"),
        "error_mode_now": current,
        "failures_seen": dict(_SEEN),
    }
