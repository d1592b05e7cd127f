"""Campaign numbers for the report, computed from run records only (no I/O, no matplotlib).

The campaign's tolerance picture: every run's final-frame tolerance spectrum (spglib's verdict on a log
grid of symprec, Å, with its breakpoints) is pooled. A symprec range is *stable* for the campaign where
no run changes its group verdict. The recommended campaign symprec itself comes from
:func:`driftwatch.rules.campaign_advice` (the audit's advice), so the report and the audit quote
the same value.
"""

from __future__ import annotations

import math
from collections import Counter

from ..rules import grid_index

__all__ = ["DEFAULT_COMMON", "final_spectrum", "verdict_at", "group_breakpoints",
           "flag_counts", "tolerance_table"]

DEFAULT_COMMON = (1e-5, 1e-3, 1e-2, 0.1)
"""Å, symprec values users commonly pick (used when a record's config has no report.common_symprecs)."""


def final_spectrum(record: dict) -> dict | None:
    """The tolerance spectrum of the last frame that ran spglib (normally the final frame)."""
    for f in reversed(record.get("frames") or []):
        if f.get("symmetry"):
            return f["symmetry"]
    return None


def verdict_at(spec: dict, symprec: float, key: str = "group"):
    """spglib's verdict at the grid value nearest to ``symprec``: (group number, symbol, operation
    count or None), or the lattice symbol. A verdict is the group and its operation count, as in
    the audit's advice (R-3m with 12 or 24 operations in one cell differ)."""
    i = grid_index(spec, symprec)
    if key == "group":
        ops = spec.get("operations") or []
        return int(spec["group"][i] or 0), str(spec["group_symbol"][i]), \
            (ops[i] if i < len(ops) else None)
    return spec["lattice"][i]


def group_breakpoints(spec: dict, kind: str = "group") -> list[tuple[float, float]]:
    """``[(low, high), ...]`` Å where the verdict changes; from the breakpoints, else from the grid
    (a record brackets the lattice alone nowhere: its changes are read off the grid)."""
    bps = [(float(b["low"]), float(b["high"])) for b in spec.get("breakpoints") or []
           if b.get("kind") == kind and b.get("low") and b.get("high")]
    if bps:
        return bps
    s, g = spec["symprec"], spec.get("group" if kind == "group" else "lattice") or []
    return [(float(s[i]), float(s[i + 1])) for i in range(len(g) - 1)
            if g[i] != g[i + 1] and g[i] is not None and g[i + 1] is not None]


def flag_counts(records: list[dict]) -> dict:
    """Runs carrying each flag code (a run with the code twice counts once), most frequent first."""
    c = Counter(code for r in records for code in {f["code"] for f in r.get("flags") or []})
    return dict(sorted(c.items(), key=lambda kv: (-kv[1], kv[0])))


def is_not_relaxation(record: dict) -> bool:
    """True when the record's steps are no relaxation (molecular dynamics, a band image, ...)."""
    return bool((record.get("run") or {}).get("not_relaxation"))


def tolerance_table(records: list[tuple[str, dict]], common=DEFAULT_COMMON) -> dict:
    """Pooled tolerance picture of runs ``[(name, record), ...]`` (final-frame spectra).

    Runs whose steps are no relaxation are left out (``left_out``), as in the audit's advice.
    Returns ``{"n_runs", "n_with_spectrum", "left_out", "common", "stable_ranges": [[low, high], ...] (Å, widest
    first: ranges inside the grids where no run changes its group verdict), "changes": [{"a", "b",
    "runs": [names]}, ...] for every pair of common symprecs, "verdicts": {name: {symprec: (group,
    symbol, operations)}}, "breakpoints": {name: [(low, high), ...]}}``.
    """
    relaxations = [(name, r) for name, r in records if not is_not_relaxation(r)]
    spectra = [(name, final_spectrum(r)) for name, r in relaxations]
    spectra = [(n, s) for n, s in spectra if s and s.get("symprec")]
    common = sorted(float(c) for c in common)
    out = {"n_runs": len(records), "n_with_spectrum": len(spectra), "common": common,
           "left_out": len(records) - len(relaxations),
           "stable_ranges": [], "changes": [], "verdicts": {}, "breakpoints": {}}
    if not spectra:
        return out
    for name, spec in spectra:
        out["verdicts"][name] = {c: verdict_at(spec, c) for c in common}
    for i, a in enumerate(common):
        for b in common[i + 1:]:
            runs = [n for n, v in out["verdicts"].items() if v[a][0::2] != v[b][0::2]]
            out["changes"].append({"a": a, "b": b, "runs": runs})
    lo = max(min(min(s["symprec"]) for _, s in spectra), 1e-12)
    hi = max(max(s["symprec"]) for _, s in spectra)
    out["breakpoints"] = {n: group_breakpoints(s) for n, s in spectra}
    merged = []
    for a, b in sorted(iv for bps in out["breakpoints"].values() for iv in bps):
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
    out["stable_ranges"] = sorted(gaps, key=lambda g: -math.log(g[1] / g[0]))
    return out
