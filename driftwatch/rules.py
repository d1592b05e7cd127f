"""Flags and the run summary, from a record's frames and the config's thresholds.

Every flag is a dict ``{"code", "level", "frame", "step", "type", "message", "value", "threshold"}``.
Lattice thresholds are compared with the Lipschitz *deformation* measure (Å), never with root-space
distances (see ``docs/flags.md``). A flag is a diagnostic that asks for a look, not a proof of a phase
or of (in)stability.

Codes (ours):

================== ======= ===========================================================================
code               level   meaning
================== ======= ===========================================================================
snapped            warning ends within ``rules.snapped.within`` of a type it started at least
                           ``start_away`` from (the most specific such type; ``frame`` = first frame
                           from which it stays within)
approaching        info    the deformation to a type fell by ``fraction`` of its initial value (from at
                           least ``start_away``) without reaching it
handedness-flip    warning a layer's 2D lattice ends with the opposite sign to its start, its mirror
                           deformation above ``min_chiral`` at the start and at the end (sign changes of
                           a lattice settling onto a mirror-symmetric one are not flagged)
tolerance-sensitive warning spglib's group for the final frame changes between ``low`` and ``high``
spglib-overcall    warning spglib's lattice-only type for the final frame at ``symprec`` is one the
                           lattice is more than ``far`` (deformation) from
atoms-break-lattice info   the final lattice is within ``within`` of a type, but the structure's group at
                           ``symprec`` has a lower lattice type: the atoms break the lattice symmetry
atoms-settled      info    the structure's group at ``rules.atoms_settled.symprec`` gained operations
                           from the first to the last frame while spglib's lattice-only type stayed the
                           same (symmetry drift carried by the atoms)
code-imposed       info    the DFT code's own symmetry handling was on and could have held or imposed
                           the final symmetry
================== ======= ===========================================================================
"""

from __future__ import annotations

import math

import numpy as np

from . import lattice2d, lattice3d

__all__ = ["evaluate", "summarize", "FLAGS", "bravais_of_group", "ORDER", "advice", "gate",
           "campaign_advice", "advice_item", "SAFE_MARGIN", "grid_index"]

FLAGS = {
    "snapped": "warning", "approaching": "info", "handedness-flip": "warning",
    "tolerance-sensitive": "warning", "spglib-overcall": "warning", "atoms-break-lattice": "info",
    "atoms-settled": "info", "code-imposed": "info",
}

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


def _types(dim):
    return lattice2d.TYPES if dim == 2 else lattice3d.TYPES


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


def _series(frames, key, types):
    return {t: np.array([f[key][t] for f in frames], dtype=float) for t in types}


def _flag(code, frame, frames, message, type_=None, value=None, threshold=None):
    return {"code": code, "level": FLAGS[code], "frame": int(frame), "step": int(frames[frame]["step"]),
            "type": type_, "message": message, "value": value, "threshold": threshold}


def grid_index(spec: dict, symprec: float) -> int:
    """Index of the grid value of a spectrum nearest to ``symprec`` (grids include rule values)."""
    return int(np.argmin(np.abs(np.log(np.asarray(spec["symprec"], float) / symprec))))


def _at(spec: dict, symprec: float, key: str):
    """Verdict of a spectrum at the grid value nearest to ``symprec``, with the group symbol."""
    i = grid_index(spec, symprec)
    return spec[key][i], spec["group_symbol"][i]


def _most_specific(types, values, within):
    ok = [t for t in types if values[t] <= within]
    return max(ok, key=lambda t: (ORDER[t], -values[t])) if ok else None


def _snapped(frames, D, types, r):
    cand = [t for t in types if D[t][0] >= r["start_away"] and D[t][-1] <= r["within"]]
    if not cand:
        return []
    t = max(cand, key=lambda t: (ORDER[t], -D[t][-1]))
    above = np.nonzero(D[t] > r["within"])[0]
    k = int(above[-1] + 1) if above.size else 0
    msg = (f"ends at the {NAMES[t]} type {t}: deformation {D[t][0]:.3g} Å at the start, "
           f"{D[t][-1]:.2g} Å at the end (within {r['within']:.2g} Å from step {frames[k]['step']})")
    return [_flag("snapped", k, frames, msg, t, float(D[t][-1]), r["within"])]


def _approaching(frames, D, types, r, snapped_within):
    cand = []
    for t in types:
        d0, d1 = D[t][0], D[t][-1]
        if d0 >= r["start_away"] and d1 > snapped_within and d1 <= (1 - r["fraction"]) * d0:
            cand.append(t)
    if not cand:
        return []
    t = min(cand, key=lambda t: (D[t][-1], -ORDER[t]))
    k = int(np.nonzero(D[t] <= (1 - r["fraction"]) * D[t][0])[0][0])
    msg = (f"moved toward the {NAMES[t]} type {t}: deformation {D[t][0]:.3g} -> {D[t][-1]:.3g} Å "
           f"({100 * (1 - D[t][-1] / D[t][0]):.0f} % of the way; not reached)")
    return [_flag("approaching", k, frames, msg, t, float(D[t][-1]), r["fraction"])]


def _handedness(frames, r):
    """The run ends with the opposite handedness to its start, clearly chiral at both ends."""
    sign = np.array([f["sign"] for f in frames])
    chiral = np.array([f["deformation"]["mirror"] for f in frames])
    sig = np.nonzero((chiral > r["min_chiral"]) & (sign != 0))[0]
    if sig.size == 0 or sig[-1] != len(frames) - 1 or sign[sig[0]] == sign[-1]:
        return []
    first, last = int(sign[sig[0]]), int(sign[-1])
    k = int(np.nonzero(sign != last)[0][-1] + 1)
    msg = (f"the layer's 2D lattice ends with the opposite handedness ({'+' if first > 0 else '-'} at "
           f"the start, {'+' if last > 0 else '-'} from step {frames[k]['step']}; mirror deformation "
           f"{chiral[sig[0]]:.3g} Å and {chiral[-1]:.3g} Å): it passed through a mirror-symmetric "
           f"lattice on the way")
    return [_flag("handedness-flip", k, frames, msg, None, float(chiral[-1]), r["min_chiral"])]


def _tolerance_sensitive(frames, r):
    k = len(frames) - 1
    spec = frames[k].get("symmetry")
    if not spec:
        return []
    s = np.asarray(spec["symprec"], float)
    inside = (s >= r["low"] * (1 - 1e-9)) & (s <= r["high"] * (1 + 1e-9))
    seen = []
    for g, sym in zip(np.asarray(spec["group"])[inside], np.asarray(spec["group_symbol"])[inside]):
        if g and (g, sym) not in seen:
            seen.append((int(g), str(sym)))
    if len(seen) < 2:
        return []
    text = " -> ".join(f"{sym} ({g})" for g, sym in seen)
    msg = (f"spglib's verdict on the final structure changes between symprec {r['low']:.3g} and "
           f"{r['high']:.3g} Å: {text}")
    return [_flag("tolerance-sensitive", k, frames, msg, None, len(seen), [r["low"], r["high"]])]


def _overcall(frames, D, r):
    k = len(frames) - 1  # the verdict a user would take from the final structure
    spec = frames[k].get("symmetry")
    if spec:
        lat, _ = _at(spec, r["symprec"], "lattice")
        t = _lattice_type(lat)
        if t in D and D[t][k] > r["far"]:
            msg = (f"spglib at symprec {r['symprec']:.3g} Å calls the lattice {t} ({NAMES[t]}) while "
                   f"its deformation to {t} is {D[t][k]:.3g} Å (> {r['far']:.3g} Å)")
            return [_flag("spglib-overcall", k, frames, msg, t, float(D[t][k]), r["far"])]
    return []


def _breaks_lattice(frames, D, types, dim, r):
    k = len(frames) - 1
    spec = frames[k].get("symmetry")
    if not spec:
        return []
    t = _most_specific(types, {x: D[x][k] for x in types}, r["within"])
    group, symbol = _at(spec, r["symprec"], "group")
    b = bravais_of_group(int(group), str(symbol), dim)
    if t is None or b is None or ORDER[b] >= ORDER[t]:
        return []
    msg = (f"the lattice is metrically {t} ({NAMES[t]}, deformation {D[t][k]:.2g} Å) but the "
           f"structure's group at symprec {r['symprec']:.3g} Å is {symbol} ({group}), lattice type {b}: "
           f"the atoms break the lattice symmetry")
    return [_flag("atoms-break-lattice", k, frames, msg, t, float(D[t][k]), r["within"])]


def _settled(frames, r):
    analysed = [k for k, f in enumerate(frames) if f.get("symmetry")]
    if len(analysed) < 2:
        return []
    k0, k1 = analysed[0], analysed[-1]
    ops0, sym0 = _at(frames[k0]["symmetry"], r["symprec"], "operations")
    ops1, sym1 = _at(frames[k1]["symmetry"], r["symprec"], "operations")
    lat0, _ = _at(frames[k0]["symmetry"], r["symprec"], "lattice")
    lat1, _ = _at(frames[k1]["symmetry"], r["symprec"], "lattice")
    if not (ops0 and ops1 and ops1 > ops0) or lat0 != lat1:
        return []  # a gain that comes with a new lattice type is the lattice's (see 'snapped')
    msg = (f"the structure's symmetry at symprec {r['symprec']:.3g} Å rose from {sym0} ({ops0} "
           f"operations) to {sym1} ({ops1} operations): the atoms moved onto more symmetric sites")
    return [_flag("atoms-settled", k1, frames, msg, None, int(ops1), r["symprec"])]


def _code_imposed(record, frames):
    cs = record["run"].get("code_settings") or {}
    code = cs.get("code")
    k = len(frames) - 1
    # pw.x counts point operations; a one-atom slab always has 4 (2/m with the layer mirror) and any
    # bulk lattice 2 (inversion), which constrain nothing: only more than that can hold a symmetry.
    floor = 4 if record["geometry"]["dimension"] == 2 else 2
    if code == "espresso" and not cs.get("nosym") and (cs.get("nsym") or 0) > floor:
        msg = (f"pw.x ran with symmetry on and kept {cs['nsym']} symmetry operations of the starting "
               f"structure (nosym=.false.): the final symmetry may be held by the code, not found by "
               f"the relaxation; rerun with nosym=.true. to test it")
        return [_flag("code-imposed", k, frames, msg, None, cs["nsym"], None)]
    if code == "vasp" and cs.get("ISYM", 2) not in (0, -1):
        spec = frames[k].get("symmetry")
        ops = max(spec["operations"]) if spec else 0
        if ops > 1:
            msg = (f"VASP ran with ISYM={cs.get('ISYM', 'default')} (symmetry on"
                   f"{', SYMPREC=' + format(cs['SYMPREC'], 'g') if 'SYMPREC' in cs else ''}): "
                   f"the final symmetry may be held by the code; rerun with ISYM=0 to test it")
            return [_flag("code-imposed", k, frames, msg, None, cs.get("ISYM", 2), None)]
    return []


def evaluate(record: dict, cfg: dict) -> list[dict]:
    """All flags of a record, in the order of the table above."""
    frames, dim = record["frames"], record["geometry"]["dimension"]
    types = _types(dim)
    D = _series(frames, "deformation", types)
    r = cfg["rules"]
    flags = _snapped(frames, D, types, r["snapped"])
    flags += _approaching(frames, D, types, r["approaching"], r["snapped"]["within"])
    if dim == 2:
        flags += _handedness(frames, r["handedness_flip"])
    flags += _tolerance_sensitive(frames, r["tolerance_sensitive"])
    flags += _overcall(frames, D, r["spglib_overcall"])
    flags += _breaks_lattice(frames, D, types, dim, r["atoms_break_lattice"])
    flags += _settled(frames, r["atoms_settled"])
    if r["code_imposed"]["enabled"]:
        flags += _code_imposed(record, frames)
    return flags


def _state(frame, types, within, dim):
    dfm, dst = frame["deformation"], frame["distance"]
    t = _most_specific(types, dfm, within) or _LOWEST[dim]
    away = [x for x in types if dfm[x] > within]
    near = min(away, key=lambda x: dfm[x]) if away else None
    return {"type": t, "nearest": near,
            "distance": None if near is None else float(dst[near]),
            "deformation": None if near is None else float(dfm[near])}


def advice(spec: dict | None, window=(1e-4, 0.2)) -> dict:
    """Tolerance advice from one spectrum: plateaus of constant group and a recommended symprec (Å).

    The recommendation is the geometric centre of the widest plateau (in log symprec) of one group,
    clipped to ``window``; it is a starting point for the user's own check, not a guarantee.
    """
    if not spec:
        return {"stable_ranges": [], "recommended_symprec": None, "reason": "no spectrum", "at": {}}
    s = [float(x) for x in spec["symprec"]]
    g = [int(x) for x in spec["group"]]
    sym = list(spec["group_symbol"])
    bps = sorted((b for b in spec.get("breakpoints", []) if b["kind"] == "group"), key=lambda b: b["low"])
    ranges, lo, i0 = [], s[0], 0
    for i in range(1, len(s) + 1):
        if i == len(s) or g[i] != g[i0]:
            hi = s[-1] if i == len(s) else next((b["low"] for b in bps if s[i - 1] <= b["low"] <= s[i]),
                                                s[i - 1])
            ranges.append([lo, hi, g[i0], sym[i0]])
            if i < len(s):
                lo = next((b["high"] for b in bps if s[i - 1] <= b["high"] <= s[i]), s[i])
                i0 = i
    best, width = None, -1.0
    for lo, hi, grp, name in ranges:
        a, b = max(lo, window[0]), min(hi, window[1])
        if grp and b > a and math.log(b / a) > width:
            best, width = (a, b, grp, name), math.log(b / a)
    at = {f"{x:g}": [int(gg), str(nn)] for x, gg, nn in zip(s, g, sym)}
    if best is None:
        return {"stable_ranges": ranges, "recommended_symprec": None, "at": at,
                "reason": "no plateau of one group inside the window"}
    rec = math.sqrt(best[0] * best[1])
    return {"stable_ranges": ranges, "recommended_symprec": rec, "at": at,
            "reason": f"centre of the widest plateau of one verdict, {best[3]} ({best[2]}), from "
                      f"{best[0]:.2g} to {best[1]:.2g} Å (factor {math.exp(width):.0f})"}


def summarize(record: dict, cfg: dict) -> dict:
    """``initial``/``final`` (type, nearest other type, its distance and deformation), drift, verdict."""
    frames, dim = record["frames"], record["geometry"]["dimension"]
    types, within = _types(dim), cfg["rules"]["snapped"]["within"]
    ini, fin = _state(frames[0], types, within, dim), _state(frames[-1], types, within, dim)
    codes = {f["code"] for f in record["flags"]}
    snap = next((f for f in record["flags"] if f["code"] == "snapped"), None)
    appr = next((f for f in record["flags"] if f["code"] == "approaching"), None)
    target = snap["type"] if snap else appr["type"] if appr else ini["nearest"]
    drift = None
    if target:
        d0, d1 = frames[0]["deformation"][target], frames[-1]["deformation"][target]
        drift = {"type": target, "initial": d0, "final": d1, "change": d1 - d0,
                 "fraction": None if d0 == 0 else (d0 - d1) / d0}
    if snap:
        verdict = "snapped"
    elif "handedness-flip" in codes:
        verdict = "handedness-flip"
    elif appr:
        verdict = "approaching"
    elif record["run"]["fixed_cell"]:
        verdict = "fixed-cell"
    else:
        verdict = "steady"
    tol = advice(frames[-1].get("symmetry"))
    tol["group_at_1e-3"] = tol["at"].get("0.001", [None, None])[1] if tol["at"] else None
    return {"initial": ini, "final": fin, "drift": drift, "verdict": verdict, "tolerance": tol,
            "lattice_note": ("fixed cell: the lattice cannot drift; symmetry drift is in the atoms "
                             "(see the displacement to each group)") if record["run"]["fixed_cell"]
            else None}


SAFE_MARGIN = 2.0  # campaign symprec advice: verdict constant within this factor either side


def advice_item(run_id: str, record: dict) -> dict:
    """The input :func:`campaign_advice` needs from one record."""
    grid = (record["frames"][-1].get("symmetry") or {}).get("symprec") or []
    return {"run": run_id, "summary": record["summary"], "grid": [min(grid), max(grid)] if grid else None}


def _near_key(at: dict, s: float):
    if not at:
        return None
    keys = list(at)
    return min(keys, key=lambda k: abs(math.log(float(k) / s)))


def _safe_at(spec_ranges, s, lo_end, hi_end, margin=None) -> float | None:
    """Log margin (>= log margin) of ``s`` inside a one-verdict plateau, or None when not safe."""
    margin = SAFE_MARGIN if margin is None else margin
    for lo, hi, group, _ in spec_ranges:
        if not group or not (lo <= s <= hi):
            continue
        a = math.inf if lo <= lo_end * (1 + 1e-9) else math.log(s / lo)
        b = math.inf if hi >= hi_end * (1 - 1e-9) else math.log(hi / s)
        m = min(a, b)
        return m if m >= math.log(margin) else None
    return None


def campaign_advice(items: list[dict], common: list[float], window=(1e-4, 0.2)) -> dict:
    """Campaign tolerance advice from the final-frame spectra of the analysed runs.

    ``items`` are ``{"run": id, "summary": record summary, "grid": [lowest, highest symprec] or None}``
    (:func:`advice_item` makes one from a record).

    ``changes`` counts the runs whose spglib verdict (group number) on the final structure differs
    between consecutive ``common`` symprecs (Å). A run is *safe* at a symprec when that value sits
    inside a plateau of one verdict with at least a factor ``SAFE_MARGIN`` to the next breakpoint on
    both sides (a plateau reaching the end of the run's grid counts as open there). The recommended
    symprec is the geometric centre of the widest range inside ``window`` (Å) where the most runs are
    safe. It is a starting point for the user's own check, not a guarantee.
    """
    common = sorted(float(s) for s in common)
    per_run = []
    for r in items:
        tol, grid = r["summary"]["tolerance"], r["grid"]
        if not tol.get("at") or not grid:
            continue
        groups = [tol["at"][_near_key(tol["at"], s)][0] for s in common]
        per_run.append((r["run"], groups, tol, grid[0], grid[1]))
    changes = []
    for i in range(len(common) - 1):
        ids = [rid for rid, g, *_ in per_run if g[i] != g[i + 1]]
        changes.append({"low": common[i], "high": common[i + 1], "runs": len(ids),
                        "run_ids": ids[:50]})
    varying = [rid for rid, g, *_ in per_run if len(set(g)) > 1]
    out = {"symprecs": common, "unit": "Å", "runs_considered": len(per_run),
           "changes": changes, "runs_changing": len(varying), "run_ids_changing": varying[:50],
           "recommended_symprec": None, "safe_runs": 0, "window": list(window),
           "reason": "no run has a symmetry spectrum of its final frame"}
    if not per_run:
        return out

    def safe(s):
        return [rid for rid, _, t, lo, hi in per_run
                if _safe_at(t.get("stable_ranges", []), s, lo, hi) is not None]

    grid = [window[0] * (window[1] / window[0]) ** (i / 96) for i in range(97)]
    counts = [len(safe(s)) for s in grid]
    top = max(counts)
    if top == 0:
        out["reason"] = (f"no symprec in {window[0]:g}-{window[1]:g} Å keeps one verdict within a "
                         f"factor {SAFE_MARGIN:g} for any run: check each run's spectrum")
        return out
    blocks, start = [], None                 # longest stretch of the top count, in log symprec
    for i, c in enumerate(counts + [-1]):
        if c == top and start is None:
            start = i
        elif c != top and start is not None:
            blocks.append((i - start, start, i - 1))
            start = None
    _, a, b = max(blocks)
    s = math.sqrt(grid[a] * grid[b])
    ok = safe(s)
    out.update(recommended_symprec=s, safe_runs=len(ok),
               unsafe_run_ids=[rid for rid, *_ in per_run if rid not in ok][:50],
               reason=f"{len(ok)} of {len(per_run)} runs keep one spglib verdict on the final "
                      f"structure within a factor {SAFE_MARGIN:g} either side of {s:.2g} Å; this is "
                      f"the centre of the widest symprec range ({grid[a]:.2g}-{grid[b]:.2g} Å) where "
                      f"the most runs are safe. A starting point for your own check"
                      + ("" if len(ok) == len(per_run) else ", above all of the other runs"))
    return out


def gate(flags: list[dict], fail_on: list[str]) -> list[dict]:
    """Flags that match ``fail_on`` entries (flag codes, or the levels 'info'/'warning')."""
    return [f for f in flags if f["code"] in fail_on or f["level"] in fail_on]
