"""The verdict (which way a run's symmetry went), its flags, and tolerance advice, from a record.

A run is judged at two levels, and the record holds the judgement once (``summary.verdict``):

* **lattice**: the Lipschitz *deformation* (Å) to every Bravais type on every frame. A type is *held*
  while its deformation is at most ``rules.lattice.within``. The run *gained* a type it ends holding
  after starting at least ``start_away`` from it, *lost* a type it held at the start and ends at least
  ``left_beyond`` from, *changed* when both happened (or, for a layer, when its handedness reversed),
  and *kept* otherwise. A type held only in the middle of the run was *passed through*.
* **structure**: spglib's group of the first and last frames at ``rules.structure.symprec`` (and at
  each of ``report.common_symprecs``), compared by group-subgroup relation
  (:func:`driftwatch.symmetry.relation`): supergroup = gained, subgroup = lost, neither = changed.

The run's direction combines the two: gained (or lost) at one level and not the opposite at the
other; changed when they disagree or either changed sideways; kept when neither moved. A finished
run is judged on its last frame; a live run (``complete=False``) counts a change only once it has held
for ``rules.persistence.steps`` consecutive ionic steps, so a state the relaxation is only passing
through does not count.

Flag codes (ours); each flag is ``{"code", "concerns", "frame", "step", "type", "message", "value",
"threshold"}``:

=================== ========== ==========================================================================
code                concerns   raised when
=================== ========== ==========================================================================
lattice-gained      lattice    the lattice ends holding a Bravais type it started clearly away from
lattice-lost        lattice    the lattice ends clearly away from a type it held at the start
lattice-changed     lattice    both at once: it left one type and reached another (sideways)
lattice-nearing     lattice    the deformation to a type fell by ``nearing_fraction`` (against the
                               lattice's size) to at most ``nearing_within``, without reaching it
passed-through      lattice    a type was held for a stretch of the run, then left again
handedness-flip     lattice    a layer's 2D lattice ends with the opposite handedness, clearly chiral at
                               both ends (min_chiral at the start, 2 x min_chiral at the end: it
                               passed through a mirror-symmetric lattice), or reversed it at least
                               twice on the way, each side reaching 2 x min_chiral
group-gained        structure  spglib's group at the end contains the start's (more operations)
group-lost          structure  spglib's group at the end is a subgroup of the start's
group-changed       structure  neither contains the other
atoms-break-lattice structure  the translation lattice is metrically of a type but the structure's group
                               has a lower lattice type
symprec-dependent   tolerance  spglib's group for the final frame changes between two common symprecs
loose-symprec       tolerance  spglib's lattice type at a loose symprec is one the lattice is far from
held-by-code        code       the DFT code's own symmetry handling was on and the run kept a
                               non-trivial group: "kept" is then what the code imposed, not a test
=================== ========== ==========================================================================

A flag asks for a look at a run; it is not a proof of stability, of instability or of a phase.
"""

from __future__ import annotations

import math

import numpy as np

from . import lattice2d, lattice3d
from .records import group_name

__all__ = ["judge", "lattice_flags", "evaluate", "summarize", "FLAGS", "RENAMED", "CONCERNS",
           "DIRECTIONS", "ORDER", "NAMES", "bravais_of_group", "advice", "select", "check_codes",
           "campaign_advice", "advice_item", "SAFE_MARGIN", "grid_index", "generalises"]

FLAGS = {
    "lattice-gained": "lattice", "lattice-lost": "lattice", "lattice-changed": "lattice",
    "lattice-nearing": "lattice", "passed-through": "lattice", "handedness-flip": "lattice",
    "group-gained": "structure", "group-lost": "structure", "group-changed": "structure",
    "atoms-break-lattice": "structure",
    "symprec-dependent": "tolerance", "loose-symprec": "tolerance",
    "held-by-code": "code",
}
"""Flag code -> what it concerns."""
CONCERNS = ("lattice", "structure", "tolerance", "code")
DIRECTIONS = ("gained", "lost", "changed", "kept")
#: Flag codes of records written before the verdict had a direction (schema driftwatch/run-1).
RENAMED = {"snapped": "lattice-gained", "approaching": "lattice-nearing",
           "tolerance-sensitive": "symprec-dependent", "spglib-overcall": "loose-symprec",
           "atoms-settled": "group-gained", "code-imposed": "held-by-code"}

# Order of the lattice point group (holohedry) of each Bravais type: International Tables Vol. A,
# Table 3.1.2.x (3D) and the 2D lattice point groups 2, 2mm, 2mm, 4mm, 6mm.
ORDER = {"mp": 2, "op": 4, "oc": 4, "tp": 8, "hp": 12,
         "aP": 2, "mP": 4, "mS": 4, "oP": 8, "oS": 8, "oI": 8, "oF": 8, "tP": 16, "tI": 16,
         "hR": 12, "hP": 24, "cP": 48, "cI": 48, "cF": 48}
NAMES = {"mp": "oblique", "op": "rectangular", "oc": "centred rectangular", "tp": "square",
         "hp": "hexagonal", "aP": "triclinic", "mP": "primitive monoclinic",
         "mS": "base-centred monoclinic", "oP": "primitive orthorhombic",
         "oS": "base-centred orthorhombic", "oI": "body-centred orthorhombic",
         "oF": "face-centred orthorhombic", "tP": "primitive tetragonal",
         "tI": "body-centred tetragonal", "hR": "rhombohedral", "hP": "hexagonal",
         "cP": "primitive cubic", "cI": "body-centred cubic", "cF": "face-centred cubic"}
_LOWEST = {2: "mp", 3: "aP"}
_ALIASES = {"oC": "oS", "oA": "oS", "oB": "oS", "mC": "mS", "mA": "mS", "mB": "mS", "mI": "mS"}
_WORD = {"supergroup": "gained", "subgroup": "lost", "unrelated": "changed", "same": "kept"}


def _types(dim):
    return lattice2d.TYPES if dim == 2 else lattice3d.TYPES


def generalises(general: str, specific: str) -> bool:
    """True when every lattice of type ``specific`` is also of type ``general`` (the closure of the
    Bravais specialisation graph, ``SPECIALISES`` of lattice2d / lattice3d), or they are equal."""
    graph = {**lattice2d.SPECIALISES, **lattice3d.SPECIALISES}
    todo, seen = [specific], set()
    while todo:
        t = todo.pop()
        if t == general:
            return True
        if t not in seen:
            seen.add(t)
            todo.extend(graph.get(t, ()))
    return False


def bravais_of_group(number: int, symbol: str, dimension: int) -> str | None:
    """Bravais type of a space group (3D) or layer group (2D) from its number and symbol.

    Ranges from International Tables Vol. A (space groups) and Vol. E (layer groups 1-7 oblique,
    8-48 rectangular, 49-64 square, 65-80 hexagonal; a leading 'c' marks the centred rectangular ones).
    """
    if not number:
        return None
    letter = (symbol or "P").strip()[:1]
    if dimension == 2:
        if number <= 7:
            return "mp"
        if number <= 48:
            return "oc" if letter == "c" else "op"
        return "tp" if number <= 64 else "hp"
    if number <= 2:
        return "aP"
    if number <= 15:
        return "mP" if letter == "P" else "mS"
    if number <= 74:
        return {"P": "oP", "I": "oI", "F": "oF"}.get(letter, "oS")
    if number <= 142:
        return "tI" if letter == "I" else "tP"
    if number <= 167:
        return "hR" if letter == "R" else "hP"
    if number <= 194:
        return "hP"
    return {"P": "cP", "I": "cI"}.get(letter, "cF")


def _lattice_type(symbol) -> str | None:
    if not symbol:
        return None
    return _ALIASES.get(symbol, symbol)


def _flag(code, frame, frames, message, type_=None, value=None, threshold=None):
    return {"code": code, "concerns": FLAGS[code], "frame": int(frame),
            "step": int(frames[frame]["step"]), "type": type_, "message": message, "value": value,
            "threshold": threshold}


def grid_index(spec: dict, symprec: float) -> int:
    """Index of the grid value of a spectrum nearest to ``symprec`` (grids include rule values)."""
    return int(np.argmin(np.abs(np.log(np.asarray(spec["symprec"], float) / symprec))))


def _at(spec: dict, symprec: float, key: str):
    """Verdict of a spectrum at the grid value nearest to ``symprec``, with the group symbol."""
    i = grid_index(spec, symprec)
    return spec[key][i], spec["group_symbol"][i]


def _g(x: float) -> str:
    """One format for every length a message or table quotes (Å)."""
    return f"{x:.3g}"


def _from(frames, k) -> str:
    """"from step N", or for the two structures of an end-points run (frames labelled initial and
    final: no ionic steps between them) "at the final structure"."""
    label = frames[k].get("label")
    return f"at the {label} structure" if label else f"from step {frames[k]['step']}"


def _most_specific(types, values, within):
    ok = [t for t in types if values[t] <= within]
    return max(ok, key=lambda t: (ORDER[t], -values[t])) if ok else None


def _states(D, types, within, lowest) -> list[str]:
    """:func:`_most_specific` of every frame (``lowest`` where no type is held), vectorised: the
    highest holohedry order held, the smaller deformation among types of that order (the first
    in ``types`` on a tie). ``D``: {type: (n,)}, or the (n, types) array."""
    M = D if isinstance(D, np.ndarray) else np.stack([D[t] for t in types], axis=1)
    held = M <= within
    order = np.array([ORDER[t] for t in types])
    level = np.where(held, order, -1).max(axis=1)          # highest order held per frame
    pick = np.where(held & (order == level[:, None]), M, np.inf).argmin(axis=1)
    names = list(types) + [lowest]
    return [names[i] for i in np.where(level >= 0, pick, len(types)).tolist()]


def _from_frame(series: np.ndarray, holds) -> int:
    """First frame from which ``holds(series)`` stays true to the end (series is (n,))."""
    bad = np.nonzero(~holds(series))[0]
    return int(bad[-1] + 1) if bad.size else 0


def _from_frames(holds: np.ndarray) -> list[int]:
    """:func:`_from_frame` of every column of a boolean (n, k) array."""
    n = holds.shape[0]
    bad = ~holds[::-1]
    last_bad = n - 1 - bad.argmax(axis=0)              # the last frame where it does not hold
    return [int(x) for x in np.where(bad.any(axis=0), last_bad + 1, 0)]


def _stretches(states: list[str]) -> list[tuple[str, int, int]]:
    out, start = [], 0
    for i in range(1, len(states) + 1):
        if i == len(states) or states[i] != states[start]:
            out.append((states[start], start, i - 1))
            start = i
    return out


# ----------------------------------------------------------------------------------------------
# the lattice level
# ----------------------------------------------------------------------------------------------
def _lattice_verdict(frames, dim, r, persist, fixed_cell, series=None):
    """Direction of the lattice from the deformation series (and the 2D sign for layers).
    ``series``: {type: (n,)} the frames' deformation as arrays, if at hand (else read from them)."""
    types = _types(dim)
    M = np.array([[f["deformation"][t] for t in types] for f in frames], dtype=float) \
        if series is None else np.stack([series[t] for t in types], axis=1)     # (n, types)
    D = {t: M[:, j] for j, t in enumerate(types)}
    n, lat = len(frames), r["lattice"]
    within, away, beyond = lat["within"], lat["start_away"], lat["left_beyond"]
    held_since = dict(zip(types, _from_frames(M <= within)))
    left_since = dict(zip(types, _from_frames(M > within)))
    # a finished run is judged on its last frame; a live one once the change held `persist` steps
    steps = [int(f["step"]) for f in frames]
    lasted = (lambda since: True) if persist is None else (
        lambda since: since < n and steps[-1] - steps[since] + 1 >= persist)
    reached = [t for t in types if D[t][0] >= away and D[t][-1] <= within]
    left = [t for t in types if D[t][0] <= within and D[t][-1] >= beyond]
    gained = [t for t in reached if lasted(held_since[t])]
    lost = [t for t in left if lasted(left_since[t])]
    # live: a change seen but not yet held `persist` steps (the verdict says so, not "kept")
    pending = bool(set(reached) - set(gained) or set(left) - set(lost))
    top = lambda ts, k: max(ts, key=lambda t: (ORDER[t], -D[t][k])) if ts else None
    g, lo = top(gained, -1), top(lost, 0)
    states = _states(M, types, within, _LOWEST[dim])
    first, last = states[0], states[-1]
    flip = _handedness(frames, r["handedness_flip"]) if dim == 2 else None
    if flip and persist is not None and not lasted(flip["frame"]):
        flip, pending = None, True
    frm = [held_since[g]] if g else []
    if lo:
        frm.append(left_since[lo])
    if flip:
        frm.append(flip["frame"])
    direction = ("changed" if (g and lo) or flip else "gained" if g else "lost" if lo else "kept")
    # a type visited and left (live: left for `persist` steps, as a change must hold)
    passed = [{"type": t, "from_step": int(frames[a]["step"]), "to_step": int(frames[b]["step"]),
               "frames": b - a + 1}
              for t, a, b in _stretches(states)[1:-1]
              if t != _LOWEST[dim] and D[t][-1] > beyond and D[t][0] > within  # left as lost
              and lasted(b + 1)]
    # a type approached without being reached (beyond the gained one: L ends oc, nearing hp), the
    # deformation measured against the lattice's size: a cell that only shrinks nears nothing
    # judged on the last frame, or live on the last `persist` frames (the approach must last)
    win = 1 if persist is None else persist
    shrink = _shrink([frames[0], *frames[-win:]])[1:]   # the end frames only: judged every step
    cand = [] if len(frames) < win else [
        t for t in types if D[t][0] >= away and np.all(D[t][-win:] > within)
        and np.all(D[t][-win:] <= (1 - lat["nearing_fraction"]) * D[t][0] * shrink)
        and D[t][-1] <= lat["nearing_within"]                 # near, not only nearer
        and (g is None or (t != g and generalises(g, t)))]
    nearing = _nearest(cand, D) if cand else None
    # the one type the drift numbers are about: gained, else lost, else neared, else the type kept
    # (a lattice of no higher type: the nearest higher type, how far it stayed)
    # (ends of two types inside the margins of a change: the more specific one)
    away_end = [t for t in types if D[t][-1] > within]
    ends = [t for t in (first, last) if t != _LOWEST[dim]]
    kept = max(ends, key=lambda t: ORDER[t]) if ends else (
        _nearest(away_end, D) if away_end else None)
    subject = g or lo or nearing or kept
    k = max(frm) if frm else None
    out = {"direction": direction, "initial": first, "final": last, "gained": g, "lost": lo,
           "gained_all": sorted(gained, key=lambda t: -ORDER[t]),
           "lost_all": sorted(lost, key=lambda t: -ORDER[t]),
           "from_frame": k, "from_step": None if k is None else int(frames[k]["step"]),
           "passed_through": sorted(passed, key=lambda p: -p["frames"])[:10],
           "nearing": nearing, "handedness": flip, "fixed_cell": bool(fixed_cell),
           "pending": f"not yet held for {persist} steps" if pending and persist else None}
    drift = None
    if subject:
        d0, d1 = float(D[subject][0]), float(D[subject][-1])
        toward = subject in (g, nearing) and d0 > 0      # of the way to a type: gained, neared
        drift = {"type": subject, "initial": d0, "final": d1, "change": d1 - d0,
                 "fraction": (d0 - d1) / d0 if toward else None, "peak": None,
                 "peak_step": None}
        k = int(np.argmax(D[subject]))      # an excursion: a type held at both ends that the
        if max(d0, d1) <= within and D[subject][k] >= beyond:   # lattice left on the way, by
            drift.update(peak=float(D[subject][k]), peak_step=int(frames[k]["step"]))  # as much
            #                                                   as a lost type is left
    return out, drift, D


def _nearest(types, D, rel=1e-6):
    """The type of ``types`` whose final deformation is smallest; of types within ``rel`` of it
    (one distance computed along different paths: cF, tI, oF, oI of a cell near cF agree to 1e-8
    Å), the most specific."""
    d = min(float(D[t][-1]) for t in types)
    return max((t for t in types if float(D[t][-1]) <= d * (1 + rel)), key=lambda t: ORDER[t])


def _chiral_frames(frames, r):
    """(sign (n,), mirror deformation (n,) Å, indices of the frames clearly chiral: mirror
    deformation above ``min_chiral`` and a sign)."""
    sign = np.array([f["sign"] for f in frames])
    chiral = np.array([f["deformation"]["mirror"] for f in frames])
    return sign, chiral, np.nonzero((chiral > r["min_chiral"]) & (sign != 0))[0]


def _handedness(frames, r):
    """A layer that ends with the opposite handedness to its start, clearly chiral at both ends:
    ``min_chiral`` at the start, twice that at the end (as each side of a reversal on the way
    must reach): a relaxation settling onto a mirror lattice overshoots it by a few per cent of
    where it started (graphene relaxed with an ML potential from 92 to 89.93 degrees)."""
    sign, chiral, sig = _chiral_frames(frames, r)
    if sig.size == 0 or sig[-1] != len(frames) - 1 or sign[sig[0]] == sign[-1] or \
            chiral[-1] < 2 * r["min_chiral"]:
        return None
    last = int(sign[-1])
    k = int(np.nonzero(sign != last)[0][-1] + 1)
    return {"initial": int(sign[sig[0]]), "final": last, "frame": k,
            "mirror_initial": float(chiral[sig[0]]), "mirror_final": float(chiral[-1])}


def _overshoot(frames, lv) -> str:
    """For a layer whose ends have opposite signs without a handedness-flip (the end too near the
    mirror lattice to count), the words saying so; else ""."""
    if lv.get("handedness") or not frames or "sign" not in frames[0]:
        return ""
    sign = np.array([f["sign"] for f in frames])
    if sign[0] == 0 or sign[-1] == 0 or sign[0] == sign[-1]:
        return ""
    k = int(np.nonzero(sign != sign[-1])[0][-1] + 1)
    return (f"; its handedness reversed {_from(frames, k)}, ending "
            f"{_g(float(frames[-1]['deformation']['mirror']))} Å past a mirror-symmetric lattice "
            f"(an overshoot: under twice min_chiral, no handedness-flip)")


def _shrink(frames) -> np.ndarray:
    """Each frame's lattice size over the first frame's ((n,); ones when a frame has no size)."""
    sizes = [_size(f) for f in frames]
    if not sizes[0] or any(s is None for s in sizes):
        return np.ones(len(frames))
    return np.asarray(sizes, float) / sizes[0]


def _size(frame) -> float | None:
    """The lattice's size (Å; :func:`driftwatch.lattice3d.deformation_and_size`) from a frame's
    root invariants (sqrt of the sum of their squares: of the conorms), or its ``size``; None when
    the frame holds neither (a record of another layout)."""
    if "size" in frame:
        return float(frame["size"])
    roots = frame.get("root_products", frame.get("root_invariant"))
    return float(np.sqrt(np.sum(np.square(roots)))) if roots is not None else None


def _lattice_flags(frames, lv, D, r, complete=True):
    within, flags = r["lattice"]["within"], []
    end = "at the end" if complete or not frames else f"at step {frames[-1]['step']} (the newest)"
    g, lo = lv["gained"], lv["lost"]
    kg = _from_frame(D[g], lambda s: s <= within) if g else None
    kl = _from_frame(D[lo], lambda s: s > within) if lo else None
    gain_text = (f"became {g} ({NAMES[g]}): deformation {_g(D[g][0])} Å at the start, "
                 f"{_g(D[g][-1])} Å {end}, within {_g(within)} Å "
                 f"{_from(frames, kg)}") if g else ""
    loss_text = (f"left {lo} ({NAMES[lo]}): deformation {_g(D[lo][0])} Å at the start, "
                 f"{_g(D[lo][-1])} Å {end} (at least {_g(r['lattice']['left_beyond'])} Å "
                 f"counts as left), no longer within {_g(within)} Å "
                 f"{_from(frames, kl)}") if lo else ""
    if g and lo:   # one sideways change, one flag
        flags.append(_flag("lattice-changed", max(kg, kl), frames,
                           f"the lattice changed sideways: it {loss_text}, and {gain_text}", g,
                           float(D[g][-1]), within))
    elif g:
        flags.append(_flag("lattice-gained", kg, frames, f"the lattice {gain_text}", g,
                           float(D[g][-1]), within))
    elif lo:
        flags.append(_flag("lattice-lost", kl, frames, f"the lattice {loss_text}", lo,
                           float(D[lo][-1]), r["lattice"]["left_beyond"]))
    if lv["nearing"]:
        t = lv["nearing"]
        frac = r["lattice"]["nearing_fraction"]
        shrink = _shrink(frames)                  # the drop measured against the lattice's size
        below = D[t] <= (1 - frac) * D[t][0] * shrink   # dated as gains are: from the first
        k = min(_from_frame(below, lambda b: b), len(frames) - 1)   # frame of the last stretch
        way = 100 * (1 - D[t][-1] / (D[t][0] * shrink[-1]))
        scaled = (f", from {_g(D[t][0] * shrink[-1])} Å at the lattice's final size"
                  if abs(shrink[-1] - 1) > 0.01 else "")
        held = [int(frames[i]["step"]) for i in np.flatnonzero(D[t] <= within)]
        seen = (f"; it was within {_g(within)} Å at step{'s' if len(held) > 1 else ''} "
                f"{', '.join(map(str, held[:4]))}{', ...' if len(held) > 4 else ''} on the way "
                f"and left it" if held else "")
        flags.append(_flag("lattice-nearing", k, frames,
                           f"the lattice moved toward {t} ({NAMES[t]}) and ends without reaching "
                           f"it within {_g(within)} Å: "
                           f"deformation {_g(D[t][0])} -> {_g(D[t][-1])} Å "
                           f"({'over 99' if way > 99 else f'{way:.0f}'} % of the way"
                           f"{scaled}){seen}"
                           + _overshoot(frames, lv), t, float(D[t][-1]), frac))
    for p in lv["passed_through"][:1]:        # the longest stretch; the record lists them all
        t = p["type"]
        k = next(i for i, f in enumerate(frames) if f["step"] == p["from_step"])
        flags.append(_flag("passed-through", k, frames,
                           f"the lattice was {t} ({NAMES[t]}) from step {p['from_step']} to "
                           f"{p['to_step']} and left it again"
                           + (f" ({len(lv['passed_through'])} such stretches)"
                              if len(lv["passed_through"]) > 1 else ""), t, p["frames"], within))
    h = lv["handedness"]
    if h:
        sg = lambda s: "+" if s > 0 else "-"
        flags.append(_flag("handedness-flip", h["frame"], frames,
                           f"the layer's 2D lattice ends with the opposite handedness "
                           f"({sg(h['initial'])} at the start, {sg(h['final'])} "
                           f"{_from(frames, h['frame'])}; mirror deformation "
                           f"{_g(h['mirror_initial'])} Å and {_g(h['mirror_final'])} Å): it passed "
                           f"through a mirror-symmetric lattice", None, h["mirror_final"],
                           r["handedness_flip"]["min_chiral"]))
    elif frames and "sign" in frames[0]:      # a layer (its frames carry a 2D sign)
        rev = _reversals(frames, r["handedness_flip"])
        if len(rev) >= 2:      # even: reversed and came back; odd: the ends are too near a mirror
            back = len(rev) % 2 == 0
            ends = ("came back: its first and last stretches more than twice min_chiral from a "
                    "mirror lattice have the same handedness" if back else
                    f"its last stretch more than twice min_chiral from a mirror lattice has the "
                    f"opposite handedness to its first, and it ended "
                    f"{_g(frames[-1]['deformation']['mirror'])} Å from a mirror lattice")
            flags.append(_flag("handedness-flip", rev[0][0], frames,
                               f"the layer's 2D lattice reversed its handedness {len(rev)} times "
                               f"(first {_from(frames, rev[0][0])}, last "
                               f"{'back ' if back else ''}{_from(frames, rev[-1][0])}; each side "
                               f"reaching a mirror deformation of twice min_chiral, up to "
                               f"{_g(max(x[1] for x in rev))} Å) and {ends} (a frame nearer a "
                               f"mirror lattice has no meaningful sign); it passed through "
                               f"mirror-symmetric lattices on the way", None, len(rev),
                               r["handedness_flip"]["min_chiral"]))
    return flags


def _reversals(frames, r) -> list[tuple[int, float]]:
    """Where a layer's handedness reversed on the way: (the frame from which the sign is the new
    side's, the side's largest mirror deformation, Å) for each change of sign between stretches
    of one sign that reach twice ``min_chiral`` (frames below ``min_chiral`` are no side: a
    lattice settling onto a mirror-symmetric one flickers there, and overshoots it by a few per
    cent of it)."""
    sign, chiral, sig = _chiral_frames(frames, r)
    sides = []                               # [sign, first frame, peak] of each stretch of one sign
    for k in sig:
        if sides and sides[-1][0] == sign[k]:
            sides[-1][2] = max(sides[-1][2], float(chiral[k]))
        else:
            sides.append([int(sign[k]), int(k), float(chiral[k])])
    clear = [s for s in sides if s[2] >= 2 * r["min_chiral"]]
    kept = []
    for s in clear:                          # stretches of one sign joined across faint ones
        if kept and kept[-1][0] == s[0]:
            kept[-1][2] = max(kept[-1][2], s[2])
        else:
            kept.append(list(s))
    out = []
    for _, b in zip(kept, kept[1:]):
        k = b[1]                 # back to where the sign turned (below min_chiral, as shown)
        while k > 0 and sign[k - 1] == b[0]:
            k -= 1
        out.append((k, b[2]))
    return out


# ----------------------------------------------------------------------------------------------
# the structure level
# ----------------------------------------------------------------------------------------------
def _group_of(f: dict, symprec: float):
    """(number, symbol, operations, relation to frame 0) of a frame at ``symprec``, or None."""
    st = f.get("structure")
    if not st:
        return None
    if symprec in st["symprec"]:
        i = st["symprec"].index(symprec)
    else:
        gaps = [abs(math.log(x / symprec)) for x in st["symprec"]]
        i = gaps.index(min(gaps))
        if gaps[i] > 1e-9:
            return None
    return st["group"][i], st["symbol"][i], st["operations"][i], st["relation"][i]


def _direction_of(first, last) -> tuple[str, str]:
    """Direction of a group change and how it was decided."""
    rel = last[3]
    if rel in _WORD:
        return _WORD[rel], rel
    if not first[0] or not last[0]:
        return "unknown", "spglib failed"
    if (first[0], first[2]) == (last[0], last[2]):
        return "kept", "same number and operation count"
    return ("gained" if last[2] > first[2] else "lost" if last[2] < first[2] else "changed",
            "operation count")


def _structure_at(frames, checked, symprec, persist):
    # the frames spglib was asked about at this symprec (a frame probed while locating the change
    # at another symprec carries that symprec only)
    got = {k: _group_of(frames[k], symprec) for k in checked}
    have = [k for k in checked if got[k] is not None]
    if not have or have[0] != checked[0] or have[-1] != checked[-1]:
        return None
    checked = have
    first, last = got[checked[0]], got[checked[-1]]
    direction, how = _direction_of(first, last)
    # the first checked frame from which the final group holds, and the checked frame before it
    hi = checked[-1]
    for k in reversed(checked[:-1]):
        gk = got[k]
        if (gk[0], gk[2]) != (last[0], last[2]):
            break
        hi = k
    lo = max([k for k in checked if k < hi], default=None)
    if persist is not None and direction != "kept" and \
            frames[checked[-1]]["step"] - frames[hi]["step"] + 1 < persist:
        direction, how = "kept", f"not yet held for {persist} steps"
    return {"symprec": symprec,
            "initial": {"group": first[0], "symbol": first[1], "operations": first[2]},
            "final": {"group": last[0], "symbol": last[1], "operations": last[2]},
            "direction": direction, "relation": how,
            "from_frame": None if direction == "kept" else hi,
            "from_step": None if direction == "kept" else int(frames[hi]["step"]),
            "after_step": None if direction == "kept" or lo is None else int(frames[lo]["step"]),
            "exact": direction != "kept" and lo is not None and hi - lo == 1,
            "checked_after": None if direction == "kept" else
            set(range(hi, checked[-1] + 1)) <= set(checked)}


def _structure_verdict(frames, cfg, persist):
    checked = [k for k, f in enumerate(frames) if f.get("structure")]
    judge_at = cfg["rules"]["structure"]["symprec"]
    if not checked or checked[0] != 0:
        return {"direction": "unknown", "symprec": judge_at, "at": {},
                "reason": "spglib was not run on the first frame"}
    out = _structure_at(frames, checked, judge_at, persist) or {
        "direction": "unknown", "symprec": judge_at, "reason": "no group at this symprec"}
    out["newest_checked_step"] = int(frames[checked[-1]]["step"])
    out["at"] = {}
    for s in cfg["report"]["common_symprecs"]:
        v = _structure_at(frames, checked, s, persist)
        if v:
            out["at"][f"{s:g}"] = {"initial": [v["initial"]["group"], v["initial"]["symbol"]],
                                   "final": [v["final"]["group"], v["final"]["symbol"]],
                                   "direction": v["direction"]}
            if v["relation"].startswith("not yet held"):          # live: a change seen, pending
                out["at"][f"{s:g}"]["pending"] = v["relation"]
    return out


def _when(frames, sv) -> str:
    """When the final group appeared: "from step N" (between two neighbouring checked frames) or
    "between steps A and B (the frames spglib checked)"; "(not every later step checked)" when
    frames after it were not asked (a search over steps: the group is taken to hold from there)."""
    when = (_from(frames, sv["from_frame"]) if sv["exact"] or sv["after_step"] is None else
            f"between steps {sv['after_step']} and {sv['from_step']} (the frames spglib checked)")
    return when + ("" if sv.get("checked_after", True) is not False else
                   " (not every later step checked)")


_OTHER_AXES = "its operations along other directions of the cell"


def _structure_flags(frames, sv):
    if sv["direction"] not in ("gained", "lost", "changed"):
        return []
    a, b, s = sv["initial"], sv["final"], sv["symprec"]
    when = _when(frames, sv)
    what = {"gained": "rose", "lost": "fell", "changed": "changed"}[sv["direction"]]
    rel = {"supergroup": f"{b['symbol']} contains {a['symbol']}",
           "subgroup": f"{b['symbol']} is a subgroup of {a['symbol']}",
           "unrelated": "neither group contains the other"}.get(sv["relation"], sv["relation"])
    if a["group"] != b["group"] and a["operations"] == b["operations"] and \
            sv["relation"] in ("supergroup", "subgroup"):   # the same operations in this cell
        big = b if sv["relation"] == "supergroup" else a
        rel += (f" ({big['symbol']}'s point group is larger; the cell holds the same "
                f"{a['operations']} "
                f"operations of both: {big['symbol']}'s others do not map this cell's lattice onto "
                f"itself, as in a supercell)")
    if a["group"] == b["group"] and a["operations"] != b["operations"]:   # the same type
        more = b["operations"] > a["operations"]
        rel = (f"the same space-group type with {'more' if more else 'fewer'} operations: pure "
               f"translations {'gained' if more else 'lost'} (a {'smaller' if more else 'larger'} "
               f"primitive cell)")
    elif a["group"] == b["group"]:
        rel = f"the same space-group type, {_OTHER_AXES}"
    msg = (f"spglib's group at symprec {_g(s)} Å {what} from "
           f"{group_name(a['symbol'], a['group'], a['operations'])} to "
           f"{group_name(b['symbol'], b['group'], b['operations'])} {when}; {rel}")
    return [_flag(f"group-{sv['direction']}", sv["from_frame"], frames, msg, None, b["group"], s)]


def _breaks_lattice(frames, dim, r, fixed=False):
    """The primitive lattice is metrically of type t, the structure's group has a lower lattice type
    (containment on the Bravais graph, so R-3m in hexagonal axes is not flagged). ``fixed``: the
    cell never moved, so its lattice is the one the run was given (a host cell around a defect)."""
    k = len(frames) - 1
    spec = frames[k].get("symmetry") or {}
    prim = spec.get("primitive")
    if not prim or not prim.get("type"):
        return []
    t = prim["type"]
    group, symbol = _at(spec, r["symprec"], "group")
    b = bravais_of_group(int(group), str(symbol), dim)
    if b is None or b == t or not generalises(b, t):
        return []
    msg = (f"the structure's translation lattice (its primitive cell) is metrically {t} "
           f"({NAMES[t]}, deformation "
           f"{_g(prim['deformation'])} Å) but the structure's group at symprec {_g(r['symprec'])} Å is "
           f"{symbol} ({group}), lattice type {b}: the atoms break the lattice's symmetry"
           + ("; the cell never moved, so this is the lattice the run was given (expected when "
              "the atoms are meant to break it, as around a defect in a host cell)" if fixed else ""))
    return [_flag("atoms-break-lattice", k, frames, msg, t, float(prim["deformation"]), r["within"])]


# ----------------------------------------------------------------------------------------------
# tolerance flags
# ----------------------------------------------------------------------------------------------
def _symprec_dependent(frames, r):
    k = len(frames) - 1
    spec = frames[k].get("symmetry")
    if not spec:
        return []
    seen = []
    for lo, hi, g, sym, _ in _plateaus(spec):   # groups met between grid points included
        if g and hi >= r["low"] * (1 - 1e-9) and lo <= r["high"] * (1 + 1e-9) \
                and (g, sym) not in seen:
            seen.append((g, sym))
    if len(seen) < 2:
        return []
    text = " -> ".join(f"{sym} ({g})" for g, sym in seen)
    msg = (f"spglib's group for the final structure changes between symprec {_g(r['low'])} and "
           f"{_g(r['high'])} Å: {text}")
    return [_flag("symprec-dependent", k, frames, msg, None, len(seen), [r["low"], r["high"]])]


def _loose(frames, D, r):
    k = len(frames) - 1  # the verdict a user would take from the final structure
    spec = frames[k].get("symmetry")
    if spec:
        lat, _ = _at(spec, r["symprec"], "lattice")
        t = _lattice_type(lat)
        if t in D and D[t][k] > r["far"]:
            msg = (f"spglib at symprec {_g(r['symprec'])} Å calls the cell's lattice (one atom per "
                   f"cell) {t} ({NAMES[t]}) while its deformation to {t} is {_g(D[t][k])} Å "
                   f"(> {_g(r['far'])} Å)")
            return [_flag("loose-symprec", k, frames, msg, t, float(D[t][k]), r["far"])]
    return []


# ----------------------------------------------------------------------------------------------
# the code's own symmetry
# ----------------------------------------------------------------------------------------------
def _held_by_code(record, frames, sv):
    """Only where it changes the reading: a kept non-trivial group under the code's symmetry, in
    a relaxation (a single point, finite differences, MD or a band image is no test of a relaxed
    structure's symmetry to begin with: its record says what it is)."""
    if record["run"].get("not_relaxation"):
        return []
    dim = record["geometry"]["dimension"]
    from .adapters.registry import symmetry_setting   # each code's own rule, in its adapter
    info = symmetry_setting(record["run"].get("code_settings") or {}, dim)
    # one-atom slabs always have 4 point operations (2/m with the layer mirror), any bulk lattice 2
    # (inversion): those constrain nothing, so only more than that can hold a symmetry.
    floor = 4 if dim == 2 else 2
    if not info or sv.get("direction") != "kept" or not sv.get("final"):
        return []
    ops = sv["final"]["operations"]
    if info.get("operations") is not None and info["operations"] <= floor:
        return []
    if ops <= floor:
        return []
    k = len(frames) - 1
    held = info.get("operations")
    who = info.get("who", "the code")
    if k == 0:                               # one frame: no change could be seen at all
        return [_flag("held-by-code", k, frames,
                      f"{info['how']}: the one structure read has {sv['final']['symbol']} "
                      f"({sv['final']['group']}, {ops} operations); with one frame nothing was "
                      f"tested, and {who} could not have lowered the group it held in any case",
                      None, held, None)]
    if held is not None and held < ops:      # the code held a subgroup (e.g. magnetic moments)
        msg = (f"{info['how']}: the run kept {sv['final']['symbol']} ({sv['final']['group']}, {ops} "
               f"operations), of which {who} held {held}: it could not "
               f"have lowered the group "
               f"below those, so 'kept' tests only the other {ops - held}; rerun with "
               f"{info['undo']} (and a slightly displaced start) to test them all")
    else:
        msg = (f"{info['how']}: the run kept {sv['final']['symbol']} ({sv['final']['group']}), but "
               f"{who} could not have lowered it, so 'kept' is not a test "
               f"of that symmetry; "
               f"rerun with {info['undo']} (and a slightly displaced start) to test it")
    return [_flag("held-by-code", k, frames, msg, None, info.get("operations"), None)]


# ----------------------------------------------------------------------------------------------
# the verdict, flags and summary
# ----------------------------------------------------------------------------------------------
def _combine(lattice: str, structure: str) -> str:
    dirs = {lattice, structure} - {"unknown"}
    if "changed" in dirs or {"gained", "lost"} <= dirs:
        return "changed"
    if "gained" in dirs:
        return "gained"
    if "lost" in dirs:
        return "lost"
    return "kept"


def _text(direction, lv, sv, frames) -> str:
    """The verdict in one line. An end-points run (two structures, no ionic steps between them)
    says "initial -> final" and quotes no step numbers."""
    ends = bool(frames and frames[-1].get("label"))
    parts = []
    if lv["direction"] == "kept" and lv.get("pending") and lv["initial"] != lv["final"]:
        parts.append(f"lattice {lv['initial']} -> {lv['final']} ({lv['pending']})")
    elif lv["direction"] == "kept" and lv["initial"] != lv["final"]:
        parts.append(f"lattice {lv['initial']} -> {lv['final']}, counted as kept (a move inside "
                     f"the margins rules.lattice.start_away and left_beyond)")
    elif lv["direction"] == "kept":
        parts.append(f"lattice kept {lv['final']}")
    else:
        moved = (f"{lv['initial']} -> {lv['final']}" if lv["initial"] != lv["final"]
                 else f"{lv['final']}")
        extra = [f"gained {lv['gained']}" if lv["gained"] else None,
                 f"lost {lv['lost']}" if lv["lost"] else None,
                 "handedness reversed" if lv["handedness"] else None]
        parts.append(f"lattice {moved} ({', '.join(e for e in extra if e)})"
                     + ("" if ends else f" {_from(frames, lv['from_frame'])}"))
    if sv.get("initial") and sv.get("final"):
        a, b = sv["initial"], sv["final"]
        # the same type at both ends: the operation counts tell them apart
        ops = [f", {g['operations']} operations" if a["group"] == b["group"] else "" for g in (a, b)]
        moved = f"{a['symbol']} ({a['group']}{ops[0]}) -> {b['symbol']} ({b['group']}{ops[1]})"
        if not a["group"] or not b["group"]:      # spglib found no group at one end or both
            where = ("the structure" if len(frames) == 1 else "the first and last frames"
                     if not a["group"] and not b["group"] else
                     "the first frame" if not a["group"] else "the last frame")
            parts.append(f"group unknown at symprec {_g(sv['symprec'])} Å (spglib found none for "
                         f"{where}: see the warnings)")
        elif sv["direction"] == "kept" and str(sv.get("relation", "")).startswith("not yet held"):
            parts.append(f"group {moved} at symprec {_g(sv['symprec'])} Å ({sv['relation']})")
        else:
            grp = f"{a['symbol']} ({a['group']})" if sv["direction"] == "kept" else moved
            when = "" if sv["direction"] == "kept" or ends else f" {_when(frames, sv)}"
            parts.append(f"group {sv['direction']} {grp} at symprec {_g(sv['symprec'])} Å{when}"
                         + _near_edge(frames, sv["symprec"]))
        looser = _looser(sv)
        if looser:
            parts.append(looser)
    pending = lv.get("pending") or str(sv.get("relation", "")).startswith("not yet held")
    head = f"{direction} (initial -> final structure; no ionic steps between them)" if ends \
        else "kept so far" if direction == "kept" and pending else direction
    return f"{head}: " + "; ".join(parts)


NEAR_EDGE = 1.25
"""A verdict's symprec this close (as a factor) to a change of the final structure's group is said
to be near it: a slightly other symprec gives another verdict."""


def _near_edge(frames, symprec: float) -> str:
    """" (the final structure's group changes N % below/above it, between X and Y Å)" when a
    bracketed change of the final frame's group lies within a factor :data:`NEAR_EDGE` of
    ``symprec``, else ""."""
    bps = [b for b in ((frames[-1].get("symmetry") or {}).get("breakpoints") or [])
           if b.get("kind") == "group" and b.get("low") and b.get("high")]
    if not bps or not symprec:
        return ""
    b = min(bps, key=lambda b: abs(math.log(math.sqrt(b["low"] * b["high"]) / symprec)))
    c = math.sqrt(b["low"] * b["high"])
    if abs(math.log(c / symprec)) > math.log(NEAR_EDGE):
        return ""
    return (f" (the final structure's group changes {abs(c / symprec - 1) * 100:.0f} % "
            f"{'below' if c < symprec else 'above'} it, between {_g(b['low'])} and "
            f"{_g(b['high'])} Å)")


def _looser(sv) -> str | None:
    """The first common symprec above the verdict's whose group verdict says otherwise (atoms
    that settled onto a symmetric configuration to within 0.1 Å but not 1e-3 Å: a relaxed defect
    in a fixed host cell), or None."""
    for key, v in sorted((sv.get("at") or {}).items(), key=lambda kv: float(kv[0])):
        if float(key) > sv["symprec"] and v["direction"] != sv["direction"]:
            (g0, s0), (g1, s1) = v["initial"], v["final"]
            if v.get("pending"):      # live: the change at this symprec has not yet held
                return f"at symprec {key} Å: group {s0} ({g0}) -> {s1} ({g1}) ({v['pending']})"
            grp = f"{s0} ({g0})" if v["direction"] == "kept" else f"{s0} ({g0}) -> {s1} ({g1})"
            if g0 == g1 and v["direction"] in ("gained", "lost"):    # the same type
                grp += (f", with {'more' if v['direction'] == 'gained' else 'fewer'} operations "
                        f"(pure translations)")
            elif g0 == g1 and v["direction"] == "changed":
                grp += f", {_OTHER_AXES}"
            return f"at symprec {key} Å: group {v['direction']} {grp}"
    return None


def _state(frame, types, within, dim):
    dfm, dst = frame["deformation"], frame["distance"]
    t = _most_specific(types, dfm, within) or _LOWEST[dim]
    away = [x for x in types if dfm[x] > within]
    d = min((dfm[x] for x in away), default=None)    # ties (cP and hR of a cell near cP): the
    near = None if d is None else max((x for x in away if dfm[x] <= d * (1 + 1e-6)),
                                      key=lambda x: ORDER[x])               # most specific
    return {"type": t, "nearest": near,
            "distance": None if near is None else float(dst[near]),
            "deformation": None if near is None else float(dfm[near])}


def lattice_flags(frames: list[dict], dim: int, cfg: dict, *, complete: bool = True,
                  series: dict | None = None) -> list[dict]:
    """The flags :func:`judge` raises about the lattice (those whose ``concerns`` is ``lattice``),
    from the frames' invariants alone (no spglib): what the live observer checks every step.
    ``frames``: per-frame entries with ``step`` and ``deformation`` (layers: ``sign`` too)."""
    r = cfg["rules"]
    persist = None if complete else r["persistence"]["steps"]
    lv, _, D = _lattice_verdict(frames, dim, r, persist, False, series)
    return _lattice_flags(frames, lv, D, r, complete)


def judge(record: dict, cfg: dict, *, complete: bool = True,
          series: dict | None = None) -> tuple[list[dict], dict]:
    """Flags and summary of a record. ``complete=False`` (a live run): a change (or a lattice's
    approach to a type) counts only once it held for ``rules.persistence.steps`` consecutive
    steps, and the flags that judge the final structure (atoms-break-lattice, symprec-dependent,
    loose-symprec, held-by-code) wait for the run's end. ``series``: the frames' deformation as
    arrays {type: (n,)} (Å) when the caller has them (the same values; saves reading the frames)."""
    frames, dim = record["frames"], record["geometry"]["dimension"]
    r = cfg["rules"]
    persist = None if complete else r["persistence"]["steps"]
    lv, drift, D = _lattice_verdict(frames, dim, r, persist, record["run"]["fixed_cell"], series)
    sv = _structure_verdict(frames, cfg, persist)
    direction = _combine(lv["direction"], sv["direction"])
    flags = _lattice_flags(frames, lv, D, r, complete)
    flags += _structure_flags(frames, sv)
    if complete:       # judgements of the final structure: a live run's newest is not one yet
        flags += _breaks_lattice(frames, dim, r["atoms_break_lattice"],
                                 len(frames) > 1 and record["run"]["fixed_cell"])
        flags += _symprec_dependent(frames, r["symprec_dependent"])
        flags += _loose(frames, D, r["loose_symprec"])
        if r["held_by_code"]["enabled"]:
            flags += _held_by_code(record, frames, sv)
    types, within = _types(dim), r["lattice"]["within"]
    precision = record["run"].get("position_precision")
    tol = advice(frames[-1].get("symmetry"), min_plateau=cfg["tolerance"]["min_plateau"],
                 precision=precision, inversion_by_content=_record_inversion_by_content(record["run"]))
    final = _state(frames[-1], types, within, dim)
    summary = {
        "verdict": {"direction": direction, "text": _text(direction, lv, sv, frames), "lattice": lv,
                    "structure": sv, "complete": complete},
        "initial": _state(frames[0], types, within, dim),
        "final": final,
        "drift": drift,
        "tolerance": tol,
        "lattice_note": _lattice_note(record["run"]),
        "cell_held": None if record["run"].get("fixed_cell") else _cell_held(
            record["run"], record["geometry"]["dimension"]),
        "supercell": _supercell(frames, final["type"]),
        "spglib_lattice": _spglib_lattice(frames, final["type"], within,
                                          r["structure"]["symprec"]),
        "atoms": None if record["run"].get("n_atoms") == 1 else   # one atom: always 0 Å
        _atoms_toward(frames, cfg["rules"]["symprec_dependent"]["high"],
                      bool(record["run"].get("fixed_cell"))),
    }
    return flags, summary


def _atoms_toward(frames, loosest, fixed_cell: bool = True) -> dict | None:
    """Where the atoms came from, for the most symmetric group spglib finds on the final structure
    at a symprec up to ``loosest`` (Å): the displacement (RMS and max, Å) of the first frame and of
    the final one to that group's symmetric configuration (the final structure's instance of it).
    Most symmetric: the most operations in the cell (pure translations included, so Fm-3m beats
    Pm-3m in a supercell and P4/mmm with a gained c/2 beats P4/mmm without), then the larger
    point group (a cell that fits only some of a group's rotations counts only those: p3m1 and
    cm11 both have 8 in an orthohexagonal slab cell), then the smaller symprec. When the first
    frame cannot be mapped onto that instance (its atoms moved too far for the group's
    operations to pair them), ``start`` holds ``error`` instead: never a lower
    group the atoms had all along. ``cell_moved``: the cell changed, so the numbers are of the
    atoms alone, each frame in its own cell. None for one frame, or when no group beyond P1 (p1)
    was measured."""
    if len(frames) < 2:
        return None
    table = ((frames[-1].get("symmetry") or {}).get("displacement") or {}).values()
    cand = [d for d in table if isinstance(d, dict) and "rms" in d and d.get("group", 1) != 1
            and d["symprec"] <= loosest * (1 + 1e-9)]
    if not cand:
        return None
    d = max(cand, key=lambda d: (d["operations"], d.get("point_operations", 0), -d["symprec"]))
    st = d.get("start") or {}
    start = {"rms": st["rms"], "max": st["max"]} if "rms" in st else \
        {"error": st.get("error") or "the first frame was not measured"}
    return {"group": d["group"], "symbol": d["symbol"], "operations": d["operations"],
            "symprec": d["symprec"], "start": start, "end": {"rms": d["rms"], "max": d["max"]},
            "cell_moved": not fixed_cell}


def gate(flags, codes, not_relaxation) -> tuple[list, list]:
    """``(rejected, not_gated)``: the flags ``codes`` name (:func:`select`) that a ``--reject-on``
    gate counts, and those it only says: a run whose steps are no relaxation (``not_relaxation``:
    MD, a single point, a band image) moved from a symmetric start by nature, no drift to reject."""
    hits = select(flags, list(codes))
    return ([], hits) if not_relaxation else (hits, [])


def _lattice_note(run: dict) -> str | None:
    """What a cell that is the same in every frame means for the lattice verdict, or None."""
    if not run.get("fixed_cell"):
        return None
    if run.get("n_frames", 2) < 2:
        return "one frame: nothing to compare it with, no drift can be seen"
    from .adapters.registry import cell_free          # each code's own rule, in its adapter
    why = cell_free(run.get("code_settings") or {})
    atoms = "symmetry drift is in the atoms (see the displacement to each group)"
    if why:
        return f"the cell did not move although {why} let it: the lattice did not drift; {atoms}"
    return f"fixed cell: the lattice cannot drift; {atoms}"


def _cell_held(run: dict, dimension: int) -> str | None:
    """What the code held of a cell it let move (pw.x's cell_dofree), in words, or None."""
    from .adapters.registry import cell_held          # each code's own rule, in its adapter
    return cell_held(run.get("code_settings") or {}, dimension)


def _spglib_lattice(frames, cell_type: str, within: float, symprec: float) -> dict | None:
    """When spglib, at the verdict's symprec, already calls the final lattice alone a more specific
    type than the lattice columns hold (its deformation to that type just above ``within``: the
    two tests differ near the threshold, docs/flags.md), that type and a sentence saying so."""
    spec = frames[-1].get("symmetry") or {}
    grid = [float(x) for x in spec.get("symprec") or []]
    at = [i for i, x in enumerate(grid) if abs(x - symprec) <= 1e-9 * symprec]
    dfm = frames[-1].get("deformation") or {}
    t = spec["lattice"][at[0]] if at and spec.get("lattice") else None
    if not t or t == cell_type or t not in dfm or t not in ORDER or \
            ORDER[t] <= ORDER.get(cell_type, -1):
        return None
    d = float(dfm[t])
    return {"type": t, "symprec": symprec, "deformation": d,
            "text": f"spglib at symprec {_g(symprec)} Å already calls the lattice alone {t} "
                    f"({NAMES[t]}), while its deformation to {t}, {_g(d)} Å, is above "
                    f"rules.lattice.within ({_g(within)} Å): the lattice columns hold "
                    f"{cell_type}; the two tests differ near that threshold"}


def _supercell(frames, cell_type: str) -> dict | None:
    """When the final structure's translation lattice (cell plus spglib's pure translations) is
    of another Bravais type than its cell (a conventional or other supercell: eight-atom diamond in
    its cubic cell, cP against cF), what it is and a sentence saying so; else None."""
    spec = frames[-1].get("symmetry") or {}
    prim = spec.get("primitive") or {}
    # the type judged as the cell's is (rules.lattice.within), not atoms-break-lattice's tighter one
    t, n = prim.get("lattice_type"), prim.get("multiplicity") or 1
    if not t or t == cell_type or n < 2:     # no pure translation: the cell is primitive
        return None
    return {"type": t, "cell_type": cell_type, "symprec": prim.get("symprec"), "multiplicity": n,
            "text": f"the cell is a supercell of {n} primitive cells: with spglib's pure "
                    f"translations (symprec {_g(prim.get('symprec'))} Å) the structure's lattice "
                    f"is {t} ({NAMES[t]}), the cell's {cell_type} ({NAMES[cell_type]}), each the "
                    f"most specific type held as the lattice columns judge it; the lattice verdict "
                    f"and columns describe the cell as given"}


def evaluate(record: dict, cfg: dict, *, complete: bool = True) -> list[dict]:
    """All flags of a record, in the order of the table above."""
    return judge(record, cfg, complete=complete)[0]


def summarize(record: dict, cfg: dict, *, complete: bool = True) -> dict:
    """The record's summary: ``verdict`` (direction at both levels), ``initial``/``final`` lattice
    state, ``drift`` (deformation to the type the verdict is about), ``tolerance`` advice."""
    return judge(record, cfg, complete=complete)[1]


# ----------------------------------------------------------------------------------------------
# tolerance advice
# ----------------------------------------------------------------------------------------------
def _plateaus(spec):
    """Stretches of one group verdict: [low, high, group, symbol, operations] (Å): the grid points
    and the two ends of every bisected bracket, in order of symprec, cut where the verdict changes
    (so a bracket end is a stretch end, and a group met only between two grid points, or a window
    where spglib flickered between grid points of one verdict, is a stretch of its own)."""
    ops = spec.get("operations") or [0] * len(spec["group"])
    pts = [(float(x), int(g), str(n), int(o))
           for x, g, n, o in zip(spec["symprec"], spec["group"], spec["group_symbol"], ops)]
    for b in spec.get("breakpoints", []):
        if b["kind"] == "group":
            pts.append((float(b["low"]), int(b["from"]), str(b.get("from_symbol", "")),
                        int(b.get("from_operations") or 0)))
            pts.append((float(b["high"]), int(b["to"]), str(b.get("to_symbol", "")),
                        int(b.get("to_operations") or 0)))
    pts.sort(key=lambda p: p[0])
    ranges, cur = [], None
    for x, g, n, o in pts:
        if cur is not None and (cur[2], cur[4]) == (g, o):
            cur[1] = x
            continue
        if cur is not None:
            ranges.append(cur)
        cur = [x, x, g, n, o]
    ranges.append(cur)
    return ranges


def alternating(values, min_len: int = 4) -> list[tuple[int, int]]:
    """[(i, j)]: the maximal runs ``values[i..j]`` of at least ``min_len`` items that alternate
    between two values (A B A B ...): where spglib flickers between two verdicts across symprec."""
    out, i, n = [], 0, len(values)
    while i < n - 1:
        if values[i + 1] == values[i]:
            i += 1
            continue
        j = i + 1
        while j + 1 < n and values[j + 1] == values[j - 1]:
            j += 1
        if j - i + 1 >= min_len:
            out.append((i, j))
            i = j
        else:
            i += 1
    return out


def shown_ranges(ranges, min_plateau: float = 10.0) -> list[list]:
    """:func:`_plateaus` stretches for display: a run of stretches alternating between two groups
    (spglib flickering) is one row ``[low, high, groups, symbols, operations, stretches]`` whose
    groups, symbols and operations are pairs; other rows carry ``stretches`` 1. A stretch at least
    ``min_plateau`` wide (factor in symprec) is a plateau, a row of its own, never folded into a
    flicker beside it."""
    keys = [(r[2], r[4]) if r[1] < r[0] * min_plateau else ("plateau", k)
            for k, r in enumerate(ranges)]
    runs = {i: j for i, j in alternating(keys)}
    out, i = [], 0
    while i < len(ranges):
        j = runs.get(i)
        if j is None:
            out.append(list(ranges[i]) + [1])
            i += 1
            continue
        a, b = ranges[i], ranges[i + 1]
        out.append([a[0], ranges[j][1], (a[2], b[2]), (a[3], b[3]), (a[4], b[4]), j - i + 1])
        i = j + 1
    return out


def shown_breakpoints(breakpoints, min_plateau: float = 10.0, grid=None) -> list[dict]:
    """The breakpoints for display, each kind in order of symprec: a chain of brackets alternating
    between two verdicts is one entry with ``changes`` (its count) from the first low to the last
    high; other entries carry ``changes`` 1. A verdict holding at least ``min_plateau`` (factor)
    between two brackets, or between a bracket and an end of ``grid`` (lowest, highest symprec),
    is a plateau that ends a chain, as in :func:`shown_ranges`."""
    lo, hi = grid if grid else (math.inf, 0.0)
    out = []
    for kind in dict.fromkeys(b["kind"] for b in breakpoints):
        bs = sorted((b for b in breakpoints if b["kind"] == kind), key=lambda b: b["low"])
        begins = [lo] + [b["high"] for b in bs]                # where each verdict begins ...
        stops = [b["low"] for b in bs] + [hi]                  # ... and where it stops
        values = [v if b < a * min_plateau else ("plateau", k)
                  for k, (v, a, b) in enumerate(zip([bs[0]["from"]] + [b["to"] for b in bs],
                                                    begins, stops))] if bs else []
        chained = all(bs[k]["from"] == bs[k - 1]["to"] for k in range(1, len(bs)))
        runs = {i: j for i, j in alternating(values)} if chained else {}
        k = 0
        while k < len(bs):
            j = runs.get(k)
            if j is None:
                out.append(dict(bs[k], changes=1))
                k += 1
                continue
            out.append(dict(bs[k], high=bs[j - 1]["high"], changes=j - k))
            k = j
    return out


def inversion_by_content(n_atoms: int, n_kinds: int) -> bool:
    """True when the cell's content alone gives it inversion (P-1, layer group p-1): one atom
    (inversion through it) or two atoms of one kind (through their midpoint)."""
    return n_atoms == 1 or (n_atoms == 2 and n_kinds == 1)


def _record_inversion_by_content(run: dict) -> bool:
    """:func:`inversion_by_content` of a record's run (its species, else its formula's elements)."""
    import re
    kinds = set(run.get("species") or ()) or set(re.findall(r"[A-Z][a-z]?",
                                                            str(run.get("formula") or "")))
    return inversion_by_content(run.get("n_atoms") or 0, len(kinds))


def advice(spec: dict | None, *, min_plateau: float = 10.0, precision: float | None = None,
           inversion_by_content: bool = False) -> dict:
    """Tolerance advice from one spectrum (Å): plateaus of one group, and the symprec to use.

    The chosen plateau is the widest (in log symprec; of plateaus as wide to within the squared
    bracket precision, the one with the most operations), except that a plateau of P1 (layer
    group p1) gives way to the widest plateau of a real group at least ``min_plateau`` wide (factor
    high/low):
    P1 over a wide range below such a group only says the atoms are not symmetric to within those
    small tolerances. The suggestion is the plateau's geometric centre.
    Grid points below twice the file's printed ``precision`` (Å; half a unit of the last printed
    digit of a position) are below what the file can resolve: they are marked and never suggested.
    One verdict over the whole grid gives no suggestion (any value in the grid gives that verdict).
    ``inversion_by_content``: the cell's content alone gives it inversion (one atom, or two of one
    species); a chosen plateau of group 2 (P-1, p-1) then says so in its reason.
    A starting point for the user's own check, not a guarantee.
    """
    empty = {"ranges": [], "recommended_symprec": None, "plateau": None, "kind": "none",
             "reason": "no spectrum", "at": {}, "resolution": None, "angle_check": None}
    if not spec:
        return empty
    ranges = _plateaus(spec)
    floor = 2.0 * precision if precision else None
    ops_at = spec.get("operations") or [0] * len(spec["group"])
    at = {f"{x:g}": [int(gg), str(nn), int(oo)]
          for x, gg, nn, oo in zip(spec["symprec"], spec["group"], spec["group_symbol"], ops_at)}
    out = dict(empty, ranges=ranges, at=at, resolution=floor, reason="")
    grid_lo, grid_hi = float(spec["symprec"][0]), float(spec["symprec"][-1])
    usable = []
    for lo, hi, grp, name, ops in ranges:
        a = max(lo, floor) if floor else lo
        if grp and hi > a:
            usable.append((a, hi, grp, name, ops, hi / a))
    note = (f"; symprec below {_g(floor)} Å is under the file's printed precision"
            if floor and floor > grid_lo else "")
    if len([x for x in ranges if x[2]]) == 1 and len(ranges) == 1 and usable:
        a, b, grp, name, ops, _ = usable[0]
        out.update(kind="one-verdict", plateau=_plateau_dict(usable[0], grid_lo, grid_hi),
                   reason=f"one verdict, {name} ({grp}), at every symprec of the grid "
                          f"({_g(grid_lo)} to {_g(grid_hi)} Å): any value in it gives that "
                          f"verdict{note}")
        return out
    if not usable:
        out.update(reason="no plateau of one group" + note)
        return out
    best = max(usable, key=lambda u: u[5])
    why = "the widest plateau of one verdict"
    # widths within the brackets' own uncertainty (each end known to a factor `precision`) are one
    # width: of those, the group with the most operations
    tie = float(spec.get("precision") or 1.05) ** 2
    even = [u for u in usable if u[5] * tie >= best[5] and u[4] > best[4]]
    if even:
        best = max(even, key=lambda u: (u[4], u[5]))
        why = (f"the plateau with the most operations among the widest (widths within a factor "
               f"{tie:.3g}, the brackets' precision squared, count as one)")
    # P1 (p1) is no verdict to settle on when a real group holds widely
    real = [u for u in usable if u[2] != 1 and u[5] >= min_plateau]
    if best[2] == 1 and real:
        trivial = best[3]
        best = max(real, key=lambda u: u[5])
        why = (f"the widest plateau of a group other than {trivial} spanning at least a factor "
               f"{min_plateau:g} ({trivial} at smaller symprec only says the atoms are not symmetric "
               f"to within those tolerances)")
    # P-1 (p-1) that the content alone gives stays the advice (another group's plateau may sit
    # where spglib already blurs the lattice: loose-symprec), and the widest other one is named
    other = [u for u in usable if u[2] not in (1, 2) and u[5] >= min_plateau] \
        if best[2] == 2 and inversion_by_content else []
    also = ""
    if other:
        o = max(other, key=lambda u: u[5])
        also = (f"; the widest plateau of another group is {o[3]} ({o[2]}) from {_g(o[0])} to "
                f"{_g(o[1])} Å (factor {o[5]:.3g}): check it against the lattice's own "
                f"deformation before using it (loose-symprec)")
    a, b, grp, name, ops, width = best
    rec = math.sqrt(a * b)
    plateau = _plateau_dict(best, grid_lo, grid_hi)
    out.update(kind="plateau", recommended_symprec=rec, plateau=plateau,
               reason=f"{_g(rec)} Å is the centre of the plateau of {group_name(name, grp, ops)} "
                      f"from {_g(a)} to {_g(b)} Å (factor {width:.3g}): {why}"
                      + ("; it starts at the bottom of the searched range, so its width and "
                         "centre depend on where the range starts" if plateau["open_low"] else "")
                      + ("; it reaches the top of the searched range, so its width and centre "
                         "depend on where the range ends" if plateau["open_high"] else "")
                      + (f"; {name} holds for any cell of one atom or of two atoms of one species "
                         f"(inversion through the atom or their midpoint), so it says nothing about "
                         f"this structure" if grp == 2 and inversion_by_content else "")
                      + also + note)
    check = spec.get("angle_check")
    if check and math.isclose(check["symprec"], rec, rel_tol=1e-12):
        out["angle_check"] = check
        if not check["same"]:
            out["reason"] += _angle_said(check, float(spec.get("angle_tolerance", -1.0)))
    return out


def _angle_said(check: dict, angle: float) -> str:
    """The advice's clause for a group that another common angle_tolerance changes
    (:func:`driftwatch.symmetry.angle_check`)."""
    words = lambda a: ("5 degrees (pymatgen's SpacegroupAnalyzer default)" if a == 5.0 else
                       f"{a:g} degrees" if a >= 0 else "-1 (spglib's default)")
    alt = check["angle_tolerance"]
    other = group_name(check["group_symbol"], check["group"], check["operations"])
    if "at_configured" in check:
        g, sym, ops = check["at_configured"]
        whose = ("the cell's 3D space group at this symprec (what spglib's get_symmetry_dataset "
                 "or pymatgen gives for the cell as the file has it)"
                 if check.get("cell") != "slab" else
                 "the 3D space group at this symprec of the slab spglib is given (ASE's zero "
                 "vacuum vector made 20 Å longer than the layer's thickness)")
        return (f"; {whose} is {group_name(sym, g, ops)} with angle_tolerance {words(angle)} but "
                f"{other} with {words(alt)}")
    return (f"; with angle_tolerance {words(alt)} spglib gives {other} at this symprec: this "
            f"advice is spglib's with angle_tolerance {words(angle)}")


def _plateau_dict(u, grid_lo, grid_hi):
    a, b, grp, name, ops, width = u
    return {"low": a, "high": b, "group": grp, "symbol": name, "operations": ops,
            "factor": width, "open_low": a <= grid_lo * (1 + 1e-9),
            "open_high": b >= grid_hi * (1 - 1e-9)}


SAFE_MARGIN = 2.0  # campaign symprec advice: verdict constant within this factor either side
NARROW = 1.5       # campaign symprec advice: a widest range narrower than this factor is said so


def advice_item(run_id: str, record: dict) -> dict:
    """The input :func:`campaign_advice` needs from one record."""
    grid = (record["frames"][-1].get("symmetry") or {}).get("symprec") or []
    return {"run": run_id, "summary": record["summary"], "grid": [min(grid), max(grid)] if grid else None,
            "not_relaxation": (record.get("run") or {}).get("not_relaxation")}


def _near_key(at: dict, s: float):
    if not at:
        return None
    keys = list(at)
    return min(keys, key=lambda k: abs(math.log(float(k) / s)))


def _safe_at(ranges, s, lo_end, hi_end, margin=None, floor=None) -> float | None:
    """Log margin (>= log margin) of ``s`` inside a one-verdict plateau, or None when not safe."""
    margin = SAFE_MARGIN if margin is None else margin
    if floor and s < floor:
        return None
    for lo, hi, group, *_ in ranges:
        if not group or not (lo <= s <= hi):
            continue
        a = math.inf if lo <= lo_end * (1 + 1e-9) else math.log(s / lo)
        b = math.inf if hi >= hi_end * (1 - 1e-9) else math.log(hi / s)
        m = min(a, b)
        return m if m >= math.log(margin) else None
    return None


def campaign_advice(items: list[dict], common: list[float], window=None) -> dict:
    """Campaign tolerance advice from the final-frame spectra of the analysed runs.

    ``items`` are ``{"run": id, "summary": record summary, "grid": [lowest, highest symprec] or None,
    "not_relaxation": what the steps are, or None}`` (:func:`advice_item` makes one from a record).
    Runs whose steps are no relaxation (molecular dynamics, band images, single points) are left
    out: their final structures are not relaxed ones (``left_out`` counts them).

    ``changes`` counts the runs whose spglib verdict (group number) on the final structure differs
    between consecutive ``common`` symprecs (Å). A run is *safe* at a symprec when that value sits
    inside the plateau its own advice recommends (:func:`advice`; any plateau when one verdict holds
    over its whole grid) with at least a factor ``SAFE_MARGIN`` to the next breakpoint on both sides
    (a plateau reaching the end of the run's grid counts as open there) and is not below what its
    file resolves: a stretch of P1 below the group a run settles on is not a verdict to recommend
    for the campaign, any more than for the run. The searched range is the runs' own symprec grid
    (``window`` to narrow it, Å). The recommended symprec is the geometric centre of the widest
    range where the most runs are safe. A starting point for the user's own check, not a guarantee.
    """
    common = sorted(float(s) for s in common)
    left_out = [r["run"] for r in items if r.get("not_relaxation")]
    per_run = []
    for r in items:
        tol, grid = r["summary"]["tolerance"], r["grid"]
        if r.get("not_relaxation"):
            continue
        if not tol.get("at") or not grid:
            continue
        # a verdict is the group and its operation count (R-3m with 12 or 24 in one cell differ)
        groups = [tuple(tol["at"][_near_key(tol["at"], s)][0:3:2]) for s in common]
        per_run.append((r["run"], groups, tol, grid[0], grid[1]))
    changes = []
    for i in range(len(common) - 1):
        ids = [rid for rid, g, *_ in per_run if g[i] != g[i + 1]]
        changes.append({"low": common[i], "high": common[i + 1], "runs": len(ids),
                        "run_ids": ids})
    varying = [rid for rid, g, *_ in per_run if len(set(g)) > 1]
    if window is None and per_run:
        window = (min(p[3] for p in per_run), max(p[4] for p in per_run))
    out = {"symprecs": common, "unit": "Å", "runs_considered": len(per_run),
           "changes": changes, "runs_changing": len(varying), "run_ids_changing": varying,
           "recommended_symprec": None, "safe_runs": 0,
           "window": list(window) if window else None, "left_out": len(left_out),
           "run_ids_left_out": left_out,
           "reason": "no run has a symmetry spectrum of its final frame"}
    if not per_run:
        return _left_out_said(out)

    def ranges_of(t):
        """The stretches a run may be judged in: the plateau its own advice recommends (a
        stretch of P1 below a real group, or of a lower group below the widest one, is what
        spglib calls the structure's smallest deviations, not its verdict), or every stretch
        when one verdict holds over the whole grid."""
        every = t.get("ranges", t.get("stable_ranges", []))
        p = t.get("plateau")
        if t.get("kind") != "plateau" or not p:
            return every
        return [r for r in every if r[2] == p["group"] and r[0] <= p["low"] * (1 + 1e-9)
                and r[1] >= p["high"] * (1 - 1e-9)][:1] or every

    def safe(s):
        return [rid for rid, _, t, lo, hi in per_run
                if _safe_at(ranges_of(t), s, lo, hi, floor=t.get("resolution")) is not None]

    grid = [window[0] * (window[1] / window[0]) ** (i / 96) for i in range(97)]
    counts = [len(safe(s)) for s in grid]
    top = max(counts)
    if top == 0:
        out["reason"] = (f"no symprec in {_g(window[0])}-{_g(window[1])} Å keeps one verdict within "
                         f"a factor {SAFE_MARGIN:g} for any run: check each run's spectrum")
        return _left_out_said(out)
    blocks, start = [], None                 # longest stretch of the top count, in log symprec
    for i, c in enumerate(counts + [-1]):
        if c == top and start is None:
            start = i
        elif c != top and start is not None:
            blocks.append((i - start, start, i - 1))
            start = None
    _, a, b = max(blocks)
    if a == 0 and b == len(grid) - 1:
        out.update(safe_runs=top, reason=f"{top} of {len(per_run)} runs keep one spglib verdict on "
                   f"the final structure at every symprec searched ({_g(window[0])}-"
                   f"{_g(window[1])} Å): any value in that range gives the same verdicts")
        return _left_out_said(out)
    s = math.sqrt(grid[a] * grid[b])
    ok = safe(s)
    unsafe = [rid for rid, *_ in per_run if rid not in ok]
    others = "" if not unsafe else (
        (f", above all the {len(unsafe)} runs that do not: " if len(unsafe) > 1 else
         ", above all the one run that does not: ") + ", ".join(unsafe[:3])
        + (f" and {len(unsafe) - 3} more (tolerance.unsafe_run_ids in campaign.json)"
           if len(unsafe) > 3 else ""))
    out.update(recommended_symprec=s, safe_runs=len(ok), unsafe_run_ids=unsafe,
               reason=f"{len(ok)} of {len(per_run)} runs keep the spglib verdict on the final "
                      f"structure that their own advice recommends within a factor "
                      f"{SAFE_MARGIN:g} either side of {_g(s)} Å; "
                      + (f"this is the centre of the widest range of such values ("
                         f"{_g(grid[a])}-{_g(grid[b])} Å" if a != b else
                         f"this is the one such value of the grid ({_g(s)} Å")
                      + f", searched {_g(window[0])}-{_g(window[1])} Å) at which the most runs "
                        f"keep their verdict with that margin"
                      + ("" if a else "; it starts at the bottom of the searched range, where "
                         "spglib sees the smallest deviations from symmetry")
                      + ("" if grid[b] >= NARROW * grid[a] else
                         "; " + (f"a range this narrow (a factor {grid[b] / grid[a]:.2g})"
                                 if a != b else "one point of the search grid")
                         + " is no common choice to rely on: judge the runs by their own advice")
                      + ". A starting point for your own check" + others)
    return _left_out_said(out)


def _left_out_said(advice: dict) -> dict:
    """The advice's reason, ending with how many runs were left out as no relaxation."""
    n = advice["left_out"]
    if n:
        advice["reason"] += (f". Left out: {n} run{'s' if n > 1 else ''} whose steps are no "
                             f"relaxation")
    return advice


def check_codes(codes, what: str = "--reject-on") -> list[str]:
    """Validate flag codes (or what they concern); old codes get a hint to their new name."""
    from .errors import ConfigError
    codes = [c.strip() for c in codes if c and c.strip()]
    bad = [c for c in codes if c not in FLAGS and c not in CONCERNS and c != "any"]
    if bad:
        hint = "; ".join(f"{c} is now {RENAMED[c]}" for c in bad if c in RENAMED)
        raise ConfigError(f"{what}: unknown flag code(s) {', '.join(bad)}"
                          + (f" ({hint})" if hint else "")
                          + f" (codes: {', '.join(FLAGS)}; or what they concern: "
                            f"{', '.join(CONCERNS)}; or 'any')")
    return codes


def select(flags: list[dict], codes: list[str]) -> list[dict]:
    """Flags matching ``codes``: flag codes, what flags concern (lattice, structure, tolerance,
    code), or ``any``."""
    return [f for f in flags if f["code"] in codes or "any" in codes
            or f.get("concerns", FLAGS.get(f["code"])) in codes]
