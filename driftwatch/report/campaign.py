"""Campaign numbers for the report, computed from run records only (no I/O, no matplotlib).

Tolerance advice for a campaign: every run's final-frame tolerance spectrum (spglib's verdict on a log
grid of symprec, Å, with its breakpoints) is pooled. A symprec is *stable* for the campaign where no run
changes its group verdict; the recommended value is the geometric centre of the widest such range inside
the advice window, or, if every value is near some run's breakpoint, the value with the fewest runs
changing verdict within a factor :data:`NEAR` of it. This is a starting point for the user's own check.
"""

from __future__ import annotations

import math
from collections import Counter

import numpy as np

__all__ = ["DEFAULT_COMMON", "WINDOW", "NEAR", "final_spectrum", "verdict_at", "group_breakpoints",
           "flag_counts", "tolerance_advice"]

DEFAULT_COMMON = (1e-5, 1e-3, 1e-2, 0.1)
"""Å, symprec values users commonly pick (used when a record's config has no report.common_symprecs)."""
WINDOW = (1e-4, 0.2)
"""Å, the range a recommendation is taken from (as in ``rules.advice``)."""
NEAR = 3.0
"""Factor: a breakpoint within this factor of a symprec counts as a verdict change near it."""


def final_spectrum(record: dict) -> dict | None:
    """The tolerance spectrum of the last frame that ran spglib (normally the final frame)."""
    for f in reversed(record.get("frames") or []):
        if f.get("symmetry"):
            return f["symmetry"]
    return None


def verdict_at(spec: dict, symprec: float, key: str = "group"):
    """spglib's verdict (group number, or lattice symbol) at the grid value nearest to ``symprec``."""
    s = np.asarray(spec["symprec"], float)
    i = int(np.argmin(np.abs(np.log(s / symprec))))
    if key == "group":
        return int(spec["group"][i] or 0), str(spec["group_symbol"][i])
    return spec["lattice"][i]


def group_breakpoints(spec: dict, kind: str = "group") -> list[tuple[float, float]]:
    """``[(low, high), ...]`` Å where the verdict changes; from the breakpoints, else from the grid."""
    bps = [(float(b["low"]), float(b["high"])) for b in spec.get("breakpoints") or []
           if b.get("kind") == kind and b.get("low") and b.get("high")]
    if bps or kind != "group":
        return bps
    s, g = spec["symprec"], spec["group"]
    return [(float(s[i]), float(s[i + 1])) for i in range(len(s) - 1) if g[i] != g[i + 1]]


def flag_counts(records: list[dict]) -> dict:
    """Runs carrying each flag code (a run with the code twice counts once), most frequent first."""
    c = Counter(code for r in records for code in {f["code"] for f in r.get("flags") or []})
    return dict(sorted(c.items(), key=lambda kv: (-kv[1], kv[0])))


def tolerance_advice(records: list[dict], common=DEFAULT_COMMON, window=WINDOW) -> dict:
    """Pooled tolerance advice for runs (final-frame spectra).

    Returns ``{"n_runs", "n_with_spectrum", "stable_ranges": [[low, high], ...] (widest first, Å),
    "recommended_symprec", "reason", "runs_near_recommended", "changes": [{"a", "b", "runs":
    [names]}...], "verdicts": {name: {symprec: "symbol (n)"}}}``; ``records`` is ``[(name, record)]``.
    """
    spectra = [(name, final_spectrum(r)) for name, r in records]
    spectra = [(n, s) for n, s in spectra if s and s.get("symprec")]
    common = sorted(float(c) for c in common)
    out = {"n_runs": len(records), "n_with_spectrum": len(spectra), "common": common,
           "stable_ranges": [], "recommended_symprec": None, "runs_near_recommended": None,
           "changes": [], "verdicts": {}}
    if not spectra:
        out["reason"] = "no run has a tolerance spectrum"
        return out
    for name, spec in spectra:
        out["verdicts"][name] = {c: verdict_at(spec, c) for c in common}
    for i, a in enumerate(common):
        for b in common[i + 1:]:
            runs = [n for n in out["verdicts"] if out["verdicts"][n][a][0] != out["verdicts"][n][b][0]]
            out["changes"].append({"a": a, "b": b, "runs": runs})
    lo = max(min(min(s["symprec"]) for _, s in spectra), 1e-12)
    hi = max(max(s["symprec"]) for _, s in spectra)
    per_run = {n: group_breakpoints(s) for n, s in spectra}
    intervals = sorted(iv for bps in per_run.values() for iv in bps)
    # stable ranges: the gaps between merged breakpoint brackets, inside the grid span
    merged = []
    for a, b in intervals:
        if merged and a <= merged[-1][1]:
            merged[-1][1] = max(merged[-1][1], b)
        else:
            merged.append([a, b])
    gaps, cur = [], lo
    for a, b in merged:
        if a > cur:
            gaps.append([cur, a])
        cur = max(cur, b)
    if cur < hi:
        gaps.append([cur, hi])
    gaps.sort(key=lambda g: -math.log(g[1] / g[0]))
    out["stable_ranges"] = gaps
    best, width = None, 0.0
    for a, b in gaps:
        a2, b2 = max(a, window[0]), min(b, window[1])
        if b2 > a2 and math.log(b2 / a2) > width:
            best, width = (a2, b2), math.log(b2 / a2)
    if best is not None:
        rec = math.sqrt(best[0] * best[1])
        out["recommended_symprec"] = rec
        out["runs_near_recommended"] = _near(per_run, rec)
        out["reason"] = (f"centre (in log symprec) of the widest range inside {window[0]:g}-"
                         f"{window[1]:g} Å where no run changes its verdict: {best[0]:.2g} to "
                         f"{best[1]:.2g} Å (factor {math.exp(width):.0f})")
        return out
    cand = np.geomspace(window[0], window[1], 241)
    scores = [(len(_near(per_run, c)), -_clearance(intervals, c), c) for c in cand]
    n, _, rec = min(scores)
    out["recommended_symprec"] = float(rec)
    out["runs_near_recommended"] = _near(per_run, rec)
    out["reason"] = (f"no symprec in {window[0]:g}-{window[1]:g} Å is clear of every run's breakpoints; "
                     f"this value has the fewest runs ({n} of {len(spectra)}) changing verdict within a "
                     f"factor {NEAR:g} of it")
    return out


def _near(per_run, s):
    return [n for n, bps in per_run.items()
            if any(a / NEAR <= s <= b * NEAR for a, b in bps)]


def _clearance(intervals, s):
    """Log distance (natural) from ``s`` to the nearest breakpoint bracket."""
    if not intervals:
        return math.inf
    return min(0.0 if a <= s <= b else min(abs(math.log(s / a)), abs(math.log(s / b)))
               for a, b in intervals)
